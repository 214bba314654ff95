"""Commands from the floor: planned windows, holds and acknowledgements (the shell).

The logic is in :mod:`shiftwatch.core.plans`; this module is the daemon's
side of it (main thread only): it takes the messages on
``<prefix>/commands/<verb>``, refuses a malformed one with a reason on
``<prefix>/replies`` (counted, never acted on in part), carries out a good
one on the :class:`~shiftwatch.core.plans.FloorBook`, writes the book to
``state.dir/snapshots/floor.json`` before the command is acknowledged to the
broker, tells the engines which planned windows concern them, and publishes
acknowledgements on ``<prefix>/acks/<stream>``.  ``mqtt.send_command`` is the
CLI's side: it publishes one command and waits for its reply.

Who may send commands is the broker's business: its access control (a
Mosquitto ``acl_file``, see the README) lets operators publish under
``<prefix>/commands/`` and nothing else under the prefix.
"""

from __future__ import annotations

import json
import logging
import os
import threading
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.plans import (
    ACK,
    END,
    HOLD,
    PLAN,
    VERBS,
    Command,
    CommandError,
    FloorBook,
    StreamFloor,
    parse_command,
)
from shiftwatch.core.records import ADVISORY, AlertRecord
from shiftwatch.core.timefmt import format_time
from shiftwatch.fsutil import explain_os_error, fsync_dir
from shiftwatch.metrics import FloorMetrics
from shiftwatch.mqtt import Message

#: The book's file in the snapshot directory.
FLOOR_FILE = "floor.json"
FLOOR_VERSION = 1

#: What every reply and acknowledgement record says about holds and planned windows.
FLOOR_ADVISORY = (
    ADVISORY + " A planned window or a hold only changes what shiftwatch reports; it makes "
    "nothing safe and replaces no lockout, permit or other site procedure."
)


