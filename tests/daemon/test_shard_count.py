"""A shard whose shard.of the other live shards of its set disagree with (issue 15).

The cluster's mapping record (key ``mapping`` of the ``<name>_state`` bucket,
``partition.Remap``) says which count of shards runs now and which ran before, so
that for ``cluster.handover_wait`` after a change a stream that moved asks the shard
that had it.  One shard of a running 3-shard set started (or reloaded) with
``shard.of: 4`` by a typo rewrote that record: the real mapping before was lost, and
the other shards took the typo for a change of the number of shards.

Now each shard announces its count in its ownership lease (``shiftwatch.lease``) and
takes a count up only when another live shard runs the same one, or none says one
(``partition.count_disagreement``).  Otherwise the record stays as it is, and the
shard says so in its log, its /metrics (``shiftwatch_shard_of_disputed``) and its
status page; after a start it takes no samples (they stay with the broker), after a
reload it goes on with the count in force.

The real parts: a nats-server with JetStream and MQTT started by the test
(``natskit.start_lone_server``), the real ``shiftwatch run --shard 1`` in a
subprocess, samples published over MQTT with paho (``PlainClient``), the real
/metrics and /status.json scraped over HTTP, and the status page's notices line read
in headless Chromium (the ``chromium`` fixture).  The other shards of the set are
real ``ShardLease`` claims made by the test (their leases are all a shard's count is
read from).  Which partition a topic falls in is ``partition_of``, held to the real
nats-server's ``partition()`` mapping in ``test_shards.py``; the samples expected are
the ones published (counted here, the reference for what was sent).
"""

from __future__ import annotations

import json
import logging
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from shiftwatch.broker import wait_until
from shiftwatch.clusterstate import MAPPING_KEY, ClusterState
from shiftwatch.lease import ShardLease
from shiftwatch.mqtt import PlainClient
from shiftwatch.natsio import NatsIO
from shiftwatch.partition import Remap, partition_of

from .killrun import metric, scrape
from .natskit import free_port_block, start_lone_server, started_io
from .test_status_page import FLAGS

LEVELS = (2, 3, 4)
NAME = "cnt"
T0 = 1_790_000_000
#: Topics shard 1 owns under the mapping for 3 partitions and for 4 alike.
TOPICS = [t for li in range(1, 7) for h in range(1, 9)
          if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 3) == 1
          and partition_of(t, LEVELS, 4) == 1][:2]


@pytest.fixture
def server(tmp_path: Path) -> Iterator[int]:
    proc, port = start_lone_server(tmp_path, "count", mqtt='ack_wait: "2s"')
    yield port
    proc.terminate()
    proc.wait(10)


def _io(port: int, who: str) -> NatsIO:
    io: NatsIO = started_io(port, who)
    return io


class _Peers:
    """Shards 0 and 2 of the set, live: their leases claimed and renewed, each announcing
    shard.of 3; and the mapping record of a real change from 2 shards to 3 (``ago`` seconds
    before: 0, moments ago)."""

    def __init__(self, port: int, ago: float = 0.0) -> None:
        self.io = _io(port, "peers")
        self.leases = []
        for k in (0, 2):
            lease = ShardLease(self.io, name=NAME, shard=k, lease=6.0, replicas=1,
                               logger=logging.getLogger("test"))
            lease.count = (3, LEVELS)  # what their configuration gives them, announced in the lease
            lease.setup()
            assert lease.claim(threading.Event())
            self.leases.append(lease)
        cs = ClusterState(self.io, name=NAME, replicas=1, logger=logging.getLogger("test"), writer="peers")
        cs.setup()
        cs.note_mapping(2, LEVELS, changed=False)
        self.record = cs.note_mapping(3, LEVELS, changed=True)
        assert self.record is not None and (self.record.of, self.record.previous_of) == (3, 2)
        if ago:
            self.record = Remap(3, LEVELS, 2, LEVELS, self.record.since - ago)
            self.io.run(self.io.kv_put(cs.bucket, MAPPING_KEY, self.record.encode()))

    def mapping(self) -> tuple[Remap | None, int]:
        entry = self.io.run(self.io.kv_get(f"{NAME}_state", MAPPING_KEY))
        assert entry is not None
        return Remap.decode(entry.value), entry.revision

    def close(self) -> None:
        for lease in self.leases:
            lease.release()
        self.io.close()


