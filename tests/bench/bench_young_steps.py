"""Real steps on new streams: how soon they are confirmed, and whether any is left open
(not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_young_steps.py              # about a minute on 2 cores
    python tests/bench/bench_young_steps.py --scale 0.2  # fewer states, a smoke check

To pair two checkouts on the same data, run it once with each on ``PYTHONPATH``
(every stream has its own fixed random state).  Noise as ``bench_confirm_counts.py``
makes it (unit variance around 10; iid Gaussian, AR(1) by scipy's ``lfilter`` from a
stationary start).

1. **Steps in the first warm-up**: a 3-sigma step at sample 20, 30, 40, 50 or 60 of a
   new stream of 1,400 samples, fed 10 samples a call, iid and AR(1) 0.5, 40 states
   each (states ``50_000 + 1000 at + i``).  Counted: confirmed with the shift time
   within 10 samples of the step, the first record that ends an event by its phase
   ("none": nothing was detected), and the delays from the step to its first
   detection, and from its detection to its confirmation.
2. **Steps on the young level after the warm-up**: steps of 1 and 1.5 sigma at sample
   400 of 2,000, fed 1,024 a call, iid and AR(1) 0.5 and 0.8, 100 states each
   (``20_000 + i``): confirmed within 1,600 samples of the step, and the delay.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

from shiftwatch.core.engine import StreamEngine

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_confirm_counts import _series

T0 = 1_788_000_000.0


def _warm_step(args: tuple[float, int, int]) -> tuple[str, int, int, int]:
    """(first ending phase, detection sample, confirmation sample, its event's detection)."""
    phi, at, state = args
    rng = np.random.default_rng(state)
    n = 1400
    x = 10.0 + _series(phi, n, rng)
    x[at:] += 3.0
    t = T0 + np.arange(float(n))
    eng = StreamEngine("brackenfield/line3/fill")
    recs = []
    for a in range(0, n, 10):
        recs += eng.process(t[a:a + 10], x[a:a + 10]).records
    det = [r for r in recs if r.phase == "detected"]
    ends = [r for r in recs if r.phase != "detected"]
    first = ends[0].phase if ends else ("open" if det else "none")
    conf = [r for r in ends if r.phase == "confirmed" and abs(r.shift_at - t[at]) <= 10]
    return (first, int(det[0].detected_at - T0) if det else -1,
            int(conf[0].as_of - T0) if conf else -1, int(conf[0].detected_at - T0) if conf else -1)


def _later_step(args: tuple[float, float, int]) -> float:
    """Samples from the step to its confirmation (nan: not within 1,600)."""
    phi, size, state = args
    rng = np.random.default_rng(state)
    n = 2000
    x = 10.0 + _series(phi, n, rng)
    x[400:] += size
    t = T0 + np.arange(float(n))
    eng = StreamEngine("brackenfield/line3/fill")
    recs = []
    for a in range(0, n, 1024):
        recs += eng.process(t[a:a + 1024], x[a:a + 1024]).records
    conf = [r for r in recs if r.phase in ("confirmed", "returned") and r.detected_at >= t[400] - 5]
    return float(conf[0].as_of - t[400]) if conf and conf[0].as_of <= t[1999] else float("nan")


def _q(v: np.ndarray) -> str:
    return f"median {np.median(v):.1f}, p90 {np.percentile(v, 90):.1f}, max {v.max():.0f}" if v.size else "-"


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--scale", type=float, default=1.0, help="states per set times this")
    args = ap.parse_args()
    started = time.time()
    k1 = max(2, int(40 * args.scale))
    k2 = max(2, int(100 * args.scale))
    with ProcessPoolExecutor(2) as pool:
        print("| 3-sigma step at sample 20-60 | confirmed at the step | first end | "
              "step to detection | detection to confirmation |")
        print("|---|---|---|---|---|")
        for phi in (0.0, 0.5):
            jobs = [(phi, at, 50_000 + 1000 * at + i) for at in (20, 30, 40, 50, 60) for i in range(k1)]
            res = list(pool.map(_warm_step, jobs, chunksize=10))
            ok = [(j, r) for j, r in zip(jobs, res, strict=True) if r[2] >= 0]
            det = np.array([r[1] - j[1] for j, r in zip(jobs, res, strict=True) if r[1] >= 0], dtype=float)
            wait = np.array([r[2] - r[3] for _, r in ok], dtype=float)
            ends = ", ".join(f"{p} {c}" for p, c in sorted(Counter(r[0] for r in res).items()))
            print(f"| {'iid' if phi == 0 else f'AR(1) {phi}'} | {len(ok)} of {len(res)} | {ends} | "
                  f"{_q(det)} | {_q(wait)} |", flush=True)
        print("\n| step at sample 400 of 2,000 | confirmed within 1,600 | step to confirmation |")
        print("|---|---|---|")
        for phi in (0.0, 0.5, 0.8):
            for size in (1.0, 1.5):
                res = np.array(list(pool.map(_later_step, [(phi, size, 20_000 + i) for i in range(k2)],
                                             chunksize=10)))
                got = res[~np.isnan(res)]
                print(f"| {'iid' if phi == 0 else f'AR(1) {phi}'}, {size} sigma | {got.size} of {res.size} | "
                      f"{_q(got)} |", flush=True)
    print(f"({time.time() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
