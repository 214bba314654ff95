"""Shards behind a real 3-server NATS cluster, and their faults.

One cluster for the module (``natskit.NatsCluster``: nats-server with JetStream,
3 replicas, MQTT, the plant mapped to partitions by ``partition()``); each test
runs real ``shiftwatch run --shard k`` daemons with ``state.keep: cluster`` as
subprocesses and publishes with paho over MQTT (``shardrun.ShardRun``).  When
the cluster cannot start the tests fail, they never skip: the README's test
command installs the Debian package nats-server.

References outside the project:

- NATS's subject mapping: ``{{partition(n, wildcards...)}}`` sends each subject to
  exactly one of n partitions, always the same one (nats-server 2.9 docs, "Subject
  Mapping and Partitioning"); checked here against the daemons' own metrics.
- MQTT 3.1.1 section 4.3.2 (OASIS standard): a QoS 1 message not acknowledged by
  the receiver is delivered again; that is what carries a killed shard's backlog
  to its successor.
- nats-server 2.9.10 itself (Debian's package) for the partition function: which
  ``part.<k>`` subject the real cluster's ``partition()`` mapping delivers each topic on
  is the reference for ``shiftwatch.partition`` (FNV-1a 32-bit, whose constants and
  test vectors are those of the IETF draft draft-eastlake-fnv, over the wildcard tokens
  joined with nothing between them, mod n).
- At-least-once delivery with a key to drop repeats is common practice for
  event streams; the record's ``id`` (with ``phase``) is that key.

The last two tests change the mapping (to 4 partitions, and back to 3 at their end): they run last in the module.
The reshards whose old owner is late are in ``test_shard_handover_stalls.py``.
"""

from __future__ import annotations

import json
import logging
import socket
import threading
import time
from pathlib import Path

import pytest

from shiftwatch.broker import wait_until
from shiftwatch.handover import MAGIC as HANDOVER_MAGIC
from shiftwatch.lease import ShardLease
from shiftwatch.mqtt import PlainClient
from shiftwatch.natsio import NatsIO
from shiftwatch.partition import fnv1a_32, partition_of

from .killrun import metric, scrape
from .natskit import NatsCluster
from .shardrun import (
    HASHED_LEVELS,
    SHIFTWATCH,
    Plan,
    ShardRun,
    all_taking,
    handover_outcomes,
    publish_with,
    run_three_shards,
)


def test_partition_function_is_the_one_nats_server_applies(cluster: NatsCluster) -> None:
    # Reference: the real nats-server 2.9 cluster.  Topics published over MQTT through the
    # cluster's mapping partition(3, 1, 2, 3) arrive on part/<k>/...; shiftwatch.partition
    # must give the same k for every one.  The topics include pairs whose wildcard tokens
    # join to the same text (ab/c/d and a/bc/d): nats-server joins them with nothing
    # between, so those pairs share a partition, which a separator would break.
    # FNV-1a 32-bit reference values: the IETF draft draft-eastlake-fnv's test vectors.
    assert fnv1a_32(b"") == 0x811C9DC5
    assert fnv1a_32(b"a") == 0xE40C292C
    assert fnv1a_32(b"foobar") == 0xBF9CF968
    topics = [f"brackenfield/line{i}/head{j}/fill" for i in range(12) for j in range(12)]
    topics += [f"brackenfield/{a}/{b}/{c}" for a, b, c in
               [("ab", "c", "d"), ("a", "bc", "d"), ("a", "b", "cd"), ("abc", "d", "x"), ("a", "bcd", "x"),
                ("L-7", "Kopf_2", "temp"), ("L-7K", "opf_2", "temp"), ("0", "0", "0"), ("00", "", "0")]]
    arrived: dict[str, str] = {}
    lock = threading.Lock()

    def on(topic: str, payload: bytes) -> None:
        with lock:
            arrived[payload.decode()] = topic

    sub = PlainClient(cluster.mqtt_url(1), "partition-probe-sub", subscribe=["part/#"], on_message=on,
                      mqtt_version="3.1.1").start()
    pub = PlainClient(cluster.mqtt_url(2), "partition-probe-pub", mqtt_version="3.1.1").start()
    try:
        # The subscription has reached every server once a probe comes back.
        def probe() -> bool:
            pub.publish("brackenfield/probe/probe/probe", b"probe", qos=1)
            return "probe" in arrived

        assert wait_until(probe, 30, every=0.5)
        for t in topics:
            pub.publish(t, t.encode(), qos=1)
        assert wait_until(lambda: all(t in arrived for t in topics), 30), \
            sorted(set(topics) - set(arrived))[:10]
    finally:
        sub.stop()
        pub.stop()
    wrong = {}
    for t in topics:
        k = int(arrived[t].split("/")[1])
        assert arrived[t] == f"part/{k}/{t}"
        if partition_of(t, HASHED_LEVELS, cluster.parts) != k:
            wrong[t] = k
    assert not wrong, wrong
    for a, b in [("brackenfield/ab/c/d", "brackenfield/a/bc/d"), ("brackenfield/a/b/cd", "brackenfield/ab/c/d"),
                 ("brackenfield/abc/d/x", "brackenfield/a/bcd/x"),
                 ("brackenfield/L-7/Kopf_2/temp", "brackenfield/L-7K/opf_2/temp")]:
        assert arrived[a].split("/")[1] == arrived[b].split("/")[1], (a, b)
    # And the three partitions all occur (the check is not passed by one constant answer).
    assert {v.split("/")[1] for v in arrived.values()} == {"0", "1", "2"}


