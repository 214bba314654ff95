"""Two figures the README states about records, measured (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_record_claims.py            # about 10 minutes on 2 cores
    python tests/bench/bench_record_claims.py --quick    # fewer streams, a smoke check

1. **Detection delay** of 1- and 2-sigma steps on iid Gaussian noise at the
   default settings (``7d`` at 1 Hz, ``min_shift_sigma`` 1), the step at
   sample 1,000 (a baseline of some 800 samples) and at sample 5,200 (5,000
   in-control samples after the warm-up, as ``run_bench.py``), against an
   oracle: a two-sided tabular CUSUM (Montgomery, "Introduction to
   Statistical Quality Control", ch. 9) that knows the level and sigma, k =
   0.5, h from Siegmund's approximation for an ARL of 604,800 (the two sides
   together), run from the first sample and restarted after each alarm, so
   in its steady state at the step.  Delay = index of the detecting sample
   minus index of the first sample at the new level (0: detected on that
   sample); ``design``'s figure is a run length, that delay plus one.
2. **Coverage of level_after +- 1.645 level_after_se** (nominal 90%) in
   ``confirmed`` records of 0.5-, 1- and 2-sigma steps at sample 1,000 on
   iid noise (``false_alarm_every`` 1 h, ``min_shift_sigma`` 1, the event
   trial's settings), and the ratio of the record's level_after_se to
   statsmodels' OLS standard error of the after-level at the record's split.
"""

from __future__ import annotations

import argparse
import math
import sys
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from shiftwatch.core.design import design
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_772_431_200.0


def siegmund_h(k: float, arl: float) -> float:
    """h of a two-sided CUSUM (two one-sided charts, each of ARL 2 arl) by Siegmund's
    approximation ARL = (exp(2kb) - 2kb - 1) / (2k^2), b = h + 1.166 (Montgomery ch. 9)."""
    lo, hi = 0.0, 200.0
    for _ in range(200):
        m = 0.5 * (lo + hi)
        b = m + 1.166
        if (math.exp(2 * k * b) - 2 * k * b - 1) / (2 * k * k) < 2 * arl:
            lo = m
        else:
            hi = m
    return 0.5 * (lo + hi)


def oracle_delay(z: np.ndarray, at: int, k: float, h: float, start: int = 0) -> float:
    """Readings from ``at`` to a textbook two-sided CUSUM's first alarm at or after it on
    ``z`` (standardised on the true level before ``at``), the sums started from zero at
    ``start`` and restarted after each alarm before ``at`` (math.inf: none)."""
    cp = cm = 0.0
    for i, v in enumerate(z[start:].tolist(), start):
        cp = max(0.0, cp + v - k)
        cm = max(0.0, cm - v - k)
        if cp > h or cm > h:
            if i >= at:
                return float(i - at)
            cp = cm = 0.0
    return math.inf


def _delays(args: tuple[float, int, int, int]) -> list[tuple[float, float]]:
    shift, at, reps, seed = args
    rng = np.random.default_rng(seed)
    h = siegmund_h(0.5, 604_800.0)
    out = []
    for _ in range(reps):
        n = at + 400
        z = rng.standard_normal(n)
        z[at:] += shift * rng.choice((-1.0, 1.0))
        t = T0 + np.arange(float(n))
        recs = StreamEngine("bench/delay").process(t, 20.0 + z).records
        det = [r for r in recs if r.phase == "detected" and r.detected_at >= t[at]]
        d = det[0].detected_at - t[at] if det else math.inf
        out.append((d, oracle_delay(z, at, 0.5, h)))
    return out


def _coverage(args: tuple[float, int, int]) -> list[tuple[bool, float]]:
    import statsmodels.api as sm

    shift, reps, seed = args
    rng = np.random.default_rng(seed)
    s = DetectionSettings(min_shift_sigma=1.0, false_alarm_every=3600.0)
    at, n = 1000, 2000
    out = []
    for _ in range(reps):
        sign = rng.choice((-1.0, 1.0))
        z = rng.standard_normal(n)
        x = 50.0 + 2.0 * z
        x[at:] += sign * shift * 2.0
        t = T0 + np.arange(float(n))
        res = StreamEngine("bench/cov", s).process(t, x)
        conf = [r for r in res.records if r.phase == "confirmed" and r.detected_at >= t[at]]
        if not conf:
            continue
        r = conf[0]
        truth = 50.0 + sign * shift * 2.0
        covered = abs(r.level_after - truth) <= 1.6449 * r.level_after_se
        gone = {j.time for j in res.rejected}
        keep = np.array([tv not in gone for tv in t.tolist()])
        kt, kx = t[keep], x[keep]
        before = np.flatnonzero(kt < r.shift_at)[-r.n_before:]
        after = np.flatnonzero((kt >= r.shift_at) & (kt <= r.as_of))[: r.n_after]
        y = np.concatenate((kx[before], kx[after]))
        dummy = np.concatenate((np.zeros(before.shape[0]), np.ones(after.shape[0])))
        ols = sm.OLS(y, np.column_stack((1.0 - dummy, dummy))).fit()
        out.append((covered, r.level_after_se / float(ols.bse[1])))
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--workers", type=int, default=2)
    a = ap.parse_args()
    reps = 40 if a.quick else 300
    per = 20
    d = design(1.0, 604_800.0, 1.0, shifts=(1.0, 2.0), runs=50)
    bound = {r.shift: r.bank_median for r in d.rows}
    with ProcessPoolExecutor(a.workers) as pool:
        print("Detection delay, iid noise, default settings (7d at 1 Hz); samples from the step's first sample")
        print(f"  {'step':>5} {'at':>6} {'detected':>9} {'median':>7} {'p10-p90':>10} {'oracle':>7} {'ratio':>6} "
              f"{'design (run length)':>20}")
        for shift in (1.0, 2.0):
            for at in (1000, 5200):
                jobs = [(shift, at, min(per, reps - i), 900 + int(10 * shift) * 1000 + at + i)
                        for i in range(0, reps, per)]
                rows = [x for part in pool.map(_delays, jobs) for x in part]
                sw = np.array([r[0] for r in rows])
                orc = np.array([r[1] for r in rows])
                found = sw[np.isfinite(sw)]
                med, omed = float(np.median(found)), float(np.median(orc[np.isfinite(orc)]))
                p10, p90 = np.percentile(found, (10, 90))
                print(f"  {shift:5.1f} {at:6d} {found.shape[0]:4d}/{len(rows):<4d} {med:7.1f} "
                      f"{p10:4.0f}-{p90:<5.0f} {omed:7.1f} {med / omed:6.2f} {bound[shift]:>13.0f} "
                      f"(delay {bound[shift] - 1:.0f})")
        print("\nlevel_after +- 1.645 se, confirmed records, iid noise, 1h, step at sample 1,000")
        for shift in (0.5, 1.0, 2.0):
            jobs = [(shift, min(per, reps - i), 70_000 + int(10 * shift) * 1000 + i) for i in range(0, reps, per)]
            rows = [x for part in pool.map(_coverage, jobs) for x in part]
            cov = np.mean([c for c, _ in rows])
            ratio = np.median([q for _, q in rows])
            print(f"  {shift:4.1f} sigma: {len(rows)} confirmed, coverage {100 * cov:.0f}%, "
                  f"se / statsmodels OLS se at the split: median {ratio:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
