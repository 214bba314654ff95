"""Planned changes, holds and acknowledgements: the pure logic.

People beside the line know things the samples do not: a changeover is due,
a filler is stopped for cleaning, an alert has been seen.  They say so with
commands (MQTT or the CLI; the shell turns each into a :class:`Command`
with :func:`parse_command`), and :class:`FloorBook` keeps what they said:

*planned window* (``plan``)
    A stream, or every stream a topic filter matches, will move on purpose
    between ``start`` and ``end``.  A step whose shift-time interval meets
    the window is recorded with the phase ``planned`` (its fitted size and
    time kept), raises no alarm, and the stream watches on from the new
    level at once (:meth:`FloorBook.plan_lookup` is what the engine asks).
*hold* (``hold``)
    From ``start`` until ``end`` (or until ended by a command) the stream's
    samples are not process readings: they are kept from the engine, so
    nothing is detected and nothing joins the baseline
    (:meth:`FloorBook.held_mask`).
*acknowledgement* (``ack``)
    An operator marks an event as seen, with an optional short note.  The
    book keeps, per stream, the recent events that alarmed (``detected``,
    ``confirmed``, ``returned``) and whether each has been acknowledged.

Times.  Windows are compared with the samples' own time stamps (stream
time), never with a clock: a backlog delivered late is judged by when its
samples were taken.  A command's relative times (``-5min``, a window ``for``
``20min``) and the end of a window by command are resolved against ``now``,
the time the command arrived, which the shell passes in; this module reads
no clock.

Nothing here makes anything safe: a planned window or a hold only changes
what shiftwatch, an advisory monitor, reports.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from collections import OrderedDict
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.timefmt import DURATION_FORMS, format_time, parse_duration, parse_rfc3339

PLAN = "plan"
HOLD = "hold"
END = "end"
ACK = "ack"
#: The commands, each on ``<prefix>/commands/<verb>``.
VERBS = (PLAN, HOLD, END, ACK)

#: Most windows (plans and holds) kept at once; a command past it is refused.
MAX_WINDOWS = 1000
#: Longest window a command may announce (a hold without an end is allowed).
MAX_WINDOW_SECONDS = 31 * 86400.0
#: Furthest in the past or the future a window may start.
MAX_START_OFFSET = 7 * 86400.0
#: Longest note and ``by`` text.
MAX_NOTE = 200
MAX_BY = 64
#: Largest command payload.
MAX_PAYLOAD = 4096
#: Events kept per stream for acknowledgement (the oldest acknowledged ones go first).
MAX_EVENTS_PER_STREAM = 50
#: A window is forgotten this long (by the clock ``now`` passed in) after its end.
KEEP_AFTER = 86400.0
#: Phases that bring an event to people's attention (kept for acknowledgement).
ALARM_PHASES = ("detected", "confirmed", "returned")
#: Phases counted as open and unacknowledged: a lasting step that nobody has marked as seen.
LASTING_PHASES = ("confirmed", "returned")

_REF = re.compile(r"^[A-Za-z0-9_.:-]{1,64}$")
_ID = re.compile(r"^[0-9a-f]{1,32}$")
_RELATIVE = re.compile(r"^\s*([+-])\s*(.+)$")
_KEYS = {
    PLAN: {"target", "start", "end", "for", "note", "by", "ref"},
    HOLD: {"target", "start", "end", "for", "note", "by", "ref"},
    END: {"id", "target", "note", "by", "ref"},
    ACK: {"event", "note", "by", "ref"},
}


class CommandError(ValueError):
    """A command refused: ``reason`` is a short code, the message says what was wrong and where."""

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(message)
        self.reason = reason


@dataclass(frozen=True)
class Command:
    """A parsed command (see :func:`parse_command`)."""

    verb: str
    ref: str | None = None
    target: str | None = None
    start: float | None = None
    end: float | None = None
    id: str | None = None
    event: str | None = None
    note: str = ""
    by: str = ""


@dataclass(frozen=True)
class Window:
    """A planned window or a hold over the streams ``target`` matches.

    ``start`` and ``end`` are epoch seconds compared with sample times;
    ``end`` is None for a hold that lasts until a command ends it.
    ``announced_at`` is when the command arrived.
    """

    id: str
    kind: str
    target: str
    start: float
    end: float | None
    note: str = ""
    by: str = ""
    announced_at: float = 0.0

    def covers(self, t: float) -> bool:
        """Whether a sample taken at ``t`` falls in the window (start included, end excluded)."""
        return self.start <= t and (self.end is None or t < self.end)

    def meets(self, lo: float, hi: float) -> bool:
        """Whether the interval ``[lo, hi]`` (a step's shift-time interval) meets the window."""
        return lo <= (math.inf if self.end is None else self.end) and hi >= self.start

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "kind": self.kind, "target": self.target,
                "start": format_time(self.start),
                "end": None if self.end is None else format_time(self.end),
                "note": self.note, "by": self.by, "announced_at": format_time(self.announced_at)}

    def get_state(self) -> dict[str, Any]:
        return {"id": self.id, "kind": self.kind, "target": self.target, "start": self.start,
                "end": self.end, "note": self.note, "by": self.by, "announced_at": self.announced_at}


