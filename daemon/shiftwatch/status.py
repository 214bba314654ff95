"""The status of every stream, for the page on the metrics listener, its JSON and ``shiftwatch status``.

One function builds what is shown of a stream, :func:`stream_status`, into
one dataclass, :class:`StreamStatus`; the page, the JSON and the terminal
table all read that.  A part of shiftwatch with more to say about a stream
(an acknowledgement, a hold or planned window, a stream gone stale) adds a
*provider* to the :class:`StatusBoard` (:meth:`StatusBoard.add_provider`): a
function of the stream name that returns the fields it knows, which are
merged in with :func:`dataclasses.replace`.  Fields nobody provides stay
``None`` and are shown as absent, never as an error.

Threads.  The daemon's main thread owns the engines.  It tells the board
about each alert record (:meth:`StatusBoard.record`), ticks the sample
rates (:meth:`StatusBoard.tick`, every few seconds) and, after each round,
copies the held samples of the few streams whose page is open
(:meth:`StatusBoard.serve_windows`: nothing to do when no page is open).
Everything else (the per-stream figures) comes from the snapshots the
metrics already hold (:meth:`shiftwatch.metrics.Metrics.streams`).  The JSON
is built in the metrics endpoint's render thread, which rests as long as
each render took, so however many pages are open the main thread is not
held up by them.
"""

from __future__ import annotations

import dataclasses
import json
import math
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from importlib import resources
from typing import TYPE_CHECKING, Any
from urllib.parse import parse_qs

from shiftwatch.core.engine import EVENT_OPEN
from shiftwatch.core.records import ADVISORY, AlertRecord
from shiftwatch.core.timefmt import format_time
from shiftwatch.display import clock, fault_text, human_number, sigmas_text, zone_label

if TYPE_CHECKING:
    from shiftwatch.metrics import StreamStats

__all__ = ["PAGE_PATHS", "RECENT_S", "EventSummary", "StatusBoard", "StreamStatus", "format_table",
           "stream_status"]

#: An event whose last record is younger than this (seconds, by the daemon's clock) is "recent":
#: its stream is listed before the quiet ones.
RECENT_S = 3600.0
#: Alert records kept per stream for the page (the newest; older events scroll out).
RECORDS_KEPT = 16
#: A stream's page keeps its held samples copied after each round for this long after its
#: last request (the page asks every few seconds while open).
WATCH_S = 30.0
#: Samples kept with an event (what the engine held when it was detected), so that its page
#: can show the level before a step after the engine has let those samples go; and the
#: events per stream that keep them.
CONTEXT_SAMPLES = 600
CONTEXT_EVENTS = 2
#: Records saved with each state snapshot (the newest, at most two per stream), so the page
#: shows each stream's last event again after a restart.
SAVED_RECORDS = 2000
#: Streams whose held samples are copied at once, at most (pages open on different streams).
WATCH_MAX = 16
#: Seconds a request for a stream's page waits for the main thread's first copy of its samples
#: (the endpoint's loop waits, not its render thread).
WINDOW_WAIT_S = 1.5
#: Rows the overview returns unless asked for fewer (the page asks for this many).
DEFAULT_LIMIT = 500
#: Seconds between two checkpoints of the sample counts (the rate is over the last two).
RATE_EVERY_S = 15.0

#: Where the pages and their JSON are served on the metrics listener.
PAGE_PATHS = ("/status", "/status.json", "/status/stream", "/status/stream.json")


@dataclass(frozen=True, slots=True)
class EventSummary:
    """The newest event of a stream, as its newest record says.

    ``phase`` is that record's phase (``detected`` while the event is open);
    times are epoch seconds; ``recorded_at`` is the daemon's clock when the
    record was made (what "recent" is measured by).
    """

    id: str
    phase: str
    detected_at: float
    shift_at: float
    shift_at_low: float
    shift_at_high: float
    as_of: float
    level_before: float
    level_after: float
    delta: float
    delta_sigma: float
    direction: str
    recorded_at: float
    #: the record's sensor-fault fields (core/sensorcheck.py), None when it names none
    repeated_value: float | None = None
    spread_ratio: float | None = None

    @classmethod
    def of(cls, rec: AlertRecord, recorded_at: float) -> EventSummary:
        return cls(rec.id, rec.phase, rec.detected_at, rec.shift_at, rec.shift_at_low,
                   rec.shift_at_high, rec.as_of, rec.level_before, rec.level_after, rec.delta,
                   rec.delta_sigma, rec.direction, recorded_at, rec.repeated_value, rec.spread_ratio)


