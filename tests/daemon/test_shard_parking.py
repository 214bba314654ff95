"""Moved streams in the cluster: samples parked while a stream waits, stale snapshots.

Samples of a stream that waits for its last writer are parked in the cluster.

A stream that moved to a shard (the number of shards changed) waits there until
the shard that wrote it last has passed on what it still held
(``shiftwatch.handover``).  Its samples used to wait in the daemon's memory, and
the rounds that brought them unacknowledged; NATS's MQTT side then sent the shard
nothing more once it held ``max_ack_pending`` of them (the live case is
``test_shard_handover_stalls.py::test_shards_waiting_for_an_answer_go_on_taking_samples_at_a_small_unacknowledged_limit``).
Now they are parked in the cluster (``ClusterState.park``) and the round is
acknowledged; whoever loads the stream next, this daemon when the wait ends or
another on an empty disk after a crash, feeds them after the journal, journals
them and purges them.  And a shard whose engine of a stream is stale (another
daemon has written the stream since) does not save it over the other's work.

In-process daemons against a real nats-server with JetStream (one server, one
replica).  The samples each check expects are read from the messages with the
standard library's ``json``, the reference for what was sent.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.clusterstate import MAPPING_KEY, ClusterState
from shiftwatch.config import load_config
from shiftwatch.daemon import Daemon
from shiftwatch.handover import MAGIC
from shiftwatch.journal import JournalGroup
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message
from shiftwatch.natsio import NatsIO
from shiftwatch.partition import Remap, partition_of

from .natskit import start_lone_server, started_io

LEVELS = (2, 3, 4)
NAME = "pk"


def _owned_by_1_of_2(n: int) -> list[str]:
    """Topics the NATS mapping for 2 partitions gives partition 1 (shiftwatch.partition)."""
    out = [t for li in range(1, 5) for h in range(1, 9)
           if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 2) == 1]
    assert len(out) >= n
    return out[:n]


@pytest.fixture
def server(tmp_path: Path) -> Iterator[int]:
    proc, port = start_lone_server(tmp_path, "parking")
    yield port
    proc.terminate()
    proc.wait(10)


def _io(port: int, who: str) -> NatsIO:
    io: NatsIO = started_io(port, who)
    return io


def _journal_as(port: int, writer: str, topic: str, t: np.ndarray, value: float = 500.0) -> None:
    """Shard 0, as daemon ``writer``, loads the stream and writes samples at times ``t`` (all
    ``value``) into its journal, as a shard does after a round."""
    io = _io(port, writer)
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer=writer,
                          shard=0)
        cs.setup()
        cs.load([topic])
        assert cs.journal([JournalGroup(topic, "g", t, value + 0.0 * t, t, "brackenfield/+/+/fill")]) == []
    finally:
        io.close()


def _old_writer(port: int, topic: str, n: int) -> None:
    """Shard 0 wrote the stream's journal last, moments ago: ``n`` samples, times 0 to n - 1."""
    _journal_as(port, "w-old", topic, np.arange(n, dtype=float))


def _daemon(tmp_path: Path, port: int, name: str, handover_wait: float = 60.0) -> Daemon:
    path = tmp_path / f"{name}.yaml"
    path.write_text(
        "streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, unit: g}\n"
        f"broker: {{client_id: {name}}}\n"
        f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}', keep: cluster}}\n"
        f"cluster: {{servers: ['nats://127.0.0.1:{port}'], name: {NAME}, replicas: 1, "
        f"handover_wait: {handover_wait}s, redelivery_wait: 1s, lease: 3s}}\n"
        "shard: {number: 1, of: 2, topic_prefix: 'part/{number}', hashed_levels: [2, 3, 4]}\n")
    d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics())
    d._join_cluster()
    assert d.cluster is not None and d.handover is not None
    return d


def _close(d: Daemon) -> None:
    if d.lease is not None:
        d.lease.release()
    if d.nats is not None:
        d.nats.close()
    if d.journal is not None:
        d.journal.close()


def _single(topic: str, t: float, v: float) -> Message:
    return Message(topic, json.dumps({"ts": t, "v": v}).encode(), time.time(), 0, 0)


def _array(topic: str, t0: float, vs: list[float]) -> Message:
    return Message(topic, json.dumps([{"ts": t0 + j, "v": v} for j, v in enumerate(vs)]).encode(),
                   time.time(), 0, 0)


