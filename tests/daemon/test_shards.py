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

The last four tests change the mapping (to 4 partitions, and back to 3 at their end): they run last in the module.
"""

from __future__ import annotations

import json
import logging
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path

import pytest

from shiftwatch.broker import hold, wait_until
from shiftwatch.handover import MAGIC as HANDOVER_MAGIC
from shiftwatch.lease import ShardLease
from shiftwatch.mqtt import PlainClient
from shiftwatch.natsio import NatsIO
from shiftwatch.partition import fnv1a_32, partition_of

from .killrun import metric, scrape
from .natskit import NatsCluster, module_cluster
from .shardrun import HASHED_LEVELS, Plan, ShardRun, Tally

CMD = [sys.executable, "-m", "shiftwatch"]


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[NatsCluster]:
    yield from module_cluster(tmp_path_factory)


def _run(tmp_path: Path, cluster: NatsCluster, name: str, plan: Plan, keepalive: int = 5) -> ShardRun:
    r = ShardRun(tmp_path, CMD, cluster, plan=plan, name=name, keepalive=keepalive)
    r.start()
    for k in range(3):
        r.shard(k).start()
        assert r.online(k), f"shard {k} never said online: {r.shard(k).log()[-2000:]}"
    return r


def _all_taking(r: ShardRun, shards: int = 3) -> float:
    """Wait until shards 0 to ``shards`` - 1 have all taken samples; the seconds waited."""
    t = time.monotonic()
    if not wait_until(lambda: all(metric(scrape(r.shard(k).port), "shiftwatch_samples_total") > 0
                                  for k in range(shards)), 60):
        raise RuntimeError("a shard took no sample in 60 s")
    return time.monotonic() - t


def _publish_with(r: ShardRun, change: Callable[[], None], *, at: int = 300, wait: float = 120.0,
                  settle: float = 150.0, still_for: float = 20.0,
                  progress: list[int] | None = None) -> tuple[dict[str, float], Tally]:
    """Publish the plan; once sample index ``at`` is out, run ``change`` in a thread (what it
    raises fails the test); then wait for the shards to settle (``ShardRun.settle``): the
    samples each stream's holder took, and the tally.  ``progress[-1]``: the last index out."""
    done = threading.Event()
    errors: list[str] = []

    def run() -> None:
        try:
            change()
        except Exception as exc:  # noqa: BLE001  reported below, in the test's thread
            errors.append(f"{type(exc).__name__}: {exc}")
        finally:
            done.set()

    def during(j: int) -> None:
        if progress is not None:
            progress[-1] = j
        if j == at:
            threading.Thread(target=run, daemon=True).start()

    t0 = time.monotonic()
    r.publish(during)
    assert done.wait(wait)
    assert not errors, errors
    counts = r.settle(settle, still_for=still_for)
    return counts, r.tally(counts, time.monotonic() - t0)


def _handovers(pages: Iterable[dict[tuple[str, tuple[tuple[str, str], ...]], float]]) -> dict[str, float]:
    """shiftwatch_stream_handovers_total by outcome, summed over the shards' scrapes."""
    out = {"answered": 0.0, "waited_out": 0.0}
    for m in pages:
        for (n, lab), v in m.items():
            if n == "shiftwatch_stream_handovers_total":
                out[dict(lab)["outcome"]] += v
    return out


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
    r = ShardRun(tmp_path, CMD, cluster, plan=Plan(samples=10), name="portclash")
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
        assert a.lost_event.wait(5.0)
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
    r = _run(tmp_path, cluster, "split", plan)
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
    r = _run(tmp_path, cluster, "killed", plan)
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
        _counts, tally = _publish_with(r, restart, at=450, wait=90, settle=120)
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
    r = _run(tmp_path, cluster, "serverdown", plan)

    def bounce() -> None:
        cluster.kill(0)  # the server the shards' MQTT connections use
        time.sleep(3.0)
        cluster.restart(0)

    try:
        # The cluster's recovery (the server's restart, JetStream electing leaders, the
        # shards' reconnect backing off up to 8 s, their wait for redeliveries, NATS's
        # ack_wait) can take more than settle's usual 20 s without progress on a loaded
        # machine: a CI run on fc348e9 stopped waiting at 36 s with 7,294 samples not yet
        # taken (whether they would have come is not known).  A real loss still fails
        # below, once 45 s pass with nothing taken.
        _counts, tally = _publish_with(r, bounce, settle=180, still_for=45.0)
    finally:
        r.close()
    print(tally.line())
    # As for the shard moved to an empty disk: no step missed, none under a second id; no
    # sample lost in every run so far, but a delivery NATS holds back past
    # cluster.redelivery_wait is set aside as out of order, so the bound is a loose one.
    assert tally.lost <= tally.published // 4, tally.line()
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()