@dataclass(frozen=True, slots=True)
class StreamStatus:
    """Everything the status page, its JSON and ``shiftwatch status`` show of one stream.

    Built by :func:`stream_status` only.  The last four fields belong to other
    parts of shiftwatch and stay ``None`` until a provider fills them (see the
    module docstring): ``ack`` (an acknowledgement of the last event:
    ``{"acked": bool, "by": str, "note": str, "at": epoch s}``), ``hold`` (a
    hold or a planned window: ``{"kind": str, "until": epoch s, "note": str}``),
    ``stale`` (True while the source of the stream has announced its death and
    no birth followed) and ``notes`` (short lines any part wants shown).  ``repeating`` comes
    with the metrics snapshot: the run of one repeated reading the engine flags (a stuck
    sensor is possible; ``{"value", "readings", "since", "flagged_at"}``, epoch s), or None.
    """

    stream: str
    label: str | None
    unit: str | None
    state: str
    level: float | None
    sigma: float | None
    samples_total: int
    samples_per_minute: float | None
    last_event: EventSummary | None
    ack: Mapping[str, Any] | None = None
    hold: Mapping[str, Any] | None = None
    stale: bool | None = None
    notes: tuple[str, ...] = ()
    repeating: Mapping[str, Any] | None = None

    @property
    def event_open(self) -> bool:
        return self.state == EVENT_OPEN

    def recent(self, now: float, recent_s: float = RECENT_S) -> bool:
        """The last event's newest record was made within ``recent_s`` of ``now``."""
        return self.last_event is not None and now - self.last_event.recorded_at <= recent_s

    def sort_key(self, now: float) -> tuple[int, float, str]:
        """Open events first, then recent events (newest first), then the rest by name."""
        if self.event_open:
            group = 0
        elif self.stale or self.repeating:
            group = 1
        elif self.recent(now):
            group = 2
        else:
            group = 3
        newest = -self.last_event.recorded_at if self.last_event is not None and group < 3 else 0.0
        return group, newest, (self.label or self.stream).lower()

    def to_dict(self, tz: str, now: float) -> dict[str, Any]:
        """The JSON form: machine times RFC 3339 UTC, ``*_text`` fields in the site's time zone."""
        ev = self.last_event
        event: dict[str, Any] | None = None
        if ev is not None:
            event = {
                "id": ev.id, "phase": ev.phase, "detected_at": format_time(ev.detected_at),
                "shift_at": format_time(ev.shift_at), "shift_at_low": format_time(ev.shift_at_low),
                "shift_at_high": format_time(ev.shift_at_high), "as_of": format_time(ev.as_of),
                "level_before": _num(ev.level_before), "level_after": _num(ev.level_after),
                "delta": _num(ev.delta), "delta_sigma": round(ev.delta_sigma, 3) if math.isfinite(ev.delta_sigma) else None,
                "direction": ev.direction, "recorded_at": format_time(ev.recorded_at),
                "repeated_value": ev.repeated_value,
                "spread_ratio": None if ev.spread_ratio is None else round(ev.spread_ratio, 2),
                "when_text": clock(ev.shift_at if ev.phase != "dismissed" else ev.detected_at, tz,
                                   today=now),
                "size_text": _size_text(ev, self.unit),
            }
        return {
            "stream": self.stream, "label": self.label, "unit": self.unit, "state": self.state,
            "level": _num(self.level), "sigma": _num(self.sigma),
            "level_text": None if self.level is None else _with_unit(human_number(self.level, 6), self.unit),
            "sigma_text": None if self.sigma is None else _with_unit(human_number(self.sigma, 3), self.unit),
            "samples_total": self.samples_total,
            "samples_per_minute": None if self.samples_per_minute is None
            else round(self.samples_per_minute, 1),
            "event_open": self.event_open, "recent": self.recent(now),
            "last_event": event,
            "ack": None if self.ack is None else dict(self.ack),
            "hold": None if self.hold is None else dict(self.hold),
            "stale": self.stale, "notes": list(self.notes),
            "repeating": None if self.repeating is None else _repeating(self.repeating, self.unit, tz, now),
        }