@dataclass
class EventNote:
    """An event that alarmed, as the acknowledgement book keeps it."""

    id: str
    phase: str
    shift_at: float
    delta: float
    unit: str | None = None
    acked_at: float | None = None
    acked_by: str = ""
    note: str = ""

    @property
    def open(self) -> bool:
        """A lasting step nobody has marked as seen yet."""
        return self.phase in LASTING_PHASES and self.acked_at is None

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "phase": self.phase, "shift_at": format_time(self.shift_at),
                "delta": self.delta, "unit": self.unit,
                "acknowledged_at": None if self.acked_at is None else format_time(self.acked_at),
                "acknowledged_by": self.acked_by, "note": self.note}


@dataclass(frozen=True)
class StreamFloor:
    """What people have said about one stream: the one object a status page reads.

    ``hold`` is the hold in force at ``as_of`` (the stream's newest sample
    time), ``plans`` the planned windows not yet over at ``as_of``,
    ``events`` the recent events that alarmed, newest last, and
    ``unacknowledged`` how many of them are lasting steps nobody has
    marked as seen.
    """

    stream: str
    as_of: float | None
    hold: Window | None
    plans: tuple[Window, ...]
    events: tuple[EventNote, ...]
    unacknowledged: int

    def to_dict(self) -> dict[str, Any]:
        return {"stream": self.stream, "held": self.hold is not None,
                "hold": None if self.hold is None else self.hold.to_dict(),
                "plans": [w.to_dict() for w in self.plans],
                "events": [e.to_dict() for e in self.events],
                "unacknowledged": self.unacknowledged}


def filter_matches(pattern: str, name: str) -> bool:
    """MQTT topic-filter matching of a stream name (``+`` one level, ``#`` the rest),
    as in MQTT 3.1.1 section 4.7 and MQTT 5.0 section 4.7.

    Examples
    --------
    >>> filter_matches("plant/line2/+/fill", "plant/line2/head3/fill")
    True
    >>> filter_matches("plant/line2/#", "plant/line2/head3/fill")
    True
    >>> filter_matches("plant/line2/#", "plant/line2")
    True
    >>> filter_matches("plant/+", "plant/line2/head3")
    False
    """
    p = pattern.split("/")
    t = name.split("/")
    for i, part in enumerate(p):
        if part == "#":
            return True
        if i >= len(t):
            return False
        if part != "+" and part != t[i]:
            return False
    return len(t) == len(p)


def _valid_filter(f: str) -> str | None:
    """Why ``f`` is not a valid MQTT topic filter, or None."""
    if not f:
        return "is empty"
    if len(f) > 1024:
        return "is longer than 1024 characters"
    if any(ord(c) < 32 or ord(c) == 127 for c in f):
        return "holds a control character"
    parts = f.split("/")
    for i, part in enumerate(parts):
        if "#" in part and (part != "#" or i != len(parts) - 1):
            return "uses '#' other than as the whole last level"
        if "+" in part and part != "+":
            return "uses '+' other than as a whole level"
    return None