def _sent(msgs: list[Message], topic: str) -> tuple[list[float], list[float]]:
    """The reference: the samples the messages carry, read with the stdlib's json."""
    times, values = [], []
    for m in msgs:
        if m.topic != topic:
            continue
        doc = json.loads(m.payload)
        for r in doc if isinstance(doc, list) else [doc]:
            times.append(float(r["ts"]))
            values.append(float(r["v"]))
    return times, values


def _parked(port: int, topic: str) -> tuple[list[float], list[float], int]:
    io = _io(port, "reader")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="reader")
        r = cs.load([topic])[topic]
        times = [t for g in r.parked for t in g.times.tolist()]
        values = [v for g in r.parked for v in g.values.tolist()]
        return times, values, r.parked_last
    finally:
        io.close()


def _journaled(port: int, topic: str) -> list[float]:
    io = _io(port, "reader2")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="reader2")
        return [t for g in cs.load([topic])[topic].groups for t in g.times.tolist()]
    finally:
        io.close()


def _counter(d: Daemon, name: str, **labels: str) -> float:
    value = d.metrics.registry.get_sample_value(name, labels)
    return 0.0 if value is None else float(value)


def test_a_waiting_stream_s_samples_are_parked_and_its_round_is_done(tmp_path: Path, server: int) -> None:
    a_topic, b_topic = _owned_by_1_of_2(2)
    for topic in (a_topic, b_topic):
        _old_writer(server, topic, 100)
    rng = np.random.default_rng(21)
    x = np.round(500.0 + 0.4 * rng.standard_normal(400), 4).tolist()
    # Arrays and single samples of both streams in one round (a JSON array's group is
    # arrays, a single sample's is lists: the first array to reach a held stream once
    # stopped the daemon with "operands could not be broadcast together").
    msgs = [_array(a_topic, 100.0, x[0:150]), _single(b_topic, 100.0, x[150]),
            _single(a_topic, 250.0, x[151]), _array(b_topic, 101.0, x[152:352])]
    d = _daemon(tmp_path, server, "parker")
    try:
        d.process(msgs)
        assert sorted(d.moved.deferred) == sorted([a_topic, b_topic])  # both wait for shard 0
        assert not d.engines  # nothing fed while they wait
        assert d._held_round is None  # the round is done: its messages are acknowledged
        assert _counter(d, "shiftwatch_samples_parked_total") == 352
    finally:
        _close(d)
    for topic in (a_topic, b_topic):
        times, values, last = _parked(server, topic)
        assert last > 0
        assert (times, values) == _sent(msgs, topic), topic


def test_parked_samples_are_fed_in_time_order_when_the_wait_ends(tmp_path: Path, server: int) -> None:
    [topic] = _owned_by_1_of_2(1)
    _old_writer(server, topic, 100)
    d = _daemon(tmp_path, server, "release")
    try:
        first = [_array(topic, 100.0, [500.0] * 50)]
        d.process(first)
        assert topic in d.moved.deferred and topic not in d.engines
        second = [_array(topic, 150.0, [500.1] * 50)]
        d.process(second)
        # The old owner wrote samples 100 to 119 meanwhile (its late ones), before the answer.
        _journal_as(server, "w-old", topic, np.arange(100.0, 120.0), 499.9)
        # Shard 0's answer, as it comes by plain NATS (shiftwatch.handover's format).
        answer = {"answer": [topic], "shard": 0, "writer": d.writer_id}
        d.moved.message(MAGIC + json.dumps(answer).encode(), "from the test", time.time())
        d.moved.release()
        eng = d.engines[topic]
        # The journal's 120 samples, then the parked 100 to 199, whose first 20 (times 100
        # to 119, taken by the old owner first) are set aside as duplicates.
        assert eng.samples_total == 200, eng.samples_total
        assert sum(eng.rejected_total.values()) == 20, eng.rejected_total
        assert _parked(server, topic)[2] == 0  # purged
        assert _counter(d, "shiftwatch_stream_handovers_total", outcome="answered") == 1
        # In the journal now as this shard fed them (the duplicates too: a load feeds the
        # journal to a new engine, which sets them aside again).
        journaled = _journaled(server, topic)
        assert journaled == [float(i) for i in range(120)] + [float(i) for i in range(100, 200)]
    finally:
        _close(d)


