"""Benchmark of a live round's cost per stream: the pool of calm streams against the
engine handed one sample per call, measured in the same run.

Usage, from the repository root with the package installed::

    python tests/bench/bench_rounds.py            # 10,000 streams, 13 minutes on a busy 2-core machine
    python tests/bench/bench_rounds.py --quick    # 2,000 streams, about 3 minutes
    python tests/bench/bench_rounds.py --engine-only 16   # the engines handed 260-sample arrays only

Everything runs in this process; no broker.  10,000 streams (4 in 5 white noise,
1 in 5 AR(1) with phi 0.6), each past its warm-up on 2,000 samples, then rounds
of one sample per stream, 1 stream in 100 stepping by 3 sigma during them.

1. Detection, the issue's measure: per stream per round, the samples of a round
   through the pool's charts (core/calm.py) and the engines it hands streams to,
   against the same samples handed to each stream's engine one per call.  Both
   sides are timed in alternating blocks of rounds and the figure is the median
   block; target at most DETECT_TARGET_US microseconds.  The two sides' records
   must be the same, on the same rounds.
2. The daemon's whole round in process (decode of single-sample JSON, grouping,
   engines, journal): ``Daemon.process`` with the pool against the same daemon
   without it, on the same messages.  Reported, no target: decoding and grouping
   cost the same on both sides.
3. Batched payloads in process: 200 established streams each sending JSON arrays
   of 260 samples, and the same as SenML packs of 260 records (base name, time and
   unit in the first record, ``n``, ``t``, ``v`` in each), through ``Daemon.process``
   (decode, engines, journal): samples a second of CPU time, median of the rounds.
   Reported against the issue's 1,000,000 a second per shard; the broker and paho's
   thread are not in it (bench_daemon.py and bench_shards.py measure those).  Beside
   it, the engines alone handed the same kind of 260-sample arrays, one call per
   stream and round: microseconds per call, the median round.

The script prints one table and exits 0 when the target is met.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
import tempfile
import time
from typing import Any

import numpy as np

from shiftwatch.config import parse_config
from shiftwatch.core.calm import CalmPool
from shiftwatch.core.engine import StreamEngine
from shiftwatch.daemon import POOL_AGE_S, POOL_SAMPLES, Daemon
from shiftwatch.decode import stream_name
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

DETECT_TARGET_US = 5.0
T0 = 1_788_000_000.0
WARM = 2_000


def make_data(n: int, rounds: int, rng: np.random.Generator) -> np.ndarray:
    """Values, shape (n streams, WARM + rounds)."""
    m = WARM + rounds
    e = rng.standard_normal((n, m))
    ar = rng.random(n) < 0.2
    x = e.copy()
    for j in range(1, m):
        x[ar, j] = 0.6 * x[ar, j - 1] + 0.8 * e[ar, j]
    steps = np.flatnonzero(rng.random(n) < 0.01)
    at = WARM + rng.integers(0, rounds, size=steps.shape[0])
    for s, a in zip(steps.tolist(), at.tolist()):
        x[s, a:] += 3.0 * (1.0 if rng.random() < 0.5 else -1.0)
    return 500.0 + 0.4 * x


def warmed(names: list[str], data: np.ndarray) -> dict[str, StreamEngine]:
    t = T0 + np.arange(float(WARM))
    engines = {}
    for i, name in enumerate(names):
        eng = StreamEngine(name)
        eng.process(t, data[i, :WARM])
        engines[name] = eng
    return engines


def detect_single(engines: dict[str, StreamEngine], names: list[str], col: np.ndarray, tv: float,
                  out: list[Any], r: int) -> None:
    ta = np.array([tv])
    for i, name in enumerate(names):
        for rec in engines[name].process(ta, col[i:i + 1], ta).records:
            out.append((r, rec.to_dict()))


def detect_pooled(engines: dict[str, StreamEngine], pool: CalmPool, names: list[str], col: np.ndarray,
                  tv: float, out: list[Any], r: int) -> None:
    """What Daemon._pool_round does with a round: the pooled streams' samples in one offer,
    the rest (and the handed-over ones) to their engines."""
    inside: list[int] = []
    outside: list[int] = []
    for i, n in enumerate(names):  # one pass, as _pool_round takes the round's groups
        (inside if n in pool else outside).append(i)
    feed: list[tuple[str, np.ndarray, np.ndarray, np.ndarray]] = []
    if inside:
        pn = [names[i] for i in inside]
        t = np.full(len(inside), tv)
        handed = pool.offer(pn, t, col[inside], t, now=0.0)
        for k in np.flatnonzero(handed).tolist():
            feed.append((pn[k], *pool.take(pn[k])))
    ta = np.array([tv])
    feed += [(names[i], ta, col[i:i + 1], ta) for i in outside]
    for name, t, x, a in feed:
        eng = engines[name]
        for rec in eng.process(t, x, a).records:
            out.append((r, rec.to_dict()))
        terms = eng.calm_terms()
        if terms is not None:
            pool.join(name, terms)


def part_detection(n: int, rounds: int, block: int) -> tuple[dict[str, float], list[str]]:
    rng = np.random.default_rng(20261203)
    names = [f"bench/{i:05d}/v" for i in range(n)]
    data = make_data(n, rounds, rng)
    single = warmed(names, data)
    pooled = warmed(names, data)
    pool = CalmPool(max_samples=POOL_SAMPLES, max_age=POOL_AGE_S)
    rec_single: list[Any] = []
    rec_pooled: list[Any] = []
    times: dict[str, list[float]] = {"single": [], "pooled": []}
    r = 0
    # The pool fills from the first round on: the first block of each side is not timed.
    while r < rounds:
        stop = min(r + block, rounds)
        for side in ("single", "pooled"):
            t0 = time.process_time()
            for k in range(r, stop):
                col, tv = data[:, WARM + k], T0 + WARM + k
                if side == "single":
                    detect_single(single, names, col, tv, rec_single, k)
                else:
                    detect_pooled(pooled, pool, names, col, tv, rec_pooled, k)
            if r > 0:
                times[side].append((time.process_time() - t0) / ((stop - r) * n) * 1e6)
        r = stop
    # Whatever waits at the end is fed (its records would come on a later round).
    for name in pool.names():
        t, x, a = pool.take(name)
        for rec in pooled[name].process(t, x, a).records:
            rec_pooled.append((rounds, rec.to_dict()))
    # Within a round the two sides feed streams in another order: compare per round.
    def key(item: Any) -> Any:
        return item[0], item[1]["stream"], item[1]["phase"], item[1]["detected_at"]

    same = sorted(rec_single, key=key) == sorted(rec_pooled, key=key)
    res = {"single": statistics.median(times["single"]), "pooled": statistics.median(times["pooled"]),
           "records": float(len(rec_single)), "same": float(same)}
    notes = ["detection, us per stream per round by block (CPU time): single "
             + ", ".join(f"{v:.2f}" for v in times["single"]) + "; pooled "
             + ", ".join(f"{v:.2f}" for v in times["pooled"])]
    return res, notes


def part_daemon(n: int, rounds: int) -> tuple[dict[str, float], list[str]]:
    rng = np.random.default_rng(7)
    names = [f"bench/{i:05d}/v" for i in range(n)]
    data = make_data(n, rounds, rng)
    res: dict[str, float] = {}
    for side in ("pool off", "pool on"):
        with tempfile.TemporaryDirectory() as st:
            cfg = parse_config(
                "broker: {url: 'mqtt://127.0.0.1:1', client_id: bench}\n"
                "streams:\n  - {topic: 'bench/+/v', format: json, value: v, time: ts}\n"
                "alerts: {topic_prefix: bench}\n"
                f"metrics: {{listen: '127.0.0.1:0', max_streams: {n + 10}}}\n"
                f"state: {{dir: '{st}', journal: false}}\n")
            d = Daemon(cfg, metrics=Metrics(), pool=side == "pool on")
            # The warm-up straight to the engines (decoding 10,000 x 2,000 samples of JSON
            # would take minutes and measure nothing here).
            t = T0 + np.arange(float(WARM))
            spec = cfg.streams[0]
            for i, name in enumerate(names):
                eng = d.engine_for(name, spec, None)
                assert eng is not None
                eng.process(t, data[i, :WARM])
            rounds_msgs = [[Message(name, json.dumps({"v": float(data[i, WARM + k]), "ts": T0 + WARM + k}).encode(),
                                    T0 + WARM + k, 0, 0) for i, name in enumerate(names)] for k in range(rounds)]
            t0 = time.process_time()
            for msgs in rounds_msgs:
                d.process(msgs)
            res[side] = (time.process_time() - t0) / (rounds * n) * 1e6
            res[side + " records"] = float(d.records_published)
    return res, []


def part_batches(streams: int = 200, batch: int = 260, rounds: int = 8, fmt: str = "json") -> tuple[float, list[float]]:
    """Samples a second of CPU time through Daemon.process: the median round, and each round."""
    rng = np.random.default_rng(9)
    names = [f"bench/{i:05d}/v" for i in range(streams)]
    entry = "{topic: 'bench/+/v', format: json, value: v, time: ts}" if fmt == "json" else \
        "{topic: 'bench/+/v', format: senml}"
    with tempfile.TemporaryDirectory() as st:
        cfg = parse_config(
            "broker: {url: 'mqtt://127.0.0.1:1', client_id: bench}\n"
            f"streams:\n  - {entry}\n"
            "alerts: {topic_prefix: bench}\nmetrics: {listen: '127.0.0.1:0'}\n"
            f"state: {{dir: '{st}'}}\n")
        d = Daemon(cfg, metrics=Metrics())
        d.restore()  # opens the journal
        t = T0 + np.arange(float(WARM))
        for name in names:
            eng = d.engine_for(name if fmt == "json" else stream_name(name, "brackenfield:filler3:fill_g"),
                               cfg.streams[0], None)
            assert eng is not None
            eng.process(t, 500.0 + 0.4 * rng.standard_normal(WARM))

        def payload(x: np.ndarray, t0: float) -> bytes:
            if fmt == "json":
                return json.dumps([{"v": round(float(v), 4), "ts": t0 + j} for j, v in enumerate(x)]).encode()
            head = {"bn": "brackenfield:filler3:", "bt": t0, "bu": "g"}
            return json.dumps([{**(head if j == 0 else {}), "n": "fill_g", "t": j, "v": round(float(v), 4)}
                               for j, v in enumerate(x)]).encode()

        def messages(k: int) -> list[Message]:
            x = 500.0 + 0.4 * rng.standard_normal((streams, batch))
            t0 = T0 + WARM + k * batch
            return [Message(name, payload(x[i], t0), t0 + batch, 0, 0) for i, name in enumerate(names)]

        rounds_msgs = [messages(k) for k in range(rounds)]
        d.process(rounds_msgs[0])
        rates = []
        for msgs in rounds_msgs[1:]:
            c0 = time.process_time()
            d.process(msgs)
            rates.append(streams * batch / (time.process_time() - c0))
        if d.journal is not None:
            d.journal.close()
    return statistics.median(rates), rates


def part_engine_batches(streams: int = 200, batch: int = 260, rounds: int = 16) -> tuple[float, list[float]]:
    """The engines alone handed the same kind of batches (200 established streams, 260 samples
    a call, no daemon around them): microseconds per call, the median round, and each round."""
    rng = np.random.default_rng(9)
    engines = [StreamEngine(f"bench/{i:05d}/v") for i in range(streams)]
    t = T0 + np.arange(float(WARM))
    for eng in engines:
        eng.process(t, 500.0 + 0.4 * rng.standard_normal(WARM))
    per_call = []
    for k in range(rounds + 1 if rounds else 0):
        x = np.round(500.0 + 0.4 * rng.standard_normal((streams, batch)), 4)
        tk = T0 + WARM + k * batch + np.arange(float(batch))
        c0 = time.process_time()
        for i, eng in enumerate(engines):
            eng.process(tk, x[i])
        if k:  # the first round is not timed, as in part_batches
            per_call.append((time.process_time() - c0) / streams * 1e6)
    return (statistics.median(per_call) if per_call else math.nan), per_call


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="2,000 streams instead of 10,000")
    ap.add_argument("--detection-only", action="store_true", help="skip the daemon part")
    ap.add_argument("--engine-only", type=int, metavar="R", default=None,
                    help="only the engines handed 260-sample arrays, R timed rounds (for callgrind: "
                         "the difference of two R is the rounds' own count)")
    a = ap.parse_args()
    if a.engine_only is not None:
        us, calls = part_engine_batches(rounds=a.engine_only)
        print(f"engine alone, 260 samples a call, 200 streams: {us:.1f} us a call (median of "
              f"{len(calls)} rounds: " + ", ".join(f"{v:.0f}" for v in calls) + ")")
        return 0
    n = 2_000 if a.quick else 10_000
    t_start = time.monotonic()
    det, notes = part_detection(n, 240, 40)
    print(f"[{time.monotonic() - t_start:5.0f} s] detection done", file=sys.stderr, flush=True)
    dmn = {"pool on": math.nan, "pool off": math.nan, "pool on records": math.nan, "pool off records": math.nan}
    if not a.detection_only:
        dmn, more = part_daemon(n, 120)
        notes += more
    batch_rate = senml_rate = engine_us = math.nan
    if not a.detection_only:
        engine_us, calls = part_engine_batches(rounds=16)
        notes.append("engine alone, 260 samples a call, us per call by round (CPU time): "
                     + ", ".join(f"{v:.0f}" for v in calls))
        batch_rate, rates = part_batches(rounds=16)
        senml_rate, srates = part_batches(rounds=16, fmt="senml")
        notes.append("batched payloads, samples/s by round (CPU time): JSON arrays "
                     + ", ".join(f"{v / 1e3:,.0f}k" for v in rates) + "; SenML packs "
                     + ", ".join(f"{v / 1e3:,.0f}k" for v in srates))
    ratio = det["pooled"] / det["single"]
    ok = det["pooled"] <= DETECT_TARGET_US and bool(det["same"])
    rows = [
        (f"detection per stream per round, {n:,} streams", f"{det['pooled']:.2f} us ({ratio:.2f}x)",
         f"{det['single']:.2f} us one sample per call", f"<= {DETECT_TARGET_US:.0f} us, same records",
         ok),
        (f"daemon round in process, {n:,} single-sample msgs", f"{dmn['pool on']:.2f} us",
         f"{dmn['pool off']:.2f} us without the pool", "(reported)", True),
        ("daemon in process, JSON arrays of 260 samples", f"{batch_rate:,.0f} samples/s", "",
         "(reported; 1,000,000/s per shard)", True),
        ("daemon in process, SenML packs of 260 records", f"{senml_rate:,.0f} samples/s", "",
         "(reported; 1,000,000/s per shard)", True),
        ("engine alone, 260 samples a call, 200 streams", f"{engine_us:.0f} us a call",
         f"{260 / engine_us * 1e6:,.0f} samples/s" if not math.isnan(engine_us) else "",
         "(reported; the daemon's round above includes it)", True),
    ]
    w = [max(len(r[i]) for r in rows + [("target", "measured", "baseline", "goal", True)]) for i in range(4)]
    for i, h in enumerate(("target", "measured", "baseline", "goal")):
        print(h.ljust(w[i]), end="  ")
    print("result")
    for row in rows:
        print("  ".join(str(row[i]).ljust(w[i]) for i in range(4)) + "  " + ("ok" if row[4] else "MISSED"))
    notes.append(f"records in the detection part: {det['records']:.0f}, the same on both sides: "
                 f"{bool(det['same'])}; daemon records: pool off {dmn['pool off records']:.0f}, pool on "
                 f"{dmn['pool on records']:.0f}; pool: up to {POOL_SAMPLES} samples or {POOL_AGE_S:.0f} s a batch")
    for note in notes:
        print("  " + note)
    print(f"  total {time.monotonic() - t_start:.0f} s ({'quick' if a.quick else 'full'} run)")
    return 0 if ok and not math.isnan(ratio) else 1


if __name__ == "__main__":
    sys.exit(main())
