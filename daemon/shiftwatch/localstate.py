"""The daemon's side of a state directory (state.keep: local, the default): the engines
restored from the last snapshot at start, the journal of the rounds after it replayed
(after a crash, the samples the snapshot did not hold), each round journaled, the
snapshots written to disk (each starts a fresh journal), and a journal lost behind the
daemon's back noticed.  What they hold and why is in README.md ("State, restarts and
signals") and DEVELOPERS.md ("Architecture").

:class:`LocalState` belongs to the daemon's main thread.  It changes the daemon's
engines and their filters (the dicts it is given: it makes engines as it restores
streams), reads the configuration through a callable (a reload changes it), makes
engines for replayed streams and publishes records through the callables it is given,
and keeps no reference to the daemon.  With state in the cluster the daemon does not
call it (shiftwatch.keeper has that side).
"""

from __future__ import annotations

import logging
import secrets
import time
from collections.abc import Callable, Iterator, Mapping
from typing import Any

import numpy as np

from shiftwatch.config import Config, StreamConfig
from shiftwatch.core.calm import CalmPool
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import AlertRecord
from shiftwatch.decode import stream_name
from shiftwatch.display import stamp
from shiftwatch.floor import FloorDesk
from shiftwatch.fsutil import explain_os_error
from shiftwatch.journal import Journal, JournalGroup, JournalSingles
from shiftwatch.metrics import Metrics, StreamStats
from shiftwatch.statestore import PACKED_FROM, StateStore
from shiftwatch.status import StatusBoard
from shiftwatch.termtext import log_text as _printable
from shiftwatch.termtext import one_line as _one_line

#: Samples gathered from the journal's rounds before they are fed, stream by stream.
REPLAY_BATCH = 200_000