def test_parked_samples_survive_the_shard_and_reach_the_next_loader_on_an_empty_disk(
        tmp_path: Path, server: int) -> None:
    [topic] = _owned_by_1_of_2(1)
    _old_writer(server, topic, 100)
    first = _daemon(tmp_path, server, "first", handover_wait=1.0)
    try:
        first.process([_array(topic, 100.0, [500.0] * 60)])
        assert topic in first.moved.deferred and first._held_round is None
    finally:
        _close(first)  # gone before the wait ended: no snapshot, nothing fed
    time.sleep(1.2)  # past cluster.handover_wait and redelivery_wait: the next loader does not wait
    second = _daemon(tmp_path, server, "second-on-an-empty-disk", handover_wait=1.0)
    try:
        second.process([_array(topic, 160.0, [500.0] * 40)])
        assert topic not in second.moved.deferred
        eng = second.engines[topic]
        assert eng.samples_total == 200 and not sum(eng.rejected_total.values()), (
            eng.samples_total, eng.rejected_total)
        assert _parked(server, topic)[2] == 0
        assert _journaled(server, topic) == [float(i) for i in range(200)]
    finally:
        _close(second)


def test_a_stale_engine_is_not_saved_over_the_work_of_the_stream_s_new_writer(
        tmp_path: Path, server: int) -> None:
    # A shard that still feeds a stream another daemon now writes (the mapping changed
    # before this shard's reload) snapshotted it over the new writer's snapshot and purged
    # the journal down to its last message.  Now the snapshot is refused
    # (ClusterState.save, test_shard_journal.py) and the stale engine dropped.
    # The dropped stream also leaves the status page, as a stream let go at a reload does
    # (its entry stayed there, with the event it had made, before).
    [topic] = _owned_by_1_of_2(1)
    d = _daemon(tmp_path, server, "stale")
    x = np.round(500.0 + 0.2 * np.random.default_rng(8).standard_normal(300), 4)
    x[250:] += 2.0  # a 10-sigma step once the stream has warmed up: an event on its page
    try:
        d.process([_array(topic, 0.0, x.tolist())])
        assert topic in d.engines and d.engines[topic].records_total.get("detected", 0) >= 1
        assert topic in d.status._records
        _journal_as(server, "w-new", topic, np.arange(300.0, 330.0))
        assert d.keeper.snapshot()
        assert topic not in d.engines and topic not in d.status._records
        assert _journaled(server, topic) == [float(i) for i in range(330)]  # nothing purged
    finally:
        _close(d)


def test_a_stream_whose_parked_samples_reached_its_journal_is_done_when_another_s_were_refused(
        tmp_path: Path, server: int) -> None:
    # Two streams wait for shard 0 with parked samples; when the wait ends, the old owner
    # writes one of them once more between this shard's load and its journal write (its
    # late samples), so that one's unparked samples are refused.  The other's went into its
    # journal: it used to stay deferred with its parked messages kept, so the next attempt
    # loaded it again and fed the parked samples a second time (set aside as duplicates,
    # and journaled again).
    a_topic, b_topic = _owned_by_1_of_2(2)
    for topic in (a_topic, b_topic):
        _old_writer(server, topic, 100)
    d = _daemon(tmp_path, server, "half")
    try:
        msgs = [_array(a_topic, 100.0, [500.0] * 50), _array(b_topic, 100.0, [500.0] * 50)]
        d.process(msgs)
        assert sorted(d.moved.deferred) == sorted([a_topic, b_topic])
        for topic in (a_topic, b_topic):
            answer = {"answer": [topic], "shard": 0, "writer": d.writer_id}
            d.moved.message(MAGIC + json.dumps(answer).encode(), "from the test", time.time())
        real = d.cluster.journal
        calls = []

        def late_write_first(groups: list[JournalGroup]) -> list[JournalGroup]:
            if not calls:  # the old owner's late samples of b, after this shard's load of b
                io = _io(server, "late-writer")
                try:
                    cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"),
                                      writer="w-old", shard=0)
                    cs.load([b_topic])
                    t = np.arange(100.0, 110.0)
                    assert cs.journal([JournalGroup(b_topic, "g", t, 500.0 + 0.0 * t, t,
                                                    "brackenfield/+/+/fill")]) == []
                finally:
                    io.close()
            calls.append(len(groups))
            return real(groups)

        d.cluster.journal = late_write_first
        d.moved.release()
        assert a_topic not in d.moved.deferred and a_topic in d.engines  # a is done
        assert _parked(server, a_topic)[2] == 0  # and its parked samples purged
        assert b_topic in d.moved.deferred and _parked(server, b_topic)[2] > 0  # b waits, parked kept
        d.moved.release()
        assert not d.moved.deferred
        a_eng, b_eng = d.engines[a_topic], d.engines[b_topic]
        assert a_eng.samples_total == 150 and not sum(a_eng.rejected_total.values()), (
            a_eng.samples_total, a_eng.rejected_total)
        # b: the journal's 110 samples, then its parked 100 to 149, the first 10 set aside as
        # duplicates (taken by the old owner first).
        assert b_eng.samples_total == 150 and sum(b_eng.rejected_total.values()) == 10
        sent_a = _sent(msgs, a_topic)[0]
        assert _journaled(server, a_topic) == [float(i) for i in range(100)] + sent_a
        assert _parked(server, b_topic)[2] == 0
    finally:
        _close(d)


