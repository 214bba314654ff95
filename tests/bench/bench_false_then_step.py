"""Benchmark: a real step that comes while a false event is open (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_false_then_step.py                 # 400 states of iid and AR(1) 0.5, about 2 minutes
    python tests/bench/bench_false_then_step.py --states 100    # fewer

Each random state makes 5,000 samples of unit-variance noise around 20 (iid, or AR(1)
0.5 through scipy's lfilter from a stationary start) and runs the engine on them
(``false_alarm_every`` 600 s, batches of 1,024).  Its first detection after sample 700
is a false one; when its event stayed open for more than 21 samples, a step of 1, 2 or
3 sigma (either way) is put in at a random 20 to 300 samples after it, before that
event was decided, and the engine runs again on the same samples with the step.  The
first ``confirmed`` (or ``returned``) record from the false detection on is counted:

* near the step: its ``shift_at`` within 3 samples of the truth, or the truth inside
  its own interval (a sample either side);
* at the false split: its ``shift_at`` at or before the false detection;
* elsewhere, or none.

The reference beside the count is the truth (the step's sample is known); for each
stream the exact least-squares single split of the event's window (the 400 samples
before the false detection and those up to the confirmation: the cost ruptures'
``Dynp`` with model "l2" and one breakpoint minimises, over every split) is printed
as how often it lies within 3 samples of the truth in the streams dated at the false
split.
"""

from __future__ import annotations

import argparse
import math
from collections import Counter
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0
N = 5000
SETTINGS = DetectionSettings(false_alarm_every=600.0)


def _noise(kind: str, rng: np.random.Generator) -> np.ndarray:
    if kind == "iid":
        return rng.standard_normal(N)
    e = rng.standard_normal(N) * math.sqrt(1.0 - 0.25)
    x, _ = lfilter([1.0], [1.0, -0.5], e, zi=[rng.standard_normal() * 0.5])
    return x


def _feed(t: np.ndarray, x: np.ndarray) -> list:
    eng = StreamEngine("brackenfield/bench/reading", SETTINGS)
    out = []
    for a in range(0, t.shape[0], 1024):
        out += eng.process(t[a:a + 1024], x[a:a + 1024]).records
    return out


def _l2_split(v: np.ndarray) -> int:
    n = v.shape[0]
    c, c2 = np.cumsum(v), np.cumsum(v * v)
    k = np.arange(2, n - 1)
    cost = (c2[k - 1] - c[k - 1] ** 2 / k) + ((c2[-1] - c2[k - 1]) - (c[-1] - c[k - 1]) ** 2 / (n - k))
    return int(k[np.argmin(cost)])


def _one(args: tuple[str, int]) -> tuple[str, float, bool, bool] | None:
    """(outcome, step size, step in the false detection's direction, l2 split near the truth)."""
    kind, state = args
    rng = np.random.default_rng(state)
    x = 20.0 + _noise(kind, rng)
    t = T0 + np.arange(float(N))
    recs = _feed(t, x)
    first = next((r for r in recs if r.phase == "detected" and r.detected_at >= t[700]), None)
    if first is None:
        return None
    end = next((r for r in recs if r.id == first.id and r.phase != "detected"), None)
    i = int(np.searchsorted(t, first.detected_at))
    j = int(np.searchsorted(t, end.as_of)) if end is not None else N
    if j - i <= 21 or i + 1400 > N:
        return None
    k = int(rng.integers(20, min(300, j - i - 1) + 1))
    size = float(rng.choice([1.0, 2.0, 3.0]))
    sign = float(rng.choice([-1.0, 1.0]))
    y = x.copy()
    y[i + k:] += sign * size
    same = sign * first.delta > 0
    ends = [r for r in _feed(t, y) if r.detected_at >= first.detected_at and r.phase in ("confirmed", "returned")]
    if not ends:
        return "none", size, same, False
    e, truth = ends[0], t[i + k]
    d = int(np.searchsorted(t, e.as_of))
    ref_near = abs(i - 399 + _l2_split(y[i - 399:d + 1]) - (i + k)) <= 3
    if abs(e.shift_at - truth) <= 3 or e.shift_at_low - 1 <= truth <= e.shift_at_high + 1:
        return "near the step", size, same, ref_near
    return ("at the false split" if e.shift_at <= first.detected_at else "elsewhere"), size, same, ref_near


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--states", type=int, default=400)
    args = ap.parse_args()
    print("\nA real step while a false event is open\n")
    print("| noise | streams | near the step | at the false split (1 / 2 / 3 sigma) | elsewhere or none "
          "| l2 split near the truth, of those at the false split |")
    print("|---|---|---|---|---|---|")
    with ProcessPoolExecutor(2) as pool:
        for kind in ("iid", "ar05"):
            rows = [r for r in pool.map(_one, [(kind, 2000 + s) for s in range(args.states)], chunksize=8)
                    if r is not None]
            c = Counter(r[0] for r in rows)
            false = [r for r in rows if r[0] == "at the false split"]
            by = Counter(r[1] for r in false)
            print(f"| {kind} | {len(rows)} | {c['near the step']} | {len(false)} ({by[1.0]} / {by[2.0]} / {by[3.0]}; "
                  f"{sum(r[2] for r in false)} in the false detection's direction) | "
                  f"{c['elsewhere'] + c['none']} | {sum(r[3] for r in false)} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