def _text(d: Mapping[str, Any], key: str, limit: int) -> str:
    v = d.get(key, "")
    if v is None:
        return ""
    if not isinstance(v, str):
        raise CommandError("bad_field", f"{key}: must be text, got {type(v).__name__}")
    if len(v) > limit:
        raise CommandError("bad_field", f"{key}: longer than {limit} characters ({len(v)})")
    if any(ord(c) < 32 and c not in "\t" for c in v):
        raise CommandError("bad_field", f"{key}: holds a control character")
    return v


def _when(d: Mapping[str, Any], key: str, now: float) -> float | None:
    """A time given as RFC 3339, ``now``, or a signed duration relative to ``now``."""
    v = d.get(key)
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, str):
        raise CommandError("bad_time", f"{key}: must be text (RFC 3339, 'now', or a signed duration "
                                       f"such as -5min), got {v!r:.40}")
    s = v.strip()
    if s == "now":
        return now
    m = _RELATIVE.match(s)
    if m is not None and not any(c in m.group(2) for c in "T:"):
        try:
            d_s = parse_duration(m.group(2))
        except ValueError as exc:
            raise CommandError("bad_time", f"{key}: {exc}") from None
        return now - d_s if m.group(1) == "-" else now + d_s
    if "T" not in s and "t" not in s and " " not in s:
        raise CommandError("bad_time", f"{key}: {v!r:.40} is neither an RFC 3339 time with a date and a "
                                       f"UTC offset, 'now', nor a signed duration ({DURATION_FORMS}, "
                                       "with + or - in front)")
    try:
        t = parse_rfc3339(s)  # RFC 3339 section 5.6, as the decoder and replay read times
    except ValueError as exc:
        raise CommandError("bad_time", f"{key}: {v!r:.40} {exc}") from None
    return t