def test_parked_samples_of_a_stream_with_a_cut_name_and_no_snapshot_are_fed(
        tmp_path: Path, server: int) -> None:
    # A topic of more than 256 characters gives a stream name cut and hashed
    # (shiftwatch.decode.stream_name), which the entry's filter no longer matches: only the
    # filter the stream was made for finds its entry (Config.stream_for).  With no snapshot
    # yet that filter is in the journal's and the parking's messages, and the load did not
    # look there: the stream got no engine from the cluster, its journal and parked samples
    # were passed over and a fresh engine began with the round's samples.
    from shiftwatch.decode import stream_name

    topic = next(t for h in range(1, 9)
                 if partition_of(t := "brackenfield/" + "kiln-row-" * 30 + f"/head{h}/fill", LEVELS, 2) == 1)
    name = stream_name(topic, None)
    assert name != topic and len(topic) > 256
    io = _io(server, "old-writer")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="w-old",
                          shard=0)
        cs.setup()
        t = np.arange(100, dtype=float)
        assert cs.journal([JournalGroup(name, "g", t, 500.0 + 0.0 * t, t, "brackenfield/+/+/fill")]) == []
    finally:
        io.close()
    first = _daemon(tmp_path, server, "first-cut", handover_wait=1.0)
    try:
        first.process([_array(topic, 100.0, [500.0] * 60)])
        assert name in first.moved.deferred and first._held_round is None
    finally:
        _close(first)
    assert _parked(server, name)[2] > 0
    time.sleep(1.2)  # past cluster.handover_wait and redelivery_wait
    second = _daemon(tmp_path, server, "second-cut", handover_wait=1.0)
    try:
        second.process([_array(topic, 160.0, [500.0] * 40)])
        eng = second.engines[name]
        assert eng.samples_total == 200 and not sum(eng.rejected_total.values()), (
            eng.samples_total, eng.rejected_total)
        assert _parked(server, name)[2] == 0
        assert _journaled(server, name) == [float(i) for i in range(200)]
    finally:
        _close(second)


def test_a_damaged_parked_message_is_set_aside_named_and_counted_and_the_rest_is_fed(
        tmp_path: Path, server: int) -> None:
    # A parked message that does not decode (here: bytes that are no journal encoding)
    # costs only its own samples: the load names the subject, counts it with the states set
    # aside, feeds the stream's other parked samples and purges the parking.
    [topic] = _owned_by_1_of_2(1)
    _old_writer(server, topic, 100)
    first = _daemon(tmp_path, server, "first-damaged", handover_wait=1.0)
    try:
        first.process([_array(topic, 100.0, [500.0] * 60)])
        assert topic in first.moved.deferred
        subject = first.cluster.parked_subject(topic)
        first.nats.run(first.nats.publish(subject, b"\x00not a journal round"))
    finally:
        _close(first)
    time.sleep(1.2)  # past cluster.handover_wait and redelivery_wait
    second = _daemon(tmp_path, server, "second-damaged", handover_wait=1.0)
    try:
        second.process([_array(topic, 160.0, [500.0] * 40)])
        eng = second.engines[topic]
        assert eng.samples_total == 200 and not sum(eng.rejected_total.values())
        assert _counter(second, "shiftwatch_stream_states_set_aside_total") == 1
        assert _parked(server, topic)[2] == 0
    finally:
        _close(second)


