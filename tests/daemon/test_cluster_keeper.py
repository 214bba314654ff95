"""The cluster side of a shard as a part of its own (shiftwatch.keeper), without a daemon.

``ClusterKeeper`` is driven here directly: a real ``ClusterState`` against a
nats-server with JetStream started by the test (``natskit.start_lone_server``), real
``ShardCount``, ``MovedStreams``, ``LevelBoard``, ``StatusBoard``, ``Metrics`` and
engines.  What it hands the daemon is recorded: ``run_stream`` makes an engine and
feeds it as the daemon's does (the samples fed are noted), records and publications
are noted.  The transitions: a stream loaded from another daemon's journal into the
engines given, then let go (saved to the cluster, gone from the engines); samples
parked while a stream waits, fed in time order at its load and taken out of the
parking; other shards' samples set aside and counted without state in the cluster.
The daemon end to end is held to the same behaviour by test_shard_parking.py,
test_shard_journal.py and test_shard_damaged_state.py.

References: which shard a topic falls in is ``partition.partition_of``, held to the
real nats-server's ``partition()`` subject mapping in test_shards.py (nats-server 2.9's
documentation of subject mapping); the samples each check expects are the ones the
test wrote, listed by hand (the behaviour is DEVELOPERS.md's "Shards and cluster
state", not a value computed by the code under test).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from shiftwatch.clusterstate import ClusterState
from shiftwatch.config import StreamConfig, load_config
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import AlertRecord
from shiftwatch.daemon import RateLimitedLog
from shiftwatch.journal import JournalGroup
from shiftwatch.keeper import ClusterKeeper
from shiftwatch.levels import LevelBoard
from shiftwatch.metrics import Metrics
from shiftwatch.moved import MovedStreams
from shiftwatch.partition import partition_of
from shiftwatch.shardcount import ShardCount
from shiftwatch.status import StatusBoard

from .loglines import Lines
from .natskit import lone_server_port, started_io

LEVELS = (2, 3, 4)
NAME = "kp"
FILTER = "brackenfield/+/+/fill"


def _topics(shard: int, n: int) -> list[str]:
    """Topics the NATS mapping for 2 partitions gives ``shard`` (shiftwatch.partition)."""
    out = [t for li in range(1, 5) for h in range(1, 9)
           if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 2) == shard]
    assert len(out) >= n
    return out[:n]


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[int]:
    yield from lone_server_port(tmp_path_factory, "keeper")


class Side:
    """Shard 1 of 2 with its keeper; ``cluster``: its state kept in the cluster (else locally)."""

    def __init__(self, tmp_path: Path, port: int, name: str, *, cluster: bool = True) -> None:
        path = tmp_path / f"{name}.yaml"
        path.write_text(
            f"streams:\n  - {{topic: '{FILTER}', format: json, value: v, time: ts, unit: g}}\n"
            f"broker: {{client_id: {name}}}\n"
            f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}', "
            f"keep: {'cluster' if cluster else 'local'}}}\n"
            f"cluster: {{servers: ['nats://127.0.0.1:{port}'], name: {NAME}, replicas: 1, "
            "handover_wait: 60s, redelivery_wait: 1s, lease: 3s}\n"
            "shard: {number: 1, of: 2, topic_prefix: 'part/{number}', hashed_levels: [2, 3, 4]}\n")
        self.cfg = load_config(str(path))
        self.io: Any = None
        self.cs: ClusterState | None = None
        if cluster:
            self.io = started_io(port, name)
            self.cs = ClusterState(self.io, name=NAME, replicas=1, logger=logging.getLogger("test"),
                                   writer=name, shard=1)
            self.cs.setup()
        self.engines: dict[str, StreamEngine] = {}
        self.filters: dict[str, str] = {}
        self.metrics = Metrics()
        self.log = logging.getLogger(f"keeper.{name}.{id(self)}")
        self.lines = Lines()
        self.log.addHandler(self.lines)
        self.log.setLevel(logging.DEBUG)
        self.log.propagate = False
        rlog = RateLimitedLog(self.log)
        self.status = StatusBoard(self.metrics.streams)
        self.levels = LevelBoard("brackenfield/alerts", self.engines, label_for=lambda n: None,
                                 publish=lambda topic, payload, level: None, linked=lambda: False,
                                 connected=lambda: False)
        self.shards = ShardCount(self.cfg.shard, config=lambda: self.cfg, adopt=lambda of, levels: None,
                                 moved_away=lambda: self.keeper.let_go_moved(),
                                 keep_topic=self.engines.__contains__, topic_bound=1000,
                                 lease=lambda: None, cluster=lambda: self.cs, handover=None,
                                 metrics=self.metrics, status=self.status, log=self.log)
        self.moved = MovedStreams(None, writer=name, cluster_name=NAME, redelivery_wait=1.0,
                                  shard_prefix="part/1/", owner=lambda: self.shards.owner,
                                  moved_from=lambda topic, now, written: None, hold_until=lambda: 0.0,
                                  load=lambda names: self.keeper.load(names),
                                  loaded=self.engines.__contains__, publish=lambda topic, payload: None,
                                  send=lambda subject, payload: None, count_drop=lambda reason: None,
                                  metrics=self.metrics, rlog=rlog, log=self.log)
        self.fed: list[tuple[str, list[float]]] = []
        self.records: list[AlertRecord] = []
        self.published: list[tuple[str, bytes, int]] = []
        self.keeper = ClusterKeeper(
            engines=self.engines, filters=self.filters, cluster=lambda: self.cs, config=lambda: self.cfg,
            shards=self.shards, moved=self.moved, levels=self.levels, status=self.status,
            prefix="brackenfield/alerts", run_stream=self.run_stream,
            emit=lambda rec, arrived: self.records.append(rec),
            publish=lambda topic, payload, qos: self.published.append((topic, payload, qos)),
            outbox_pending=list, count_drop=self.count_drop, metrics=self.metrics, rlog=rlog,
            log=self.log)

    def run_stream(self, name: str, spec: StreamConfig, unit: str | None, times: list[float],
                   values: list[float], arrivals: list[float], now: float) -> JournalGroup | None:
        """As the daemon's: the stream's engine (made if need be) fed; the samples fed."""
        eng = self.engines.get(name)
        if eng is None:
            eng = self.engines[name] = StreamEngine(name, spec.detection, unit=unit)
            self.filters[name] = spec.topic
        t, v, a = (np.asarray(c, dtype=np.float64) for c in (times, values, arrivals))
        self.fed.append((name, t.tolist()))
        eng.process(t, v, a)
        return JournalGroup(name, unit, t, v, a, spec.topic)

    def count_drop(self, reason: str, n: int = 1) -> None:
        self.metrics.messages_dropped.labels(reason).inc(n)

    def counter(self, name: str, **labels: str) -> float:
        value = self.metrics.registry.get_sample_value(name, labels)
        return 0.0 if value is None else float(value)

    def close(self) -> None:
        if self.io is not None:
            self.io.close()


def _reader(port: int, who: str) -> tuple[Any, ClusterState]:
    io = started_io(port, who)
    return io, ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer=who)


def _journal_as(port: int, writer: str, topic: str, t: np.ndarray) -> None:
    """Shard 0, as daemon ``writer``, writes samples at times ``t`` (all 500 g) to the journal."""
    io, cs = _reader(port, writer)
    try:
        cs.setup()
        cs.load([topic])
        assert cs.journal([JournalGroup(topic, "g", t, 500.0 + 0.0 * t, t, FILTER)]) == []
    finally:
        io.close()


def test_a_stream_is_loaded_into_the_engines_given_and_let_go_with_its_state_saved(
        tmp_path: Path, server: int) -> None:
    [topic] = _topics(1, 1)
    _journal_as(server, "w-other", topic, np.arange(300, dtype=float))
    side = Side(tmp_path, server, "loader")
    try:
        side.keeper.load([topic])
        eng = side.engines[topic]
        assert eng.samples_total == 300  # the journal's 300 samples, replayed
        assert side.filters[topic] == FILTER
        assert topic in side.metrics.streams()
        side.keeper.let_go([topic])
        assert topic not in side.engines and topic not in side.filters
        assert topic not in side.metrics.streams()
    finally:
        side.close()
    io, cs = _reader(server, "reader-1")
    try:
        saved = cs.load([topic])[topic]
        assert saved.state is not None  # saved by let_go before the engine was dropped
        assert saved.topic_filter == FILTER
    finally:
        io.close()


def test_parked_samples_are_fed_in_time_order_at_the_load_and_leave_the_parking(
        tmp_path: Path, server: int) -> None:
    [_, topic] = _topics(1, 2)
    _journal_as(server, "w-old", topic, np.arange(100, dtype=float))
    side = Side(tmp_path, server, "parker")
    try:
        spec = side.cfg.streams[0]
        side.moved.deferred[topic] = time.time() + 60.0  # waits for its last writer
        late = [210.0, 205.0, 200.0]  # came in this order; fed in time order at the load
        now = time.time()
        assert side.keeper.park({topic: [spec, "g", list(late), [500.0] * 3, [now] * 3]}, now)
        assert topic in side.keeper.parked_here and not side.engines
        assert side.counter("shiftwatch_samples_parked_total") == 3
        del side.moved.deferred[topic]
        side.keeper.load([topic])
        assert side.fed == [(topic, [200.0, 205.0, 210.0])]
        assert topic not in side.keeper.parked_here
        assert side.engines[topic].samples_total == 103  # 100 journaled, then the 3 parked
    finally:
        side.close()
    io, cs = _reader(server, "reader-2")
    try:
        r = cs.load([topic])[topic]
        assert r.parked == []  # purged once journaled
        assert [t for g in r.groups for t in g.times.tolist()] == [*range(100), 200.0, 205.0, 210.0]
    finally:
        io.close()


def test_without_state_in_the_cluster_other_shards_samples_are_set_aside_and_counted(
        tmp_path: Path, server: int) -> None:
    [topic] = _topics(0, 1)  # shard 0's, not this shard's
    side = Side(tmp_path, server, "local", cluster=False)
    spec = side.cfg.streams[0]
    side.shards.note_topic(topic, topic)
    now = time.time()
    assert side.keeper.take_foreign({topic: [spec, "g", [1.0, 2.0], [500.0, 500.1], [now, now]]}, now)
    assert side.counter("shiftwatch_messages_dropped_total", reason="other_shard") == 2
    assert side.counter("shiftwatch_samples_handed_over_total") == 0
    assert not side.engines and not side.fed
    assert side.lines.said("belongs to shard 0 (shard.of 2), not to this one") == 1
