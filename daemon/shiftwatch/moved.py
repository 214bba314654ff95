"""Streams that moved to this shard and wait for the daemon that wrote them last
(state.keep: cluster): which wait and until when, the asks sent and the answers
taken and owed (the exchange itself is :class:`shiftwatch.handover.Handover`).

A stream whose journal another daemon wrote moments ago, or that the mapping
before a young change of shard.of gave another shard, gets no engine at first: it
is *deferred*.  Its samples are parked in the cluster meanwhile
(``ClusterKeeper.park``, shiftwatch.keeper); once its wait is over (the answer came,
``cluster.handover_wait`` or ``cluster.redelivery_wait`` passed)
:meth:`MovedStreams.release` has the daemon load it afresh.

:class:`MovedStreams` belongs to the daemon's main thread; the NATS thread only
appends answers to :attr:`MovedStreams.answers`.  It loads, publishes and sends
through the callables it is given and keeps no reference to the daemon.
"""

from __future__ import annotations

import logging
import time
from collections import deque
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from shiftwatch.handover import Handover, HandoverError
from shiftwatch.metrics import Metrics
from shiftwatch.natsio import ClusterError
from shiftwatch.partition import Ownership
from shiftwatch.termtext import log_text as _printable

if TYPE_CHECKING:
    from shiftwatch.daemon import RateLimitedLog