def test_late_samples_of_a_stream_let_go_while_it_waited_stay_behind_its_parked_ones(
        tmp_path: Path, server: int) -> None:
    # Two changes of the number of shards within cluster.handover_wait: the stream moved
    # to this shard, which parked its samples while it waited for the old owner's answer
    # (times 100 to 159), then moved on before the answer came (the reload lets the
    # deferred stream go, its parked samples stay for the next owner).  Samples of it that
    # reach this shard late (times 160 to 199, sent before the mapping changed) used to go
    # to the stream's journal, ahead of the older parked ones: the next owner feeds the
    # journal first, then the parking, so the 60 parked samples came after newer ones and
    # were set aside as out of order (a step among them would have been missed).  Now they
    # are parked behind them, and the next owner feeds all 200 in time order.
    topic = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) != 1)
    _old_writer(server, topic, 100)
    d = _daemon(tmp_path, server, "twice")
    try:
        d.process([_array(topic, 100.0, [500.0] * 60)])
        assert topic in d.moved.deferred
        moved_on = tmp_path / "twice-of-3.yaml"
        moved_on.write_text((tmp_path / "twice.yaml").read_text().replace("of: 2", "of: 3"))
        d.shards.reload(load_config(str(moved_on)))
        assert topic not in d.moved.deferred and d.owner is not None and not d.owner.owns(topic)
        d.process([_array(topic, 160.0, [500.1] * 40)])
        assert _counter(d, "shiftwatch_messages_dropped_total", reason="other_shard") == 40
    finally:
        _close(d)
    time.sleep(1.2)  # past the next owner's cluster.handover_wait and redelivery_wait
    nxt = _daemon(tmp_path, server, "next-owner", handover_wait=1.0)
    try:
        nxt.process([_array(topic, 200.0, [500.1] * 20)])
        eng = nxt.engines[topic]
        assert eng.samples_total == 220 and not sum(eng.rejected_total.values()), (
            eng.samples_total, eng.rejected_total)
        assert _journaled(server, topic) == [float(i) for i in range(220)]
    finally:
        _close(nxt)


def test_parked_samples_of_a_stream_whose_entry_was_removed_stay_and_are_said(
        tmp_path: Path, server: int) -> None:
    # The stream's entry removed from the configuration (a reload) while its samples were
    # parked: when its wait ends no engine is made, and the parked samples stay in the
    # cluster for a configuration that has the entry again (the parking keeps them up to
    # its age limit).  That used to happen without a word: the only line said the stream
    # was loaded with what the cluster holds.
    [topic] = _owned_by_1_of_2(1)
    _old_writer(server, topic, 100)
    d = _daemon(tmp_path, server, "no-entry", handover_wait=1.0)
    lines: list[str] = []
    handler = logging.Handler()
    handler.emit = lambda rec: lines.append(rec.getMessage())  # type: ignore[method-assign]
    d.log.addHandler(handler)
    try:
        d.process([_array(topic, 100.0, [500.0] * 60)])
        assert topic in d.moved.deferred
        path = tmp_path / "no-entry.yaml"
        path.write_text(path.read_text().replace("brackenfield/+/+/fill", "brackenfield/+/+/weight"))
        d.reload()
        time.sleep(1.1)
        d.moved.release()
        assert topic not in d.moved.deferred and topic not in d.engines
        times, _values, last = _parked(server, topic)
        assert times == [float(t) for t in range(100, 160)] and last > 0  # kept
        subject = d.cluster.parked_subject(topic)
        said = [x for x in lines if subject in x and "60 parked sample(s)" in x]
        assert said, lines
    finally:
        _close(d)


def test_samples_of_another_shard_s_stream_refused_by_its_journal_are_parked_for_its_owner(
        tmp_path: Path, server: int) -> None:
    # A shard that gets samples of a stream the mapping gives another shard writes them to
    # the stream's journal with the last sequence it knows (none: it never had the stream).
    # Once the owner has written the stream they are refused.  They used to be set aside
    # (other_shard): an owner that had taken the stream back and waited for this shard's
    # answer lost them (a shard frozen through two changes of the number of shards,
    # test_shard_reshard_faults.py).  Now they are parked, and so is what comes of the
    # stream after them; the owner's next load feeds them in time order after its journal.
    # (A change on this branch once reused the count's name for a loop over the refused
    # streams, and the shard stopped with a TypeError at such a refusal.)
    topic = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) != 1)
    _old_writer(server, topic, 100)  # the owner has written it (times 0 to 99)
    d = _daemon(tmp_path, server, "not-mine")
    try:
        moved_on = tmp_path / "not-mine-of-3.yaml"
        moved_on.write_text((tmp_path / "not-mine.yaml").read_text().replace("of: 2", "of: 3"))
        d.shards.reload(load_config(str(moved_on)))
        d.process([_array(topic, 100.0, [500.0] * 30)])
        d.process([_array(topic, 130.0, [500.0] * 10)])
        assert _counter(d, "shiftwatch_messages_dropped_total", reason="other_shard") == 40
        assert _counter(d, "shiftwatch_samples_handed_over_total") == 40
        assert _journaled(server, topic) == [float(i) for i in range(100)]
        times, _values, last = _parked(server, topic)
        assert times == [float(t) for t in range(100, 140)] and last > 0
    finally:
        _close(d)
    time.sleep(1.2)  # past the owner's cluster.handover_wait and redelivery_wait
    owner = _daemon(tmp_path, server, "owner", handover_wait=1.0)
    try:
        owner.process([_array(topic, 140.0, [500.0] * 10)])
        eng = owner.engines[topic]
        assert eng.samples_total == 150 and not sum(eng.rejected_total.values()), (
            eng.samples_total, eng.rejected_total)
        assert _journaled(server, topic) == [float(i) for i in range(150)]
    finally:
        _close(owner)


