"""Streams that moved to this shard, and the handover of them, as a state machine of their
own (shiftwatch.moved).

Two ``MovedStreams`` are driven here directly, without daemons or broker: the new owner
(shard 3) and the shard that wrote the stream last (shard 1), each with a real
``Handover`` (shiftwatch.handover), real ``Ownership`` (shiftwatch.partition),
``Metrics`` and ``RateLimitedLog``.  What one publishes on the stream's topic in the
other's partition is handed to the other's ``messages``, as the broker's mapping would;
what one sends on ``<cluster.name>.handover.<writer id>`` lands in the other's
``answers``, as a plain NATS subscription would.  Loading a stream
(``ClusterKeeper.load``) is a recorded call; the loaded journal's headers are real
``clusterstate.Restored`` records.  The transitions: deferred for an answer or for
cluster.redelivery_wait, not deferred, released by an answer or when its wait is over,
a load that fails, a stream let go while it waits, an ask for streams this shard
still owns, a message that is no handover message.  The daemon end to end is held to
the same behaviour by test_shard_parking.py and test_shard_handover_stalls.py.

References: which shard a topic falls in is ``partition.partition_of``, held to the
real nats-server's ``partition()`` subject mapping in test_shards.py (nats-server 2.9's
documentation of subject mapping); NATS subject tokens (``<name>.handover.<writer>``)
as the NATS documentation ("Subjects") describes them, common practice.
"""

from __future__ import annotations

import logging
import time

from shiftwatch.clusterstate import Restored
from shiftwatch.daemon import RateLimitedLog
from shiftwatch.handover import MAGIC, Handover
from shiftwatch.metrics import Metrics
from shiftwatch.moved import MovedStreams
from shiftwatch.natsio import ClusterError
from shiftwatch.partition import Ownership, Remap, partition_of

from .loglines import Lines

LEVELS = (2, 3, 4)
NAME = "plant"
#: A topic the mapping for 4 partitions gives shard 3, and for 3 partitions shard 1.
TOPIC = next(t for li in range(1, 9) for h in range(1, 9)
             if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 4) == 3
             and partition_of(t, LEVELS, 3) == 1)


class Side:
    """One shard's MovedStreams and what it did through its callables."""

    def __init__(self, number: int, of: int, *, wait: float = 30.0, redelivery_wait: float = 2.0,
                 remap: Remap | None = None) -> None:
        self.number = number
        self.writer = f"w{number}"
        self.handover = Handover(number, self.writer, "part/{number}", wait)
        self.ownership: Ownership | None = Ownership(number, of, LEVELS)
        self.remap = remap
        self.hold = 0.0
        self.engines: set[str] = set()
        self.loads: list[list[str]] = []
        self.fail_load: set[str] = set()
        self.published: list[tuple[str, bytes]] = []
        self.sent: list[tuple[str, bytes]] = []
        self.dropped: list[str] = []
        self.metrics = Metrics()
        self.log = logging.getLogger(f"moved.{number}.{id(self)}")
        self.lines = Lines()
        self.log.addHandler(self.lines)
        self.log.setLevel(logging.DEBUG)
        self.log.propagate = False
        self.moved = MovedStreams(
            self.handover, writer=self.writer, cluster_name=NAME, redelivery_wait=redelivery_wait,
            shard_prefix=f"part/{number}/", owner=lambda: self.ownership, moved_from=self.moved_from,
            hold_until=lambda: self.hold, load=self.load, loaded=self.engines.__contains__,
            publish=lambda t, p: self.published.append((t, p)), send=lambda s, p: self.sent.append((s, p)),
            count_drop=self.dropped.append, metrics=self.metrics, rlog=RateLimitedLog(self.log),
            log=self.log)

    def moved_from(self, topic: str | None, now: float, written: float | None) -> int | None:
        """As ShardCount.moved_from: the mapping record's shard before, if it can be asked."""
        if self.remap is None or topic is None or self.ownership is None:
            return None
        k = self.remap.moved_from(topic, self.number, now=now, wait=self.handover.wait, written=written)
        return k if self.handover.can_ask(k) else None

    def load(self, names: list[str]) -> None:
        self.loads.append(list(names))
        self.engines.update(n for n in names if n not in self.fail_load)
        if self.fail_load & set(names):
            raise ClusterError("loading stream state: the cluster did not answer")

    def handovers(self, outcome: str) -> float | None:
        return self.metrics.registry.get_sample_value("shiftwatch_stream_handovers_total",
                                                      {"outcome": outcome})


