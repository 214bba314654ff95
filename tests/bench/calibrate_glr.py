"""Offline calibration and verification of the GLR threshold (not run by pytest).

Usage (from the repository root; numpy, plus scipy for the CUSUM oracle)::

    PYTHONPATH=daemon python tests/bench/calibrate_glr.py curve  [--window 400] [--samples 2e9]
    PYTHONPATH=daemon python tests/bench/calibrate_glr.py direct [--window 400] [--arl 1e5] [--runs 400]
    PYTHONPATH=daemon python tests/bench/calibrate_glr.py delay  [--window 400] [--arl 604800]
    PYTHONPATH=daemon python tests/bench/calibrate_glr.py speed

``curve``
    Simulates one long iid N(0, 1) stream (fixed random state, split over two
    processes), computes the no-reset GLR statistic and keeps, for every
    sample where it exceeds a low level, the running maximum over the lag
    set.  Because the statistic only looks ``window`` samples back, the run
    lengths of the test *with* resets at any threshold ``c`` above that level
    follow exactly from these records (the lag set after a reset is cut to
    the lags that fit).  Prints (c, trips, simulated ARL) for a grid of ``c``.
    Small thresholds (ARL < ~3e4) are simulated directly with resets.
``direct``
    Runs ``GlrTest.design(arl)`` with resets on fresh data and prints the
    simulated ARL with its standard error.
``delay``
    Median detection delay of ``GlrTest.design(arl)`` and of an oracle
    two-sided CUSUM with ``k = shift / 2`` at the same in-control ARL, for
    steps of 0.5, 0.75, 1, 1.5 and 2 sigma after 300 in-control samples
    (delay = trip index - step index).
``speed``
    ns/sample of ``GlrTest.update`` for batches of 1000 next to river's
    PageHinkley per-sample update (if river is installed).
"""

from __future__ import annotations

import argparse
import math
import multiprocessing as mp
import sys
import time

import numpy as np

from shiftwatch.core.glr import DEFAULT_WINDOW, GlrTest, _max_stat, default_lags

CHUNK = 1 << 20


# --------------------------------------------------------------- ARL curve
def _exceedances(args: tuple[int, int, float, int]) -> tuple[list[int], list[np.ndarray]]:
    """No-reset GLR over ``n`` samples; records where it exceeds ``low``.

    Returns positions (1-based sample counts from the stream start) and the
    running max over the (sorted) lag set at those positions.
    """
    stream, window, low, n = args
    lags = default_lags(window)
    lag_arr = np.asarray(lags)
    half_inv = 0.5 / lag_arr
    rng = np.random.default_rng(20240611 + stream)
    tail = np.zeros(1)
    pos: list[int] = []
    rec: list[np.ndarray] = []
    done = 0
    while done < n:
        m = min(CHUNK, n - done)
        t0 = tail.size
        c = np.empty(t0 + m)
        c[:t0] = tail
        np.cumsum(rng.standard_normal(m), out=c[t0:])
        c[t0:] += tail[-1]
        best = _max_stat(c, t0, lags, half_inv)
        for i in np.flatnonzero(best > low):
            p = t0 + i
            nl = int(np.searchsorted(lag_arr, p, side="right"))
            d = c[p] - c[p - lag_arr[:nl]]
            v = np.full(lag_arr.size, -1.0)
            v[:nl] = d * d * half_inv[:nl]
            pos.append(done + int(i) + 1)
            rec.append(np.maximum.accumulate(v))
        done += m
        keep = min(done, window) + 1
        tail = c[-keep:] - c[-1]
    return pos, rec


def _walk(pos: list[int], rec: list[np.ndarray], lag_arr: np.ndarray, c: float) -> list[int]:
    """Run lengths of the test with resets at threshold ``c``."""
    runs = []
    r = 0
    for t, v in zip(pos, rec):
        if t <= r:
            continue
        nl = int(np.searchsorted(lag_arr, t - r, side="right"))
        if nl and v[nl - 1] > c:
            runs.append(t - r)
            r = t
    return runs


def _direct_runs(c: float, window: int, n_runs: int, rng: np.random.Generator) -> np.ndarray:
    test = GlrTest(c, window=window)
    runs = []
    count = 0
    size = 4096  # batches much longer than the ARL waste work (a batch is evaluated in full)
    buf = rng.standard_normal(size)
    i = 0
    while len(runs) < n_runs:
        if i >= buf.size:
            buf = rng.standard_normal(size)
            i = 0
        k = test.update(buf[i:])
        if k < 0:
            count += buf.size - i
            i = buf.size
        else:
            count += k + 1
            runs.append(count)
            count = 0
            test.reset()
            i += k + 1
    return np.asarray(runs, dtype=float)