class _Shard:
    """``shiftwatch run --shard 1`` with its log in a file."""

    def __init__(self, tmp_path: Path, port: int, of: int, number: int = 1) -> None:
        self.port = port
        self.number = number
        self.metrics_port = free_port_block(1)
        self.config = tmp_path / "shiftwatch.yaml"
        self.log_path = tmp_path / f"shard{number}.log"
        self.state = tmp_path / "state"
        self.write(of)
        self.proc: subprocess.Popen[bytes] | None = None

    def write(self, of: int) -> None:
        self.config.write_text(
            f"broker: {{url: 'mqtt://127.0.0.1:{self.port + 1}', client_id: cnt, mqtt_version: '3.1.1'}}\n"
            "streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, unit: g}\n"
            f"alerts: {{topic_prefix: cnt/out}}\nmetrics: {{listen: '127.0.0.1:{self.metrics_port}'}}\n"
            f"state: {{dir: '{self.state}', keep: cluster, snapshot_every: 2s}}\n"
            f"cluster: {{servers: ['nats://127.0.0.1:{self.port}'], name: {NAME}, replicas: 1, "
            "redelivery_wait: 0s, lease: 6s, handover_wait: 30s}\n"
            f"shard: {{number: 0, of: {of}, metrics_port: same, hashed_levels: [2, 3, 4]}}\n")

    def start(self) -> None:
        with open(self.log_path, "ab") as out:
            self.proc = subprocess.Popen([sys.executable, "-m", "shiftwatch", "run", "--config",
                                          str(self.config), "--shard", str(self.number)],
                                         stdout=out, stderr=subprocess.STDOUT)
        assert wait_until(lambda: "connected to broker" in self.log() or self.proc is None
                          or self.proc.poll() is not None, 60), self.log()[-2000:]
        assert self.proc.poll() is None, self.log()[-2000:]

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def reload(self, of: int, line: str) -> None:
        offset = len(self.log())
        self.write(of)
        assert self.proc is not None
        self.proc.send_signal(signal.SIGHUP)
        assert wait_until(lambda: line in self.log()[offset:], 30), self.log()[offset:]

    def metrics(self) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
        return scrape(self.metrics_port)

    def status(self) -> dict[str, object]:
        with urllib.request.urlopen(f"http://127.0.0.1:{self.metrics_port}/status.json", timeout=5) as r:
            doc = json.loads(r.read())
        assert isinstance(doc, dict)
        return doc

    def taken(self, topics: list[str] = TOPICS) -> float:
        try:
            m = self.metrics()
        except OSError:
            return -1.0
        return sum(metric(m, "shiftwatch_samples_total", stream=t) for t in topics)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


class _Publisher:
    def __init__(self, port: int) -> None:
        self.client = PlainClient(f"mqtt://127.0.0.1:{port + 1}", "cnt-publisher", mqtt_version="3.1.1").start()
        self.sent = 0
        self._j = 0

    def send(self, n: int, topics: list[str] = TOPICS, part: int = 1) -> None:
        """``n`` samples of each topic, on shard ``part``'s partition (what the NATS mapping
        would put in front of them; the lone server has no mapping)."""
        for _ in range(n):
            for t in topics:
                self.client.publish(f"part/{part}/{t}", json.dumps({"v": 500.0, "ts": T0 + self._j}), qos=1)
                self.sent += 1
            self._j += 1

    def stop(self) -> None:
        self.client.stop()


def _notice_shown(browser: Any) -> str | None:
    """The status page's notices line as headless Chromium shows it: its text when it is
    visible, None when it is hidden (read in one script: the page refreshes every 5 s)."""
    got = browser.execute_script(
        "const n = document.getElementById('notices');"
        "return n ? [n.hidden, getComputedStyle(n).display, n.textContent] : null")
    if got is None:
        return None
    hidden, display, text = got
    return None if hidden or display == "none" else str(text)