def _written(by: str | None, at: float | None, shard: int | None) -> Restored:
    return Restored(written_by=by, written_at=at, written_shard=shard)


def _carry(asker: Side, old: Side) -> None:
    """The asks the asker published on old's partition reach old on their topics."""
    prefix = f"part/{old.number}/"
    got = [(p, t[len(prefix):]) for t, p in asker.published if t.startswith(prefix)]
    asker.published.clear()
    old.moved.messages(got, time.time())


def _answer(old: Side, asker: Side) -> None:
    """The answers old sent to the asker's subject reach its NATS subscription."""
    subject = asker.moved.answer_subject(asker.writer)
    for s, p in old.sent:
        if s == subject:
            asker.moved.answers.append(p)
    old.sent.clear()


def test_a_stream_another_shard_wrote_moments_ago_waits_for_its_answer() -> None:
    new, old = Side(3, 4), Side(1, 4)
    now = time.time()
    assert new.moved.defer(TOPIC, TOPIC, _written("w1", now - 1.0, 1), now)
    assert new.moved.deferred[TOPIC] == now + 30.0
    new.moved.send_asks()
    assert [t for t, _p in new.published] == [f"part/1/{TOPIC}"]
    assert new.lines.said("1 stream(s) moved here") == 1
    new.moved.release()
    assert new.loads == []  # still waiting
    _carry(new, old)
    old.moved.send_answers()  # (old no longer owns TOPIC under 4 partitions)
    assert [s for s, _p in old.sent] == [f"{NAME}.handover.w3"]
    _answer(old, new)
    new.moved.take_answers()
    assert new.moved.deferred[TOPIC] == 0.0
    new.moved.release()
    assert new.loads == [[TOPIC]] and not new.moved.deferred
    assert new.handovers("answered") == 1 and new.handovers("waited_out") is None


def test_a_stream_whose_answer_never_comes_is_loaded_when_its_wait_is_over() -> None:
    new = Side(3, 4, wait=0.5)
    now = time.time() - 10.0  # the round that deferred it came ten seconds ago
    assert new.moved.defer(TOPIC, TOPIC, _written("w1", now - 0.1, 1), now)
    new.moved.release()
    assert new.loads == [[TOPIC]] and not new.moved.deferred
    assert new.handovers("waited_out") == 1
    assert new.lines.said("did not answer within cluster.handover_wait") == 1


def test_which_streams_wait_and_for_how_long() -> None:
    new = Side(3, 4, redelivery_wait=2.0)
    now = time.time()
    # Its own journal, or one written long ago: no wait.
    assert not new.moved.defer("a", "a", _written("w3", now - 0.5, 3), now)
    assert not new.moved.defer("b", "b", _written("w1", now - 300.0, 1), now)
    assert not new.moved.defer("c", "c", _written(None, None, None), now)
    # Written moments ago by a daemon that is no shard (no shard header): the redelivery wait.
    assert new.moved.defer("d", "d", _written("w9", now - 0.5, None), now)
    assert new.moved.deferred["d"] == now - 0.5 + 2.0
    # Written moments ago by this same shard number's earlier run: no one to ask, the same wait.
    assert new.moved.defer("e", "e", _written("w-old", now - 0.5, 3), now)
    assert new.moved.deferred["e"] == now - 0.5 + 2.0
    # No topic known: nobody can be asked.
    assert not new.moved.defer("f", None, _written("w1", now - 300.0, 1), now)
    assert new.handover.asking() == []


