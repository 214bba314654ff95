"""False confirmations on step-free streams, and late-detected steps confirmed (not part of
the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_confirm_counts.py              # about 2 minutes on 2 cores
    python tests/bench/bench_confirm_counts.py --scale 0.1  # fewer streams, a smoke check

To pair two checkouts on the same data, run it once with each on ``PYTHONPATH``
(every stream has its own fixed random state).

1. **False confirmations**: step-free streams of unit-variance noise around 50
   (iid Gaussian, AR(1) phi 0.5 and 0.8 by scipy's ``lfilter`` from a stationary
   start), fed in batches of 1,024 at 1 Hz: new streams of 600 samples at
   ``false_alarm_every`` 1h (1,000 each) and 7d (2,000 each), and streams of 10,000
   samples at 1h (100 each) and phi 0.8 at 7d (100).  Counted: ``detected`` records,
   ``confirmed`` or ``returned`` ones (every one false), and of those how many were
   decided while the baseline rested on fewer than ``window_samples`` samples
   ("young").  Wald's bound for independent noise with a known level is about
   ``confirm_p_value`` (0.001) of the detections (Wald 1945).
2. **Late-detected steps**: ``bench_events.py``'s ``ar08`` feeds (AR(1) 0.8, steps of
   1, 1.5, 2 and 3 sigma at sample 1,500 of 3,000, a settled baseline) in six random
   states of 100 steps: confirmed within 1,000 samples, and steps detected more than
   once (counted as ``bench_events.py`` counts them).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_events

T0 = 1_788_000_000.0
BATCH = 1024


class _Counting(StreamEngine):
    """The engine, noting for each confirmation whether its baseline was young."""

    young_confirmed = 0

    def _end_event(self, ev: Any, phase: str, fit: Any, result: Any, as_of: float, **extra: Any) -> None:
        if phase in ("confirmed", "returned") and self._baseline is not None:
            _Counting.young_confirmed += self._baseline.n < self.settings.window_samples
        super()._end_event(ev, phase, fit, result, as_of, **extra)


def _series(phi: float, n: int, rng: np.random.Generator) -> np.ndarray:
    if phi == 0.0:
        return rng.standard_normal(n)
    e = rng.standard_normal(n) * math.sqrt(1 - phi * phi)
    x, _ = lfilter([1.0], [1.0, -phi], e, zi=[rng.standard_normal() * phi])
    return np.asarray(x)


def _step_free(args: tuple[float, int, float, int]) -> tuple[int, int, int]:
    phi, n, every, state = args
    rng = np.random.default_rng(state)
    x = 50.0 + _series(phi, n, rng)
    t = T0 + np.arange(float(n))
    _Counting.young_confirmed = 0
    eng = _Counting("s", DetectionSettings(false_alarm_every=every))
    recs = []
    for a in range(0, n, BATCH):
        recs += eng.process(t[a:a + BATCH], x[a:a + BATCH]).records
    det = sum(r.phase == "detected" for r in recs)
    conf = sum(r.phase in ("confirmed", "returned") for r in recs)
    return det, conf, _Counting.young_confirmed


SETS = (("iid, 600, 1h", 0.0, 600, 3600.0, 1000, 100_000),
        ("AR 0.5, 600, 1h", 0.5, 600, 3600.0, 1000, 200_000),
        ("AR 0.8, 600, 1h", 0.8, 600, 3600.0, 1000, 300_000),
        ("iid, 600, 7d", 0.0, 600, 604800.0, 2000, 400_000),
        ("AR 0.5, 600, 7d", 0.5, 600, 604800.0, 2000, 500_000),
        ("AR 0.8, 600, 7d", 0.8, 600, 604800.0, 2000, 600_000),
        ("AR 0.8, 10,000, 1h", 0.8, 10_000, 3600.0, 100, 700_000),
        ("iid, 10,000, 1h", 0.0, 10_000, 3600.0, 100, 800_000),
        ("AR 0.5, 10,000, 1h", 0.5, 10_000, 3600.0, 100, 900_000),
        ("AR 0.8, 10,000, 7d", 0.8, 10_000, 604800.0, 100, 1_000_000))


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--scale", type=float, default=1.0, help="streams per set times this")
    args = ap.parse_args()
    started = time.time()
    print("| step-free streams (samples, false_alarm_every) | streams | detected | confirmed | of them young |")
    print("|---|---|---|---|---|")
    with ProcessPoolExecutor(2) as pool:
        for name, phi, n, every, streams, base in SETS:
            k = max(1, int(streams * args.scale))
            out = list(pool.map(_step_free, [(phi, n, every, base + i) for i in range(k)], chunksize=20))
            det, conf, young = (sum(o[j] for o in out) for j in range(3))
            print(f"| {name} | {k} | {det} | {conf} | {young} |", flush=True)
        states = [7002 + 100 * j for j in range(6)]
        reps = max(4, int(100 * args.scale) // 4 * 4)
        res = [r for rs in pool.map(bench_events._steps, [("ar08", reps, s) for s in states]) for r in rs]
    ok = sum(r[1] for r in res)
    one = [r for r in res if r[0] == 1.0]
    print(f"\nar08 steps at sample 1,500 (states {states[0]} to {states[-1]} by 100): "
          f"{ok} of {len(res)} confirmed within 1,000 samples; 1 sigma: "
          f"{sum(r[1] for r in one)} of {len(one)}; detected more than once: "
          f"{sum(r[2] > 1 for r in res)}, more than twice: {sum(r[2] > 2 for r in res)}")
    print(f"({time.time() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
