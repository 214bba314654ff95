"""A shard's view of the number of shards (shard.of, shard.hashed_levels) and of the
mapping they give: which streams it owns, whether the count it runs is disputed by the
other live shards, taking up a new count at a reload, and the cluster's mapping record.

:class:`ShardCount` belongs to the daemon's main thread.  It reads the lease and the
cluster state through the callables it is given (both are made when the daemon joins
the cluster), changes the daemon's configuration only through ``adopt``, and leaves
the streams the new mapping takes away to the daemon's ``moved_away``.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

from shiftwatch.config import Config, ShardConfig
from shiftwatch.handover import Handover
from shiftwatch.lease import ShardLease
from shiftwatch.metrics import Metrics
from shiftwatch.natsio import ClusterError
from shiftwatch.partition import Count, Ownership, count_disagreement, new_to_the_set
from shiftwatch.status import StatusBoard


class ShardCount:
    """The shard count this shard runs, and the ownership of streams it gives.

    Parameters
    ----------
    shard : the shard section the daemon started with (None: no shards).
    config : the daemon's configuration as it is now (shard.of changes at a reload).
    adopt : take ``(of, hashed_levels)`` into the daemon's configuration.
    moved_away : the count changed and was taken up: let go the streams this shard
        does not own any more (:meth:`owns` answers by the new mapping).
    keep_topic : whether the topic noted for a stream must be kept (it has an engine,
        or waits for its last writer) when the notes are pruned.
    topic_bound : at most this many topics are noted before the notes are pruned.
    lease, cluster : the shard's lease and the cluster state (None until the daemon has
        joined the cluster, and without one).
    handover : the daemon's handover of moved streams (None without state in the cluster).
    """

    def __init__(self, shard: ShardConfig | None, *, config: Callable[[], Config],
                 adopt: Callable[[int, tuple[int, ...] | None], None], moved_away: Callable[[], None],
                 keep_topic: Callable[[str], bool], topic_bound: int,
                 lease: Callable[[], ShardLease | None], cluster: Callable[[], Any],
                 handover: Handover | None, metrics: Metrics, status: StatusBoard,
                 log: logging.Logger) -> None:
        self.config = config
        self.adopt = adopt
        self.moved_away = moved_away
        self.keep_topic = keep_topic
        self.topic_bound = topic_bound
        self.lease = lease
        self.cluster = cluster
        self.handover = handover
        self.metrics = metrics
        self.status = status
        self.log = log
        # With shard.hashed_levels: the streams the mapping for shard.of partitions gives
        # this shard; the others' samples are not fed (see ClusterKeeper.take_foreign, reload).
        self.owner = Ownership(shard.number, shard.of, shard.hashed_levels) \
            if shard is not None and shard.hashed_levels else None
        self.topic_of: dict[str, str] = {}  # stream -> a topic it came on (with self.owner)
        # A count (shard.of, hashed levels) that agrees with no other live shard of the set is
        # not taken up (see take_up): at a start the shard leaves the cluster's mapping
        # record alone (unnoted) and takes no samples meanwhile (held) unless it is new to
        # the set; at a reload it goes on with the count it ran (pending: the configuration
        # that brought the new one).  All are looked at again every second.
        self.unnoted = False
        self.held = False
        self.new = False
        self.pending: Config | None = None
        self.said: str | None = None

    @property
    def rechecking(self) -> bool:
        """Whether the count waits to be taken up (see :meth:`recheck`)."""
        return self.unnoted or self.pending is not None

    # ---------------------------------------------------- stream ownership
    # With shard.hashed_levels each shard computes the partition of every topic as the
    # NATS mapping for shard.of partitions does (shiftwatch.partition) and feeds its
    # engines only its own streams.  When the number of shards changes, a moving
    # stream then has one writer at a time, decided by the mapping: the old owner
    # lets it go at its reload (snapshot, engine dropped) and writes what still
    # comes to it of the stream into the stream's journal, which the new owner
    # loads with the snapshot (README, "Running shards").
    def note_topic(self, name: str, topic: str) -> None:
        if name not in self.topic_of:
            if len(self.topic_of) >= self.topic_bound:
                self.prune_topics()
            self.topic_of[name] = topic

    def prune_topics(self) -> None:
        """Forget the topics of the streams the daemon keeps nothing of."""
        self.topic_of = {n: t for n, t in self.topic_of.items() if self.keep_topic(n)}

    def owns(self, name: str) -> bool:
        topic = self.topic_of.get(name)
        return self.owner is None or topic is None or self.owner.owns(topic)

    def moved_from(self, topic: str | None, now: float, written: float | None) -> int | None:
        """The shard that the mapping before the last change gave ``topic``, while that
        change is younger than cluster.handover_wait, the stream's journal (last written
        at ``written``) has not been written since, and that shard is another one (it
        can be asked); None otherwise.  From the cluster's mapping record, which every
        shard brings up to date at its start and at a reload (see note_mapping).  A
        stream written since the change was taken up under the new mapping: by an earlier
        run of this shard (a restart), which waits cluster.redelivery_wait instead; until
        2026-12-04 it asked the old owner again, and waited the whole handover_wait when
        that shard was gone (4 to 3)."""
        cluster = self.cluster()
        ho, remap = self.handover, cluster.remap if cluster is not None else None
        if ho is None or remap is None or topic is None or self.owner is None:
            return None
        k = remap.moved_from(topic, self.owner.number, now=now, wait=ho.wait, written=written)
        return k if ho.can_ask(k) else None

    def owners_began(self, by: dict[str, tuple[int | None, float | None]]) -> set[str]:
        """Of another shard's streams, with the shard and time of their journal's last
        message (the one that refused this shard's write), those whose owner (by this
        shard's mapping) wrote it at or after the last change of the mapping (the mapping
        record, read again: a change may have come since this shard last read it): that
        owner has begun the stream.  One that wrote it before the change may be waiting
        for this shard's answer (it took the stream back), and one whose message does not
        say (no headers, no record) is taken to wait.  Raises ClusterError."""
        cluster = self.cluster()
        assert cluster is not None and self.owner is not None
        if not by:
            return set()
        remap = cluster.read_mapping()
        if remap is None:
            return set()
        out = set()
        for name, (shard, at) in by.items():
            topic = self.topic_of.get(name)
            if (shard is not None and at is not None and topic is not None
                    and shard == self.owner.partition(topic) and at >= remap.since):
                out.add(name)
        return out

    # ------------------------------------------------------ the count itself
    def note_mapping(self, *, changed: bool) -> None:
        """Shards with shard.hashed_levels and state in the cluster: the cluster's mapping
        record says which mapping runs now and which ran before (ClusterState.note_mapping),
        so that a new owner knows where a stream was before the change, even one no shard
        has written yet.  A cluster that does not answer costs only that knowledge."""
        cluster = self.cluster()
        if cluster is None or self.owner is None or self.handover is None:
            return
        try:
            cluster.note_mapping(self.owner.of, self.owner.levels, changed=changed)
        except ClusterError as exc:
            self.log.warning("the mapping record in the cluster not brought up to date (%s): streams "
                             "that no shard wrote lately begin at once if they moved here", exc)
        if cluster.mapping_damaged is not None:
            # Written anew from this shard's mapping: the one before it is not known, so
            # streams that no shard wrote lately begin at once if they moved here.
            self.metrics.states_set_aside.inc()
            self.log.warning("%s: set aside and written anew with this shard's mapping (shard.of %d); "
                             "the mapping before is not known", cluster.mapping_damaged, self.owner.of)

    def disagreement(self, count: Count) -> str | None:
        """None when this shard may take up ``count`` (shard.of, hashed levels): see
        partition.count_disagreement, judged by the counts the other live shards announce in
        their leases; otherwise what disagrees (also when the leases cannot be read: the
        count is taken up only once they have said).  Notes in ``new`` whether the
        shard is new to the set (partition.new_to_the_set)."""
        self.new = False
        lease = self.lease()
        if lease is None or not count[1]:
            return None
        try:
            peers = lease.peers()
        except ClusterError as exc:
            return f"the other shards' shard.of cannot be read ({exc})"
        self.new = new_to_the_set(lease.shard, peers)
        return count_disagreement(lease.shard, count, peers)

    def take_up(self) -> None:
        """At start: the shard's count goes into the cluster's mapping record (note_mapping)
        only when it agrees with the other live shards of the set.  Otherwise (one shard of
        a running set started with a wrong shard.of, say) the record is left as it is and
        the shard takes no samples (they stay with the broker) until another live shard
        runs the same count or this one's configuration agrees again (recheck).  A
        shard new to the set (step 1 of a change: past every other shard's shard.of, so the
        servers' mapping sends it nothing yet) takes samples all the same, as before: only
        the record waits.
        Until 2026-12-04 every start rewrote the record: a typo made the other shards take
        the shard's own count for a change of the number of shards, and the real mapping
        before was lost."""
        why = None if self.owner is None else self.disagreement((self.owner.of, self.owner.levels))
        if why is None:
            self.note_mapping(changed=False)
            return
        self.unnoted = True
        self.held = not self.new
        self.say(why)

    def say(self, why: str | None) -> None:
        """The disagreement of this shard's count (None: none any more) in the log (once per
        change of what is said), the metrics and the status page."""
        lease = self.lease()
        self.metrics.shard_of_disputed.set(0 if why is None else 1)
        if why is None:
            self.status.set_notice("shard_of", None)
            if self.said is not None:
                self.log.info("shard %d: shard.of %d is taken up (it agrees with the other live shards, "
                              "or is the one in force); the cluster's mapping record is brought up to date",
                              lease.shard if lease else -1,
                              self.owner.of if self.owner is not None else 0)
            self.said = None
            return
        if self.pending is not None and self.owner is not None:
            then = (f"it goes on with shard.of {self.owner.of}, the count in force, and leaves the cluster's "
                    "mapping record as it is")
        elif not self.held:
            then = ("this shard is new to the set (past the others' shard.of): it takes the samples of its "
                    "partition (none come before the servers' mapping changes) and leaves the cluster's "
                    "mapping record as it is")
        else:
            then = ("it takes no samples (they stay with the broker, unacknowledged) and leaves the "
                    "cluster's mapping record as it is")
        text = (f"{why}: {then}, until another live shard runs the same shard.of (a change of the "
                "number of shards: reload or restart the others too) or this shard's configuration "
                "agrees again (a typo: correct it and reload)")
        self.status.set_notice("shard_of", text)
        if text != self.said:
            self.log.warning("shard %d: %s", lease.shard if lease else -1, text)
            self.said = text

    def recheck(self) -> None:
        """Every second while this shard's count disagrees with the other live shards': taken
        up once it agrees (another shard changed too)."""
        if self.pending is not None:
            pending = self.pending
            assert pending.shard is not None
            why = self.disagreement((pending.shard.of, tuple(pending.shard.hashed_levels or ())))
            if why is None:
                self.pending = None
                self.reload(pending, agreed=True)
            self.say(why)
        elif self.unnoted:
            assert self.owner is not None
            why = self.disagreement((self.owner.of, self.owner.levels))
            if why is None:
                self.held = self.unnoted = False
                self.note_mapping(changed=False)
            self.say(why)

    def reload(self, new: Config, *, agreed: bool = False) -> None:
        """SIGHUP: take shard.of and shard.hashed_levels from the file (the number, the
        prefix and the cluster stay until the next start), once the count agrees with the
        other live shards of the set (see take_up; ``agreed``: checked already)."""
        sh, nsh = self.config().shard, new.shard
        if sh is None or nsh is None:
            if (sh is None) != (nsh is None):
                self.log.warning("the shard section was added or removed: that takes a restart")
            return
        if nsh.topic_prefix != sh.topic_prefix and not agreed:
            self.log.warning("shard.topic_prefix changed: that takes a restart (kept: %s)", sh.topic_prefix)
        count = (nsh.of, tuple(nsh.hashed_levels or ()))
        lease = self.lease()
        if self.held:
            # Started with a count the other live shards disagreed with: nothing was taken
            # under it, so the file's count simply replaces it, and is judged in its turn.
            self.adopt(nsh.of, nsh.hashed_levels)
            if lease is not None:
                lease.announce(count if nsh.hashed_levels else None)
            if not nsh.hashed_levels or self.owner is None:
                self.owner = None
                self.held = self.unnoted = False
                self.say(None)
                return
            self.owner.change(nsh.of, nsh.hashed_levels)
            self.recheck()
            return
        if (nsh.of, nsh.hashed_levels) == (sh.of, sh.hashed_levels):
            if self.pending is not None:
                # Back to the count in force (a typo corrected): nothing to take up.
                self.pending = None
                if lease is not None:
                    lease.announce(count if nsh.hashed_levels else None)
                self.say(None)
            return
        taken = False  # a disputed count that agrees now: said once the new one is in force
        if nsh.hashed_levels and lease is not None and not agreed:
            lease.announce(count)
            why = self.disagreement(count)
            if why is not None:
                self.pending = new
                self.say(why)
                return
            if self.pending is not None or self.unnoted:
                self.pending = None
                self.unnoted = False
                taken = True
        self.adopt(nsh.of, nsh.hashed_levels)
        if not nsh.hashed_levels:
            self.owner = None
            self.log.info("shard.of is %d now; shard.hashed_levels is not set, so this shard feeds "
                          "every stream that reaches it", nsh.of)
            return
        if self.owner is None:
            self.owner = Ownership(sh.number, nsh.of, nsh.hashed_levels)
        else:
            self.owner.change(nsh.of, nsh.hashed_levels)
        if taken:
            # Until 2026-12-05 said before the change: the line named the count before.
            self.say(None)
        self.note_mapping(changed=True)
        if sh.number >= nsh.of:
            self.log.warning("shard %d is past shard.of %d: it owns no stream now; stop it once the "
                             "NATS servers' mapping has %d partitions", sh.number, nsh.of, nsh.of)
        self.moved_away()
