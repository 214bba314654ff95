"""Damaged entries in the cluster's state: a snapshot or a journal message put there by
hand, by another program or by a fault.

A shard loads a stream from the snapshot bucket and the journal stream when its first
samples come (``ClusterState.load``).  Whatever is wrong in what it reads must cost only
the damaged part: it is named in a log line with where it lies (bucket and key, or
stream and sequence), counted in ``shiftwatch_stream_states_set_aside_total``, and
nothing good is lost, no round is held, nothing stops.

In-process daemons against a real nats-server with JetStream (one server, one replica).
The damaged entries are written with nats-py, the NATS project's own client, as a person
or another program would.  References outside the project: the samples each check
expects are read from the messages with the standard library's ``json``; what an MQTT
client refuses to publish is asked of paho itself (MQTT 3.1.1 sections 3.3.1.2, no QoS
3, and 4.7.1, no wildcard in a topic name).
"""

from __future__ import annotations

import asyncio
import json
import logging
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
import pytest

from shiftwatch.clusterstate import ClusterState, stream_key
from shiftwatch.daemon import Daemon

from .natskit import start_lone_server
from .test_shard_parking import NAME, _array, _close, _counter, _daemon, _io, _owned_by_1_of_2

FILTER = "brackenfield/+/+/fill"


@pytest.fixture
def server(tmp_path: Path) -> Iterator[int]:
    proc, port = start_lone_server(tmp_path, "damaged")
    yield port
    proc.terminate()
    proc.wait(10)


class _Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


def _written(tmp_path: Path, port: int, topic: str) -> None:
    """Daemon 'a' takes 50 samples (times 0 to 49), saves the stream's snapshot, then takes
    10 more (50 to 59), which stay in the journal after the snapshot."""
    d = _daemon(tmp_path, port, "a")
    try:
        d.process([_array(topic, 0.0, [500.0] * 50)])
        assert d.keeper.snapshot()
        d.process([_array(topic, 50.0, [500.0] * 10)])
    finally:
        _close(d)


async def _kv(port: int, topic: str, value: bytes | None = None) -> bytes:
    """The stream's entry in the snapshot bucket; with ``value``, put that there first."""
    import nats

    nc = await nats.connect(f"nats://127.0.0.1:{port}")
    try:
        kv = await nc.jetstream().key_value(f"{NAME}_state")
        if value is not None:
            await kv.put(stream_key(topic), value)
        return bytes((await kv.get(stream_key(topic))).value or b"")
    finally:
        await nc.close()


async def _publish_journal(port: int, topic: str, body: bytes) -> int:
    import nats

    nc = await nats.connect(f"nats://127.0.0.1:{port}")
    try:
        return int((await nc.jetstream().publish(f"{NAME}.journal.{stream_key(topic)}", body)).seq)
    finally:
        await nc.close()


def _damage(port: int, topic: str, change: dict[str, Any]) -> None:
    doc = json.loads(asyncio.run(_kv(port, topic)))
    doc.update(change)
    asyncio.run(_kv(port, topic, json.dumps(doc).encode()))


def _loader(tmp_path: Path, port: int, name: str) -> tuple[Daemon, _Lines]:
    time.sleep(1.1)  # past the loaders' redelivery_wait after daemon a's last journal write
    d = _daemon(tmp_path, port, name, handover_wait=1.0)
    lines = _Lines()
    d.log.addHandler(lines)
    return d, lines


@pytest.mark.parametrize("seq", [-7, 10**15, "12", None, 1.5, True])
def test_a_snapshot_whose_journal_position_cannot_be_keeps_its_state_and_its_journal(
        tmp_path: Path, server: int, seq: object) -> None:
    # A snapshot's "seq" (the journal sequence its state includes) that is no sequence at
    # all, or lies past the journal's end (damaged, or the journal stream made anew): the
    # state is kept and the journal read from its start (the samples the state holds come
    # again and are set aside as repeats), so none of the 80 samples is lost.  Before, a
    # negative one made the cluster refuse the read: the load failed and the whole round
    # (the healthy stream's samples too) was held and tried again, for ever; one past the
    # end skipped the journal's 10 samples without a word; a string threw the state away.
    damaged, healthy = _owned_by_1_of_2(2)
    _written(tmp_path, server, damaged)
    _damage(server, damaged, {"seq": seq})
    d, lines = _loader(tmp_path, server, "b")
    try:
        d.process([_array(damaged, 60.0, [500.0] * 20), _array(healthy, 0.0, [500.0] * 20)])
        assert healthy in d.engines and d.engines[healthy].samples_total == 20
        eng = d.engines[damaged]
        assert eng.samples_total == 80, eng.samples_total
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
        said = [x for x in lines.lines if stream_key(damaged) in x]
        assert said and f"bucket {NAME}_state" in said[0], lines.lines
    finally:
        _close(d)