def stream_status(stream: str, stats: StreamStats, *, label: str | None = None,
                  records: Iterable[tuple[float, AlertRecord]] = (),
                  samples_per_minute: float | None = None,
                  providers: Iterable[Callable[[str], Mapping[str, Any] | None]] = ()) -> StreamStatus:
    """What is shown of one stream: the one place a :class:`StreamStatus` is made.

    Parameters
    ----------
    stream : the stream name.
    stats : the stream's latest metrics snapshot (state, level, sigma, counts, unit).
    label : the operator's name of the stream (the config's ``label``), if any.
    records : ``(recorded_at, record)`` pairs of the stream's recent alert records, oldest first.
    samples_per_minute : the stream's recent rate of samples, when known.
    providers : functions of the stream name returning more fields (see the module docstring);
        each may return None or a mapping of :class:`StreamStatus` field names.

    Examples
    --------
    >>> from shiftwatch.metrics import StreamStats
    >>> st = StreamStats(samples_total=900, rejected_total={}, records_total={}, level=500.03,
    ...                  sigma=0.6, statistic=0.1, threshold=1.0, last_shift_at=None,
    ...                  state="watching", unit="g")
    >>> s = stream_status("plant/filler/head2/fill", st, label="filler head 2",
    ...                   providers=[lambda name: {"stale": False}])
    >>> s.label, s.unit, s.level, s.last_event, s.ack, s.stale
    ('filler head 2', 'g', 500.03, None, None, False)
    """
    last: EventSummary | None = None
    for recorded_at, rec in records:
        last = EventSummary.of(rec, recorded_at)
    rep = stats.repeating
    s = StreamStatus(stream=stream, label=label, unit=stats.unit, state=stats.state,
                     level=stats.level, sigma=stats.sigma, samples_total=stats.samples_total,
                     samples_per_minute=samples_per_minute, last_event=last,
                     repeating=None if rep is None else {"value": rep.value, "readings": rep.readings,
                                                         "since": rep.since, "flagged_at": rep.flagged_at})
    for provide in providers:
        extra = provide(stream)
        if extra:
            s = dataclasses.replace(s, **dict(extra))
    return s


def _repeating(rep: Mapping[str, Any], unit: str | None, tz: str, now: float) -> dict[str, Any]:
    """The JSON of a flagged run of one repeated reading: its value, readings, since when
    (RFC 3339 UTC) and ``text`` as the page shows it (``one value 500 g since 06:20:00Z``)."""
    since = clock(rep["since"], tz, today=now)
    return {"value": rep["value"], "readings": rep["readings"], "since": format_time(rep["since"]),
            "flagged_at": format_time(rep["flagged_at"]),
            "text": f"one value {_with_unit(human_number(rep['value'], 6), unit)} since {since}"}


def _num(x: float | None, digits: int = 6) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _with_unit(text: str, unit: str | None) -> str:
    return f"{text} {unit}" if unit else text


def _size_text(ev: EventSummary, unit: str | None) -> str:
    """The size of an event's step in units and sigmas, e.g. ``+1.8 g (+2.1 sigma)``; for a
    record that names a sensor fault the fault in place of the sigmas (``-500 g (one value
    repeated)``, ``+0.3 g (spread x2.2)``: a stuck sensor's readings have no noise to
    measure a step in, and a spread change's step is measured in the old noise)."""
    fault = fault_text(ev.repeated_value, ev.spread_ratio)
    if ev.phase == "dismissed":
        return "no lasting step" if fault is None else f"no lasting step ({fault})"
    return (f"{ev.delta:+.3g}{' ' + unit if unit else ''} "
            f"({sigmas_text(ev.delta_sigma, signed=True) if fault is None else fault})")