def test_a_shard_that_cannot_start_gives_its_lease_back(tmp_path: Path, cluster: NatsCluster) -> None:
    # A run of this module on the shared machine failed as a CI run had ("shard 1 did not
    # start" within 60 s): the shard's metrics port was taken (the kit took base + k from
    # the range the kernel also hands outgoing connections as local ports), the daemon
    # stopped with status 2 after it had claimed its lease, and every restart waited for
    # that lease to expire (cluster.lease), then failed the same way.  A start that fails
    # gives the lease back: the next attempt claims it at once.
    r = ShardRun(tmp_path, SHIFTWATCH, cluster, plan=Plan(samples=10), name="portclash")
    sh = r.shard(0)
    blocker = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        blocker.bind(("127.0.0.1", sh.port))
        blocker.listen(1)
        with pytest.raises(RuntimeError, match="did not start"):
            sh.start()
        assert sh.proc is not None and sh.proc.wait(30) == 2
        first = sh.log()
        assert "Address already in use" in first and "shard 0 is ours" in first, first[-2000:]
        assert "shard 0 released" in first, first[-2000:]
        blocker.close()
        sh.start()
        second = sh.log()[len(first):]
    finally:
        blocker.close()
        r.close()
    assert "shard 0 is ours" in second and "is held by" not in second, second[-2000:]


def _lease(cluster: NatsCluster, who: str) -> tuple[NatsIO, ShardLease]:
    io = NatsIO(cluster.urls, name=who)
    io.connect()
    lease = ShardLease(io, name="leasecheck", shard=7, lease=3.0, replicas=3,
                       logger=logging.getLogger(f"test.{who}"))
    lease.setup()
    return io, lease