def test_a_stream_nobody_wrote_waits_for_the_shard_the_mapping_before_gave_it(
        tmp_path: Path, server: int) -> None:
    # The number of shards went from 3 to 2 moments ago (the cluster's mapping record says
    # so: another shard took up the mapping for 3, this one that for 2).  A stream no shard
    # has written yet, which the mapping for 3 gave another shard, used to begin at once:
    # samples its old owner still held (in its wait after resuming a session, say) were
    # then refused by the journal and set aside.  Now it waits for that shard's answer, its
    # samples parked; a stream that was this shard's under both mappings begins at once,
    # and so does every stream once the change is older than cluster.handover_wait.
    moved = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) not in (1, None))
    stayed = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) == 1)
    later = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) not in (1, None)
                 and t != moved)
    io = _io(server, "before")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="w-before",
                          shard=0)
        cs.setup()
        first = cs.note_mapping(3, LEVELS, changed=False)
        assert first is not None and (first.of, first.previous_of) == (3, None)
    finally:
        io.close()
    d = _daemon(tmp_path, server, "remapped", handover_wait=2.0)
    try:
        d.shards.note_mapping(changed=False)
        assert d.cluster.remap is not None and (d.cluster.remap.of, d.cluster.remap.previous_of) == (2, 3)
        d.process([_array(moved, 0.0, [500.0] * 20), _array(stayed, 0.0, [500.0] * 20)])
        assert moved in d.moved.deferred and moved not in d.engines
        assert d.handover.waiting[moved].shard == partition_of(moved, LEVELS, 3)
        assert _parked(server, moved)[0] == [float(t) for t in range(20)]
        assert stayed in d.engines and stayed not in d.moved.deferred
        time.sleep(2.1)  # the change is older than cluster.handover_wait now
        d.process([_array(later, 0.0, [500.0] * 20)])
        assert later in d.engines and later not in d.moved.deferred
    finally:
        _close(d)


def test_a_damaged_mapping_record_is_written_anew_named_and_counted(tmp_path: Path, server: int) -> None:
    # The mapping record (key ``mapping`` of the state bucket) holds something that is no
    # such record (put there by hand, or damaged).  The shard's start wrote it anew without
    # a word: bad input neither said nor counted, and the mapping before (which a new owner
    # asks by) silently lost.  Now that is logged, naming the bucket, key and revision, and
    # counted (states_set_aside), once.
    io = _io(server, "hand")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="hand")
        cs.setup()
        io.run(io.kv_put(cs.bucket, MAPPING_KEY, b"{\"format\": \"shiftwatch-mapping\", \"of\": -3"))
    finally:
        io.close()
    d = _daemon(tmp_path, server, "after-hand")
    try:
        d.shards.note_mapping(changed=False)
        assert d.cluster.remap is not None and (d.cluster.remap.of, d.cluster.remap.previous_of) == (2, None)
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
        stored = d.nats.run(d.nats.kv_get(d.cluster.bucket, MAPPING_KEY))
        assert stored is not None and Remap.decode(stored.value) == d.cluster.remap
        d.shards.note_mapping(changed=False)  # sound now: nothing more to say or count
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
    finally:
        _close(d)


def _journal_as_shard(port: int, writer: str, shard: int, topic: str, t: np.ndarray) -> None:
    """Shard ``shard``, as daemon ``writer``, writes samples at times ``t`` to the stream's journal."""
    io = _io(port, writer)
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer=writer,
                          shard=shard)
        cs.setup()
        cs.load([topic])
        assert cs.journal([JournalGroup(topic, "g", t, 500.0 + 0.0 * t, t, "brackenfield/+/+/fill")]) == []
    finally:
        io.close()