def test_a_shard_started_with_a_shard_of_no_live_shard_runs_takes_nothing_and_keeps_the_mapping_record(
        tmp_path: Path, server: int, chromium: Any) -> None:
    # Shards 0 and 2 of a 3-shard set run (the record says: 3 now, 2 before).  Shard 1 is
    # started with shard.of 4 by a typo.  Before, its start rewrote the record (4 now, 3
    # before: the real mapping before lost) and it went on with 4.  Now the record stays,
    # the disagreement is named in the log, /metrics and /status.json, and the shard takes
    # no sample until its count agrees (here: the typo corrected and the shard reloaded).
    assert len(TOPICS) == 2
    peers = _Peers(server)
    before = peers.mapping()
    shard = _Shard(tmp_path, server, of=4)
    pub = _Publisher(server)
    try:
        shard.start()
        pub.send(40)
        assert wait_until(lambda: metric(shard.metrics(), "shiftwatch_ingest_queue_depth") >= pub.sent, 30), \
            shard.metrics()
        m = shard.metrics()
        assert metric(m, "shiftwatch_shard_of_disputed") == 1
        assert metric(m, "shiftwatch_messages_processed_total") == 0
        assert shard.taken() == 0
        said = "shard.of 4 agrees with no other live shard of the set (shards 0, 2 run shard.of 3)"
        assert said in shard.log(), shard.log()[-2000:]
        notices = shard.status()["notices"]
        assert isinstance(notices, list) and len(notices) == 1 and said in notices[0], notices
        # The operator's status page says it too, in a real headless Chromium.
        browser = chromium(FLAGS, {"browser": "ALL"})
        browser.get(f"http://127.0.0.1:{shard.metrics_port}/status")
        assert wait_until(lambda: said in (_notice_shown(browser) or ""), 30), _notice_shown(browser)
        assert peers.mapping() == before  # the record as it was: same contents, same revision
        # The typo corrected, the shard reloaded: its count agrees, it takes what waited.
        shard.reload(3, "shard.of 3 is taken up")
        assert wait_until(lambda: shard.taken() >= pub.sent, 30), (shard.taken(), pub.sent)
        pub.send(10)
        assert wait_until(lambda: shard.taken() >= pub.sent, 30), (shard.taken(), pub.sent)
        m = shard.metrics()
        assert shard.taken() == pub.sent
        assert metric(m, "shiftwatch_shard_of_disputed") == 0
        assert shard.status()["notices"] == []
        assert wait_until(lambda: _notice_shown(browser) is None, 30), _notice_shown(browser)  # next refresh
        assert peers.mapping() == before
    finally:
        pub.stop()
        shard.stop()
        peers.close()


def test_a_reload_to_a_shard_of_the_others_take_up_too_is_a_change_and_until_then_the_count_in_force_runs(
        tmp_path: Path, server: int) -> None:
    # Shard 1 runs with shard.of 3 like the others, then is reloaded with 4.  No other live
    # shard runs 4: it goes on with 3 (its streams still fed) and the record stays.  Then
    # the others announce 4 too (a real change, made on every shard): the shard takes 4 up
    # within seconds, and the record says 4 now, 3 before.
    peers = _Peers(server)
    before = peers.mapping()
    shard = _Shard(tmp_path, server, of=3)
    pub = _Publisher(server)
    try:
        shard.start()
        pub.send(20)
        assert wait_until(lambda: shard.taken() >= pub.sent, 30), (shard.taken(), pub.sent)
        assert peers.mapping() == before  # its start agreed: nothing to change
        shard.reload(4, "agrees with no other live shard of the set")
        pub.send(20)
        assert wait_until(lambda: shard.taken() >= pub.sent, 30), (shard.taken(), pub.sent)
        assert metric(shard.metrics(), "shiftwatch_shard_of_disputed") == 1
        assert "shard.of is 4 now" not in shard.log()
        assert peers.mapping() == before
        t = time.time()
        for lease in peers.leases:
            lease.announce((4, LEVELS))
        assert wait_until(lambda: "shard.of is 4 now" in shard.log(), 30), shard.log()[-2000:]
        record, _rev = peers.mapping()
        assert record is not None and (record.of, record.previous_of) == (4, 3) and record.since >= t - 1.0
        assert metric(shard.metrics(), "shiftwatch_shard_of_disputed") == 0
        pub.send(20)
        assert wait_until(lambda: shard.taken() >= pub.sent, 30), (shard.taken(), pub.sent)
        assert shard.taken() == pub.sent
    finally:
        pub.stop()
        shard.stop()
        peers.close()