def test_a_stream_nobody_wrote_that_moved_at_a_young_change_asks_its_shard_before() -> None:
    now = time.time()
    new = Side(3, 4, remap=Remap(4, LEVELS, 3, LEVELS, now - 1.0))
    assert new.moved.defer(TOPIC, TOPIC, _written(None, None, None), now)
    assert new.handover.waiting[TOPIC].shard == 1 and new.moved.deferred[TOPIC] == now + 30.0
    later = Side(3, 4, remap=Remap(4, LEVELS, 3, LEVELS, now - 100.0))  # older than handover_wait
    assert not later.moved.defer(TOPIC, TOPIC, _written(None, None, None), now)


def test_an_old_owner_that_still_owns_the_topic_holds_its_answer() -> None:
    new, old = Side(3, 4), Side(1, 3)  # shard 1 has not reloaded: shard.of 3 still
    now = time.time()
    new.moved.defer(TOPIC, TOPIC, _written("w1", now - 1.0, 1), now)
    new.moved.send_asks()
    _carry(new, old)
    assert old.lines.said("which the mapping for shard.of 3 still gives this shard") == 1
    old.moved.send_answers()
    assert old.sent == []
    old.ownership = Ownership(1, 4, LEVELS)  # its reload let the stream go
    old.moved.send_answers()
    assert len(old.sent) == 1


def test_an_answer_waits_out_the_hold_for_redeliveries() -> None:
    new, old = Side(3, 4), Side(1, 4)
    now = time.time()
    new.moved.defer(TOPIC, TOPIC, _written("w1", now - 1.0, 1), now)
    new.moved.send_asks()
    old.hold = time.monotonic() + 3600.0  # old resumed its session: it waits for redeliveries
    _carry(new, old)
    old.moved.send_answers()
    assert old.sent == []


def test_a_message_that_is_no_handover_message_is_set_aside_and_counted() -> None:
    new = Side(3, 4)
    now = time.time()
    new.moved.defer(TOPIC, TOPIC, _written("w1", now - 1.0, 1), now)
    new.moved.answers.append(MAGIC + b"[1, 2]")
    new.moved.messages([(MAGIC + b"{not json", TOPIC)], now)
    new.moved.take_answers()
    assert new.dropped == ["bad_handover", "bad_handover"]
    assert new.lines.said("handover message on part/3/") == 1  # the second is held back
    assert new.moved.deferred[TOPIC] == now + 30.0 and not new.moved.answers


def test_a_failed_load_keeps_waiting_only_the_streams_it_did_not_load() -> None:
    new = Side(3, 4, wait=0.5)
    now = time.time() - 10.0
    names = [f"brackenfield/line9/head{h}/fill" for h in range(1, 4)]
    for n in names:
        assert new.moved.defer(n, n, _written("w1", now - 0.1, 1), now)
    new.fail_load = {names[1]}
    new.moved.release()
    assert list(new.moved.deferred) == [names[1]]
    assert new.lines.said("tried again shortly") == 1
    new.fail_load = set()
    new.moved.release()
    assert not new.moved.deferred and new.loads[-1] == [names[1]]


def test_streams_let_go_while_they_wait_stop_waiting() -> None:
    new = Side(3, 4)
    now = time.time()
    other = next(t for li in range(1, 9) for h in range(1, 9)
                 if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 4) == 0)
    for n in (TOPIC, other):
        new.moved.defer(n, n, _written("w1", now - 1.0, 1), now)
    owner = Ownership(3, 4, LEVELS)
    new.moved.let_go(owner.owns)  # the daemon's ownership by topic (names are topics here)
    assert list(new.moved.deferred) == [TOPIC]
    assert list(new.handover.waiting) == [TOPIC]