def test_a_lease_whose_entry_vanished_is_taken_again_when_nobody_else_has_it(cluster: NatsCluster) -> None:
    # A CI run of the server-kill test below lost 2,855 samples and missed 6 steps: while
    # a NATS server was down no renewal got through, the lease's entry expired, and the
    # owner stopped at its next renewal although nobody had claimed the shard.  The entry
    # is removed here as its expiry removes it (a delete marker or nothing: kv_get returns
    # None for both); the owner must create it again and carry on.  The other daemon's
    # claim must still win when it comes first: JetStream's create is atomic (NATS docs,
    # "Key/Value Store": create succeeds only when the key does not exist).
    io, a = _lease(cluster, "lease-a")
    io_b, b = _lease(cluster, "lease-b")
    try:
        assert a.claim(threading.Event())
        io.run(io.kv_delete(a.bucket, a.key))
        assert io.run(io.kv_get(a.bucket, a.key)) is None
        time.sleep(3.0)  # three renewal rounds (every third of the lease)
        assert a.lost is None
        entry = io.run(io.kv_get(a.bucket, a.key))
        assert entry is not None and json.loads(entry.value)["id"] == a.owner["id"]
        # Now the entry vanishes and another daemon claims the shard before the owner renews
        # (tried again in the rare case the owner's renewal came between the two; a claim
        # that finds the key held waits, so each try is cut short).
        for _ in range(10):
            io.run(io.kv_delete(a.bucket, a.key))
            stop_b = threading.Event()
            threading.Timer(0.3, stop_b.set).start()
            if b.claim(stop_b):
                break
        else:
            pytest.fail("the other daemon never got its claim in between the owner's renewals")
        # (A bound, not a speed asked for: the owner renews every second, but a CI run
        # beside other long tests, its NATS servers 3 s behind on their reads, had not seen
        # the loss within 5 s.)
        assert a.lost_event.wait(30.0)
        assert a.lost == "the lease was claimed by another daemon"
        entry = io.run(io.kv_get(a.bucket, a.key))
        assert entry is not None and json.loads(entry.value)["id"] == b.owner["id"]
    finally:
        b.release()
        a.release()
        io.close()
        io_b.close()


def test_three_shards_split_the_plant_and_keep_stream_names(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=700, rate=100.0)
    r = run_three_shards(tmp_path, cluster, "split", plan)
    try:
        t0 = time.monotonic()
        # A damaged handover message on a stream's topic in shard 0's partition, and an
        # answer for a daemon that does not exist: set aside, counted, nothing else lost.
        stray = PlainClient(cluster.mqtt_url(1), "split-stray", mqtt_version="3.1.1").start()
        try:
            topic = "part/0/" + next(s for s in plan.names() if partition_of(s, HASHED_LEVELS, 3) == 0)
            stray.publish_wait(topic, HANDOVER_MAGIC + b'{"ask": "not a list", "shard": 1, "writer": "w"}')
            stray.publish_wait(topic, HANDOVER_MAGIC + b'{"answer": ["x"], "shard": 1, "writer": "nobody"}')
        finally:
            stray.stop()
        r.publish()
        counts = r.settle()
        bad = scrape(r.shard(0).port).get(("shiftwatch_messages_dropped_total",
                                           (("reason", "bad_handover"), ("shard", "0"))))
        tally = r.tally(counts, time.monotonic() - t0)
        holders: dict[str, list[int]] = {s: [] for s in plan.names()}
        for k, sh in r.shards.items():
            m = scrape(sh.port)
            labels = [dict(lab) for (n, lab) in m if n == "shiftwatch_samples_total"]
            # Every series of a shard carries its shard label (the constant label).
            assert all(lab.get("shard") == str(k) for (_n, lab_t) in m for lab in [dict(lab_t)])
            for lab in labels:
                assert not lab["stream"].startswith("part/"), lab  # the partition never shows
                holders[lab["stream"]].append(k)
        with r._lock:
            topics = {rec["stream"] for rec in r.records}
    finally:
        r.close()
    # Each stream is watched by exactly one shard (the mapping's partition), and all
    # three shards get some: 12 streams hashed over 3 partitions.
    assert all(len(v) == 1 for v in holders.values()), holders
    assert {v[0] for v in holders.values()} == {0, 1, 2}
    assert topics <= set(plan.names())
    assert tally.lost == 0 and tally.shifts_missed == 0 and tally.shifts_with_two_ids == 0, tally.line()
    assert bad == 1, bad
    assert "handover message on part/0/brackenfield/" in r.shard(0).log()
    assert "'ask' is not a list of stream names" in r.shard(0).log()
    print(tally.line())