def test_shard_count_changed_from_3_to_4_while_samples_flow(tmp_path: Path, cluster: NatsCluster) -> None:
    plan = Plan(samples=1600, rate=100.0)
    r = _run(tmp_path, cluster, "grown", plan)
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
        started.append(_all_taking(r))
        r.write_config(4)
        r.shard(3).start()
        if not r.online(3):
            raise RuntimeError("shard 3 did not say online")
        r.reload_shards([0, 1, 2], "shard.of is 4 now")
        r.remap(4)
        remapped_at.append(published[-1])

    try:
        _counts, tally = _publish_with(r, grow, wait=90, settle=120, progress=published)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items()}
    finally:
        r.close()
        r.repartition(3)
    # The mapping changed while samples still flowed (not after the last of them).
    assert remapped_at and remapped_at[0] < plan.samples - 100, remapped_at
    handed = sum(v for m in pages.values() for (n, _lab), v in m.items()
                 if n == "shiftwatch_samples_handed_over_total")
    handovers = _handovers(pages.values())
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


def test_an_old_owner_held_back_at_a_reshard_hands_its_late_samples_over(tmp_path: Path,
                                                                          cluster: NatsCluster) -> None:
    # The stall behind the measured losses, made certain: right after the old shards'
    # reload, the old owner of the most moving streams is stopped (SIGSTOP) for 2.5 s
    # before the mapping changes and 9 s after it, longer than cluster.redelivery_wait
    # (6 s).  Samples of the moving streams pile up in its MQTT session meanwhile, and
    # reach it only after their new owners have seen the streams.  (The MQTT keepalive is
    # 30 s here, so the broker keeps the stopped shard's connection: a frozen process, not
    # a lost connection, is what is tested.)
    # Before the handover (shiftwatch.handover), the new owners waited redelivery_wait,
    # then wrote the streams, and the old owner's late samples were refused by the journal
    # and set aside: 250 or more a moving stream, and in CI runs a step with them.  Now the
    # new owners ask the old one and wait for its answer, which it sends only once it has
    # written all it held to the journal: no sample of a moving stream is lost, no step
    # missed, none confirmed under two ids.
    # (With a cluster whose MQTT side sends at most 64 unacknowledged messages a
    # subscription, this passed twice and stalled once: every old owner is a new owner
    # too, each waiting shard soon held 64 and was sent nothing more, asks included, so
    # they waited on each other until cluster.handover_wait.  README, Running shards,
    # "Known limits"; the answer by plain NATS removed the other half of that stall.)
    _stalled_reshard(tmp_path, cluster, Plan(samples=1600, rate=100.0))


def test_shards_waiting_for_an_answer_go_on_taking_samples_at_a_small_unacknowledged_limit(
        tmp_path: Path) -> None:
    # The same stall on a cluster whose MQTT side sends a subscription at most 64
    # unacknowledged messages.  A new owner waiting for the stopped shard's answer held
    # its rounds unacknowledged (the waiting streams' samples were only in its memory), so
    # after 64 messages NATS sent it nothing more, on any of its streams, asks for its own
    # answers included: in one run of three two waiting shards waited on each other until
    # cluster.handover_wait.  Now the waiting streams' samples are parked in the cluster
    # and every round is acknowledged: shard 3 goes on taking its other streams.
    own = NatsCluster(3, 3, base=tmp_path / "nats", max_ack_pending=64)
    try:
        own.start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test NATS cluster: {exc}")
    try:
        _stalled_reshard(tmp_path, own, Plan(samples=3000, rate=100.0), watch=True)
    finally:
        own.stop()


