"""The daemon's side of a shard whose stream state is kept in the cluster
(state.keep: cluster): streams loaded from the cluster, their samples parked while
they wait for their last writer, each round journaled per stream, other shards'
samples handed on, streams let go when they move away, and the snapshots.  How all
of it works, and why, is in DEVELOPERS.md, "Shards and cluster state".

:class:`ClusterKeeper` belongs to the daemon's main thread.  It changes the daemon's
engines and their filters (the dicts it is given: it makes engines as it loads
streams and drops those that moved away), reads the cluster state through a callable
(made when the daemon joins the cluster), feeds and publishes through the callables
it is given, and keeps no reference to the daemon.  Without state in the cluster only
:meth:`ClusterKeeper.take_foreign` has work: other shards' samples are set aside.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from shiftwatch.config import Config, StreamConfig
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import AlertRecord
from shiftwatch.journal import JournalGroup
from shiftwatch.levels import LevelBoard
from shiftwatch.metrics import Metrics, StreamStats
from shiftwatch.moved import MovedStreams
from shiftwatch.natsio import ClusterError
from shiftwatch.outbox import OutboxItem
from shiftwatch.partition import Ownership
from shiftwatch.shardcount import ShardCount
from shiftwatch.status import StatusBoard
from shiftwatch.termtext import log_text as _printable
from shiftwatch.termtext import one_line as _one_line

if TYPE_CHECKING:
    from shiftwatch.clusterstate import ClusterState
    from shiftwatch.daemon import RateLimitedLog

#: run_stream(name, spec, unit, times, values, arrivals, now): feed a stream samples
#: through the daemon's usual path (engine made if need be, held samples kept out,
#: records published); the samples fed, to journal (None: nothing fed).
RunStream = Callable[[str, StreamConfig, str | None, list[float], list[float], list[float], float],
                     JournalGroup | None]


class ClusterKeeper:
    """A shard's streams as the cluster keeps them.

    Parameters
    ----------
    engines : the daemon's engines by stream name (streams loaded get one here, streams
        let go lose theirs).
    filters : the ``topic`` of the config entry each engine was made for (kept with it).
    cluster : the cluster state (shiftwatch.clusterstate.ClusterState; None until the
        daemon has joined the cluster, and with state kept locally).
    config : the daemon's configuration as it is now (streams and shard.of change at a
        reload).
    shards : the shard count run and the streams it owns (shiftwatch.shardcount).
    moved : the streams that moved here and wait for their last writer (shiftwatch.moved).
    levels, status : the retained levels and the status page (a stream let go leaves both).
    prefix : alerts.topic_prefix (the outbox's alert records of a stream go with its snapshot).
    run_stream : see :data:`RunStream`.
    emit : publish an alert record (through the outbox) made at a given time of arrival.
    publish : publish (topic, payload, qos) once more, not retained: a record a load
        brought back from the cluster.
    outbox_pending : the alert records not yet acknowledged by the broker.
    count_drop : count samples set aside, by reason.
    """

    def __init__(self, *, engines: dict[str, StreamEngine], filters: dict[str, str],
                 cluster: Callable[[], ClusterState | None], config: Callable[[], Config],
                 shards: ShardCount, moved: MovedStreams, levels: LevelBoard, status: StatusBoard,
                 prefix: str, run_stream: RunStream, emit: Callable[[AlertRecord, float], None],
                 publish: Callable[[str, bytes, int], None],
                 outbox_pending: Callable[[], list[OutboxItem]],
                 count_drop: Callable[[str, int], None], metrics: Metrics, rlog: RateLimitedLog,
                 log: logging.Logger) -> None:
        self.engines = engines
        self.filters = filters
        self._cluster = cluster
        self.config = config
        self.shards = shards
        self.moved = moved
        self.levels = levels
        self.status = status
        self.prefix = prefix
        self.run_stream = run_stream
        self.emit = emit
        self.publish = publish
        self.outbox_pending = outbox_pending
        self.count_drop = count_drop
        self.metrics = metrics
        self.rlog = rlog
        self.log = log
        # Streams fed since the last snapshot to the cluster (state.keep: cluster only: a
        # snapshot on disk saves every stream, and the set would hold every name for good).
        # The daemon adds the streams it feeds.
        self.fed_since_snapshot: set[str] = set()
        # Streams whose samples this daemon parked and has not loaded since: when a reload
        # let one go while it waited, samples of it that still come here are parked behind
        # those, not journaled ahead of them (see take_foreign).
        self.parked_here: set[str] = set()

    @property
    def cluster(self) -> ClusterState | None:
        return self._cluster()

    @property
    def owner(self) -> Ownership | None:
        """With shard.hashed_levels: the streams the mapping gives this shard."""
        return self.shards.owner

    def load(self, names: list[str], *, defer: bool = False) -> None:
        """Streams seen for the first time by this daemon: their state from the cluster
        (snapshot, then the journal after it), fed to new engines.  The records the
        journal's replay makes are published again: the outbox that held them may
        have been on another box.

        With ``defer``, a stream whose journal another daemon wrote moments ago (it
        moved here when the shards changed, and that daemon may still hold older
        samples of it) gets no engine yet: it is deferred (see shiftwatch.moved).
        When that daemon was another shard, it is asked to pass on what it holds
        (shiftwatch.handover) and the stream waits for its answer, at most
        cluster.handover_wait; otherwise it waits cluster.redelivery_wait from
        the journal's last write."""
        if not names or self.cluster is None:
            return
        try:
            loaded = self.cluster.load(names)
        except ClusterError as exc:
            raise ClusterError(f"loading stream state: {exc}") from None
        restored = replayed = 0
        now = time.time()
        unparked: list[JournalGroup] = []
        parked_last: dict[str, int] = {}
        for name, r in loaded.items():
            if defer and self.moved.defer(name, self.shards.topic_of.get(name), r, now):
                continue
            self.parked_here.discard(name)  # loaded here: this load feeds what is parked
            if r.problem is not None:
                self.metrics.states_set_aside.inc()
                self.log.warning("stream %s: %s; what could be read is used", _printable(name), r.problem)
            for topic, payload, qos in r.records:
                self.publish(topic, payload, qos)
            if r.state is None and not r.groups and not r.parked_last:
                continue
            # The filter of the entry the stream was made for: the snapshot's, or (none yet)
            # the latest journal or parked message's.  A cut name (a topic of more than 256
            # characters) matches its entry only through it.
            topic_filter = r.topic_filter or next(
                (g.topic_filter for g in reversed([*r.groups, *r.parked]) if g.topic_filter), None)
            spec = self.config().stream_for(name, topic_filter)
            if spec is None:
                if r.parked_last:
                    from shiftwatch.clusterstate import JOURNAL_MAX_AGE

                    # Its entry was removed while it waited: no engine, and the parked
                    # samples stay for a configuration that has the entry again.
                    self.log.warning("stream %s has no stream entry any more: its %d parked sample(s) "
                                     "stay in %s (subject %s, kept up to %d days) for a configuration "
                                     "that has its entry again", _printable(name),
                                     sum(len(g.values) for g in r.parked), self.cluster.parking,
                                     self.cluster.parked_subject(name), round(JOURNAL_MAX_AGE / 86400))
                continue
            eng = StreamEngine(name, spec.detection, unit=r.unit or spec.unit)
            if r.state is not None:
                try:
                    eng.set_state(r.state)
                except Exception as exc:  # noqa: BLE001  costs that stream only
                    from shiftwatch.clusterstate import stream_key as _stream_key

                    self.metrics.states_set_aside.inc()
                    self.log.warning("saved state of stream %s (bucket %s key %s) set aside (%s); it "
                                     "warms up again", _printable(name), self.cluster.bucket,
                                     _stream_key(name), _one_line(exc))
                    eng = StreamEngine(name, spec.detection, unit=r.unit or spec.unit)
                restored += 1
            self.engines[name] = eng
            self.filters[name] = spec.topic
            for g in r.groups:
                try:
                    res = eng.process(np.array(g.times), np.array(g.values), np.array(g.arrived))
                except Exception:
                    self.log.exception("internal error while replaying stream %s", _printable(name))
                    continue
                replayed += len(g.values)
                for rec in res.records:
                    self.emit(rec, time.time())
            if r.parked_last:
                parked_last[name] = r.parked_last
                jg = self._unpark(name, spec, r.unit or spec.unit, r.parked, now)
                if jg is not None:
                    unparked.append(jg)
            self.metrics.update_stream(name, StreamStats.from_engine(eng))
        if restored or replayed:
            self.log.info("loaded %d stream(s) from the cluster (%d journaled sample(s) replayed)",
                          restored, replayed)
        if parked_last:
            self._journal_unparked(unparked, parked_last, now)

    def _unpark(self, name: str, spec: StreamConfig, unit: str | None, parked: list[JournalGroup],
                now: float) -> JournalGroup | None:
        """Feed a loaded stream the samples parked while it waited (shiftwatch.clusterstate),
        in time order after its journal; the samples fed, to journal."""
        if not parked:
            return None
        t = np.concatenate([g.times for g in parked])
        order = np.argsort(t, kind="stable")
        v = np.concatenate([g.values for g in parked])[order]
        a = np.concatenate([g.arrived for g in parked])[order]
        return self.run_stream(name, spec, unit, t[order].tolist(), v.tolist(), a.tolist(), now)

    def _journal_unparked(self, fed: list[JournalGroup], lasts: dict[str, int], now: float) -> None:
        """The unparked samples into the streams' journals, then out of the parking.  Raises
        ClusterError when the journal did not take some: those streams' engines are dropped
        (their samples stay parked) and the caller loads them again later; the others'
        parked samples, in their journals now, are purged first (loaded again, they would
        be fed twice)."""
        assert self.cluster is not None
        try:
            refused = self.cluster.journal(fed) if fed else []
        except ClusterError:
            refused = fed
        names = {g.stream for g in refused}
        for n in names:
            self.engines.pop(n, None)
        done = {n: last for n, last in lasts.items() if n not in names}
        try:
            if done:
                self.cluster.unpark(done)
        except ClusterError as exc:
            # They are in the journal: loaded again later, they are set aside as duplicates.
            self.rlog.warning("cluster_unpark", f"parked samples of {len(done)} stream(s) not "
                              f"removed from the cluster ({exc}); a later load of those streams sets "
                              "them aside as duplicates", now)
        if names:
            raise ClusterError(f"the parked samples of {len(names)} stream(s) (e.g. "
                               f"{_printable(next(iter(names)))}) did not reach their journal")

    def park(self, groups: dict[str, list[Any]], now: float) -> bool:
        """The round's samples of the deferred streams (waiting for their last writer) into
        the cluster's parking, so that the round can be acknowledged while they wait: a
        shard holding its rounds unacknowledged is sent nothing more once it holds the
        broker's limit of them (NATS: max_ack_pending), asks for its own answers
        included.  False: the cluster did not take them (the round is held)."""
        assert self.cluster is not None
        parked = [JournalGroup(name, unit, np.asarray(times, dtype=np.float64),
                               np.asarray(values, dtype=np.float64), np.asarray(arrivals, dtype=np.float64),
                               self.filters.get(name, spec.topic))
                  for name, (spec, unit, times, values, arrivals, *_prior) in groups.items()
                  if name in self.moved.deferred]
        if not parked:
            return True
        try:
            # Counted as the cluster stores them: a round held after this (another shard's
            # samples not written, say) parks them again, and the cluster keeps one copy.
            # Until 2026-12-04 each attempt counted them all again.
            self.cluster.park(parked, stored=self.metrics.samples_parked.inc)
        except ClusterError as exc:
            self.metrics.journal_failures.inc()
            self.rlog.warning("cluster_park", f"samples of streams waiting for their last writer not "
                              f"parked in the cluster ({exc}); the round is held and tried again", now)
            return False
        self.parked_here.update(g.stream for g in parked)
        return True

    def journal(self, fed: list[JournalGroup], now: float, *, started: Any = None) -> bool:
        """The round's samples into the cluster's journal; False when the cluster did not
        take them (the round then stays unacknowledged).  ``started``: the round's
        ``JournalRound``, to which ``fed`` was added as it was fed."""
        assert self.cluster is not None
        try:
            refused = started.wait() if started is not None else self.cluster.journal(fed)
            for _attempt in range(2):
                if not refused:
                    return True
                # Written by another daemon meanwhile (the stream moved between shards):
                # its engine here is stale.  Load it again and feed it this round once more.
                if self.owner is not None:
                    theirs = [g for g in refused if not self.shards.owns(g.stream)]
                    for g in theirs:
                        self.cluster.unsigned.pop(g.stream, None)
                    if theirs:
                        self.let_go([g.stream for g in theirs], save=False)
                        self.count_drop("other_shard", sum(len(g.values) for g in theirs))
                        refused = [g for g in refused if self.shards.owns(g.stream)]
                        if not refused:
                            return True
                names = [g.stream for g in refused]
                self._say_refused(names, "were written by another daemon meanwhile (they moved between "
                                  "shards)", "reloading them from the cluster")
                for n in names:
                    self.engines.pop(n, None)
                self.load(names)
                again = []
                for g in refused:
                    spec = self.config().stream_for(g.stream, g.topic_filter)
                    if spec is None:
                        continue
                    jg = self.run_stream(g.stream, spec, g.unit, list(g.times), list(g.values),
                                          list(g.arrived), now)
                    if jg is not None:
                        again.append(jg)
                refused = self.cluster.journal(again)
            if refused:
                # Another daemon keeps writing them: it owns them now.  This daemon lets
                # them go (their engines here are stale) and sets the round's samples of
                # them aside, counted: holding the round would only have it delivered
                # again, to the same end.
                lost = sum(len(g.values) for g in refused)
                for g in refused:
                    self.cluster.unsigned.pop(g.stream, None)
                    self.engines.pop(g.stream, None)
                    self.metrics.remove_stream(g.stream)
                self.count_drop("stream_moved", lost)
                self.log.warning("%d stream(s) are written by another daemon now (e.g. %s); "
                                 "%d sample(s) of them that came here set aside", len(refused),
                                 _printable(refused[0].stream), lost)
            return True
        except ClusterError as exc:
            self.metrics.journal_failures.inc()
            self.rlog.warning("cluster_journal", f"cluster journal not written ({exc}); the round "
                              "stays unacknowledged and is delivered again", now)
            return False

    def _say_refused(self, names: list[str], moved_text: str, then: str) -> None:
        """Why the cluster refused these streams (a journal write, a snapshot): another
        daemon wrote them (``moved_text``), or a message no daemon wrote ends their journal
        (``ClusterState.unsigned``); ``then``: what this daemon does about it."""
        assert self.cluster is not None
        unsigned = {n: self.cluster.unsigned.pop(n) for n in names if n in self.cluster.unsigned}
        moved = [n for n in names if n not in unsigned]
        if unsigned:
            first = next(iter(unsigned))
            self.log.warning("%d stream(s) have a journal message that no shiftwatch wrote (no writer "
                             "header; put there by hand or by another program?), e.g. %s: %s "
                             "sequence %d; %s", len(unsigned), _printable(first), self.cluster.stream,
                             unsigned[first], then)
        if moved:
            self.log.warning("%d stream(s) %s, e.g. %s; %s", len(moved), moved_text,
                             _printable(moved[0]), then)

    def take_foreign(self, foreign: dict[str, list[Any]], now: float) -> bool:
        """Samples of streams the mapping gives another shard: not fed to an engine.
        With state in the cluster they go to the stream's journal, stating the last
        sequence this daemon knows of it (0, no message yet, for a stream it never
        had: NATS may have held all of an old owner's deliveries back): its owner
        loads them with the snapshot.  When the journal refuses them (the stream was
        written since this daemon knew it), and for a stream whose samples this daemon
        parked before, they are parked (ClusterState.park), unless the owner wrote the
        stream since the last change of the mapping (ShardCount.owners_began: set
        aside): an owner that is still waiting for this shard's answer (it asks the shard that wrote the stream last,
        or that the mapping before the last change gave it) feeds them with its own
        parked samples in time order; one that has begun sets them aside at its next
        load of the stream, as out of order.  Without the cluster they are set aside.
        All count as other_shard.  False: the cluster did not answer (the round is held
        and taken again)."""
        assert self.owner is not None
        n = sum(len(g[3]) for g in foreign.values())
        handed = 0
        if self.cluster is not None:
            out = []
            for name, (spec, unit, times, values, arrivals) in foreign.items():
                if name not in self.engines:
                    out.append(JournalGroup(name, unit, np.asarray(times, dtype=np.float64),
                                            np.asarray(values, dtype=np.float64),
                                            np.asarray(arrivals, dtype=np.float64),
                                            self.filters.get(name, spec.topic)))
            # A stream this shard parked samples of (while it waited for an answer, or
            # refused by its journal before): what still comes of it is parked behind
            # those, whose next owner feeds the parking after the journal in time order.
            # Journaled, these newer samples came before the parked ones, which were then
            # set aside as out of order.
            behind = [g for g in out if g.stream in self.parked_here]
            out = [g for g in out if g.stream not in self.parked_here]
            if out or behind:
                try:
                    refused = self.cluster.journal(out) if out else []
                    for g in refused:
                        self.cluster.unsigned.pop(g.stream, None)  # (refused as another shard's stream)
                    # Refused: the owner wrote the stream after this shard last knew it.
                    # Until 2026-12-04 they were set aside, and an owner that took a stream
                    # back (two changes in a row) lost what the mapping between had sent a
                    # shard that was frozen meanwhile: parked now, unless the owner wrote
                    # the stream since the last change (it has begun, and reads the parking
                    # only at its next load, which may never come: set aside, counted now).
                    # So too for those parked behind earlier ones: once the owner has read
                    # the parking and written on, nothing reads them but a later load.
                    by = {g.stream: self.cluster.refused_by.pop(g.stream, (None, None)) for g in refused}
                    if behind:
                        by.update(self.cluster.last_written({g.stream for g in behind}))
                    begun = self.shards.owners_began(by)
                    set_aside = [g for g in (*refused, *behind) if g.stream in begun]
                    parked = [g for g in (*refused, *behind) if g.stream not in begun]
                    self.parked_here.difference_update(begun)
                    if parked:
                        self.cluster.park(parked)
                        self.parked_here.update(g.stream for g in parked)
                except ClusterError as exc:
                    self.metrics.journal_failures.inc()
                    self.rlog.warning("cluster_journal", f"samples of another shard's streams not "
                                      f"written to their journal ({exc}); the round is held and "
                                      "tried again", now)
                    return False
                no = {id(g) for g in refused}
                handed = sum(len(g.values) for g in (*(g for g in out if id(g) not in no), *parked))
                if set_aside:
                    self.rlog.warning("other_shard_late", lambda: (
                        f"{sum(len(g.values) for g in set_aside)} sample(s) of {len(set_aside)} stream(s) "
                        f"of other shards (e.g. {_printable(set_aside[0].stream)}) set aside: their "
                        "owner has written them since the last change of shard.of, after these were "
                        "sent here"), now)
        self.count_drop("other_shard", n)
        if handed:
            self.metrics.samples_handed_over.inc(handed)
        for name in foreign:
            if self.owner.first_sight(name):
                k = self.owner.partition(self.shards.topic_of.get(name, name))

                def text(name: str = name, k: int | None = k) -> str:
                    return (f"stream {_printable(name)} belongs to shard {k} (shard.of "
                            f"{self.owner.of if self.owner else '?'}), not to this one: its samples "
                            "are not fed here (with state in the cluster they are written to the "
                            "stream's journal, or parked, for its owner; with local state they are "
                            "set aside)")

                self.rlog.warning("other_shard", text, now, extra={"stream": name})
        return True

    def let_go(self, names: list[str], *, save: bool = True) -> None:
        """Streams this shard no longer owns: their state saved (state in the cluster),
        their engines and series dropped.  Their open events carry on with the new owner."""
        names = [n for n in names if n in self.engines]
        if save and names and self.cluster is not None:
            self.snapshot(names)
        for n in names:
            del self.engines[n]
            self.filters.pop(n, None)
            self.fed_since_snapshot.discard(n)
            self.levels.let_go(n)
            self.metrics.remove_stream(n)
            self.status.forget(n)

    def let_go_moved(self) -> None:
        """The count taken up at a reload moved streams away: let them go."""
        sh = self.config().shard
        assert sh is not None
        gone = [n for n in self.engines if not self.shards.owns(n)]
        self.moved.let_go(self.shards.owns)
        self.let_go(gone)
        # (deferred streams keep theirs: a later reshard must still see where they belong)
        self.shards.prune_topics()
        self.log.info("shard.of is %d now: this shard owns the streams the mapping gives partition %d; "
                      "%d stream(s) let go (state saved to the cluster, engines dropped), %d kept",
                      sh.of, sh.number, len(gone), len(self.engines))

    def snapshot(self, only: list[str] | None = None) -> bool:
        """Save the streams fed since the last snapshot (or the streams ``only``) to the
        cluster, each with the alert records of it that the broker has not acknowledged yet."""
        assert self.cluster is not None
        names = [n for n in (self.fed_since_snapshot if only is None else only) if n in self.engines]
        pending: dict[str, list[tuple[str, bytes, int]]] = {}
        head = f"{self.prefix}/alerts/"
        for item in self.outbox_pending():
            if item.topic.startswith(head):
                pending.setdefault(item.topic[len(head):], []).append((item.topic, item.payload, item.qos))
        try:
            self.cluster.save({n: (self.engines[n].get_state(), self.filters.get(n), self.engines[n].unit,
                                   pending.get(n, [])) for n in names})
        except ClusterError as exc:
            self.metrics.snapshot_failures.inc()
            self.log.error("snapshot to the cluster failed: %s; detection carries on, the journal "
                           "keeps growing until one succeeds", exc)
            return False
        self.fed_since_snapshot.difference_update(names)
        self.metrics.snapshots.inc()
        if self.cluster.damaged:
            from shiftwatch.clusterstate import stream_key as _stream_key

            self.metrics.states_set_aside.inc(len(self.cluster.damaged))
            first = self.cluster.damaged[0]
            self.log.warning("%d stream(s) had an entry that is no stream state (damaged), e.g. %s "
                             "(bucket %s key %s): written anew from this daemon's engines",
                             len(self.cluster.damaged), _printable(first), self.cluster.bucket,
                             _stream_key(first))
        stale = [n for n in self.cluster.refused if n in self.engines]
        if stale:
            # Written by another daemon since this one last wrote or read them (they moved,
            # and this daemon had not let them go): its engines of them are stale.  Dropped
            # here; samples of them that still come load them afresh, or are refused by the
            # journal and set aside.
            self.let_go(stale, save=False)  # (its status-page entries go with them)
            self._say_refused(stale, "were written by another daemon since this one last did: not "
                              "saved over its work", "their engines here are dropped (loaded again "
                              "from the cluster with their next samples)")
        return True