class LocalState:
    """A daemon's stream state in its state directory: the snapshot and the journal.

    Parameters
    ----------
    engines : the daemon's engines by stream name (streams restored or replayed get one here).
    filters : the ``topic`` of the config entry each engine was made for (kept with it).
    store : the snapshot (``<state.dir>/snapshots``).
    journal : the journal beside it (None with state.journal: false).
    config : the daemon's configuration as it is now (streams change at a reload).
    floor : plans, holds and acknowledgements (saved with the snapshot; engines attached).
    status : the status page (its last records are saved with the snapshot).
    pool : the calm streams' pool (its waiting samples are saved with the snapshot).
    tz : display.time_zone (the restore's line says when the snapshot was saved).
    engine_for : the daemon's engine of a stream, made if need be (None at the stream limit).
    emit : publish an alert record (through the outbox) made at a given time of arrival.
    """

    def __init__(self, *, engines: dict[str, StreamEngine], filters: dict[str, str], store: StateStore,
                 journal: Journal | None, config: Callable[[], Config], floor: FloorDesk,
                 status: StatusBoard, pool: CalmPool | None, tz: str,
                 engine_for: Callable[[str, StreamConfig, str | None], StreamEngine | None],
                 emit: Callable[[AlertRecord, float], None], metrics: Metrics,
                 log: logging.Logger) -> None:
        self.engines = engines
        self.filters = filters
        self.store = store
        self.journal = journal
        self.config = config
        self.floor = floor
        self.status = status
        self.pool = pool
        self.tz = tz
        self.engine_for = engine_for
        self.emit = emit
        self.metrics = metrics
        self.log = log
        # Streams restored under a name stream_name() now gives differently (old -> new).
        self.renamed: dict[str, str] = {}
        # The last snapshot failed: no early one when the journal is half full (see
        # journal_half_full), until one succeeds.
        self.early_snapshot_failed = False

    def restore(self) -> None:
        """Load the last snapshot (each stream carries on without a second warm-up),
        then replay the journal of what was processed after it."""
        try:
            streams, meta = self.store.load()
        except OSError as exc:
            self.log.error("state snapshot in %s cannot be read (%s); streams warm up again",
                           self.store.directory, explain_os_error(exc, self.store.directory))
            streams, meta = {}, {}
        restored = 0
        self.floor.load(meta)
        filters = meta.get("filters")
        if not isinstance(filters, dict):  # snapshots written before it was saved
            filters = {}
        for name, state in streams.items():
            f = filters.get(name)
            spec = self.config().stream_for(name, f if isinstance(f, str) else None)
            if spec is None:
                continue
            old, name = name, current_stream_name(name, spec)
            if name != old:
                self.renamed[old] = name
                self.log.info("stream %s is now named %s (a SenML name that is a URN is read as "
                              "levels); its state carries over", _printable(old), _printable(name),
                              extra={"stream": name})
            eng = StreamEngine(name, spec.detection, unit=spec.unit)
            try:
                eng.set_state(state)
            except Exception as exc:  # noqa: BLE001  whatever is wrong with one entry costs that stream only
                self.metrics.states_set_aside.inc()
                self.log.warning("saved state of stream %s set aside (%s); it warms up again, the "
                                 "other streams are restored", _printable(name), _one_line(exc))
                continue
            self.engines[name] = eng
            self.filters[name] = spec.topic
            self.floor.attach(name, eng)
            restored += 1
        if streams:
            self.log.info("restored %d stream(s) from the snapshot of %s", restored,
                          stamp(float(meta.get("saved_at", 0.0)), self.tz))
        # The status page's last events (records of streams no longer configured are left out).
        saved = meta.get("status_records")
        if isinstance(saved, list):
            self.status.restore([r for r in saved if isinstance(r, list) and len(r) == 2
                                 and isinstance(r[1], dict) and isinstance(r[1].get("stream"), str)
                                 and r[1]["stream"] in self.engines])
        self._feed_saved_waiting(meta.get("waiting"))
        token = meta.get("journal")
        self.replay_journal(token if isinstance(token, str) else "none")

    def _feed_saved_waiting(self, waiting: Any) -> None:
        """The samples the snapshot's pooled streams had waiting (see snapshot()), fed to
        their engines before the journal is replayed.  A damaged entry costs its stream's
        waiting samples only, with a line naming it."""
        if waiting is None:
            return  # a snapshot written before the pool
        if not isinstance(waiting, dict):
            self.log.warning("snapshot field 'waiting' is not a mapping (%s); the samples that "
                             "waited in it are not fed", type(waiting).__name__)
            return
        now = time.time()
        unknown: list[str] = []
        for name, entry in waiting.items():
            eng = self.engines.get(self.renamed.get(name, name)) if isinstance(name, str) else None
            if eng is None:
                unknown.append(str(name))
                continue
            try:
                t, x, a = (np.asarray(col, dtype=np.float64) for col in entry)
                if not t.ndim == x.ndim == a.ndim == 1 or not t.shape == x.shape == a.shape:
                    raise ValueError("three lists of equal length expected")
            except (TypeError, ValueError) as exc:
                self.metrics.states_set_aside.inc()
                self.log.warning("snapshot field 'waiting' of stream %s set aside (%s); the stream "
                                 "carries on without those samples", _printable(str(name)), _one_line(exc))
                continue
            for rec in eng.process(t, x, a).records:
                self.emit(rec, now)
        if unknown:
            self.log.warning("snapshot field 'waiting' has samples of %d stream(s) not restored (no longer "
                             "configured, or their state was set aside; the first: %s); they are not fed",
                             len(unknown), _printable(unknown[0]))

    def replay_journal(self, token: str) -> None:
        """Feed the engines the rounds journaled on top of the snapshot.  Their alert
        records are not published again: they reached the outbox before the round
        was journaled.

        Rounds are read one at a time and each stream's samples from many rounds
        are fed in one batch (up to REPLAY_BATCH samples in all), which gives the
        same state and records as round by round (batch splits change nothing in
        the engine) at a fraction of the calls, with one batch in memory.
        """
        if self.journal is None:
            return
        samples = rounds = 0
        pending: dict[str, list[JournalGroup]] = {}
        held = 0
        try:
            for groups in self.journal.replay(token):
                rounds += 1
                for g in groups:
                    pending.setdefault(g.stream, []).append(g)
                    held += len(g.values)
                if held >= REPLAY_BATCH:
                    samples += self._replay_batch(pending)
                    pending, held = {}, 0
        except OSError as exc:
            self.journal_failed(exc)
        samples += self._replay_batch(pending)
        if self.journal.lost is not None:  # logged by the journal, with what it held
            self.metrics.journal_damaged.inc()
        for name, eng in self.engines.items():
            self.metrics.update_stream(name, StreamStats.from_engine(eng))
        if rounds:
            self.log.info("replayed %d sample(s) in %d round(s) from the journal", samples, rounds)

    def _replay_batch(self, pending: dict[str, list[JournalGroup]]) -> int:
        samples = 0
        for stream, gs in pending.items():
            last = gs[-1]
            spec = self.config().stream_for(stream, last.topic_filter or self.filters.get(stream))
            name = stream if spec is None else self.renamed.get(stream) or \
                current_stream_name(stream, spec)
            eng = None if spec is None else self.engine_for(name, spec, last.unit)
            if eng is None:
                continue
            times = np.concatenate([g.times for g in gs])  # copies: the journal's are read-only views
            values = np.concatenate([g.values for g in gs])
            arrived = np.concatenate([g.arrived for g in gs])
            try:
                for rec in eng.process(times, values, arrived).records:
                    self.floor.note(rec)  # published before the crash; kept for acknowledgement
            except Exception:  # as in process(): one stream's batch, never the daemon
                self.log.exception("internal error while replaying stream %s", _printable(stream))
            samples += len(values)
        return samples

    def journal_round(self, fed: list[JournalGroup], singles: JournalSingles | None) -> None:
        """A round's samples (the groups fed, and the pool's single samples as columns) into
        the journal: called before the round's acknowledgements leave."""
        if (fed or singles) and self.journal is not None:
            if not self.journal.is_open:
                # Closed by an earlier failure (a write, a journal deleted with its directory, the
                # bound reached): this round goes unjournaled too, until a snapshot succeeds and
                # starts a fresh journal.  Counted, as README promises (until 2026-12-05 only the
                # round that failed was).
                self.metrics.journal_failures.inc()
            else:
                try:
                    self.journal.append(fed, singles)
                except OSError as exc:
                    self.journal_failed(exc)

    def journal_failed(self, exc: OSError) -> None:
        self.metrics.journal_failures.inc()
        if self.journal is not None:
            self.journal.close()
        self.log.error("sample journal in %s could not be written (%s); until the next good snapshot "
                       "a crash loses the samples processed since the last one", self.store.directory,
                       explain_os_error(exc, self.store.directory))

    def snapshot(self) -> bool:
        """Save every engine's state; a new journal starts with the snapshot."""
        token = secrets.token_hex(8)
        # Samples waiting in the pool were journaled, not fed: the snapshot carries them
        # (the new journal starts after them), and a start feeds them first.
        waiting = {} if self.pool is None else {
            n: [t.tolist(), x.tolist(), a.tolist()] for n, (t, x, a) in self.pool.waiting_samples().items()}
        try:
            self.store.save(_EngineStates(self.engines),
                            {"saved_at": time.time(), "journal": token, "waiting": waiting,
                             "filters": {n: self.filters[n] for n in self.engines
                                         if n in self.filters},
                             "status_records": self.status.export(),
                             "floor": self.floor.get_state()})
        except OSError as exc:
            # The journal still belongs to the previous snapshot: it keeps growing.
            self.metrics.snapshot_failures.inc()
            self.early_snapshot_failed = True
            self.log.error("snapshot to %s failed: %s; detection carries on", self.config().state.dir,
                           explain_os_error(exc, self.store.directory))
            return False
        self.metrics.snapshots.inc()
        self.floor.saved()
        self.floor.prune(time.time(), self.engines)
        self.early_snapshot_failed = False
        if self.journal is not None:
            try:
                self.journal.restart(token)
            except OSError as exc:
                self.journal_failed(exc)
        return True

    def journal_half_full(self) -> bool:
        """The journal is half its bound: snapshot now (which starts a new one), so that
        it reaches the bound only while snapshots fail.  After a failed snapshot only
        the regular interval applies, until one succeeds."""
        j = self.journal
        return (j is not None and j.is_open and j.size >= j.max_bytes // 2
                and not self.early_snapshot_failed)

    def check_journal(self) -> None:
        """Notice a journal deleted, replaced or damaged behind the daemon's back (see
        Journal.check): log it, count it, and start a fresh one through a snapshot, which
        holds everything the lost journal did."""
        if self.journal is None or not self.journal.is_open:
            return
        problem = self.journal.check()
        if problem is None:
            return
        self.metrics.journal_damaged.inc()
        self.log.error("sample journal %s %s: a crash now would lose the samples since the last "
                       "snapshot; taking a snapshot, which starts a fresh journal", self.journal.path,
                       problem)
        if not self.snapshot():
            self.journal.close()  # appending to a file that is gone helps nobody
            self.log.error("no fresh journal until a snapshot succeeds")