def test_shard_killed_and_restarted_on_an_empty_state_dir(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=1000, rate=100.0)
    r = run_three_shards(tmp_path, cluster, "killed", plan)
    held: list[str] = []

    def restart() -> None:
        r.shards[1].kill()
        r.status.pop("1", None)
        # What the dead shard left in the cluster of its streams (written before the kill).
        held.extend(r.cluster_holds([s for s in plan.names() if partition_of(s, HASHED_LEVELS, 3) == 1]))
        # Another box: a state directory that has never been used.
        r.fresh_state(1, "state-elsewhere")
        r.shard(1).start()

    try:
        # At 450: just after a step at 400 was detected, its trial still open.
        _counts, tally = publish_with(r, restart, at=450, wait=90, settle=120)
        # Streams the dead shard wrote moments before are loaded once cluster.redelivery_wait
        # has passed (deferred): the line can come after the last samples.
        deadline = time.monotonic() + 30.0
        log = r.shard(1).log()
        while "from the cluster" not in log and time.monotonic() < deadline:
            time.sleep(0.5)
            log = r.shard(1).log()
    finally:
        r.close()
    print(tally.line() + f"; streams the dead shard had left in the cluster: {len(held)}")
    # The new shard 1 waited for the dead one's lease, then took from the cluster the streams
    # the dead one had written: none of those warmed up again.  Which streams those are is
    # read from the cluster itself at the kill: a dead shard that had created engines may
    # not have journaled them yet (in one run it had three engines and nothing in the
    # cluster; NATS then delivered all of its unacknowledged samples to the new shard).
    if held:
        assert "loaded" in log and "from the cluster" in log, log[-3000:]
    for s in held:
        assert f"new stream {s} " not in log, (s, log[-3000:])
    # What the issue asks of a shard moved to an empty disk: no step missed, none under a
    # second id.  Samples: none lost in every run but that one, where the held-back
    # deliveries came after newer samples, later than cluster.redelivery_wait, and 1,500
    # of 12,000 were set aside as out of order (counted; README, Shards measured).  The
    # tally is printed; the bound only catches a gross loss.
    assert tally.lost <= tally.published // 4, tally.line()
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()


def test_one_nats_server_killed_and_restarted(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=800, rate=100.0)
    r = run_three_shards(tmp_path, cluster, "serverdown", plan)

    def bounce() -> None:
        cluster.kill(0)  # the server the shards' MQTT connections use
        time.sleep(3.0)
        cluster.restart(0)

    try:
        # The cluster's recovery (the server's restart, JetStream electing leaders, the
        # shards' reconnect backing off (up to 30 s before 2026-12-05, 4 s now), their wait for redeliveries, NATS's
        # ack_wait) can take more than settle's usual 20 s without progress on a loaded
        # machine: a CI run on fc348e9 stopped waiting at 36 s with 7,294 samples not yet
        # taken, one on ad97735 at 68 s (45 s without progress) with 3,305 not taken and no
        # record at all, which is what a round held while the cluster's journal does not
        # answer looks like (whether they would have come is not known; none of 8 runs
        # here stalled, 6 of them beside 2 or 3 busy loops).  A real loss still fails below, once
        # 90 s pass with nothing taken, and the shards' and servers' logs are shown.
        _counts, tally = publish_with(r, bounce, settle=240, still_for=90.0)
        logs = r.log_tails()
    finally:
        r.close()
    print(tally.line())
    # As for the shard moved to an empty disk: no step missed, none under a second id; no
    # sample lost in every run so far, but a delivery NATS holds back past
    # cluster.redelivery_wait is set aside as out of order, so the bound is a loose one.
    assert tally.lost <= tally.published // 4, f"{tally.line()}\n{logs}"
    assert tally.shifts_missed == 0, f"{tally.line()}\n{logs}"
    assert tally.shifts_with_two_ids == 0, f"{tally.line()}\n{logs}"