def _stalled_reshard(tmp_path: Path, cluster: NatsCluster, plan: Plan, *, watch: bool = False) -> None:
    r = _run(tmp_path, cluster, "stalled", plan, keepalive=30)
    names = plan.names()
    moving = {k: [s for s in names if partition_of(s, HASHED_LEVELS, 3) == k
                  and partition_of(s, HASHED_LEVELS, 4) != k] for k in range(3)}
    stalled = max(moving, key=lambda k: len(moving[k]))
    published: list[int] = [0]
    remapped_at: list[int] = []
    # Streams shard 3 takes over from the shards that keep running (answered at once),
    # and what it took of them while the stalled shard's streams waited (watch=True),
    # with how many of their samples were published meanwhile.
    others = [s for s in names if partition_of(s, HASHED_LEVELS, 4) == 3 and s not in moving[stalled]]
    watched: list[float] = []

    def taken_by_3() -> float:
        page = scrape(r.shard(3).port)
        return sum(v for (n, lab), v in page.items()
                   if n == "shiftwatch_samples_total" and dict(lab).get("stream") in others)

    def grow() -> None:
        _all_taking(r)  # as in the test above
        r.write_config(4)
        r.shard(3).start()
        if not r.online(3):
            raise RuntimeError("shard 3 did not say online")
        r.reload_shards([0, 1, 2], "shard.of is 4 now")
        proc = r.shard(stalled).proc
        assert proc is not None
        hold(proc)
        try:
            time.sleep(2.5)
            r.remap(4)
            remapped_at.append(published[-1])
            if watch:
                time.sleep(3.0)
                before, sent_from = taken_by_3(), published[-1]
                time.sleep(5.0)
                watched.append(taken_by_3() - before)
                watched.append(float(len(others) * (published[-1] - sent_from)))
                time.sleep(1.0)
            else:
                time.sleep(9.0)
        finally:
            proc.send_signal(signal.SIGCONT)

    try:
        counts, tally = _publish_with(r, grow, progress=published)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items()}
    finally:
        r.close()
        r.repartition(3)
    # The mapping changed while samples still flowed, so the stalled shard held some.
    assert remapped_at and remapped_at[0] < plan.samples - 200, remapped_at
    if watch:
        # Samples of shard 3's other streams were published while it was watched (500 a
        # stream at the plan's rate; fewer when the publisher falls behind on a busy
        # machine) ...
        assert len(others) == 2 and len(watched) == 2 and watched[1] >= 260, (others, watched)
        # ... and it took them meanwhile: a shard that NATS sends nothing more after 64
        # unacknowledged messages would take at most 64 (it took 0 on the code before).
        # (Not a share of what was published: how much of it a shard takes in 5 s is a
        # matter of the machine's speed; a CI run on a slow machine took 202 of 1,004.)
        assert watched[0] >= 65.0, (others, watched)
    page = pages[stalled]
    other = sum(v for (n, lab), v in page.items()
                if n == "shiftwatch_messages_dropped_total" and dict(lab).get("reason") == "other_shard")
    handed = sum(v for (n, _lab), v in page.items() if n == "shiftwatch_samples_handed_over_total")
    handovers = _handovers(pages.values())
    moved_short = sum(plan.samples - min(int(counts.get(s, 0)), plan.samples) for s in moving[stalled])
    print(tally.line() + f"; shard {stalled} (stopped 11.5 s, {len(moving[stalled])} streams moving away, "
          f"{moved_short} of their samples lost): other shards' samples {other:.0f}, handed over "
          f"{handed:.0f}; handovers {handovers}"
          + (f"; shard 3 took {watched[0]:.0f} of the {watched[1]:.0f} samples of its other streams "
             "published in the 5 s watched" if len(watched) == 2 else ""))
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()
    # The stalled shard wrote the moving streams' late samples to their journals (how many
    # depends on how far the publisher got in the 2.5 s: 434 to 2,835 in runs so far)...
    assert handed >= 10 * len(moving[stalled]), (handed, tally.line())
    # ...and their new owners waited for its answer, so none of those samples was lost.
    assert moved_short == 0, (moved_short, tally.line())
    assert handovers["answered"] >= len(moving[stalled]) and handovers["waited_out"] == 0, handovers
    assert tally.lost <= tally.published // 10, tally.line()