#: The entries of StreamEngine.get_state(arrays=True) that are arrays (or None).
_STATE_ARRAYS = ("times", "values", "event_times", "event_values", "unfolded_follow")


class _EngineStates(Mapping[str, dict[str, Any]]):
    """Each engine's state, made when the snapshot writer reaches it.

    A dict of every state at once held each window as lists of float objects for
    all streams together: with 10,000 streams the snapshot took the daemon from
    179 MB to a peak of 516 MB, and the freed heap left it at 234 MB.  One
    state at a time is all the writer needs."""

    __slots__ = ("_engines",)

    def __init__(self, engines: Mapping[str, StreamEngine]) -> None:
        self._engines = engines

    def __getitem__(self, name: str) -> dict[str, Any]:
        # The samples as arrays, which the snapshot packs as bytes: the same file as from
        # lists of floats (a short one stays a list, as the store keeps a short list),
        # without a float object per sample made and read again (about a fifth of a
        # snapshot's time).
        state = self._engines[name].get_state(arrays=True)
        for key in _STATE_ARRAYS:
            a = state[key]
            if a is not None and a.shape[0] < PACKED_FROM:
                state[key] = a.tolist()
        return state

    def __iter__(self) -> Iterator[str]:
        return iter(list(self._engines))

    def __len__(self) -> int:
        return len(self._engines)