def test_alert_records_of_a_snapshot_that_cannot_be_published_are_set_aside_and_named(
        tmp_path: Path, server: int) -> None:
    # The snapshot keeps the alert records the broker had not acknowledged; a loader
    # publishes them again.  One whose topic or QoS paho refuses would stop the daemon
    # (paho raises, at every start again); the others must still go out.
    [topic] = _owned_by_1_of_2(1)
    _written(tmp_path, server, topic)
    good = ["sw/out/alerts/x", "eyJpZCI6IDF9", 1]
    bad = [["sw/out/#", "eyJpZCI6IDF9", 1], ["sw/out/alerts/y", "eyJpZCI6IDF9", 7],
           [{"a": 1}, "eyJpZCI6IDF9", 1], ["sw/out/alerts/z", "not base64!", 1], "a record"]
    _damage(server, topic, {"records": [good, *bad], "unit": {"g": 1}, "filter": 5})
    # The reference: paho refuses the first two (and a topic that is no text).
    client = paho.Client(paho.CallbackAPIVersion.VERSION2)
    for t, _p, q in bad[:3]:
        with pytest.raises((ValueError, TypeError, AttributeError)):
            client.publish(t, b"{}", qos=q)  # type: ignore[arg-type]
    io = _io(server, "reader")
    try:
        cs = ClusterState(io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="reader")
        r = cs.load([topic])[topic]
    finally:
        io.close()
    assert r.records == [("sw/out/alerts/x", b'{"id": 1}', 1)]
    assert r.state is not None and r.unit is None and r.topic_filter is None
    assert r.problem is not None and f"bucket {NAME}_state key {stream_key(topic)}" in r.problem
    assert r.problem.count("alert record") == len(bad) and "unit" in r.problem and "filter" in r.problem
    d, _lines = _loader(tmp_path, server, "c")
    try:
        d.process([_array(topic, 60.0, [500.0] * 20)])
        assert d.engines[topic].samples_total == 80 and d.engines[topic].unit == "g"
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
    finally:
        _close(d)


def test_a_damaged_journal_message_is_named_by_its_sequence_and_the_rest_is_fed(
        tmp_path: Path, server: int) -> None:
    [topic] = _owned_by_1_of_2(1)
    _written(tmp_path, server, topic)
    seq = asyncio.run(_publish_journal(server, topic, b"\xff\x00 not a journal round"))
    d, lines = _loader(tmp_path, server, "d")
    try:
        d.process([_array(topic, 60.0, [500.0] * 20)])
        assert d.engines[topic].samples_total == 80
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
        said = [x for x in lines.lines if f"{NAME}_journal sequence {seq}" in x]
        assert said, lines.lines
    finally:
        _close(d)


def test_an_engine_state_of_the_wrong_shape_is_named_by_bucket_and_key(tmp_path: Path, server: int) -> None:
    # The engine state itself damaged: the stream warms up again from what its journal
    # holds after the snapshot (the 50 samples the snapshot held are gone with it).
    [topic] = _owned_by_1_of_2(1)
    _written(tmp_path, server, topic)
    _damage(server, topic, {"state": {"kind": "zz"}})
    d, lines = _loader(tmp_path, server, "e")
    try:
        d.process([_array(topic, 60.0, [500.0] * 20)])
        assert d.engines[topic].samples_total == 30
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
        said = [x for x in lines.lines if f"bucket {NAME}_state key {stream_key(topic)}" in x]
        assert said, lines.lines
    finally:
        _close(d)


