"""Samples set aside as lone spikes, counted (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_spike_counts.py     # about a minute on 2 cores

To pair two checkouts on the same data, run it once with each on ``PYTHONPATH``
(every stream has its own fixed random state).  Streams at 1 Hz around 50, fed in
batches of 1,024:

* iid Gaussian noise, no spikes (every sample set aside is an ordinary reading; a
  normal tail beyond 5 sigma holds 5.7e-7 of them): 100 streams of 10,000 at
  ``false_alarm_every`` 1h and at 7d, 2,000 new streams of 600 at 1h;
* Student-t(3) noise scaled to unit variance with 0.5% planted spikes of 6 sigma,
  100 streams of 10,000 at 1h: how many of the planted spikes are set aside;
* iid noise with a 5-sigma step at sample 1,000 of 2,000 and at sample 200 of 400
  (in the first warm-up's young level), 2,000 streams each: how many of the step's
  first 10 samples are set aside.
"""

from __future__ import annotations

import math
import sys
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0


def _one(args: tuple[str, int, float, int]) -> tuple[int, int, int]:
    kind, n, every, seed = args
    rng = np.random.default_rng(seed)
    planted = np.zeros(n, bool)
    if kind == "t3":
        x = rng.standard_t(3, n) / math.sqrt(3.0)
        planted = rng.random(n) < 0.005
        x[planted] += rng.choice([-6.0, 6.0], size=int(planted.sum()))
    else:
        x = rng.standard_normal(n)
    x = 50.0 + x
    if kind == "step":
        x[n // 2:] += 5.0
        planted[n // 2:n // 2 + 10] = True
    t = T0 + np.arange(float(n))
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=every))
    gone: list[int] = []
    for a in range(0, n, 1024):
        res = eng.process(t[a:a + 1024], x[a:a + 1024])
        gone += [int(r.time - T0) for r in res.rejected if r.reason == "spike"]
    idx = np.array(gone, dtype=np.intp)
    return len(gone), int(planted[idx].sum()) if idx.size else 0, int(planted.sum())


SETS = (("iid", 10_000, 3600.0, 100, 1), ("iid", 10_000, 604800.0, 100, 9_000),
        ("iid", 600, 3600.0, 2000, 5_000), ("t3", 10_000, 3600.0, 100, 20_000),
        ("step", 2000, 3600.0, 2000, 30_000), ("step", 400, 3600.0, 2000, 40_000))


def main() -> int:
    print("| streams | samples each | false_alarm_every | set aside | of them planted spikes / step samples |")
    print("|---|---|---|---|---|")
    with ProcessPoolExecutor(2) as pool:
        for kind, n, every, k, base in SETS:
            out = list(pool.map(_one, [(kind, n, every, base + i) for i in range(k)], chunksize=10))
            planted = sum(o[2] for o in out)
            print(f"| {k} {kind} | {n} | {every:.0f} s | {sum(o[0] for o in out)} | "
                  f"{sum(o[1] for o in out)} of {planted} |", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