class StatusBoard:
    """What the status page needs beyond the metrics snapshots, and the pages themselves.

    Parameters
    ----------
    streams : returns the latest :class:`~shiftwatch.metrics.StreamStats` of every stream
        (:meth:`shiftwatch.metrics.Metrics.streams`).
    label_for : the operator's name of a stream, or None (cached here; :meth:`forget_labels`
        after a reload).
    time_zone : the site's time zone (``display.time_zone``).
    clock_fn : the wall clock (tests pass their own).
    """

    def __init__(self, streams: Callable[[], Mapping[str, StreamStats]],
                 label_for: Callable[[str], str | None] = lambda name: None, *,
                 time_zone: str = "UTC", clock_fn: Callable[[], float] = time.time) -> None:
        self._streams = streams
        self._label_for = label_for
        self.time_zone = time_zone
        self._clock = clock_fn
        self._lock = threading.Lock()
        self._records: dict[str, deque[tuple[float, AlertRecord]]] = {}
        self._context: dict[str, deque[tuple[str, list[float], list[float]]]] = {}
        self._labels: dict[str, str | None] = {}
        self._providers: list[Callable[[str], Mapping[str, Any] | None]] = []
        # What the daemon has to say about itself (key -> one line), shown above the streams.
        self._notices: dict[str, str] = {}
        # Sample rates: the counts at the last two checkpoints (main thread writes, others read).
        self._prev: tuple[float, dict[str, int]] | None = None
        self._rates: dict[str, float] = {}
        # Pages open on streams: name -> time of the last request; copies of their samples.
        self._watch: dict[str, float] = {}
        self._windows: dict[str, tuple[list[float], list[float], float, float | None, float | None]] = {}

    # ------------------------------------------------------------ main thread
    def record(self, rec: AlertRecord, held: tuple[Any, Any] | None = None) -> None:
        """An alert record was made (the daemon calls this as it publishes it).

        ``held`` is what the engine holds when a ``detected`` record is made (its
        :meth:`~shiftwatch.core.engine.StreamEngine.held_samples`): the samples
        before the step, which the engine lets go once the step is confirmed.
        The stream's page shows them, lighter, before the samples held now.
        """
        with self._lock:
            q = self._records.get(rec.stream)
            if q is None:
                q = self._records[rec.stream] = deque(maxlen=RECORDS_KEPT)
            q.append((self._clock(), rec))
            if held is not None:
                c = self._context.get(rec.stream)
                if c is None:
                    c = self._context[rec.stream] = deque(maxlen=CONTEXT_EVENTS)
                c.append((rec.id, [float(v) for v in held[0][-CONTEXT_SAMPLES:]],
                          [float(v) for v in held[1][-CONTEXT_SAMPLES:]]))

    def export(self, limit: int = SAVED_RECORDS) -> list[list[Any]]:
        """The newest records (two per stream at most, ``limit`` in all) for the state snapshot:
        ``[recorded_at, record fields]`` each, oldest first."""
        with self._lock:
            pairs = [p for q in self._records.values() for p in list(q)[-2:]]
        pairs.sort(key=lambda p: p[0])
        return [[t, dataclasses.asdict(rec)] for t, rec in pairs[-limit:]]

    def restore(self, saved: object) -> int:
        """Take back records saved by :meth:`export` (from a snapshot); entries that are not
        well-formed are skipped.  Returns how many were taken."""
        if not isinstance(saved, list):
            return 0
        names = {f.name for f in dataclasses.fields(AlertRecord)}
        taken = 0
        with self._lock:
            for item in saved:
                try:
                    t, fields = item
                    if not isinstance(fields, dict) or set(fields) - names:
                        continue
                    rec = AlertRecord(**fields)
                    if not isinstance(rec.stream, str) or not isinstance(rec.id, str):
                        continue
                    q = self._records.setdefault(rec.stream, deque(maxlen=RECORDS_KEPT))
                    q.append((float(t), rec))
                    taken += 1
                except (TypeError, ValueError):
                    continue
        return taken

    def forget(self, stream: str) -> None:
        """A stream removed by a reload."""
        with self._lock:
            self._records.pop(stream, None)
            self._context.pop(stream, None)
            self._labels.pop(stream, None)
            self._rates.pop(stream, None)

    def forget_labels(self) -> None:
        """The configuration changed: labels are looked up again."""
        with self._lock:
            self._labels.clear()

    def tick(self, now: float | None = None) -> None:
        """Checkpoint the sample counts; the rate of each stream is over the last two checkpoints.

        The main thread calls it after every round; a checkpoint is taken once
        :data:`RATE_EVERY_S` seconds have passed since the last one (a dict of
        every stream's count, a few milliseconds with 10,000 streams).
        """
        now = time.monotonic() if now is None else now
        prev = self._prev
        if prev is not None and now - prev[0] < RATE_EVERY_S:
            return
        counts = {name: st.samples_total for name, st in self._streams().items()}
        if prev is not None:
            span = now - prev[0]
            old = prev[1]
            self._rates = {name: 60.0 * (n - old.get(name, n)) / span for name, n in counts.items()
                           if name in old}
        self._prev = (now, counts)

    def watched(self) -> list[str]:
        """The streams whose page is open (their engines' samples are copied after a round)."""
        if not self._watch:
            return []
        with self._lock:
            return list(self._watch)

    def serve_windows(self, engines: Mapping[str, Any]) -> None:
        """Copy the held samples of the streams whose page is open (main thread, after a round).

        Nothing to do, and nothing done, while no page is open.  A copy is made
        again only when the stream has taken samples since the last one.
        """
        if not self._watch:
            return
        now = time.monotonic()
        with self._lock:
            names = [n for n, t in self._watch.items() if now - t <= WATCH_S]
            for n in [n for n in self._watch if n not in names]:
                del self._watch[n]
                self._windows.pop(n, None)
        for name in names:
            eng = engines.get(name)
            if eng is None:
                continue
            have = self._windows.get(name)
            total = float(eng.samples_total)
            if have is not None and have[2] == total:
                continue
            t, x = eng.held_samples()
            copy = (t.tolist(), x.tolist(), total, eng.level, eng.sigma)
            with self._lock:
                if name in self._watch:
                    self._windows[name] = copy

    # ------------------------------------------------------- providers
    def set_notice(self, key: str, text: str | None) -> None:
        """A line about the daemon itself (None: no more), shown above the streams, e.g. a
        shard whose shard.of the other shards disagree with."""
        with self._lock:
            if text is None:
                self._notices.pop(key, None)
            else:
                self._notices[key] = text

    def add_provider(self, provide: Callable[[str], Mapping[str, Any] | None]) -> None:
        """Add a source of more fields for every stream (see the module docstring)."""
        with self._lock:
            self._providers.append(provide)

    # ------------------------------------------------------ render thread
    def label(self, name: str) -> str | None:
        """The stream's label, looked up once (until :meth:`forget_labels`)."""
        try:
            return self._labels[name]
        except KeyError:
            label = self._labels[name] = self._label_for(name)
            return label

    def statuses(self, query: str = "") -> list[StreamStatus]:
        """Every stream's status (or those whose name or label holds ``query``, any case),
        open and recent events first."""
        now = self._clock()
        q = query.strip().lower()
        stats = self._streams()
        with self._lock:
            records = {n: list(r) for n, r in self._records.items()}
            providers = list(self._providers)
        rates = self._rates
        out = []
        for name, st in stats.items():
            label = self.label(name)
            if q and q not in name.lower() and (label is None or q not in label.lower()):
                continue
            out.append(stream_status(name, st, label=label, records=records.get(name, ()),
                                     samples_per_minute=rates.get(name), providers=providers))
        out.sort(key=lambda s: s.sort_key(now))
        return out

    def overview(self, query: str = "", limit: int = DEFAULT_LIMIT) -> dict[str, Any]:
        """The JSON of the overview: every stream (up to ``limit``), open and recent events first."""
        now = self._clock()
        every = self.statuses(query)
        all_streams = len(self._streams())
        return {
            "advisory": ADVISORY,
            "generated_at": format_time(now),
            "generated_text": clock(now, self.time_zone),
            "time_zone": zone_label(self.time_zone),
            "recent_s": RECENT_S,
            "notices": self.notices(),
            "query": query,
            "counts": {"streams": all_streams, "matching": len(every),
                       "shown": min(len(every), limit),
                       "event_open": sum(s.event_open for s in every),
                       "recent": sum(s.recent(now) and not s.event_open for s in every)},
            "streams": [s.to_dict(self.time_zone, now) for s in every[:limit]],
        }

    def notices(self) -> list[str]:
        """The daemon's lines about itself (see :meth:`set_notice`)."""
        with self._lock:
            return [self._notices[k] for k in sorted(self._notices)]

    def has_stream(self, name: str) -> bool:
        """The stream is tracked (has a metrics snapshot)."""
        return name in self._streams()

    def want(self, name: str) -> bool:
        """A page of the stream was asked for: keep its held samples copied after each round
        (for :data:`WATCH_S`); True when a copy is there already."""
        with self._lock:
            if name not in self._watch and len(self._watch) >= WATCH_MAX:
                oldest = min(self._watch, key=self._watch.__getitem__)
                del self._watch[oldest]
                self._windows.pop(oldest, None)
            self._watch[name] = time.monotonic()
            return name in self._windows

    def stream(self, name: str) -> dict[str, Any] | None:
        """The JSON of one stream's page, or None for a stream not tracked."""
        stats = self._streams().get(name)
        if stats is None:
            return None
        now = self._clock()
        with self._lock:
            records = list(self._records.get(name, ()))
            context = list(self._context.get(name, ()))
            providers = list(self._providers)
        status = stream_status(name, stats, label=self.label(name), records=records,
                               samples_per_minute=self._rates.get(name), providers=providers)
        self.want(name)
        held = self._windows.get(name)
        times, values = (held[0], held[1]) if held is not None else ([], [])
        tz = self.time_zone
        events: dict[str, dict[str, Any]] = {}
        for recorded_at, rec in records:
            d = rec.to_dict()
            d["recorded_at"] = format_time(recorded_at)
            d["as_of_text"] = clock(rec.as_of, tz, today=now)
            d["shift_at_text"] = clock(rec.shift_at, tz, today=now)
            d["detected_at_text"] = clock(rec.detected_at, tz, today=now)
            d["size_text"] = _size_text(EventSummary.of(rec, recorded_at), rec.unit)
            ev = events.setdefault(rec.id, {"id": rec.id, "records": []})
            ev["records"].append(d)
            # The newest record of the event carries its fit.
            ev.update({"phase": rec.phase, "shift_at": rec.shift_at, "shift_at_low": rec.shift_at_low,
                       "shift_at_high": rec.shift_at_high, "detected_at": rec.detected_at,
                       "level_before": _num(rec.level_before), "level_after": _num(rec.level_after)})
        # Samples kept with the events, older than those held now.
        first = times[0] if times else math.inf
        earlier: dict[float, float] = {}
        for _, ct, cx in context:
            for tv, xv in zip(ct, cx):
                if tv < first:
                    earlier[tv] = xv
        early_t = sorted(earlier)[-CONTEXT_SAMPLES:]
        early_x = [earlier[tv] for tv in early_t]
        t0 = early_t[0] if early_t else (times[0] if times else None)
        t1 = times[-1] if times else (early_t[-1] if early_t else None)
        for ev in events.values():
            ev["in_view"] = t0 is not None and t1 is not None and ev["shift_at_high"] >= t0 \
                and ev["shift_at_low"] <= t1
        return {
            "advisory": ADVISORY,
            "generated_at": format_time(now),
            "generated_text": clock(now, tz),
            "time_zone": zone_label(tz),
            "time_zone_name": "UTC" if zone_label(tz) == "UTC" else tz,
            "status": status.to_dict(tz, now),
            "samples": {"t": times, "x": values, "held": len(times),
                        "from_text": None if t0 is None else clock(t0, tz, today=now),
                        "to_text": None if t1 is None else clock(t1, tz, today=now)},
            "earlier": {"t": early_t, "x": early_x},
            "level": None if held is None else _num(held[3]),
            "sigma": None if held is None else _num(held[4]),
            "events": list(events.values())[::-1],
        }

    # ----------------------------------------------------------- HTTP
    def page(self, path: str, query: str) -> tuple[int, bytes, str]:
        """Answer one request of :data:`PAGE_PATHS` (the metrics endpoint's render thread)."""
        params = parse_qs(query)
        if path in ("/status", "/status/stream"):
            name = "overview.html" if path == "/status" else "stream.html"
            return 200, asset(name), "text/html; charset=utf-8"
        if path == "/status.json":
            given = params.get("limit", [str(DEFAULT_LIMIT)])[0]
            try:
                limit = min(int(given), 100_000)
            except ValueError:
                return 400, b'{"error": "limit must be a whole number"}\n', "application/json"
            if limit < 1:  # was taken as 1: one row shown for limit=0 or limit=-1
                return 400, _json({"error": f"limit must be 1 or more, got {int(given)}"}), "application/json"
            body = self.overview(params.get("q", [""])[0], limit)
            return 200, _json(body), "application/json"
        if path == "/status/stream.json":
            name = params.get("name", [""])[0]
            d = self.stream(name)
            if d is None:
                return 404, _json({"error": f"no stream named {name!r} is tracked",
                                   "advisory": ADVISORY}), "application/json"
            return 200, _json(d), "application/json"
        return 404, b"not found\n", "text/plain; charset=utf-8"