def test_a_real_daemon_restarted_on_a_snapshot_with_unpublishable_records_keeps_running(
        tmp_path: Path) -> None:
    # The process itself: `shiftwatch run` with its state in the cluster (a lone nats-server
    # with JetStream and MQTT), stopped (SIGTERM: its snapshot saved), its stream's entry
    # given an alert record on a wildcard topic and one of QoS 7 with nats-py, started
    # again.  Before, paho's publish of the first raised at the stream's load and the daemon
    # stopped with a traceback, at every start again (a trial with 3 shards lost all 4,500
    # samples of the damaged shard's streams that way); now it names the entry and runs on.
    import subprocess
    import sys

    from shiftwatch.broker import wait_until
    from shiftwatch.mqtt import PlainClient

    from .killrun import metric, scrape
    from .natskit import free_port_block

    proc, port = start_lone_server(tmp_path, "damaged-run", mqtt='ack_wait: "2s"')
    metrics_port = free_port_block(1)
    topic = "brackenfield/line1/head1/fill"
    config = tmp_path / "shiftwatch.yaml"
    config.write_text(
        f"broker: {{url: 'mqtt://127.0.0.1:{port + 1}', client_id: dmg, mqtt_version: '3.1.1'}}\n"
        "streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, unit: g}\n"
        f"alerts: {{topic_prefix: dmg/out}}\nmetrics: {{listen: '127.0.0.1:{metrics_port}'}}\n"
        f"state: {{dir: '{tmp_path / 'state'}', keep: cluster, snapshot_every: 2s}}\n"
        f"cluster: {{servers: ['nats://127.0.0.1:{port}'], name: {NAME}, replicas: 1, "
        "redelivery_wait: 0s}\n")
    log = tmp_path / "daemon.log"
    cmd = [sys.executable, "-m", "shiftwatch", "run", "--config", str(config)]
    pub = PlainClient(f"mqtt://127.0.0.1:{port + 1}", "dmg-publisher", mqtt_version="3.1.1").start()
    daemon: subprocess.Popen[bytes] | None = None

    def start() -> subprocess.Popen[bytes]:
        offset = log.stat().st_size if log.exists() else 0
        with open(log, "ab") as out:
            p = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT)
        assert wait_until(lambda: "connected to broker" in log.read_text()[offset:] or p.poll() is not None, 60)
        return p

    def taken() -> float:
        try:
            return metric(scrape(metrics_port), "shiftwatch_samples_total", stream=topic)
        except OSError:
            return -1.0

    def send(t0: int, n: int) -> None:
        for j in range(t0, t0 + n):
            pub.publish(topic, json.dumps({"v": 500.0, "ts": 1_790_000_000 + j}), qos=1)

    try:
        daemon = start()
        send(0, 100)
        assert wait_until(lambda: taken() >= 100, 60), log.read_text()[-2000:]
        daemon.send_signal(15)
        assert daemon.wait(60) == 0
        doc = json.loads(asyncio.run(_kv(port, topic)))
        doc["records"] = [*doc.get("records", []), ["dmg/#", "e30=", 1], ["dmg/out/x", "e30=", 7]]
        asyncio.run(_kv(port, topic, json.dumps(doc).encode()))
        daemon = start()
        send(100, 50)
        assert wait_until(lambda: taken() >= 150 or daemon.poll() is not None, 60)
        text = log.read_text()
        assert daemon.poll() is None and "Traceback" not in text, text[-3000:]
        assert taken() == 150
        assert f"bucket {NAME}_state key {stream_key(topic)}" in text, text[-3000:]
        m = scrape(metrics_port)
        assert metric(m, "shiftwatch_stream_states_set_aside_total") == 1
    finally:
        pub.stop()
        if daemon is not None and daemon.poll() is None:
            daemon.terminate()
            daemon.wait(60)
        proc.terminate()
        proc.wait(10)