def test_an_old_owner_not_yet_reloaded_answers_only_once_it_let_go(tmp_path: Path,
                                                                    cluster: NatsCluster) -> None:
    # The README's steps reload the old shards before the mapping changes.  Here the
    # mapping changes first: the old owners of the streams moving to the new shard 3 still
    # own them by their shard.of (3) for 8 s, and keep their engines of them.  Shard 3 asks
    # them.  An old owner that answered at once let shard 3 begin the streams while it still
    # held an engine of them, which it then saved to the cluster over shard 3's work (at its
    # next snapshot and at its reload: the state as of the remap, and the journal purged
    # down to its last message).  So the answer waits for the reload that lets the streams
    # go; shard 3, killed right after that reload and started again, loses nothing of them.
    # (The streams moving between the old shards lost their samples of those 8 s: their new
    # owners, not reloaded either, take them for another shard's; that is what the README's
    # order is for, and not checked here.  3,038 of 19,200 lost in a run of 2026-12-04;
    # none in the one after another shard's samples refused by a journal were parked
    # instead of set aside; later that day, on a busy machine, 2,018 and 2,790 in two runs
    # of that code and 1,469 to 2,745 in three with a shard.of taken up only when another
    # live shard agrees: it varies from run to run.)
    plan = Plan(samples=1600, rate=100.0)
    r = _run(tmp_path, cluster, "late", plan)
    to3 = [s for s in plan.names() if partition_of(s, HASHED_LEVELS, 4) == 3]
    before: list[dict[str, float]] = []

    def answered(k: int) -> dict[str, float]:
        return _handovers([scrape(r.shard(k).port)])

    def grow() -> None:
        _all_taking(r)
        r.write_config(4)
        r.shard(3).start()
        if not r.online(3):
            raise RuntimeError("shard 3 did not say online")
        r.remap(4)
        time.sleep(8.0)
        before.append(answered(3))
        r.reload_shards([0, 1, 2], "shard.of is 4 now")
        wait_until(lambda: answered(3)["answered"] >= len(to3), 30)
        before.append(answered(3))
        r.shard(3).kill()
        r.shard(3).start()

    try:
        counts, tally = _publish_with(r, grow)
    finally:
        r.close()
        r.repartition(3)
    short = {s: plan.samples - int(counts.get(s, 0)) for s in to3 if counts.get(s, 0) < plan.samples}
    print(tally.line() + f"; shard 3's handovers before the old shards' reload and after it {before}; "
          f"its streams short of samples after its restart {short}")
    assert len(to3) == 3 and len(before) == 2, before
    # No answer while the old owners still owned the streams (they said why)...
    assert before[0]["answered"] == 0, before
    assert any("the answer waits until a reload lets them go" in r.shard(k).log() for k in range(3))
    # ...the answers once they let them go...
    assert before[1]["answered"] == len(to3) and before[1]["waited_out"] == 0, before
    # ...and the cluster held all of shard 3's work on them when it was killed.
    assert not short, short


def test_shard_count_changed_from_4_to_3_while_samples_flow(tmp_path: Path, cluster: NatsCluster) -> None:
    # The README's order for going down: shard.of 3 in every shard's file, all four
    # reloaded (shard 3 then owns nothing), the mapping reloaded, shard 3 stopped once its
    # streams have moved (it hands nothing more over to their journals for 3 s).  The new
    # owners of shard 3's streams ask it; it answers until it stops: nothing is lost, no
    # handover waits out.
    plan = Plan(samples=1600, rate=100.0)
    r = ShardRun(tmp_path, CMD, cluster, plan=plan, name="shrunk", shards=4)
    r.repartition(4)
    r.start()
    for k in range(4):
        r.shard(k).start()
        assert r.online(k), f"shard {k} never said online: {r.shard(k).log()[-2000:]}"

    def shrink() -> None:
        _all_taking(r, 4)
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
        _counts, tally = _publish_with(r, shrink)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items() if k < 3}
    finally:
        r.close()
        r.repartition(3)
    handovers = _handovers(pages.values())
    print(tally.line() + f"; handovers {handovers}")
    assert tally.shifts_missed == 0, tally.line()
    assert tally.shifts_with_two_ids == 0, tally.line()
    assert tally.lost == 0, tally.line()
    assert handovers["waited_out"] == 0, handovers