def _json(d: Mapping[str, Any]) -> bytes:
    """Compact JSON; a number that is not finite (a fit's p-value may be) becomes null, since
    JSON has no NaN and browsers refuse it."""
    try:
        return json.dumps(d, separators=(",", ":"), allow_nan=False).encode()
    except ValueError:
        return json.dumps(_finite(d), separators=(",", ":"), allow_nan=False).encode()


def _finite(o: Any) -> Any:
    """``o`` with every float that is not finite replaced by None.

    Examples
    --------
    >>> _finite({"a": [1.0, float("nan")], "b": {"c": float("inf")}, "d": "x"})
    {'a': [1.0, None], 'b': {'c': None}, 'd': 'x'}
    """
    if isinstance(o, float):
        return o if math.isfinite(o) else None
    if isinstance(o, Mapping):
        return {k: _finite(v) for k, v in o.items()}
    if isinstance(o, list | tuple):
        return [_finite(v) for v in o]
    return o


#: The page's files, served under /status/assets/ (read once).
ASSETS = {"overview.html": "text/html; charset=utf-8", "stream.html": "text/html; charset=utf-8",
          "status.js": "text/javascript; charset=utf-8", "status.css": "text/css; charset=utf-8",
          "icon.svg": "image/svg+xml"}
_ASSET_CACHE: dict[str, bytes] = {}