def test_shard_count_changed_from_3_to_4_while_samples_flow(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=1600, rate=100.0)
    r = run_three_shards(tmp_path, cluster, "grown", plan)
    started: list[float] = []
    published: list[int] = [0]
    remapped_at: list[int] = []

    def grow() -> None:
        # First every shard has taken samples.  Before 2026-12-04 every connect began a
        # wait of cluster.redelivery_wait (6 s here), and CI runs that changed the mapping
        # while shard 2, started last, was still waiting lost 450 to 780 samples of its two
        # moving streams: no shard had written them, so nothing said whom their new owners
        # should ask.  Now only a resumed session waits, and the cluster's mapping record
        # names the old owner (test_shard_reshard_faults.py checks that case).
        # Then the README's order: shard.of raised in the file and the new shard started (it
        # subscribes to a partition no topic maps to yet); the old shards reloaded (each
        # lets go of the streams the mapping for 4 partitions gives another shard: state
        # saved to the cluster, engine dropped; what still comes to it of them goes to
        # their journal); then the mapping on every server.
        started.append(all_taking(r))
        r.write_config(4)
        r.shard(3).start()
        if not r.online(3):
            raise RuntimeError("shard 3 did not say online")
        r.reload_shards([0, 1, 2], "shard.of is 4 now")
        r.remap(4)
        remapped_at.append(published[-1])

    try:
        _counts, tally = publish_with(r, grow, wait=90, settle=120, progress=published)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items()}
    finally:
        r.close()
        r.repartition(3)
    # The mapping changed while samples still flowed (not after the last of them).
    assert remapped_at and remapped_at[0] < plan.samples - 100, remapped_at
    handed = sum(v for m in pages.values() for (n, _lab), v in m.items()
                 if n == "shiftwatch_samples_handed_over_total")
    handovers = handover_outcomes(pages.values())
    print(tally.line() + f"; handed over through the journal {handed:.0f}; handovers {handovers}; "
          f"every shard had taken samples {started[0]:.1f} s after the grow began")
    # Each stream ends with exactly the shard the real cluster's mapping for 4 partitions
    # sends it to (the streams shard 3 holds came to it from NATS under part/3): the old
    # owners let the moved ones go instead of keeping stale engines.
    holders: dict[str, list[int]] = {s: [] for s in plan.names()}
    for k, m in pages.items():
        for n, lab in m:
            if n == "shiftwatch_samples_total":
                holders[dict(lab)["stream"]].append(k)
    assert holders == {s: [partition_of(s, HASHED_LEVELS, 4)] for s in plan.names()}, holders
    # The fourth shard took streams over with their history: their sample counts
    # (part of the saved state) include the samples taken before the change, at 300.
    took = [v for (n, _lab), v in pages[3].items() if n == "shiftwatch_samples_total"]
    assert took and min(took) > 300, took
    # What the issue asks of a reshard while samples flow: no step missed, none confirmed
    # under two ids, no sample lost.  Samples an old owner gets late (NATS's MQTT side
    # sometimes holds a QoS 1 session's deliveries back for seconds) reach the journal
    # before the new owner begins: it waits for the old owner's answer (shiftwatch.handover).
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()
    assert tally.lost == 0, tally.line()
    assert handovers["waited_out"] == 0, handovers


def test_shard_count_changed_from_4_to_3_while_samples_flow(tmp_path: Path, cluster: NatsCluster) -> None:
    # The README's order for going down: shard.of 3 in every shard's file, all four
    # reloaded (shard 3 then owns nothing), the mapping reloaded, shard 3 stopped once its
    # streams have moved (it hands nothing more over to their journals for 3 s).  The new
    # owners of shard 3's streams ask it; it answers until it stops: nothing is lost, no
    # handover waits out.
    plan = Plan(samples=1600, rate=100.0)
    r = ShardRun(tmp_path, SHIFTWATCH, cluster, plan=plan, name="shrunk", shards=4)
    r.repartition(4)
    r.start()
    for k in range(4):
        r.shard(k).start()
        assert r.online(k), f"shard {k} never said online: {r.shard(k).log()[-2000:]}"

    def shrink() -> None:
        all_taking(r, 4)
        r.write_config(3)
        r.reload_shards([0, 1, 2, 3], "shard.of is 3 now")
        r.remap(3)
        # Shard 3's streams have moved once it hands nothing more over.
        last, still = -1.0, time.monotonic()
        while time.monotonic() - still < 3.0:
            now = metric(scrape(r.shard(3).port), "shiftwatch_samples_handed_over_total")
            if now != last:
                last, still = now, time.monotonic()
            time.sleep(0.3)
        r.shard(3).stop()

    try:
        _counts, tally = publish_with(r, shrink)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items() if k < 3}
    finally:
        r.close()
        r.repartition(3)
    handovers = handover_outcomes(pages.values())
    print(tally.line() + f"; handovers {handovers}")
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()
    assert tally.lost == 0, tally.line()
    assert handovers["waited_out"] == 0, handovers
