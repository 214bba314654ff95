"""Reshards whose old owner is late: held back, stalled behind a small unacknowledged
limit, or not yet reloaded when the mapping changes (``shiftwatch.handover``).

The scenario of ``test_shards.py`` (``shardrun.ShardRun``: a real 3-server NATS
cluster with JetStream, 3 replicas and MQTT; real ``shiftwatch run --shard k``
daemons as subprocesses; paho publishing over MQTT), in a file of its own so
that, with the suite's workers, it can run beside ``test_shards.py`` instead
of after it (both are first in ``tests/conftest.py``'s ``LONG_FILES``).  When a cluster cannot start the tests fail, they never skip.

References outside the project:

- MQTT 3.1.1 section 4.3.2 (OASIS standard): a QoS 1 message not acknowledged by
  the receiver is delivered again; NATS's MQTT side stops sending a subscription
  more once it holds its limit of unacknowledged messages (nats-server 2.9,
  ``mqtt.max_ack_pending``).
- NATS's subject mapping: ``{{partition(n, wildcards...)}}`` sends each subject to
  exactly one of n partitions, always the same one (nats-server 2.9 docs, "Subject
  Mapping and Partitioning"), the one ``shiftwatch.partition`` computes (checked
  against the real server in ``test_shards.py``).
- At-least-once delivery with a key to drop repeats is common practice for
  event streams; the record's ``id`` (with ``phase``) is that key.

Each test changes the mapping to 4 partitions and back to 3 at its end.
"""

from __future__ import annotations

import signal
import time
from pathlib import Path

import pytest

from shiftwatch.broker import hold, wait_until
from shiftwatch.partition import partition_of

from .killrun import scrape
from .natskit import NatsCluster
from .shardrun import (
    HASHED_LEVELS,
    Plan,
    all_taking,
    handover_outcomes,
    publish_with,
    run_three_shards,
)


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
    # 24 s of samples, so the mapping changes while they flow on a machine as loaded as the
    # suite's workers make it (a sibling test's change came after the last of 1,600).
    _stalled_reshard(tmp_path, cluster, Plan(samples=2400, rate=100.0))


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
    r = run_three_shards(tmp_path, cluster, "stalled", plan, keepalive=30)
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
        all_taking(r)  # as in test_shards.py's reshard from 3 to 4
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
        counts, tally = publish_with(r, grow, progress=published)
        pages = {k: scrape(sh.port) for k, sh in r.shards.items()}
        logs = r.log_tails()  # shown when the tally fails (a CI run keeps nothing else)
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
    handovers = handover_outcomes(pages.values())
    moved_short = sum(plan.samples - min(int(counts.get(s, 0)), plan.samples) for s in moving[stalled])
    print(tally.line() + f"; shard {stalled} (stopped 11.5 s, {len(moving[stalled])} streams moving away, "
          f"{moved_short} of their samples lost): other shards' samples {other:.0f}, handed over "
          f"{handed:.0f}; handovers {handovers}"
          + (f"; shard 3 took {watched[0]:.0f} of the {watched[1]:.0f} samples of its other streams "
             "published in the 5 s watched" if len(watched) == 2 else ""))
    assert tally.shifts_missed == 0, f"{tally.line()}\n{logs}"
    assert tally.shifts_with_two_ids == 0, f"{tally.line()}\n{logs}"
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
    r = run_three_shards(tmp_path, cluster, "late", plan)
    to3 = [s for s in plan.names() if partition_of(s, HASHED_LEVELS, 4) == 3]
    before: list[dict[str, float]] = []

    def answered(k: int) -> dict[str, float]:
        return handover_outcomes([scrape(r.shard(k).port)])

    def grow() -> None:
        all_taking(r)
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
        counts, tally = publish_with(r, grow)
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