def parse_command(verb: str, payload: bytes | str | Mapping[str, Any], now: float) -> Command:
    """Check a command completely before anything is done with it.

    ``verb`` is the last level of its topic (one of :data:`VERBS`), ``payload``
    a JSON object, ``now`` the time it arrived (epoch seconds).  Raises
    :class:`CommandError` naming the first thing wrong; a command is never
    half understood.

    Examples
    --------
    >>> c = parse_command("plan", b'{"target": "line2/+/fill", "start": "-1min", "for": "20min"}', 1000.0)
    >>> c.target, c.start, c.end
    ('line2/+/fill', 940.0, 2140.0)
    >>> parse_command("hold", b'{"target": "line2/#"}', 1000.0).end is None
    True
    >>> parse_command("plan", b'{"target": "line2/#"}', 1000.0)
    Traceback (most recent call last):
    ...
    shiftwatch.core.plans.CommandError: plan: a planned window needs an end: 'end' (RFC 3339 or a signed duration) or 'for' (a duration)
    """
    if verb not in VERBS:
        raise CommandError("unknown_command", f"unknown command {verb!r:.40}; the commands are "
                                              + ", ".join(VERBS))
    if isinstance(payload, Mapping):
        d: Any = payload
    else:
        raw = payload.encode() if isinstance(payload, str) else bytes(payload)
        if len(raw) > MAX_PAYLOAD:
            raise CommandError("too_large", f"{verb}: the payload is {len(raw)} bytes, more than {MAX_PAYLOAD}")
        try:
            d = json.loads(raw.decode("utf-8"))
        except UnicodeDecodeError:
            raise CommandError("not_json", f"{verb}: the payload is not UTF-8") from None
        except ValueError as exc:
            raise CommandError("not_json", f"{verb}: the payload is not JSON ({exc})") from None
    if not isinstance(d, Mapping):
        raise CommandError("not_an_object", f"{verb}: the payload must be a JSON object, got {type(d).__name__}")
    unknown = sorted(set(d) - _KEYS[verb])
    if unknown:
        raise CommandError("unknown_field", f"{verb}: unknown field {unknown[0]!r:.40}; {verb} takes "
                                            + ", ".join(sorted(_KEYS[verb])))
    ref = d.get("ref")
    if ref is not None and (not isinstance(ref, str) or not _REF.match(ref)):
        raise CommandError("bad_field", "ref: must be 1 to 64 letters, digits or '_.:-'")
    note = _text(d, "note", MAX_NOTE)
    by = _text(d, "by", MAX_BY)
    if verb == ACK:
        ev = d.get("event")
        if not isinstance(ev, str) or not _ID.match(ev):
            raise CommandError("bad_field", "ack: 'event' must be the id of an event (hex digits, as in "
                                            "its alert records)")
        return Command(verb, ref=ref, event=ev, note=note, by=by)
    target = d.get("target")
    if target is not None:
        if not isinstance(target, str):
            raise CommandError("bad_field", f"{verb}: 'target' must be a topic filter as text")
        why = _valid_filter(target)
        if why is not None:
            raise CommandError("bad_field", f"{verb}: target {target!r:.60} {why}")
    if verb == END:
        wid = d.get("id")
        if wid is not None and (not isinstance(wid, str) or not _ID.match(wid)):
            raise CommandError("bad_field", "end: 'id' must be the id of a window (hex digits, as in "
                                            "the reply that accepted it)")
        if (wid is None) == (target is None):
            raise CommandError("bad_field", "end: give exactly one of 'id' (one window) or 'target' "
                                            "(every window announced for that filter)")
        return Command(verb, ref=ref, id=wid, target=target, note=note, by=by)
    if target is None:
        raise CommandError("bad_field", f"{verb}: 'target' is missing (a stream name or topic filter)")
    start = _when(d, "start", now)
    start = now if start is None else start
    end = _when(d, "end", now)
    dur = d.get("for")
    if dur is not None:
        if end is not None:
            raise CommandError("bad_field", f"{verb}: give 'end' or 'for', not both")
        if isinstance(dur, bool) or not isinstance(dur, str):
            raise CommandError("bad_time", f"for: must be a duration as text ({DURATION_FORMS})")
        try:
            end = start + parse_duration(dur)
        except ValueError as exc:
            raise CommandError("bad_time", f"for: {exc}") from None
    if verb == PLAN and end is None:
        raise CommandError("bad_field", "plan: a planned window needs an end: 'end' (RFC 3339 or a signed "
                                        "duration) or 'for' (a duration)")
    if abs(start - now) > MAX_START_OFFSET:
        raise CommandError("bad_time", f"start: {format_time(start)} is more than "
                                       f"{MAX_START_OFFSET / 86400:g} days from now ({format_time(now)})")
    if end is not None:
        if end <= start:
            raise CommandError("bad_time", f"end: {format_time(end)} is not after the start "
                                           f"{format_time(start)}")
        if end - start > MAX_WINDOW_SECONDS:
            raise CommandError("bad_time", f"end: the window is longer than "
                                           f"{MAX_WINDOW_SECONDS / 86400:g} days")
    return Command(verb, ref=ref, target=target, start=start, end=end, note=note, by=by)


@dataclass
class Outcome:
    """What a command did: ``reply`` is the JSON-able reply (without the advisory,
    which the shell adds); ``ack`` the acknowledged event's stream and note;
    ``changed_targets`` the targets of the windows it added or ended."""

    reply: dict[str, Any]
    ack: tuple[str, EventNote] | None = None
    changed_targets: tuple[str, ...] = ()