def test_a_stream_this_shard_wrote_after_the_change_is_not_asked_of_its_owner_before(
        tmp_path: Path, server: int) -> None:
    # The number of shards went from 3 to 2 moments ago, and an earlier run of this shard
    # (shard 1) has already loaded and written a stream that moved here, after the change:
    # its handover is done.  Restarted, the shard used to ask the shard the mapping for 3
    # gave the stream all the same (the record said the change was young), and wait for its
    # answer: up to the whole cluster.handover_wait when that shard is gone (4 to 3).  Now
    # a stream written since the change waits cluster.redelivery_wait from that write, as
    # the README says of a restart.
    moved = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) not in (1, None))
    io = _io(server, "before")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="w-before",
                          shard=0)
        cs.setup()
        cs.note_mapping(3, LEVELS, changed=False)
        cs.note_mapping(2, LEVELS, changed=True)
    finally:
        io.close()
    _journal_as_shard(server, "w-earlier-run", 1, moved, np.arange(20, dtype=float))
    d = _daemon(tmp_path, server, "restarted", handover_wait=30.0)
    try:
        d.shards.note_mapping(changed=False)
        assert d.cluster.remap is not None and (d.cluster.remap.of, d.cluster.remap.previous_of) == (2, 3)
        d.process([_array(moved, 20.0, [500.0] * 10)])
        assert moved not in d.handover.waiting
        assert moved in d.moved.deferred and d.moved.deferred[moved] < time.time() + 1.5  # redelivery_wait: 1 s
    finally:
        _close(d)


def test_late_samples_refused_by_an_owner_that_began_after_the_change_are_set_aside_at_once(
        tmp_path: Path, server: int) -> None:
    # This shard went from 2 partitions to 3; the stream's owner under 3 (shard 0) has
    # loaded it and written it since that change: it has begun and reads the stream's
    # parking only at its next load (a restart, a later move), which may never come within
    # the parking's 7 days.  Samples of it that still reach this shard are refused by the
    # journal.  They used to be parked all the same, neither fed nor counted as lost, and
    # the parking grew.  Now they are set aside at once (other_shard, not handed over), as
    # before the parking of refused samples; refused by an owner that wrote the stream
    # before the change (it may be waiting for this shard's answer), they are still parked
    # (test_samples_of_another_shard_s_stream_refused_by_its_journal_are_parked_for_its_owner).
    topic = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) == 0)
    d = _daemon(tmp_path, server, "not-mine-any-more")
    try:
        moved_on = tmp_path / "not-mine-any-more-of-3.yaml"
        moved_on.write_text((tmp_path / "not-mine-any-more.yaml").read_text().replace("of: 2", "of: 3"))
        d.shards.reload(load_config(str(moved_on)))
        time.sleep(0.05)  # the owner's write comes after the change (times kept to the ms)
        _journal_as_shard(server, "w-owner", 0, topic, np.arange(100, dtype=float))
        d.process([_array(topic, 100.0, [500.0] * 30)])
        assert _counter(d, "shiftwatch_messages_dropped_total", reason="other_shard") == 30
        assert _counter(d, "shiftwatch_samples_handed_over_total") == 0
        assert _journaled(server, topic) == [float(i) for i in range(100)]
        assert _parked(server, topic) == ([], [], 0)
        assert topic not in d.keeper.parked_here
    finally:
        _close(d)


def test_a_mapping_record_from_a_clock_far_ahead_does_not_hold_new_streams(tmp_path: Path, server: int) -> None:
    # The mapping record's time is the wall clock of the shard that wrote it last.  One
    # written by a box whose clock is an hour ahead read as a change less than
    # cluster.handover_wait old for that whole hour: every stream that moved (each loaded
    # at any shard's restart, say) waited for the shard the mapping before gave it, the
    # whole wait when that shard was gone; and a reload kept the time (the latest of the
    # two).  A change more than cluster.handover_wait ahead of this box's clock is taken
    # for a clock error now: not a young change.
    moved = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) not in (1, None))
    ahead = Remap(2, LEVELS, 3, LEVELS, time.time() + 3600.0)
    io = _io(server, "ahead")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="ahead")
        cs.setup()
        io.run(io.kv_put(cs.bucket, MAPPING_KEY, ahead.encode()))
    finally:
        io.close()
    d = _daemon(tmp_path, server, "on-time", handover_wait=30.0)
    try:
        d.process([_array(moved, 0.0, [500.0] * 20)])
        assert d.cluster.remap == ahead
        assert moved in d.engines and moved not in d.moved.deferred and moved not in d.handover.waiting
        now = time.time()
        retaken = ahead.taken_up(2, LEVELS, now, changed=True)
        assert retaken is not None and retaken.since == now  # not the hour ahead
    finally:
        _close(d)