def current_stream_name(name: str, spec: StreamConfig) -> str:
    """The name a stream saved under ``name`` has now.

    Releases before SenML names were read as levels named a SenML stream
    ``topic/urn:nid:a:b``; now it is ``topic/a/b`` (see
    :func:`shiftwatch.decode.readable_senml_name`).  For an entry of format
    ``senml`` the SenML part starts after the filter's levels (for a filter
    ending in ``#``, at the first level that starts with ``urn:``) and is
    named again; every other name is returned as it is.  A name that was cut
    and hashed (``~``) cannot be taken apart and stays.

    Examples
    --------
    >>> spec = StreamConfig("brackenfield/l4/+/senml", format="senml")
    >>> current_stream_name("brackenfield/l4/filler/senml/urn:brackenfield:l4:filler:fill_volume", spec)
    'brackenfield/l4/filler/senml/l4/filler/fill_volume'
    >>> current_stream_name("brackenfield/l4/filler/senml/oven2:zone3", spec)
    'brackenfield/l4/filler/senml/oven2:zone3'
    >>> current_stream_name("plant/x/urn:a:b:c", StreamConfig("plant/#", format="senml"))
    'plant/x/b/c'
    """
    if spec.format != "senml" or "~" in name:
        return name
    levels = name.split("/")
    fixed = spec.topic.split("/")
    if fixed[-1] == "#":
        cut = next((i for i in range(len(fixed) - 1, len(levels)) if levels[i][:4].lower() == "urn:"), None)
    else:
        cut = len(fixed)
    if cut is None or cut >= len(levels) or levels[cut][:4].lower() != "urn:":
        return name
    return stream_name("/".join(levels[:cut]), "/".join(levels[cut:]))