def test_a_shard_new_to_the_set_takes_samples_and_leaves_the_record_until_the_others_agree(
        tmp_path: Path, server: int) -> None:
    # Step 1 of a change from 3 shards to 4: the new shard 3 starts with shard.of 4 while
    # the others run 3.  It has no partition under their count (the servers' mapping sends
    # it nothing yet), so it runs as it always did, and takes what reaches it (the servers'
    # mapping changed first, say); only the record waits for a second shard with 4.
    mine = [t for li in range(1, 7) for h in range(1, 9)
            if partition_of(t := f"brackenfield/line{li}/head{h}/fill", LEVELS, 4) == 3][:2]
    peers = _Peers(server, ago=600.0)  # the set has run with 3 for ten minutes
    before = peers.mapping()
    shard = _Shard(tmp_path, server, of=4, number=3)
    pub = _Publisher(server)
    try:
        shard.start()
        pub.send(20, mine, part=3)
        assert wait_until(lambda: shard.taken(mine) >= pub.sent, 30), (shard.taken(mine), pub.sent)
        assert metric(shard.metrics(), "shiftwatch_shard_of_disputed") == 1
        assert "this shard is new to the set" in shard.log(), shard.log()[-2000:]
        assert peers.mapping() == before
        for lease in peers.leases:  # the first old shard's reload (step 2) wants 4 too
            lease.announce((4, LEVELS))
        assert wait_until(lambda: "shard.of 4 is taken up" in shard.log(), 30), shard.log()[-2000:]
        record, _rev = peers.mapping()
        assert record is not None and (record.of, record.previous_of) == (4, 3)
        assert metric(shard.metrics(), "shiftwatch_shard_of_disputed") == 0
        assert shard.taken(mine) == pub.sent
    finally:
        pub.stop()
        shard.stop()
        peers.close()


def test_going_down_shard_by_shard_the_first_reloaded_runs_the_old_count_until_the_second_is_reloaded(
        tmp_path: Path, server: int) -> None:
    # The README's order for 4 shards to 3, the reloads one by one (in-process daemons, the
    # real lease and record against the real nats-server): shard 0 reloaded first finds no
    # other live shard with 3 and goes on with 4, the record as it is; shard 1 reloaded next
    # agrees with shard 0's announced 3 and takes it up at once; shard 0 takes it up at its
    # next look.  The record ends as 3 now, 4 before.
    from shiftwatch.config import for_shard, load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics

    def config(of: int) -> Path:
        """The file every shard reads (``run --shard k`` picks the number)."""
        path = tmp_path / f"shards-of-{of}.yaml"
        path.write_text(
            "streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, unit: g}\n"
            f"broker: {{client_id: down}}\nmetrics: {{listen: '127.0.0.1:0'}}\n"
            f"state: {{dir: '{tmp_path / 'state'}', keep: cluster}}\n"
            f"cluster: {{servers: ['nats://127.0.0.1:{server}'], name: {NAME}, replicas: 1, lease: 6s}}\n"
            f"shard: {{number: 0, of: {of}, hashed_levels: [2, 3, 4]}}\n")
        return path

    shards = []
    try:
        for k in range(4):
            d = Daemon(for_shard(load_config(str(config(4))), k), config_path=str(config(4)), metrics=Metrics())
            d._join_cluster()
            d.shards.take_up()
            shards.append(d)
        first = shards[0].cluster.read_mapping()
        assert first is not None and (first.of, first.previous_of) == (4, None)
        d0, d1 = shards[0], shards[1]
        d0.shards.reload(load_config(str(config(3))))
        assert d0.owner is not None and d0.owner.of == 4 and d0.shards.pending is not None
        assert d0.metrics.registry.get_sample_value("shiftwatch_shard_of_disputed") == 1
        assert d0.cluster.read_mapping() == first
        d0.shards.recheck()  # a second later: still nobody else with 3
        assert d0.owner.of == 4
        d1.shards.reload(load_config(str(config(3))))
        assert d1.owner is not None and d1.owner.of == 3 and d1.shards.pending is None
        d0.shards.recheck()
        assert d0.owner.of == 3 and d0.shards.pending is None
        assert d0.metrics.registry.get_sample_value("shiftwatch_shard_of_disputed") == 0
        for d in shards[2:]:
            d.shards.reload(load_config(str(config(3))))
            assert d.owner.of == 3 and d.shards.pending is None
        record = d0.cluster.read_mapping()
        assert record is not None and (record.of, record.previous_of) == (3, 4)
    finally:
        for d in shards:
            if d.lease is not None:
                d.lease.release()
            if d.nats is not None:
                d.nats.close()