def cmd_curve(window: int, samples: float, low: float, grid: list[float]) -> None:
    lag_arr = np.asarray(default_lags(window))
    n_each = int(samples) // 2
    t = time.time()
    with mp.Pool(2) as pool:
        parts = pool.map(_exceedances, [(s, window, low, n_each) for s in range(2)])
    print(f"# window={window} lags={lag_arr.size} samples={2 * n_each:.3g} "
          f"low={low} records={sum(len(p[0]) for p in parts)} ({time.time() - t:.0f}s)")
    print("# c  trips  ARL  rel.se   (exceedance method, resets exact)")
    for c in grid:
        runs: list[int] = []
        total = 0
        for pos, rec in parts:
            rr = _walk(pos, rec, lag_arr, c)
            runs += rr
            total += n_each
        # Ratio estimator: samples per trip (the unfinished last run counts).
        k = len(runs)
        if k >= 5:
            print(f"{c:.3f} {k} {total / k:.6g} {1 / math.sqrt(k):.3f}")
    sys.stdout.flush()


def cmd_direct_grid(window: int, grid: list[float], n_runs: int) -> None:
    rng = np.random.default_rng(777)
    print("# c  runs  ARL  rel.se   (direct simulation with resets)")
    for c in grid:
        r = _direct_runs(c, window, n_runs, rng)
        print(f"{c:.3f} {r.size} {r.mean():.6g} {r.std() / r.mean() / math.sqrt(r.size):.3f}")
        sys.stdout.flush()


def _direct_one(args: tuple[float, int, int, int]) -> np.ndarray:
    arl, window, n_runs, stream = args
    test = GlrTest.design(arl, window=window)
    return _direct_runs(test.threshold, window, n_runs, np.random.default_rng(99 + stream))


