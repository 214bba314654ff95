"""Where the CPU of the daemon's batched path goes: ``bench_daemon.py --part batch`` in process.

Usage, from the repository root with the package installed::

    python tests/bench/bench_batch_path.py            # 500 streams, 40 rounds (4 of warm-up), about 1 minute
    python tests/bench/bench_batch_path.py --quick    # 100 streams, 12 rounds
    python tests/bench/bench_batch_path.py --runs 3   # the daemon part three times (median and range)

No broker: the daemon's own round (``Daemon.round``, its snapshots and journal
syncs as ``Daemon.run`` calls them) takes the very payloads of ``bench_daemon.py
--part batch`` (its ``batch_variants``: stream i sends the (i mod 8)th JSON array
of 260 samples of each publishing round) from its inbox, with the bench's stream
entry and state settings, in rounds of ``ROUND_BYTES`` as over the broker (about
95 messages).  The first 4 publishing rounds are the streams' warm-up, as there,
and are not counted.  Reported, per sample of the measured rounds (CPU time of
this process):

1. the whole, and its parts: the engines (``StreamEngine.process``), decoding
   (``Daemon._decode``), the daemon's per-stream work around each engine call
   (``Daemon._run_stream`` less the engine: the hold check, the journal group,
   the records, the level update, the metrics snapshot), the journal's appends,
   the snapshots that its size brings (and the heap settling after them), and
   the rest (routing and grouping, the round's own work).  Each part is timed by
   a wrapper (two clock reads a call, about a fifth of a microsecond each).
2. What the engines were asked: calls, samples a call, watch stretches a call
   (a refinement of the baseline or a recentring of the spike band ends a
   stretch, and the next one pays the stretch's fixed work again), refinements,
   test redesigns, and stretches of 32 samples or fewer that the CUSUM bank
   takes sample by sample.  Counted on the engine calls of a run like part 1's
   (recorded in a run of their own) replayed on engines with the same histories.
3. The same engine calls alone, timed: on engines with the same histories as in
   the daemon, and on engines that had 50,000 samples more before them
   (established: no refinement falls in the measured rounds), in alternating
   passes.
4. The engines' cost by call size: established streams (20,000 samples each),
   no arrival times and then the daemon's, 40, 260 and 4,096 samples a call,
   one stream and 500 streams.

No target: it prints what it measured and exits 0.  The figures move with the
machine's load; run it beside nothing else, or compare within one run.
"""

from __future__ import annotations

import argparse
import os
import random
import statistics
import sys
import tempfile
import time
from collections import Counter
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_daemon import BATCH_WARM_ROUNDS, batch_variants  # this folder is first on the path

from shiftwatch.config import parse_config
from shiftwatch.core import engine as engine_mod
from shiftwatch.core import multicusum
from shiftwatch.core.engine import StreamEngine
from shiftwatch.daemon import Daemon, settle_heap
from shiftwatch.journal import Journal
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

BATCH = 260
PARTS = ("engine", "decode", "per-stream shell", "journal", "snapshots", "rest")


def config_text(state_dir: str) -> str:
    """bench_daemon.py's daemon_config, less the broker and the metrics port (not used here)."""
    return ("broker: {url: 'mqtt://127.0.0.1:1', client_id: bench}\n"
            "streams:\n  - {topic: 'bench/+/v', format: json, value: v, time: ts}\n"
            "alerts: {topic_prefix: swb}\n"
            "metrics: {listen: '127.0.0.1:0', max_streams: 10000}\n"
            f"state: {{dir: '{state_dir}', snapshot_every: 1d}}\n")


@contextmanager
def timed(owner: Any, name: str, acc: Counter[str], key: str, on: list[bool]) -> Iterator[None]:
    """``owner.name`` wrapped: its CPU time added to ``acc[key]`` while ``on[0]``."""
    orig = getattr(owner, name)

    def wrapper(*a: Any, **k: Any) -> Any:
        if not on[0]:
            return orig(*a, **k)
        c = time.process_time()
        try:
            return orig(*a, **k)
        finally:
            acc[key] += time.process_time() - c

    setattr(owner, name, wrapper)
    try:
        yield
    finally:
        setattr(owner, name, orig)