class FloorDesk:
    """Owns the :class:`FloorBook` in the daemon.

    Parameters
    ----------
    prefix : ``alerts.topic_prefix``.
    directory : the snapshot directory, where ``floor.json`` lives.
    metrics : its metrics (on the daemon's registry).
    log : where lines go.
    publish : ``publish(topic, payload, durable)``: a reply (``durable`` False) or an
        acknowledgement record (``durable`` True, through the outbox).
    """

    def __init__(self, prefix: str, directory: Path, metrics: FloorMetrics, log: logging.Logger,
                 publish: Callable[[str, bytes, bool], None],
                 warn: Callable[[str, str, float], None] | None = None) -> None:
        self.prefix = prefix
        self.path = directory / FLOOR_FILE
        self.book = FloorBook()
        self.metrics = metrics
        self.log = log
        self._publish = publish
        self._warn = warn
        self._saved = -1
        #: Held while the book changes, and by view(): the status page reads from its own thread.
        self._lock = threading.Lock()
        self._hold_key: tuple[int, int] = (0, -1)
        self._hold_any = False
        self._hold_cache: dict[str, bool] = {}
        #: The newest sample time seen per stream (held samples included).
        self.newest: dict[str, float] = {}
        for kind in (PLAN, HOLD):
            self.metrics.windows.labels(kind).set(0)

    @property
    def command_filter(self) -> str:
        return f"{self.prefix}/commands/+"

    @property
    def reply_topic(self) -> str:
        return f"{self.prefix}/replies"

    def is_command(self, topic: str) -> bool:
        return topic.startswith(f"{self.prefix}/commands/")

    # ------------------------------------------------------------ state
    def load(self, meta: Mapping[str, Any]) -> None:
        """At start: the newer of ``floor.json`` and the snapshot's copy (older snapshots
        have none: the book starts empty)."""
        books: list[FloorBook] = []
        snap = meta.get("floor")
        if isinstance(snap, Mapping):
            try:
                books.append(FloorBook.from_state(snap))
            except ValueError as exc:
                self.log.warning("the snapshot's planned windows, holds and acknowledgements set "
                                 "aside (%s)", exc)
        try:
            raw = self.path.read_bytes()
        except (FileNotFoundError, NotADirectoryError):  # none yet; a bad directory is the store's to report
            raw = None
        except OSError as exc:
            self.log.error("%s cannot be read (%s); planned windows and holds come from the snapshot",
                           self.path, explain_os_error(exc, self.path.parent))
            raw = None
        if raw is not None:
            try:
                d = json.loads(raw)
                if not isinstance(d, dict) or d.get("version") != FLOOR_VERSION:
                    raise ValueError(f"not a version {FLOOR_VERSION} floor file")
                books.append(FloorBook.from_state(d["book"]))
            except (ValueError, KeyError) as exc:
                aside = self.path.with_name(FLOOR_FILE + ".damaged")
                self.log.error("%s is damaged (%s); moved to %s, planned windows and holds come from "
                               "the snapshot", self.path, str(exc)[:200], aside.name)
                try:
                    os.replace(self.path, aside)
                except OSError:
                    pass
        if books:
            with self._lock:
                self.book = max(books, key=lambda b: b.revision)
            self._saved = self.book.revision
            n = len(self.book.windows)
            if n:
                self.log.info("restored %d planned window(s) and hold(s)", n)
        self._gauge_windows()

    def get_state(self) -> dict[str, Any]:
        with self._lock:
            return self.book.get_state()

    def view(self, name: str) -> StreamFloor:
        """What people have said about a stream (holds, planned windows, events and their
        acknowledgement), as of its newest sample: safe to call from any thread."""
        with self._lock:
            return self.book.view(name, self.newest.get(name))

    def save(self) -> bool:
        """Write the book (temporary file, fsync, rename) if it changed since the last write."""
        if self.book.revision == self._saved:
            return True
        tmp = self.path.with_name(FLOOR_FILE + ".tmp")
        data = json.dumps({"version": FLOOR_VERSION, "book": self.book.get_state()}).encode()
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                os.write(fd, data)
                os.fsync(fd)
            finally:
                os.close(fd)
            os.replace(tmp, self.path)
            fsync_dir(self.path.parent)
        except OSError as exc:
            self.metrics.save_failures.inc()
            self.log.error("planned windows, holds and acknowledgements could not be written to %s (%s); "
                           "they hold in memory and go into the next snapshot", self.path,
                           explain_os_error(exc, self.path.parent))
            return False
        self._saved = self.book.revision
        return True

    def saved(self) -> None:
        """A snapshot now holds the book."""
        self._saved = self.book.revision

    # ----------------------------------------------------- the engines
    def attach(self, name: str, eng: StreamEngine) -> None:
        """Tell an engine which planned windows concern its stream."""
        eng.planned = self.book.plan_lookup(name)

    def attach_all(self, engines: Mapping[str, StreamEngine]) -> None:
        for name, eng in engines.items():
            self.attach(name, eng)

    def holding(self) -> bool:
        """Whether any hold is in the book (ended or not): while none is, no sample is held."""
        return bool(self._hold_view()[0])

    def concerned_by_hold(self, name: str) -> bool:
        """Whether a hold in the book (ended or not) names the stream (cached per revision)."""
        holds, cache = self._hold_view()
        if not holds:
            return False
        hit = cache.get(name)
        if hit is None:
            hit = cache[name] = bool(self.book.holds_for(name))
        return hit

    def _hold_view(self) -> tuple[bool, dict[str, bool]]:
        """(any hold in the book, the per-stream answers so far), as of the book's revision."""
        key = (id(self.book), self.book.revision)
        if key != self._hold_key:
            self._hold_key = key
            self._hold_any = any(w.kind == HOLD for w in self.book.windows.values())
            self._hold_cache = {}
        return self._hold_any, self._hold_cache

    def split_held(self, name: str, times: NDArray[np.float64]) -> NDArray[np.bool_] | None:
        """The samples of a batch that fall in a hold (counted), or None when none does."""
        if times.shape[0]:
            self.newest[name] = max(self.newest.get(name, float("-inf")), float(times[-1]))
        mask = self.book.held_mask(name, times)
        if mask is None or not mask.any():
            return None
        self.metrics.held.labels(name).inc(int(mask.sum()))
        return mask

    def note(self, rec: AlertRecord) -> None:
        """An alert record went out: keep its event for acknowledgement."""
        with self._lock:
            self.book.note_record(rec.stream, rec.phase, rec.id, rec.shift_at, rec.delta, rec.unit)
        self._gauge_stream(rec.stream)

    def forget(self, name: str) -> None:
        with self._lock:
            self.book.forget_stream(name)
        self.newest.pop(name, None)
        for series in (self.metrics.unacknowledged, self.metrics.held):
            try:
                series.remove(name)
            except KeyError:
                pass

    def _gauge_stream(self, name: str) -> None:
        if name in self.book.events:
            self.metrics.unacknowledged.labels(name).set(self.book.unacknowledged(name))
        else:
            try:
                self.metrics.unacknowledged.remove(name)
            except KeyError:
                pass

    def _gauge_windows(self) -> None:
        kinds = [w.kind for w in self.book.windows.values()]
        for kind in (PLAN, HOLD):
            self.metrics.windows.labels(kind).set(kinds.count(kind))

    # -------------------------------------------------------- commands
    def handle(self, msgs: list[Message], now: float, engines: Mapping[str, StreamEngine],
               label_for: Callable[[str], str | None]) -> list[AlertRecord]:
        """Carry out the round's commands in order; the records of events a new planned
        window covers (ended ``planned``) are returned for the daemon to publish."""
        records: list[AlertRecord] = []
        base = f"{self.prefix}/commands/"
        for m in msgs:
            verb = m.topic[len(base):]
            try:
                cmd = parse_command(verb, bytes(m.payload), now)
                with self._lock:
                    out = self.book.apply(cmd, now, engines.keys())
            except CommandError as exc:
                self._refuse(verb, exc, bytes(m.payload), now)
                continue
            self.metrics.commands.labels(cmd.verb, "accepted").inc()
            reply = out.reply
            if cmd.verb in (PLAN, END):
                self.attach_all(engines)
            if cmd.verb == PLAN:
                adopted = []
                for name, eng in engines.items():
                    if eng.state != "event_open" or eng.planned is None:
                        continue
                    rec = eng.adopt_planned_event(self.newest.get(name, now))
                    if rec is not None:
                        records.append(rec)
                        adopted.append(rec.id)
                if adopted:
                    reply["open_events_planned"] = adopted
            if cmd.verb == ACK and out.ack is not None:
                stream, ev = out.ack
                self._gauge_stream(stream)
                self._ack_record(stream, ev.to_dict(), cmd, label_for(stream), now)
            self._gauge_windows()
            if not self.save():
                reply["warning"] = ("not written to the state directory; a restart before the next "
                                    "snapshot forgets it")
            self._reply(reply)
            self._log_accepted(cmd, reply)
        return records

    def prune(self, now: float, engines: Mapping[str, StreamEngine]) -> None:
        """Forget windows long over (see core.plans.KEEP_AFTER)."""
        with self._lock:
            gone = self.book.prune(now)
        if gone:
            self.attach_all(engines)
            self._gauge_windows()
            self.save()

    def _refuse(self, verb: str, exc: CommandError, payload: bytes, now: float) -> None:
        shown = verb if verb in VERBS else "unknown"
        self.metrics.commands.labels(shown, "refused").inc()
        self.metrics.refused.labels(exc.reason).inc()
        ref = None
        try:
            d = json.loads(payload)
            if isinstance(d, dict) and isinstance(d.get("ref"), str) and len(d["ref"]) <= 64:
                ref = d["ref"]
        except ValueError:
            pass
        self._reply({"command": shown, "ref": ref, "accepted": False, "reason": exc.reason,
                     "message": str(exc)})
        text = f"command refused ({exc.reason}): {exc}"
        if self._warn is not None:
            self._warn(f"command:{exc.reason}", text, now)
        else:
            self.log.warning("%s", text)

    def _reply(self, body: dict[str, Any]) -> None:
        body["advisory"] = FLOOR_ADVISORY
        self._publish(self.reply_topic, json.dumps(body).encode(), False)

    def _ack_record(self, stream: str, ev: dict[str, Any], cmd: Command, label: str | None,
                    now: float) -> None:
        who = label or stream
        by = f" by {cmd.by}" if cmd.by else ""
        note = f": {cmd.note}" if cmd.note else ""
        body: dict[str, Any] = {
            "event_id": ev["id"], "stream": stream, "phase": ev["phase"], "shift_at": ev["shift_at"],
            "acknowledged_at": format_time(now), "by": cmd.by, "note": cmd.note,
        }
        if label is not None:
            body["label"] = label
        body["summary"] = (f"ACKNOWLEDGED the {ev['phase']} step of {who} (event {ev['id']}){by}{note}; "
                           "any follow-up is for the site's procedures")
        body["advisory"] = FLOOR_ADVISORY
        self._publish(f"{self.prefix}/acks/{stream}", json.dumps(body).encode(), True)
        self.log.info("%s", body["summary"], extra={"stream": stream, "event_id": ev["id"],
                                                     "phase": "acknowledged"})

    def _log_accepted(self, cmd: Command, reply: Mapping[str, Any]) -> None:
        by = f" by {cmd.by}" if cmd.by else ""
        note = f" ({cmd.note})" if cmd.note else ""
        if cmd.verb in (PLAN, HOLD):
            w = reply["window"]
            until = w["end"] or "ended by command"
            what = "planned window" if cmd.verb == PLAN else "hold"
            self.log.info("%s %s announced%s for %s, from %s until %s%s; %d stream(s) match now (it changes "
                          "only what shiftwatch reports, not what is safe)", what, w["id"], by, w["target"],
                          w["start"], until, note, reply["streams_now"])
        elif cmd.verb == END:
            for w in reply["ended"]:
                self.log.info("%s %s %s%s", "planned window" if w["kind"] == PLAN else "hold", w["id"],
                              "withdrawn" if w.get("withdrawn") else f"ended at {w['end']}", by)


__all__ = ["ACK", "END", "FLOOR_ADVISORY", "FloorDesk"]