@dataclass
class FloorBook:
    """Planned windows, holds and the acknowledgement book of every stream.

    Owned by one thread.  ``revision`` grows with every change, so the shell
    can tell which of two saved copies is newer.
    """

    windows: dict[str, Window] = field(default_factory=dict)
    events: dict[str, OrderedDict[str, EventNote]] = field(default_factory=dict)
    revision: int = 0

    # ---------------------------------------------------------- commands
    def apply(self, cmd: Command, now: float, streams: Iterable[str] = ()) -> Outcome:
        """Carry out a parsed command.  Raises :class:`CommandError` (and changes
        nothing) when it cannot be done: an unknown window or event, too many windows.
        ``streams`` are the stream names known now (the reply says how many the
        target matches)."""
        base: dict[str, Any] = {"command": cmd.verb, "ref": cmd.ref, "accepted": True}
        if cmd.verb in (PLAN, HOLD):
            assert cmd.target is not None and cmd.start is not None
            self.prune(now)
            if len(self.windows) >= MAX_WINDOWS:
                raise CommandError("too_many_windows", f"{cmd.verb}: {MAX_WINDOWS} windows are in force "
                                                       "already; end some first")
            wid = hashlib.blake2b(
                f"{cmd.verb}|{cmd.target}|{cmd.start!r}|{cmd.end!r}|{now!r}|{self.revision}".encode(),
                digest_size=6).hexdigest()
            w = Window(wid, cmd.verb, cmd.target, cmd.start, cmd.end, cmd.note, cmd.by, now)
            self.windows[wid] = w
            self.revision += 1
            matched = sum(1 for s in streams if filter_matches(cmd.target, s))
            return Outcome({**base, "window": w.to_dict(), "streams_now": matched},
                           changed_targets=(cmd.target,))
        if cmd.verb == END:
            if cmd.id is not None:
                w0 = self.windows.get(cmd.id)
                if w0 is None:
                    raise CommandError("unknown_window", f"end: no window with id {cmd.id!r} is in force")
                found = [w0]
            else:
                found = [w for w in self.windows.values() if w.target == cmd.target]
                if not found:
                    raise CommandError("unknown_window", f"end: no window is in force for target "
                                                         f"{cmd.target!r:.60}")
            ended = []
            for w in found:
                if w.start >= now:  # not begun: withdrawn altogether
                    del self.windows[w.id]
                    ended.append({**w.to_dict(), "end": None, "withdrawn": True})
                else:
                    nw = replace(w, end=now if w.end is None else min(w.end, now))
                    self.windows[w.id] = nw
                    ended.append(nw.to_dict())
            self.revision += 1
            return Outcome({**base, "ended": ended}, changed_targets=tuple(w.target for w in found))
        assert cmd.verb == ACK and cmd.event is not None
        for stream, book in self.events.items():
            ev = book.get(cmd.event)
            if ev is not None:
                if ev.acked_at is not None:
                    raise CommandError("already_acknowledged",
                                       f"ack: event {cmd.event} was acknowledged at {format_time(ev.acked_at)}"
                                       + (f" by {ev.acked_by}" if ev.acked_by else ""))
                ev.acked_at, ev.acked_by, ev.note = now, cmd.by, cmd.note
                self.revision += 1
                return Outcome({**base, "stream": stream, "event": ev.to_dict()}, ack=(stream, ev))
        raise CommandError("unknown_event", f"ack: no recent event with id {cmd.event!r} (only events "
                                            "that were detected or confirmed, and not dismissed, can be "
                                            "acknowledged)")

    def prune(self, now: float) -> list[Window]:
        """Forget windows that ended more than :data:`KEEP_AFTER` before ``now``."""
        gone = [w for w in self.windows.values() if w.end is not None and w.end < now - KEEP_AFTER]
        for w in gone:
            del self.windows[w.id]
        if gone:
            self.revision += 1
        return gone

    # ------------------------------------------------------ the engines
    def plans_for(self, stream: str) -> list[Window]:
        return [w for w in self.windows.values() if w.kind == PLAN and filter_matches(w.target, stream)]

    def holds_for(self, stream: str) -> list[Window]:
        return [w for w in self.windows.values() if w.kind == HOLD and filter_matches(w.target, stream)]

    def plan_lookup(self, stream: str) -> Callable[[float, float], str | None] | None:
        """For the engine: given a step's shift-time interval, the id of the planned window
        it meets (None: not planned); None when no window concerns the stream."""
        plans = self.plans_for(stream)
        if not plans:
            return None

        def lookup(lo: float, hi: float) -> str | None:
            for w in plans:
                if w.meets(lo, hi):
                    return w.id
            return None

        return lookup

    def held_mask(self, stream: str, times: NDArray[np.float64]) -> NDArray[np.bool_] | None:
        """Which samples fall in a hold on the stream (None: no hold concerns it)."""
        holds = self.holds_for(stream)
        if not holds:
            return None
        mask = np.zeros(times.shape, dtype=np.bool_)
        for w in holds:
            inside = times >= w.start
            if w.end is not None:
                inside &= times < w.end
            mask |= inside
        return mask

    # --------------------------------------------------- acknowledgement
    def note_record(self, stream: str, phase: str, event_id: str, shift_at: float, delta: float,
                    unit: str | None = None) -> None:
        """Keep an alert record's event for acknowledgement: an event that alarmed is kept
        (its latest phase); a dismissed or undecided one is let go."""
        book = self.events.get(stream)
        if phase not in ALARM_PHASES:
            if book is not None and book.pop(event_id, None) is not None:
                self.revision += 1
                if not book:
                    del self.events[stream]
            return
        if book is None:
            book = self.events[stream] = OrderedDict()
        ev = book.get(event_id)
        if ev is None:
            book[event_id] = EventNote(event_id, phase, shift_at, delta, unit)
            while len(book) > MAX_EVENTS_PER_STREAM:
                old = next((k for k, e in book.items() if not e.open), None)
                book.pop(old if old is not None else next(iter(book)))
        else:
            ev.phase, ev.shift_at, ev.delta = phase, shift_at, delta
        self.revision += 1

    def unacknowledged(self, stream: str) -> int:
        book = self.events.get(stream)
        return 0 if book is None else sum(1 for e in book.values() if e.open)

    def forget_stream(self, stream: str) -> None:
        if self.events.pop(stream, None) is not None:
            self.revision += 1

    def view(self, stream: str, as_of: float | None) -> StreamFloor:
        """What people have said about ``stream``, as of its newest sample time."""
        t = -math.inf if as_of is None else as_of
        hold = next((w for w in self.holds_for(stream) if w.covers(t)), None)
        plans = tuple(w for w in self.plans_for(stream) if w.end is None or w.end > t)
        book = self.events.get(stream)
        evs = () if book is None else tuple(book.values())
        return StreamFloor(stream, as_of, hold, plans, evs, sum(1 for e in evs if e.open))

    # ---------------------------------------------------------- state
    def get_state(self) -> dict[str, Any]:
        return {
            "revision": self.revision,
            "windows": [w.get_state() for w in self.windows.values()],
            "events": {s: [[e.id, e.phase, e.shift_at, e.delta, e.unit, e.acked_at, e.acked_by, e.note]
                           for e in book.values()] for s, book in self.events.items()},
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> FloorBook:
        """Rebuild a book from :meth:`get_state`; raises ValueError naming a bad field."""
        where = "floor"
        try:
            where = "floor.revision"
            rev = int(state["revision"])
            if rev < 0:
                raise ValueError("negative")
            book = cls(revision=rev)
            for i, w in enumerate(state["windows"]):
                where = f"floor.windows[{i}]"
                kind = str(w["kind"])
                if kind not in (PLAN, HOLD):
                    raise ValueError(f"unknown kind {kind!r}")
                wid, target = str(w["id"]), str(w["target"])
                if not _ID.match(wid) or _valid_filter(target) is not None:
                    raise ValueError("bad id or target")
                start = _finite(w["start"])
                end = None if w["end"] is None else _finite(w["end"])
                if end is None and kind == PLAN:
                    raise ValueError("a planned window without an end")
                book.windows[wid] = Window(wid, kind, target, start, end, str(w.get("note", "")),
                                           str(w.get("by", "")), _finite(w.get("announced_at", 0.0)))
            for s, evs in state["events"].items():
                where = f"floor.events[{s!r:.60}]"
                od: OrderedDict[str, EventNote] = OrderedDict()
                for e in evs:
                    eid, phase, shift_at, delta, unit, acked_at, acked_by, note = e
                    if phase not in ALARM_PHASES:
                        raise ValueError(f"phase {phase!r}")
                    od[str(eid)] = EventNote(str(eid), str(phase), _finite(shift_at), _finite(delta),
                                             None if unit is None else str(unit),
                                             None if acked_at is None else _finite(acked_at),
                                             str(acked_by), str(note))
                if od:
                    book.events[str(s)] = od
        except (KeyError, TypeError, ValueError) as exc:
            raise ValueError(f"{where}: malformed ({exc!r:.100})") from None
        return book


def _finite(v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ValueError(f"{v!r:.40} is not a finite number")
    return float(v)