def run_daemon(streams: int, rounds: int, *, capture: list[Any] | None = None) -> dict[str, float]:
    """The daemon part once: CPU seconds by part over the measured rounds, and counts."""
    rng = random.Random(0)
    topics = [f"bench/{s:05d}/v" for s in range(streams)]
    payloads = [batch_variants(rng, b, BATCH) for b in range(rounds)]
    acc: Counter[str] = Counter()
    on = [False]
    out: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as st:
        cfg = parse_config(config_text(st))
        d = Daemon(cfg, metrics=Metrics())
        d.restore()  # opens the journal
        if capture is not None:
            orig_process = StreamEngine.process

            def recording(self: StreamEngine, t: Any, x: Any, arrived: Any = None) -> Any:
                capture.append((self.stream, on[0], np.array(t), np.array(x),
                                None if arrived is None else np.array(arrived)))
                return orig_process(self, t, x, arrived)

            StreamEngine.process = recording  # type: ignore[method-assign]
        snapshots = 0
        daemon_rounds = 0
        try:
            with timed(StreamEngine, "process", acc, "engine", on), \
                    timed(Daemon, "_decode", acc, "decode", on), \
                    timed(Daemon, "_run_stream", acc, "run_stream", on), \
                    timed(Journal, "append", acc, "journal", on):
                for b in range(rounds):
                    on[0] = b >= BATCH_WARM_ROUNDS
                    now = time.time()
                    for i, t in enumerate(topics):
                        d.inbox.put(Message(t, payloads[b][i % 8], now, 0, 1))
                    c0 = time.process_time()
                    while len(d.inbox):
                        d.round(timeout=0)
                        daemon_rounds += on[0]
                        assert d.journal is not None
                        d.journal.sync_if_due()
                        if d.local.journal_half_full():  # as Daemon.run does
                            c = time.process_time()
                            d.snapshot()
                            settle_heap()
                            if on[0]:
                                acc["snapshots"] += time.process_time() - c
                                snapshots += 1
                    if on[0]:
                        acc["total"] += time.process_time() - c0
        finally:
            if capture is not None:
                StreamEngine.process = orig_process  # type: ignore[method-assign]
            if d.journal is not None:
                d.journal.close()
        out["samples"] = float(streams * BATCH * (rounds - BATCH_WARM_ROUNDS))
        out["records"] = float(d.records_published)
        out["snapshots"] = float(snapshots)
        out["daemon_rounds"] = float(daemon_rounds)
    shell = acc["run_stream"] - acc["engine"]
    out.update({"total": acc["total"], "engine": acc["engine"], "decode": acc["decode"],
                "per-stream shell": shell, "journal": acc["journal"], "snapshots_cpu": acc["snapshots"]})
    out["rest"] = acc["total"] - acc["engine"] - acc["decode"] - shell - acc["journal"] - acc["snapshots"]
    return out


def engines_with_histories(calls: list[Any], extra: int) -> tuple[dict[str, StreamEngine], list[Any]]:
    """Engines fed the warm-up calls (after ``extra`` samples of their own, when given), and
    the measured calls."""
    cfg = parse_config(config_text(tempfile.gettempdir()))
    det = cfg.streams[0].detection
    rng = np.random.default_rng(1)
    engines: dict[str, StreamEngine] = {}
    for name, measured, t, x, a in calls:
        if measured:
            continue
        eng = engines.get(name)
        if eng is None:
            eng = engines[name] = StreamEngine(name, det)
            if extra:
                eng.process(t[0] - extra + np.arange(float(extra)), np.round(100.0 + rng.standard_normal(extra), 3))
        eng.process(t, x, a)
    return engines, [c for c in calls if c[1]]


def count_calls(calls: list[Any]) -> dict[str, float]:
    """What the engines were asked by the measured calls (replayed on the same histories)."""
    engines, measured = engines_with_histories(calls, 0)
    counts: Counter[str] = Counter()
    wrapped: list[tuple[Any, str, Callable[..., Any]]] = []

    def count(owner: Any, name: str, key: str) -> None:
        orig = getattr(owner, name)

        def wrapper(*a: Any, **k: Any) -> Any:
            counts[key] += 1
            return orig(*a, **k)

        wrapped.append((owner, name, orig))
        setattr(owner, name, wrapper)

    count(engine_mod.StreamEngine, "_watch", "stretches")
    count(engine_mod.StreamEngine, "_refine", "refinements")
    count(engine_mod.StreamEngine, "_design_test", "redesigns")
    count(multicusum.MultiCusumTest, "_update_small", "small stretches")
    records = 0
    try:
        for name, _, t, x, a in measured:
            records += len(engines[name].process(t, x, a).records)
    finally:
        for owner, name, orig in wrapped:
            setattr(owner, name, orig)
    n = len(measured)
    return {"calls": float(n), "samples a call": sum(c[3].shape[0] for c in measured) / max(n, 1),
            "stretches a call": counts["stretches"] / max(n, 1),
            "refinements a call": counts["refinements"] / max(n, 1),
            "redesigns a call": counts["redesigns"] / max(n, 1),
            "small stretches a call": counts["small stretches"] / max(n, 1), "records": float(records)}