def asset(name: str) -> bytes:
    """One of the page's files from the package (``shiftwatch/statuspage/``)."""
    data = _ASSET_CACHE.get(name)
    if data is None:
        data = _ASSET_CACHE[name] = (resources.files("shiftwatch") / "statuspage" / name).read_bytes()
    return data


# ------------------------------------------------------------------ terminal
def format_table(doc: Mapping[str, Any], width: int = 120) -> str:
    """The overview JSON as a table for a terminal (``shiftwatch status``).

    Examples
    --------
    >>> doc = {"advisory": "Advisory only.", "generated_text": "06:30:00Z", "time_zone": "UTC",
    ...        "counts": {"streams": 1, "matching": 1, "shown": 1, "event_open": 0, "recent": 1},
    ...        "streams": [{"stream": "plant/head2/fill", "label": "filler head 2", "unit": "g",
    ...        "state": "watching", "level_text": "500.91 g", "sigma_text": "0.6 g",
    ...        "samples_per_minute": 60.0, "stale": None, "ack": None, "hold": None,
    ...        "last_event": {"phase": "confirmed", "when_text": "06:24:59Z",
    ...                       "size_text": "+0.875 g (+1.5 sigma)"}}]}
    >>> print(format_table(doc))  # doctest: +NORMALIZE_WHITESPACE
    Advisory only.
    shiftwatch status at 06:30:00Z (UTC): 1 stream(s), 0 with an open event, 1 with a recent one
    STREAM         STATE     LEVEL     SIGMA  /MIN  LAST EVENT
    filler head 2  watching  500.91 g  0.6 g  60    confirmed 06:24:59Z +0.875 g (+1.5 sigma)
    """
    counts = doc.get("counts", {})
    head = (f"shiftwatch status at {doc.get('generated_text', '?')} ({doc.get('time_zone', 'UTC')}): "
            f"{counts.get('streams', 0)} stream(s), {counts.get('event_open', 0)} with an open event, "
            f"{counts.get('recent', 0)} with a recent one")
    lines = [str(doc.get("advisory", "")), head]
    lines += [f"note: {_cell(str(n))}" for n in doc.get("notices", [])]
    rows = [("STREAM", "STATE", "LEVEL", "SIGMA", "/MIN", "LAST EVENT")]
    for s in doc.get("streams", []):
        ev = s.get("last_event")
        last = "-" if not ev else f"{ev['phase']} {ev['when_text']} {ev['size_text']}"
        state = str(s.get("state", "?"))
        if s.get("stale"):
            state += " (stale)"
        if s.get("repeating"):
            state += f" ({s['repeating'].get('text', 'one value repeated')})"
        if s.get("hold"):
            state += f" ({s['hold'].get('kind', 'hold')})"
        if s.get("ack") and s["ack"].get("acked"):
            last += f" [seen by {s['ack'].get('by') or '?'}]"
        rate = s.get("samples_per_minute")
        rows.append((_cell(s.get("label") or s.get("stream", "?")), _cell(state), s.get("level_text") or "-",
                     s.get("sigma_text") or "-", "-" if rate is None else f"{rate:g}", _cell(last)))
    widths = [min(max(len(r[i]) for r in rows), 48) for i in range(5)]
    for r in rows:
        cells = [r[i][:widths[i]].ljust(widths[i]) for i in range(5)]
        lines.append(("  ".join(cells) + "  " + r[5]).rstrip()[:max(width, 60)])
    if counts.get("shown", 0) < counts.get("matching", 0):
        lines.append(f"... {counts['matching'] - counts['shown']} more (--limit, or narrow with --filter)")
    return "\n".join(lines)