class MovedStreams:
    """The deferred streams of one daemon and its side of the handover.

    Parameters
    ----------
    handover : the exchange with other shards (None: no shards, or state kept locally;
        streams are then deferred only for cluster.redelivery_wait).
    writer : this daemon's writer id (its journal messages carry it).
    cluster_name : cluster.name (answers go on ``<cluster.name>.handover.<writer id>``).
    redelivery_wait : cluster.redelivery_wait, seconds.
    shard_prefix : the shard's topic prefix (for the log lines).
    owner : the shard's ownership now (None: it owns every stream).
    moved_from : ShardCount.moved_from (the shard the mapping before a young change
        gave a topic).
    hold_until : the monotonic time the daemon's hold for redeliveries ends.
    load : load streams from the cluster (ClusterKeeper.load without deferral);
        raises ClusterError.
    loaded : whether a stream has an engine.
    publish : publish an ask (topic, payload) at QoS 1.
    send : send an answer (subject, payload) by plain NATS.
    count_drop : count a message set aside, by reason.
    """

    def __init__(self, handover: Handover | None, *, writer: str, cluster_name: str | None,
                 redelivery_wait: float, shard_prefix: str, owner: Callable[[], Ownership | None],
                 moved_from: Callable[[str | None, float, float | None], int | None],
                 hold_until: Callable[[], float], load: Callable[[list[str]], None],
                 loaded: Callable[[str], bool], publish: Callable[[str, bytes], None],
                 send: Callable[[str, bytes], None], count_drop: Callable[[str], None],
                 metrics: Metrics, rlog: RateLimitedLog, log: logging.Logger) -> None:
        self.handover = handover
        self.writer = writer
        self.cluster_name = cluster_name
        self.redelivery_wait = redelivery_wait
        self.shard_prefix = shard_prefix
        self.owner = owner
        self.moved_from = moved_from
        self.hold_until = hold_until
        self.load = load
        self.loaded = loaded
        self.publish = publish
        self.send = send
        self.count_drop = count_drop
        self.metrics = metrics
        self.rlog = rlog
        self.log = log
        # Streams another daemon wrote moments ago (they moved here), each with the time its
        # wait ends: their samples are parked in the cluster until that daemon has had time
        # to finish its own (see ClusterKeeper.load, ClusterKeeper.park); the rounds are
        # acknowledged as usual.
        self.deferred: dict[str, float] = {}
        # Answers to this daemon's asks, as the NATS thread hands them over (plain NATS on
        # <cluster.name>.handover.<writer id>; see shiftwatch.handover).
        self.answers: deque[bytes] = deque()

    def defer(self, name: str, topic: str | None, loaded: Any, now: float) -> bool:
        """Whether a stream just loaded (``loaded``: its ClusterState.load result) waits
        before it gets an engine; if so it is deferred.  When the daemon that wrote it
        moments ago was another shard, that shard is asked to pass on what it holds
        (shiftwatch.handover) and the stream waits for its answer, at most
        cluster.handover_wait; otherwise it waits cluster.redelivery_wait from the
        journal's last write."""
        r = loaded
        ho = self.handover
        fresh = r.written_by not in (None, self.writer) and r.written_at is not None
        ask = r.written_shard if (fresh and ho is not None and ho.can_ask(r.written_shard)
                                  and now - r.written_at < ho.wait) else None
        if ask is None:
            # Nobody else wrote it moments ago (a stream nobody has written yet, or
            # not for long; or this shard's own, taken back): it may still have moved
            # here at the last change of the mapping, and its old owner may hold
            # samples of it that the mapping sent it before (a shard still waiting
            # after resuming its session, or frozen).  Asked too: begun at once, the
            # stream would refuse those samples when they reach the journal.
            ask = self.moved_from(topic, now, r.written_at)
        if ask is not None and ho is not None and topic is not None:
            ho.ask(name, ask, topic)
            self.deferred[name] = now + ho.wait
            return True
        if fresh and now - r.written_at < self.redelivery_wait:
            self.deferred[name] = r.written_at + self.redelivery_wait
            return True
        return False

    def messages(self, payloads: list[tuple[bytes | bytearray, str]], now: float) -> None:
        """Asks that came over MQTT on streams' topics (payload, topic; shiftwatch.handover):
        each is answered once the round that brought it is in the cluster (after a
        reconnect, once cluster.redelivery_wait has passed)."""
        for payload, topic in payloads:
            self.message(payload, f"on {self.shard_prefix}{_printable(topic)}", now, topic=topic)

    def take_answers(self) -> None:
        """Answers to this daemon's asks (plain NATS): the streams they name are due now."""
        now = time.time()
        while self.answers:
            self.message(self.answers.popleft(), "from the cluster", now)

    def message(self, payload: bytes | bytearray, where: str, now: float, *, topic: str = "") -> None:
        assert self.handover is not None
        hold = self.hold_until()
        held = hold if hold > time.monotonic() else 0.0
        try:
            released = self.handover.receive(payload, time.monotonic(), topic=topic, not_before=held)
        except HandoverError as exc:
            self.count_drop("bad_handover")
            self.rlog.warning("bad_handover", f"handover message {where} set aside: {exc}", now)
            return
        for n in released:
            if n in self.deferred:
                self.deferred[n] = 0.0
        owner = self.owner()
        if topic and owner is not None and owner.owns(topic) and self.handover.owes(topic):
            self.rlog.warning("handover_owned", f"another shard asked for what this shard holds of "
                              f"the streams on {_printable(topic)}, which the mapping for shard.of "
                              f"{owner.of} still gives this shard: the answer waits until a "
                              "reload lets them go (is shard.of up to date here?)", now)

    def answer_subject(self, writer: str) -> str:
        assert self.cluster_name is not None
        return f"{self.cluster_name}.handover.{writer}"

    def send_asks(self) -> None:
        assert self.handover is not None
        names = self.handover.asking()
        if not names:
            return
        self.log.info("%d stream(s) moved here (e.g. %s); asked the shard(s) that wrote them last "
                      "for what they still hold of them; they wait for the answer, at most "
                      "cluster.handover_wait (%s s)", len(names), _printable(names[0]),
                      f"{self.handover.wait:g}")
        for topic, payload in self.handover.outgoing():
            self.publish(topic, payload)

    def send_answers(self) -> None:
        """The answers owed whose asks' rounds are in the cluster; not for the streams this
        shard still owns (its reload has not let them go: see Handover.answers_due)."""
        assert self.handover is not None
        owner = self.owner()
        for writer, payload in self.handover.answers_due(time.monotonic(),
                                                         None if owner is None else owner.owns):
            self.send(self.answer_subject(writer), payload)

    def settle(self, name: str) -> None:
        outcome = self.handover.settle(name) if self.handover is not None else None
        if outcome is None:
            return
        self.metrics.handovers.labels(outcome).inc()
        if outcome == "waited_out":
            self.rlog.warning("handover_waited_out", f"stream {_printable(name)}: the shard that "
                              "wrote it last did not answer within cluster.handover_wait; loaded "
                              "with what the cluster holds (samples that shard still sends are "
                              "set aside there)", time.time(), extra={"stream": name})

    def release(self) -> None:
        """Load the deferred streams whose wait is over: afresh, with what the other
        daemon wrote meanwhile, then the samples parked while they waited."""
        now = time.time()
        due = [n for n, until in self.deferred.items() if until <= now]
        if not due:
            return
        try:
            self.load(due)
        except ClusterError as exc:
            self.rlog.warning("cluster_load", f"{exc}; tried again shortly", now)
            # Those that loaded all the same (another's parked samples were refused by its
            # journal) are done: only the others wait for the next attempt.
            due = [n for n in due if self.loaded(n)]
        for n in due:
            del self.deferred[n]
            self.settle(n)

    def let_go(self, owns: Callable[[str], bool]) -> None:
        """Deferred streams (waiting for their previous writer) that are not this shard's
        any more: the samples parked for them stay in the cluster, and their next owner
        feeds them when it loads them."""
        for n in [n for n in self.deferred if not owns(n)]:
            del self.deferred[n]
            if self.handover is not None:
                self.handover.forget(n)