def replay_alone(calls: list[Any], passes: int) -> dict[str, list[float]]:
    """Microseconds per measured call, the engines alone: with the daemon's histories and
    established ones, in alternating passes (each on fresh engines)."""
    got: dict[str, list[float]] = {"same histories": [], "established (+50,000 samples)": []}
    for k in range(passes):
        order = [("same histories", 0), ("established (+50,000 samples)", 50_000)]
        for label, extra in (order if k % 2 == 0 else order[::-1]):
            engines, measured = engines_with_histories(calls, extra)
            c0 = time.process_time()
            for name, _, t, x, a in measured:
                engines[name].process(t, x, a)
            got[label].append((time.process_time() - c0) / max(len(measured), 1) * 1e6)
    return got


def by_size(streams: int, size: int, calls: int, arrivals: bool) -> float:
    """Microseconds per call, established engines handed ``size`` samples a call (median round)."""
    rng = np.random.default_rng(3)
    engines = [StreamEngine(f"s{i}") for i in range(streams)]
    warm = 20_000
    t0 = 1_788_000_000.0
    t = t0 + np.arange(float(warm))
    for eng in engines:
        eng.process(t, np.round(100.0 + rng.standard_normal(warm), 3))
    per = []
    for k in range(calls + 1):
        tk = t0 + warm + k * size + np.arange(float(size))
        xs = np.round(100.0 + rng.standard_normal((streams, size)), 3)
        arr = np.full(size, tk[-1] + 0.05) if arrivals else None
        c = time.process_time()
        for i, eng in enumerate(engines):
            eng.process(tk, xs[i], arr)
        if k:
            per.append((time.process_time() - c) / streams * 1e6)
    return statistics.median(per)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="100 streams, 12 rounds")
    ap.add_argument("--runs", type=int, default=1, help="times to run the daemon part (default 1)")
    a = ap.parse_args()
    streams, rounds = (100, 12) if a.quick else (500, 40)
    print(f"load average at the start: {os.getloadavg()[0]:.1f}", flush=True)
    calls: list[Any] = []
    run_daemon(streams, rounds, capture=calls)  # the engine calls, for 2 and 3 (not timed: copies)
    runs = [run_daemon(streams, rounds) for _ in range(max(a.runs, 1))]
    r0 = runs[0]
    n = r0["samples"]

    def med(key: str) -> str:
        xs = [r[key] / r["samples"] * 1e6 for r in runs]
        if len(xs) == 1:
            return f"{xs[0]:.3f}"
        return f"{statistics.median(xs):.3f} ({min(xs):.3f}-{max(xs):.3f})"

    total = statistics.median(r["total"] / r["samples"] for r in runs)
    print(f"\n1. the daemon's batched path in process: {streams} streams, arrays of {BATCH}, "
          f"{rounds - BATCH_WARM_ROUNDS} publishing rounds measured ({n:,.0f} samples, "
          f"{r0['daemon_rounds']:.0f} daemon rounds, {r0['snapshots']:.0f} snapshots, {r0['records']:.0f} records)")
    print(f"   whole: {med('total')} us a sample ({1 / total:,.0f} samples per CPU-second)")
    for part in PARTS:
        key = "snapshots_cpu" if part == "snapshots" else part
        share = statistics.median(r[key] / r["total"] for r in runs)
        print(f"   {part:18s} {med(key)} us a sample, {share:5.1%}; "
              f"{statistics.median(r[key] for r in runs) / (n / BATCH) * 1e6:7.1f} us a message")
    c = count_calls(calls)
    print("\n2. the engine calls of the measured rounds: " + ", ".join(
        f"{k} {v:,.3f}" if v != int(v) else f"{k} {v:,.0f}" for k, v in c.items()))
    alone = replay_alone(calls, 4 if a.quick else 6)
    print("\n3. the same calls, the engines alone (us a call, median and range of alternating passes):")
    inside = statistics.median(r["engine"] for r in runs) / c["calls"] * 1e6
    print(f"   inside the daemon (part 1): {inside:.1f}")
    for label, xs in alone.items():
        print(f"   {label}: {statistics.median(xs):.1f} ({min(xs):.1f}-{max(xs):.1f})")
    print("\n4. the engines by call size, established streams (us a call, median round; us a sample):")
    sizes = [(1, 40, 400), (1, 260, 400), (1, 4096, 40), (streams, 40, 8), (streams, 260, 8), (streams, 4096, 2)]
    for s, size, k in sizes:
        cells = []
        for arrivals in (False, True):
            us = by_size(s, size, k, arrivals)
            cells.append(f"{'with' if arrivals else 'no'} arrival times {us:7.1f} ({us / size:.3f})")
        print(f"   {s:4d} stream(s), {size:5d} samples a call: " + "; ".join(cells), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