def cmd_direct(window: int, arl: float, n_runs: int) -> None:
    test = GlrTest.design(arl, window=window)
    t = time.time()
    with mp.Pool(2) as pool:
        parts = pool.map(_direct_one, [(arl, window, n_runs // 2, s) for s in range(2)])
    r = np.concatenate(parts)
    print(f"design ARL {arl:.6g} window {window}: threshold {test.threshold:.4f}; "
          f"simulated ARL {r.mean():.6g} +- {r.std() / math.sqrt(r.size):.3g} "
          f"over {r.size} runs (ratio {r.mean() / arl:.3f}, {time.time() - t:.0f}s)")


# ------------------------------------------------------------------- delays
def cusum_arl_markov(k: float, h: float, shift: float = 0.0, states: int = 600) -> float:
    """One-sided CUSUM ARL by the Brook & Evans (1972) Markov-chain method.

    Zero start, N(shift, 1) data, recursion C = max(0, C + x - k), alarm when
    C > h.  The interval [0, h] is cut into ``states`` cells (midpoint rule);
    common practice, accurate to well under 1% at a few hundred cells.
    """
    w = h / (states - 0.5)
    mids = np.arange(states) * w  # state 0 is the atom at zero
    from scipy.special import ndtr  # bench-only dependency

    def cdf(x: np.ndarray) -> np.ndarray:
        return ndtr(np.asarray(x) - shift)

    edges_hi = mids[None, :] + w / 2 - mids[:, None] + k
    edges_lo = mids[None, :] - w / 2 - mids[:, None] + k
    p = cdf(edges_hi) - cdf(edges_lo)
    p[:, 0] = cdf(w / 2 - mids + k)
    q = np.eye(states) - p
    return float(np.linalg.solve(q, np.ones(states))[0])


def cusum_h_for_arl(k: float, arl_two_sided: float) -> float:
    """h of a symmetric two-sided CUSUM with in-control ARL ``arl_two_sided``.

    For two symmetric one-sided charts 1/ARL = 1/ARL+ + 1/ARL- (Lucas &
    Crosier 1982; exact to well under 1% when k > 0 and ARL is large), so
    each side needs twice the ARL.
    """
    target = 2.0 * arl_two_sided
    lo, hi = 0.1, 40.0
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        if cusum_arl_markov(k, mid, 0.0, 300) < target:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def glr_delays(test: GlrTest, shift: float, reps: int, pre: int, rng: np.random.Generator):
    delays = []
    false = 0
    for _ in range(reps):
        test.reset()
        z = rng.standard_normal(pre + 2000)
        z[pre:] += shift
        k = test.update(z)
        if 0 <= k < pre:
            false += 1
            continue
        delays.append(k - pre if k >= 0 else 10**9)
    return np.asarray(delays), false


def cusum_delays(k: float, h: float, shift: float, reps: int, pre: int, rng: np.random.Generator):
    up = np.zeros(reps)
    dn = np.zeros(reps)
    trip = np.full(reps, -1)
    n = pre + 2000
    for t in range(n):
        x = rng.standard_normal(reps) + (shift if t >= pre else 0.0)
        up = np.maximum(0.0, up + x - k)
        dn = np.maximum(0.0, dn - x - k)
        new = (trip < 0) & ((up > h) | (dn > h))
        trip[new] = t
        if (trip >= 0).all():
            break
    ok = trip >= pre
    return trip[ok] - pre, int((trip < pre).sum())


def cmd_delay(window: int, arl: float, reps: int) -> None:
    test = GlrTest.design(arl, window=window)
    print(f"# GLR window {window} ({len(test.lags)} lags) threshold {test.threshold:.4f} "
          f"at ARL {arl:.6g}; step at index 300 (after 300 in-control samples); "
          f"delay = trip index - step index; {reps} reps; runs with a false alarm "
          f"before the step are dropped")
    print("# shift  GLR-median  GLR-mean  CUSUM-k  CUSUM-h  CUSUM-median  CUSUM-mean  ratio-median")
    rng = np.random.default_rng(4242)
    for shift in (0.5, 0.75, 1.0, 1.5, 2.0):
        gd, gf = glr_delays(test, shift, reps, 300, rng)
        k = shift / 2
        h = cusum_h_for_arl(k, arl)
        cd, cf = cusum_delays(k, h, shift, reps, 300, rng)
        gm, cm = float(np.median(gd)), float(np.median(cd))
        print(f"{shift:4.2f} {gm:7.1f} {gd.mean():7.2f}   {k:.3f} {h:7.3f} {cm:7.1f} "
              f"{cd.mean():7.2f}   {gm / cm:.3f}   (false alarms before step: {gf}/{cf})")
        sys.stdout.flush()


def cmd_speed() -> None:
    rng = np.random.default_rng(5)
    z = rng.standard_normal(1000 * 400)
    test = GlrTest.design(604800)
    test.update(z[:1000])
    t = time.perf_counter()
    for i in range(1, 400):
        test.update(z[i * 1000 : (i + 1) * 1000])
    glr = (time.perf_counter() - t) / (399 * 1000) * 1e9
    print(f"GlrTest.update, batches of 1000: {glr:.0f} ns/sample")
    try:
        from river import drift
    except ImportError:
        return
    ph = drift.PageHinkley()
    t = time.perf_counter()
    for v in z[:200000]:
        ph.update(float(v))
    phn = (time.perf_counter() - t) / 200000 * 1e9
    print(f"river PageHinkley.update per sample: {phn:.0f} ns/sample (GLR {phn / glr:.1f}x faster)")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("cmd", choices=["curve", "direct", "directgrid", "delay", "speed"])
    ap.add_argument("--window", type=int, default=DEFAULT_WINDOW)
    ap.add_argument("--samples", type=float, default=2e9)
    ap.add_argument("--low", type=float, default=10.0)
    ap.add_argument("--grid", type=str, default="")
    ap.add_argument("--arl", type=float, default=604800)
    ap.add_argument("--runs", type=int, default=400)
    ap.add_argument("--reps", type=int, default=4000)
    a = ap.parse_args()
    grid = [float(v) for v in a.grid.split(",")] if a.grid else []
    if a.cmd == "curve":
        cmd_curve(a.window, a.samples, a.low, grid or list(np.arange(a.low, 22.01, 0.25)))
    elif a.cmd == "directgrid":
        cmd_direct_grid(a.window, grid or list(np.arange(4.0, 10.01, 0.5)), a.runs)
    elif a.cmd == "direct":
        cmd_direct(a.window, a.arl, a.runs)
    elif a.cmd == "delay":
        cmd_delay(a.window, a.arl, a.reps)
    else:
        cmd_speed()


if __name__ == "__main__":
    main()