def test_a_snapshot_entry_damaged_while_the_owner_runs_is_written_anew_not_taken_for_another_s(
        tmp_path: Path, server: int) -> None:
    # Garbage put over a stream's entry while its owner runs.  The owner's next save was
    # refused as if another daemon had saved the stream ("written by another daemon since
    # this one last did"), its good engine dropped and the stream loaded from the damaged
    # entry: it warmed up again from the journal after the last snapshot, its baseline and
    # count gone (a trial with 3 shards: 1,475 samples of 3 streams no longer counted).
    # The journal says nobody else wrote the stream: the entry is written anew from the
    # engine, and the damage is named and counted.
    [topic] = _owned_by_1_of_2(1)
    d = _daemon(tmp_path, server, "owner")
    lines = _Lines()
    d.log.addHandler(lines)
    try:
        d.process([_array(topic, 0.0, [500.0] * 50)])
        assert d.keeper.snapshot()
        asyncio.run(_kv(server, topic, b"\xff\x00 garbage"))
        d.process([_array(topic, 50.0, [500.0] * 10)])
        assert d.keeper.snapshot()
        assert topic in d.engines and d.engines[topic].samples_total == 60
        assert _counter(d, "shiftwatch_stream_states_set_aside_total") == 1
        said = [x for x in lines.lines if f"bucket {NAME}_state key {stream_key(topic)}" in x]
        assert said and not any("written by another daemon" in x for x in lines.lines), lines.lines
    finally:
        _close(d)
    doc = json.loads(asyncio.run(_kv(server, topic)))
    assert doc["stream"] == topic and doc["state"]["samples_total"] == 60


def test_a_lease_key_overwritten_with_garbage_stops_the_owner_with_what_was_found(server: int) -> None:
    # Bytes that are no owner entry put over a running shard's lease key.  The owner still
    # stops (status 3: whoever wrote there is not known, and one owner per shard comes
    # first), but its line said "the lease was claimed by another daemon", which sent the
    # reader looking for a second daemon that does not exist.
    from shiftwatch.lease import ShardLease

    io = _io(server, "lease-owner")
    lease = ShardLease(io, name=NAME, shard=1, lease=3.0, replicas=1, logger=logging.getLogger("test"))
    try:
        lease.setup()
        assert lease.claim(threading.Event())
        io.run(io.kv_put(lease.bucket, lease.key, b"[1, 2, 3]"))
        assert lease.lost_event.wait(10.0)
        assert lease.lost is not None and "another daemon" not in lease.lost, lease.lost
        assert f"key {lease.key} in bucket {lease.bucket}" in lease.lost and "[1, 2, 3]" in lease.lost
    finally:
        lease.release()
        io.close()


def test_a_message_no_daemon_wrote_in_a_running_stream_s_journal_is_named_not_taken_for_a_move(
        tmp_path: Path, server: int) -> None:
    # Bytes appended to a stream's journal subject while its owner runs.  The owner's next
    # write is refused (the subject moved on) and the stream is reloaded and fed the round
    # again, which loses nothing; but the line said the stream "moved between shards",
    # and sent the reader after a reshard that never happened.
    [topic] = _owned_by_1_of_2(1)
    d = _daemon(tmp_path, server, "journal-owner")
    lines = _Lines()
    d.log.addHandler(lines)
    try:
        d.process([_array(topic, 0.0, [500.0] * 50)])
        seq = asyncio.run(_publish_journal(server, topic, b"\xff\x00 garbage"))
        d.process([_array(topic, 50.0, [500.0] * 10)])
        assert d.engines[topic].samples_total == 60
        assert not any("moved between shards" in x for x in lines.lines), lines.lines
        said = [x for x in lines.lines if f"{NAME}_journal sequence {seq}" in x and "no shiftwatch" in x]
        assert said, lines.lines
    finally:
        _close(d)


def test_a_message_no_daemon_wrote_found_at_a_snapshot_is_named_not_taken_for_another_daemon_s(
        tmp_path: Path, server: int) -> None:
    # As above, but the snapshot comes first: the journal no longer ends where the owner
    # left it, so the save is refused and the engine dropped (loaded again with the next
    # samples, nothing lost); the line said another daemon had written the stream.
    [topic] = _owned_by_1_of_2(1)
    d = _daemon(tmp_path, server, "snapshot-owner")
    lines = _Lines()
    d.log.addHandler(lines)
    try:
        d.process([_array(topic, 0.0, [500.0] * 50)])
        seq = asyncio.run(_publish_journal(server, topic, b"\xff\x00 garbage"))
        assert d.keeper.snapshot()
        assert not any("written by another daemon" in x for x in lines.lines), lines.lines
        said = [x for x in lines.lines if f"{NAME}_journal sequence {seq}" in x and "no shiftwatch" in x]
        assert said, lines.lines
        d.process([_array(topic, 50.0, [500.0] * 10)])
        assert d.engines[topic].samples_total == 60
    finally:
        _close(d)