def test_late_samples_parked_behind_are_set_aside_once_the_owner_has_begun(tmp_path: Path, server: int) -> None:
    # This shard parked late samples of a stream whose owner wrote it before the change
    # (it may be waiting for this shard's answer); what still came of the stream was parked
    # behind them without a look at the journal.  Once the owner has loaded the stream (its
    # parking read and purged) and written it, such samples were parked where nothing would
    # read them but a later load.  Now, as for a refused write, they are set aside at once.
    topic = next(t for t in _owned_by_1_of_2(16) if partition_of(t, LEVELS, 3) == 0)
    _journal_as_shard(server, "w-owner", 0, topic, np.arange(100, dtype=float))  # before the change
    time.sleep(0.05)
    d = _daemon(tmp_path, server, "late-again")
    try:
        moved_on = tmp_path / "late-again-of-3.yaml"
        moved_on.write_text((tmp_path / "late-again.yaml").read_text().replace("of: 2", "of: 3"))
        d.shards.reload(load_config(str(moved_on)))
        d.process([_array(topic, 100.0, [500.0] * 30)])
        assert _parked(server, topic)[0] == [float(t) for t in range(100, 130)]  # the owner may wait
        # The owner loads the stream with its parking, feeds and journals it, purges the parking,
        # and writes on: begun after the change.
        io = _io(server, "w-owner-2")
        try:
            cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="w-owner-2",
                              shard=0)
            r = cs.load([topic])[topic]
            t = np.arange(100, 140, dtype=float)
            assert cs.journal([JournalGroup(topic, "g", t, 500.0 + 0.0 * t, t, "brackenfield/+/+/fill")]) == []
            cs.unpark({topic: r.parked_last})
        finally:
            io.close()
        d.process([_array(topic, 130.0, [500.0] * 10)])
        assert _counter(d, "shiftwatch_messages_dropped_total", reason="other_shard") == 40
        assert _counter(d, "shiftwatch_samples_handed_over_total") == 30
        assert _parked(server, topic) == ([], [], 0)
    finally:
        _close(d)


def test_samples_parked_again_by_a_held_round_are_counted_once_on_the_real_metrics(
        tmp_path: Path, server: int) -> None:
    # A round parks a waiting stream's samples, then the cluster does not answer for another
    # shard's samples of the same round (their journal write times out): the round is held
    # and taken again whole, and parks the same samples again.  The cluster keeps one copy
    # (the message id, JetStream's duplicate window), but shiftwatch_samples_parked_total
    # counted every attempt: 40 for 20 samples.  Now it counts what the cluster stored anew.
    # Read from the real /metrics endpoint (prometheus_client's parser is the reference for
    # the exposition format).
    from shiftwatch.natsio import ClusterError

    from .killrun import metric, scrape

    [topic] = _owned_by_1_of_2(1)
    other = next(t for li in range(1, 5) for h in range(1, 9)
                 if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 2) == 0)
    _old_writer(server, topic, 100)  # shard 0 wrote it moments ago: it waits here, parked
    d = _daemon(tmp_path, server, "parked-twice")
    served = d.metrics.serve("127.0.0.1:0", pages=d.status)
    try:
        real = d.cluster.journal
        calls: list[int] = []

        def no_answer_first(groups: list[JournalGroup]) -> list[JournalGroup]:
            calls.append(len(groups))
            if len(calls) == 1:  # the other shard's samples, the first time: the cluster is silent
                raise ClusterError("NATS cluster (the test): no answer within 5 s")
            return real(groups)

        d.cluster.journal = no_answer_first
        msgs = [_array(topic, 100.0, [500.0] * 20), _array(other, 0.0, [500.0] * 5)]
        d.process(msgs)
        assert topic in d.moved.deferred and d._held_round is not None and d._held_round[0] == "load"
        d.round(timeout=0.0)  # the held round, taken again whole
        assert d._held_round is None and len(calls) == 2
        times, values, _last = _parked(server, topic)
        assert (times, values) == _sent(msgs, topic)  # one copy in the cluster
        m = scrape(served.port)
        assert metric(m, "shiftwatch_samples_parked_total") == 20
        assert metric(m, "shiftwatch_samples_handed_over_total") == 5
    finally:
        served.close()
        _close(d)
