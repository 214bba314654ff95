"""A shard's view of the number of shards as a state machine of its own (shiftwatch.shardcount).

``ShardCount`` is driven here directly, without a daemon: real ``ShardLease`` claims
and a real ``ClusterState`` against a nats-server with JetStream started by the test
(``natskit.start_lone_server``), real ``Metrics`` and ``StatusBoard``; what it hands
the daemon (``adopt``, ``moved_away``) is recorded.  The transitions: a count taken
up at a start or disputed (held, or new to the set), taken up once another live
shard agrees, a reload that waits (pending), one back to the count in force, one of a
held shard, one that drops hashed levels, and the shard section added at a reload.
The daemon end to end is held to the same behaviour by test_shard_count.py and
test_shard_parking.py.

References: which shard owns a topic is ``partition.partition_of``, held to the real
nats-server's ``partition()`` subject mapping in test_shards.py (nats-server 2.9's
documentation of subject mapping); the rule that a count is taken up only when
another live shard agrees or none contradicts is ``partition.count_disagreement``,
the project's own rule as README's "Running shards" states it (the expectations
below are that rule applied by hand, not values computed by the code under test).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from shiftwatch.clusterstate import ClusterState
from shiftwatch.config import Config, load_config
from shiftwatch.handover import Handover
from shiftwatch.lease import ShardLease
from shiftwatch.metrics import Metrics
from shiftwatch.partition import Count, partition_of
from shiftwatch.shardcount import ShardCount
from shiftwatch.status import StatusBoard

from .natskit import lone_server_port, started_io

LEVELS = (2, 3, 4)


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[int]:
    yield from lone_server_port(tmp_path_factory, "view")


class Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.lines: list[tuple[int, str]] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append((record.levelno, record.getMessage()))

    def said(self, text: str) -> int:
        return sum(text in m for _lv, m in self.lines)


class Setup:
    """Shard ``number`` of a set named ``name``, with the peers given (shard -> count they
    announce), its own lease claimed, the cluster state made."""

    def __init__(self, tmp_path: Path, port: int, name: str, *, number: int, of: int,
                 peers: dict[int, Count | None], levels: tuple[int, ...] | None = LEVELS) -> None:
        self.tmp_path, self.port, self.name = tmp_path, port, name
        self.io = started_io(port, f"view-{name}")
        self.peers: dict[int, ShardLease] = {}
        for k, count in peers.items():
            lease = ShardLease(self.io, name=name, shard=k, lease=6.0, replicas=1,
                               logger=logging.getLogger("peers"), count=count)
            lease.setup()
            assert lease.claim(threading.Event())
            self.peers[k] = lease
        self.cfg = self.config(number, of, levels)
        assert self.cfg.shard is not None
        self.lease = ShardLease(self.io, name=name, shard=number, lease=6.0, replicas=1,
                                logger=logging.getLogger("own"),
                                count=(of, levels) if levels else None)
        self.lease.setup()
        assert self.lease.claim(threading.Event())
        self.cluster = ClusterState(self.io, name=name, replicas=1, logger=logging.getLogger("cs"),
                                    writer=f"w{number}", shard=number)
        self.cluster.setup()
        self.metrics = Metrics()
        self.status = StatusBoard(self.metrics.streams)
        self.log = logging.getLogger(f"shardcount.{name}")
        self.lines = Lines()
        self.log.addHandler(self.lines)
        self.log.setLevel(logging.DEBUG)
        self.adopted: list[tuple[int, tuple[int, ...] | None]] = []
        self.moved = 0
        self.kept: set[str] = set()
        self.handover = Handover(number, f"w{number}", "part/{number}", 30.0)
        self.view = ShardCount(self.cfg.shard, config=lambda: self.cfg, adopt=self.adopt,
                               moved_away=self.moved_away, keep_topic=self.kept.__contains__,
                               topic_bound=4, lease=lambda: self.lease, cluster=lambda: self.cluster,
                               handover=self.handover, metrics=self.metrics, status=self.status,
                               log=self.log)

    def config(self, number: int, of: int, levels: tuple[int, ...] | None = LEVELS, *,
               shard: bool = True) -> Config:
        path = self.tmp_path / f"{self.name}-{of}-{levels}-{shard}.yaml"
        text = ("streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, unit: g}\n"
                f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{self.tmp_path / 'state'}', keep: cluster}}\n"
                f"cluster: {{servers: ['nats://127.0.0.1:{self.port}'], name: {self.name}, replicas: 1}}\n")
        if shard:
            hashed = "" if levels is None else f", hashed_levels: {list(levels)}"
            text += f"shard: {{number: {number}, of: {of}{hashed}}}\n"
        path.write_text(text)
        return load_config(str(path))

    def adopt(self, of: int, levels: tuple[int, ...] | None) -> None:
        import dataclasses

        assert self.cfg.shard is not None
        self.adopted.append((of, levels))
        self.cfg = dataclasses.replace(self.cfg, shard=dataclasses.replace(self.cfg.shard, of=of,
                                                                           hashed_levels=levels))

    def moved_away(self) -> None:
        self.moved += 1

    def disputed(self) -> float | None:
        return self.metrics.registry.get_sample_value("shiftwatch_shard_of_disputed")

    def record(self) -> Any:
        return self.cluster.read_mapping()

    def close(self) -> None:
        self.lease.release()
        for lease in self.peers.values():
            lease.release()
        self.io.close()


@pytest.fixture
def setups(tmp_path: Path) -> Iterator[list[Setup]]:
    made: list[Setup] = []
    yield made
    for s in made:
        s.close()


def test_a_count_no_other_shard_contradicts_is_taken_up_at_the_start(tmp_path: Path, server: int,
                                                                      setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "alone", number=0, of=3, peers={})
    setups.append(s)
    s.view.take_up()
    assert not s.view.held and not s.view.unnoted and not s.view.rechecking
    rec = s.record()
    assert rec is not None and (rec.of, rec.previous_of) == (3, None)
    assert s.disputed() == 0 and s.status.notices() == [] and s.lines.lines == []


def test_a_disputed_start_holds_the_shard_until_another_live_shard_agrees(tmp_path: Path, server: int,
                                                                          setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "typo", number=1, of=4, peers={0: (3, LEVELS), 2: (3, LEVELS)})
    setups.append(s)
    s.cluster.note_mapping(3, LEVELS, changed=False)  # the set runs 3
    before = s.record()
    s.view.take_up()
    # Shard 1 of 3 is not past the others' shard.of: not new to the set, so held.
    assert s.view.held and s.view.unnoted and s.view.rechecking and not s.view.new
    assert s.record() == before and s.disputed() == 1
    (notice,) = s.status.notices()
    assert "it takes no samples" in notice
    s.view.recheck()
    s.view.recheck()
    assert s.view.held and s.lines.said("it takes no samples") == 1  # said once per change
    s.peers[0].announce((4, LEVELS))  # another shard's reload wants 4 too
    s.view.recheck()
    assert not s.view.held and not s.view.unnoted and not s.view.rechecking
    rec = s.record()
    assert rec is not None and (rec.of, rec.previous_of) == (4, 3)
    assert s.disputed() == 0 and s.status.notices() == []
    assert s.lines.said("shard.of 4 is taken up") == 1
    assert s.adopted == [] and s.moved == 0  # a start's count is the configuration's already


def test_a_shard_new_to_the_set_takes_samples_while_its_count_is_disputed(tmp_path: Path, server: int,
                                                                          setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "grow", number=3, of=4, peers={0: (3, LEVELS), 1: (3, LEVELS),
                                                                2: (3, LEVELS)})
    setups.append(s)
    s.view.take_up()
    assert s.view.new and not s.view.held and s.view.unnoted
    assert "this shard is new to the set" in s.status.notices()[0]


def test_a_reload_waits_for_agreement_and_a_reload_back_drops_the_wait(tmp_path: Path, server: int,
                                                                       setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "down", number=0, of=4, peers={1: (4, LEVELS), 2: (4, LEVELS),
                                                                3: (4, LEVELS)})
    setups.append(s)
    s.view.take_up()
    assert s.view.owner is not None and s.view.owner.of == 4
    s.view.reload(s.config(0, 3))
    assert s.view.pending is not None and s.view.owner.of == 4 and s.adopted == []
    assert s.lease.count == (3, LEVELS) and s.disputed() == 1  # announced, not taken up
    assert "it goes on with shard.of 4" in s.status.notices()[0]
    s.view.reload(s.config(0, 4))  # a typo corrected
    assert s.view.pending is None and s.lease.count == (4, LEVELS) and s.disputed() == 0
    assert s.status.notices() == [] and s.adopted == []
    s.view.reload(s.config(0, 3))
    assert s.view.pending is not None
    s.peers[1].announce((3, LEVELS))
    s.view.recheck()
    assert s.view.pending is None and s.view.owner.of == 3 and s.adopted == [(3, LEVELS)]
    assert s.moved == 1 and s.cfg.shard is not None and s.cfg.shard.of == 3
    rec = s.record()
    assert rec is not None and (rec.of, rec.previous_of) == (3, 4)


def test_a_held_shards_reload_replaces_its_count(tmp_path: Path, server: int, setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "fix", number=1, of=4, peers={0: (3, LEVELS), 2: (3, LEVELS)})
    setups.append(s)
    s.view.take_up()
    assert s.view.held
    s.view.reload(s.config(1, 3))  # the typo corrected: judged in its turn, and agreed
    assert s.adopted == [(3, LEVELS)] and s.view.owner is not None and s.view.owner.of == 3
    assert not s.view.held and not s.view.unnoted and s.disputed() == 0
    assert s.moved == 0  # nothing was taken under the count before


def test_a_reload_without_hashed_levels_owns_every_stream(tmp_path: Path, server: int,
                                                          setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "flat", number=0, of=3, peers={})
    setups.append(s)
    s.view.take_up()
    s.view.reload(s.config(0, 3, None))
    assert s.view.owner is None and s.adopted == [(3, None)] and s.moved == 0
    assert s.view.owns("brackenfield/line1/head1/fill")
    assert s.lines.said("this shard feeds every stream that reaches it") == 1
    s.view.reload(s.config(0, 3, None, shard=False))
    assert s.lines.said("the shard section was added or removed") == 1 and s.adopted == [(3, None)]


def test_ownership_follows_the_mapping_and_the_noted_topics_stay_bounded(tmp_path: Path, server: int,
                                                                         setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "own", number=1, of=3, peers={})
    setups.append(s)
    s.view.take_up()
    topics = [f"brackenfield/line{li}/head{h}/fill" for li in range(1, 4) for h in range(1, 4)]
    mine = [t for t in topics if partition_of(t, LEVELS, 3) == 1]
    theirs = [t for t in topics if partition_of(t, LEVELS, 3) != 1]
    assert mine and theirs
    for t in topics[:4]:
        s.view.note_topic(t, t)
    assert all(s.view.owns(t) == (t in mine) for t in topics[:4])
    assert s.view.owns("a stream never seen")  # no topic noted: not refused
    s.kept.add(topics[0])
    s.view.note_topic(topics[4], topics[4])  # the bound (4) reached: pruned to the kept ones
    assert set(s.view.topic_of) == {topics[0], topics[4]}


def test_a_stream_that_moved_at_the_last_change_names_its_shard_before(tmp_path: Path, server: int,
                                                                       setups: list[Setup]) -> None:
    s = Setup(tmp_path, server, "moved", number=3, of=4, peers={})
    setups.append(s)
    s.cluster.note_mapping(3, LEVELS, changed=False)  # the set ran 3
    s.view.note_mapping(changed=True)  # this shard's reload took up 4
    rec = s.cluster.read_mapping()
    assert rec is not None and (rec.of, rec.previous_of) == (4, 3)
    now = rec.since + 1.0
    topic = next(f"brackenfield/line{li}/head{h}/fill" for li in range(1, 7) for h in range(1, 9)
                 if partition_of(f"brackenfield/line{li}/head{h}/fill", LEVELS, 4) == 3)
    before = partition_of(topic, LEVELS, 3)
    assert s.view.moved_from(topic, now, None) == before
    assert s.view.moved_from(topic, now, rec.since + 0.5) is None  # written since the change
    assert s.view.moved_from(topic, rec.since + 31.0, None) is None  # older than handover_wait
    assert s.view.moved_from(None, now, None) is None


def test_a_count_taken_up_at_a_second_reload_is_named_in_the_log_line(tmp_path: Path, server: int,
                                                                     setups: list[Setup]) -> None:
    # Shard 0 of 4 reloaded with 3 finds nobody else with 3 and goes on with 4 (pending);
    # shard 1 then wants 3 too, and shard 0 is reloaded once more (with 3) before its
    # once-a-second recheck: the count taken up is 3, and the line saying so must name 3.
    # It named the count in force before (4): the line was written before the new count
    # replaced it.
    s = Setup(tmp_path, server, "again", number=0, of=4, peers={1: (4, LEVELS), 2: (4, LEVELS),
                                                                 3: (4, LEVELS)})
    setups.append(s)
    s.view.take_up()
    s.view.reload(s.config(0, 3))
    assert s.view.pending is not None
    s.peers[1].announce((3, LEVELS))
    s.view.reload(s.config(0, 3))
    assert s.view.pending is None and s.view.owner is not None and s.view.owner.of == 3
    taken = [m for _lv, m in s.lines.lines if "is taken up" in m]
    assert taken == [("shard 0: shard.of 3 is taken up (it agrees with the other live shards, or is the "
                      "one in force); the cluster's mapping record is brought up to date")], taken