def _cell(text: str) -> str:
    return "".join(c if c.isprintable() else "?" for c in text)


#: The fields of :class:`StreamStatus`, in order (the README's table and the tests use it).
STATUS_FIELDS = tuple(f.name for f in dataclasses.fields(StreamStatus))


def status_url(listen: str, tls: bool) -> str:
    """Where a client on this machine reaches the page's JSON for a ``metrics.listen`` address.

    A wildcard address (``0.0.0.0``, ``::``) is reached through loopback.

    Examples
    --------
    >>> status_url("127.0.0.1:9650", False)
    'http://127.0.0.1:9650/status.json'
    >>> status_url("0.0.0.0:9650", True), status_url("[::]:9650", False)
    ('https://127.0.0.1:9650/status.json', 'http://[::1]:9650/status.json')
    """
    from shiftwatch.metrics import parse_listen

    host, port = parse_listen(listen)
    host = {"0.0.0.0": "127.0.0.1", "::": "::1", "": "127.0.0.1"}.get(host, host)
    if ":" in host:
        host = f"[{host}]"
    return f"{'https' if tls else 'http'}://{host}:{port}/status.json"


def fetch_overview(url: str, *, query: str = "", limit: int = DEFAULT_LIMIT, ca_file: str | None = None,
                   cert_file: str | None = None, key_file: str | None = None,
                   timeout: float = 10.0) -> dict[str, Any]:
    """GET the overview JSON from a running daemon (``shiftwatch status``).

    Raises
    ------
    OSError
        When the daemon cannot be reached or answers with an error (the message says which).
    """
    import http.client
    import ssl
    import urllib.error
    import urllib.request
    from urllib.parse import urlencode

    ctx = None
    if url.startswith("https:"):
        ctx = ssl.create_default_context(cafile=ca_file)
        if cert_file is not None:
            ctx.load_cert_chain(cert_file, key_file)
    full = f"{url}?{urlencode({'q': query, 'limit': limit})}"
    try:
        with urllib.request.urlopen(full, timeout=timeout, context=ctx) as r:
            doc: dict[str, Any] = json.loads(r.read())
    except urllib.error.HTTPError as exc:
        raise OSError(f"{url}: the daemon answered {exc.code} {exc.reason}") from None
    except urllib.error.URLError as exc:
        raise OSError(f"{url}: {exc.reason} (is shiftwatch running with this configuration?)") from None
    except (OSError, http.client.HTTPException, ValueError) as exc:
        # e.g. the endpoint closed the connection: a client certificate it wants was not sent
        raise OSError(f"{url}: {exc or type(exc).__name__} (with metrics.tls.client_ca_file the "
                      f"endpoint wants --cert-file and --key-file)") from None
    return doc
