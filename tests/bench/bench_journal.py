"""Benchmark of the cluster journal's publish: CPU per journal message, the round's
publish (``NatsIO.publish_in_batch``: one reply subscription, no timer a message)
against nats-py's JetStream ``publish`` (a request with a timer a message), the
baseline, measured in the same run.

Usage, from the repository root with the package installed (``.[test]``) and
nats-server available::

    python tests/bench/bench_journal.py              # 8 blocks of 5,000 messages each way
    python tests/bench/bench_journal.py --quick      # 4 blocks of 2,000
    python tests/bench/bench_journal.py --round-only --samples 260   # the daemon's round alone, to pair
                                                     # two checkouts (PYTHONPATH=<checkout>/daemon each)

One lone nats-server with JetStream (file storage, one replica: the replicas are the
servers' cost, not the shard's) on a free loopback port, and a ``ClusterState`` on it
as a shard has.  Each block publishes journal messages for rounds of 500 streams (each
message one stream's group of one sample, as single-sample rounds make, or of 260 with
``--samples 260``), with the expected last subject sequence, at most PARALLEL in
flight as a round has; the two ways alternate block by block.  The figure is the CPU
time of this process (all its threads: the NATS client's loop is where the difference
is) per message, the median block; the ratio is the round's publish over the
baseline's.  Target: at most 0.8 (the round's publish must save at least a fifth of
the client's CPU a message, or it is not worth its own reply handling).  The script
prints one table and exits 0 when the target is met.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import statistics
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from tempfile import TemporaryDirectory

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "daemon"))

import numpy as np
from natskit import connects, start_lone_server

from shiftwatch.broker import wait_until
from shiftwatch.clusterstate import PARALLEL, ClusterState
from shiftwatch.journal import JournalGroup, encode_groups
from shiftwatch.natsio import NatsIO

TARGET = 0.8
STREAMS = 500


def block(cs: ClusterState, how: str, messages: int, samples: int, t0: float) -> float:
    """Publish ``messages`` journal messages the ``how`` way; CPU microseconds a message."""
    io = cs.io
    fn = io.publish if how == "request" else io.publish_in_batch
    t = np.arange(samples, dtype=float) + t0
    bodies = [encode_groups([JournalGroup(f"brackenfield/bench/s{i}", None, t, t * 0.5, t, None)])
              for i in range(STREAMS)]
    subjects = [cs.subject(f"brackenfield/bench/s{i}") for i in range(STREAMS)]

    async def rounds() -> None:
        sem = asyncio.Semaphore(PARALLEL)

        async def one(k: int) -> None:
            i = k % STREAMS
            async with sem:
                seq = await fn(subjects[i], bodies[i], expect_last=cs.seq.get(subjects[i], 0))
                cs.seq[subjects[i]] = seq

        for start in range(0, messages, STREAMS):
            await asyncio.gather(*(one(k) for k in range(start, min(messages, start + STREAMS))))

    before = time.process_time()
    io.run(rounds(), timeout=120)
    return (time.process_time() - before) / messages * 1e6


def round_block(cs: ClusterState, messages: int, samples: int, t0: float) -> float:
    """Publish ``messages`` journal messages as the daemon's rounds do (``journal_round``:
    each stream's group added as its engine returns it, then ``wait``), rounds of
    :data:`STREAMS` streams; CPU microseconds a message, the groups' encoding included."""
    t = np.arange(samples, dtype=float) + t0
    groups = [JournalGroup(f"brackenfield/bench/r{i}", None, t, t * 0.5, t, None) for i in range(STREAMS)]
    before = time.process_time()
    for start in range(0, messages, STREAMS):
        rnd = cs.journal_round()
        for g in groups[:min(STREAMS, messages - start)]:
            rnd.add(g)
        if rnd.wait():
            raise RuntimeError("a journal message of the round was refused")
    return (time.process_time() - before) / messages * 1e6


@contextmanager
def lone_cluster_state() -> Iterator[ClusterState]:
    """A lone nats-server in a temporary directory, a connected NatsIO and a ClusterState
    set up on it; all stopped on leaving."""
    with TemporaryDirectory() as tmp:
        server, port = start_lone_server(Path(tmp), "bench-journal")
        io = NatsIO([f"nats://127.0.0.1:{port}"], name="bench-journal", timeout=10.0)
        try:
            io.start()
            if not wait_until(lambda: connects(io), 30):
                raise RuntimeError("nats-server did not answer")
            cs = ClusterState(io, name="bench", replicas=1, logger=logging.getLogger("bench"), writer="bench")
            cs.setup()
            yield cs
        finally:
            io.close()
            server.terminate()
            server.wait(10)


def main_round(blocks: int, messages: int, samples: int) -> int:
    """``--round-only``: the round's figure alone, for pairing two checkouts' code (run this
    script with each one's ``daemon/`` first on PYTHONPATH, alternating)."""
    with lone_cluster_state() as cs:
        round_block(cs, STREAMS, samples, 0.0)  # warm up (subjects, the reply subscription)
        got = [round_block(cs, messages, samples, 1e6 + b * 1e4) for b in range(blocks)]
    import shiftwatch
    print(f"journal rounds of {STREAMS} streams, messages of {samples} sample(s), {blocks} blocks of "
          f"{messages:,} messages, CPU of this process per message (median block), code of "
          f"{Path(shiftwatch.__file__).parents[1]}: {statistics.median(got):.1f} us; blocks "
          + ", ".join(f"{x:.1f}" for x in got))
    return 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--samples", type=int, default=1, help="samples in each journal message (default 1)")
    ap.add_argument("--round-only", action="store_true",
                    help="only the daemon's round (journal_round: add, wait), CPU per message, for pairing "
                         "two checkouts (run with each one's daemon/ first on PYTHONPATH)")
    args = ap.parse_args()
    blocks, messages = (4, 2_000) if args.quick else (8, 5_000)
    if args.round_only:
        return main_round(blocks, messages, args.samples)
    with lone_cluster_state() as cs:
        block(cs, "request", STREAMS, args.samples, 0.0)  # warm both ways up (subjects, subscriptions)
        block(cs, "batch", STREAMS, args.samples, 1e6)
        got: dict[str, list[float]] = {"request": [], "batch": []}
        for b in range(blocks):
            order = ("request", "batch") if b % 2 == 0 else ("batch", "request")
            for how in order:
                got[how].append(block(cs, how, messages, args.samples, 2e6 + b * 1e4))
    old, new = statistics.median(got["request"]), statistics.median(got["batch"])
    ratio = new / old
    print(f"journal messages of {args.samples} sample(s), {blocks} blocks of {messages:,} each way, "
          "CPU of this process per message (median block):")
    print("| way | microseconds a message | blocks |")
    print("|---|---|---|")
    print(f"| nats-py JetStream publish (baseline) | {old:.1f} | {', '.join(f'{x:.1f}' for x in got['request'])} |")
    print(f"| NatsIO.publish_in_batch (the round's) | {new:.1f} | {', '.join(f'{x:.1f}' for x in got['batch'])} |")
    print(f"ratio {ratio:.2f} (target at most {TARGET}): {'met' if ratio <= TARGET else 'MISSED'}")
    return 0 if ratio <= TARGET else 1


if __name__ == "__main__":
    sys.exit(main())
