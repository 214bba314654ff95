"""Offline calibration and verification of the multi-chart CUSUM design (not run by pytest).

Usage (from the repository root)::

    PYTHONPATH=daemon python tests/bench/calibrate_multicusum.py curve  [--trips 4000]
    PYTHONPATH=daemon python tests/bench/calibrate_multicusum.py direct [--arl 1e5] [--runs 2000]
    PYTHONPATH=daemon python tests/bench/calibrate_multicusum.py delay  [--arl 604800] [--reps 4000]

``curve``
    For a grid of ``min_shift`` (0.3 .. 3 sigma) and individual two-sided ARLs
    ``A`` (1e2 .. 3e6), builds the bank of the default multiples with every
    chart at ``h = design_h(A, k)`` and simulates its in-control run lengths
    WITH resets (every sum back to zero after a trip) on one long iid N(0, 1)
    stream per process (fixed random states, two processes).  Prints the
    joint ARL, its standard error and the ratio ``r = joint ARL / A`` that
    :mod:`shiftwatch.core.multicusum` fits.  The per-sample recursion runs in
    a tiny C kernel compiled with the system C compiler (about 10x faster
    than numpy); without a compiler it falls back to
    ``MultiCusumTest.update`` itself.
``direct``
    Runs ``MultiCusumTest.design(arl)`` (the numpy implementation of the
    package, not the C kernel) with resets on fresh data and prints the
    simulated joint ARL with its standard error and real/requested.
``delay``
    Median detection delay of ``MultiCusumTest.design(arl, 1.0)`` for steps
    of 0.5, 0.75, 1, 1.5, 2 and 3 sigma after 300 in-control samples
    (steady state; delay = trip index - step index + 1, runs with a false
    alarm before the step dropped), next to the zero-state median of the
    oracle two-sided CUSUM with ``k = shift / 2`` at the same ARL
    (``cusum_run_length_quantile``).

Results of 2026-12-02 (fixed random states):

* ``direct``: real/requested joint ARL 1.018 +- 0.023 at 1e5 (2000 runs)
  and 1.006 +- 0.030 at 604,800 (1000 runs), min_shift 1.
* ``delay`` at 604,800, min_shift 1 (bank ks 0.375, 0.5, 0.75, 1.0; hs
  17.091, 13.107, 8.901, 6.687), 4000 reps; bank median / oracle median:
  0.5 sigma 96/81 (1.19), 0.75: 40/39 (1.03), 1: 24/23 (1.04),
  1.5: 11/11 (1.00), 2: 7/7 (1.00), 3: 4/3 (1.33).
"""

from __future__ import annotations

import argparse
import ctypes
import math
import multiprocessing as mp
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

from shiftwatch.core.arl import cusum_run_length_quantile, design_h
from shiftwatch.core.multicusum import DEFAULT_MULTIPLES, MultiCusumTest

CHUNK = 1 << 20

_C_SOURCE = r"""
/* Bank of two-sided CUSUMs with resets over one chunk of samples.
   State: cp[m], cm[m] (sums), *since (samples since the last reset).
   Every completed run length is written to runs[]; returns how many. */
long bank_runs(const double *restrict x, long n, int m, const double *restrict k,
               const double *restrict h, double *restrict cp, double *restrict cm,
               long *restrict since, long *restrict runs)
{
    /* local copies so the sums stay in registers (at most 16 charts) */
    double u[16], l[16], kk[16], hh[16];
    long nr = 0, s = *since;
    if (m > 16) return -1;
    for (int j = 0; j < m; j++) { u[j] = cp[j]; l[j] = cm[j]; kk[j] = k[j]; hh[j] = h[j]; }
    for (long t = 0; t < n; t++) {
        double z = x[t];
        int trip = 0;
        s++;
        for (int j = 0; j < m; j++) {
            double a = u[j] + z - kk[j];
            double b = l[j] - z - kk[j];
            a = a > 0.0 ? a : 0.0;
            b = b > 0.0 ? b : 0.0;
            u[j] = a;
            l[j] = b;
            trip |= (a > hh[j]) | (b > hh[j]);
        }
        if (trip) {
            runs[nr++] = s;
            s = 0;
            for (int j = 0; j < m; j++) { u[j] = 0.0; l[j] = 0.0; }
        }
    }
    for (int j = 0; j < m; j++) { cp[j] = u[j]; cm[j] = l[j]; }
    *since = s;
    return nr;
}
"""

_KERNEL: ctypes.CDLL | None = None


def _kernel() -> ctypes.CDLL | None:
    """Compile (once per process) and load the C kernel; None if no compiler."""
    global _KERNEL
    if _KERNEL is not None:
        return _KERNEL
    d = tempfile.mkdtemp(prefix="multicusum_")
    src = os.path.join(d, "bank.c")
    lib = os.path.join(d, "bank.so")
    with open(src, "w") as f:
        f.write(_C_SOURCE)
    try:
        subprocess.run(["cc", "-O2", "-shared", "-fPIC", "-o", lib, src], check=True,
                       capture_output=True)
    except (OSError, subprocess.CalledProcessError):
        return None
    k = ctypes.CDLL(lib)
    dp = ctypes.POINTER(ctypes.c_double)
    lp = ctypes.POINTER(ctypes.c_long)
    k.bank_runs.argtypes = [dp, ctypes.c_long, ctypes.c_int, dp, dp, dp, dp, lp, lp]
    k.bank_runs.restype = ctypes.c_long
    _KERNEL = k
    return k


def _ptr(a: np.ndarray, t: type) -> ctypes._Pointer:  # type: ignore[type-arg]
    return a.ctypes.data_as(ctypes.POINTER(t))


def simulate_runs(ks: list[float], hs: list[float], max_samples: float, max_runs: int,
                  state: int) -> np.ndarray:
    """In-control run lengths of the bank with resets on one long N(0, 1) stream.

    Stops after ``max_runs`` completed runs or ``max_samples`` samples.
    """
    rng = np.random.default_rng(state)
    lib = _kernel()
    runs: list[np.ndarray] = []
    nr = 0
    done = 0
    if lib is None:
        test = MultiCusumTest(ks, hs)
        count = 0
        out: list[int] = []
        while len(out) < max_runs and done < max_samples:
            x = rng.standard_normal(CHUNK)
            i = 0
            while i < x.size:
                j = test.update(x[i:])
                if j < 0:
                    count += x.size - i
                    break
                count += j + 1
                out.append(count)
                count = 0
                test.reset()
                i += j + 1
            done += CHUNK
        return np.asarray(out[:max_runs], dtype=float)
    k = np.asarray(ks, dtype=np.float64)
    h = np.asarray(hs, dtype=np.float64)
    cp = np.zeros(len(ks))
    cm = np.zeros(len(ks))
    since = np.zeros(1, dtype=np.int64)
    buf = np.empty(CHUNK, dtype=np.int64)
    while nr < max_runs and done < max_samples:
        x = rng.standard_normal(CHUNK)
        got = lib.bank_runs(_ptr(x, ctypes.c_double), CHUNK, len(ks), _ptr(k, ctypes.c_double),
                            _ptr(h, ctypes.c_double), _ptr(cp, ctypes.c_double),
                            _ptr(cm, ctypes.c_double), _ptr(since, ctypes.c_long),
                            _ptr(buf, ctypes.c_long))
        runs.append(buf[:got].astype(float))
        nr += got
        done += CHUNK
    return np.concatenate(runs)[:max_runs] if runs else np.zeros(0)


# --------------------------------------------------------------- the curve
MIN_SHIFTS = (0.3, 0.5, 1.0, 2.0, 3.0)
IND_ARLS = (1e2, 3e2, 1e3, 3e3, 1e4, 3e4, 1e5, 3e5, 1e6, 3e6)


def _curve_task(args: tuple[float, float, int, int]) -> tuple[float, float, np.ndarray]:
    min_shift, a, trips, stream = args
    ks = [min_shift * m / 2.0 for m in DEFAULT_MULTIPLES]
    hs = [design_h(a, k) for k in ks]
    state = 20261203 + 7919 * stream + int(1000 * min_shift) * 31 + round(math.log10(a) * 100)
    r = simulate_runs(ks, hs, max_samples=trips * a * 2.0, max_runs=trips, state=state)
    return min_shift, a, r


def _reachable(min_shift: float, a: float) -> bool:
    try:
        for m in DEFAULT_MULTIPLES:
            design_h(a, min_shift * m / 2.0)
    except ValueError:
        return False
    return True


def cmd_curve(trips: int, shifts: list[float], arls: list[float]) -> None:
    tasks = [(s, a, trips // 2, st) for s in shifts for a in arls if _reachable(s, a)
             for st in range(2)]
    t0 = time.time()
    with mp.Pool(2) as pool:
        parts = pool.map(_curve_task, tasks, chunksize=1)
    print(f"# multiples {DEFAULT_MULTIPLES}; {trips} runs per point; "
          f"C kernel {'yes' if _kernel() is not None else 'no'}; {time.time() - t0:.0f}s")
    print("# min_shift  A(individual)  runs  joint_ARL  se  r=joint/A  rel.se")
    for s in shifts:
        for a in arls:
            rs = [r for (ss, aa, r) in parts if ss == s and aa == a]
            if not rs:
                continue
            r = np.concatenate(rs)
            mean = r.mean()
            se = r.std() / math.sqrt(r.size)
            print(f"{s:4.2f} {a:10.4g} {r.size:6d} {mean:12.6g} {se:10.4g} "
                  f"{mean / a:.5f} {se / mean:.4f}")
    sys.stdout.flush()


# ------------------------------------------------------------ verification
def _direct_task(args: tuple[float, float, int, int]) -> np.ndarray:
    arl, min_shift, n_runs, stream = args
    t = MultiCusumTest.design(arl, min_shift)
    rng_state = 99 + stream
    # the package's numpy implementation, not the C kernel
    rng = np.random.default_rng(rng_state)
    out: list[int] = []
    count = 0
    size = int(min(CHUNK, max(4096, arl)))
    while len(out) < n_runs:
        x = rng.standard_normal(size)
        i = 0
        while i < x.size and len(out) < n_runs:
            j = t.update(x[i:])
            if j < 0:
                count += x.size - i
                break
            count += j + 1
            out.append(count)
            count = 0
            t.reset()
            i += j + 1
    return np.asarray(out, dtype=float)


def cmd_direct(arl: float, min_shift: float, n_runs: int) -> None:
    t = MultiCusumTest.design(arl, min_shift)
    t0 = time.time()
    with mp.Pool(2) as pool:
        parts = pool.map(_direct_task, [(arl, min_shift, n_runs // 2, s) for s in range(2)])
    r = np.concatenate(parts)
    se = r.std() / math.sqrt(r.size)
    print(f"design ARL {arl:.6g} min_shift {min_shift}: ks {t.ks} hs "
          f"{tuple(round(v, 4) for v in t.hs)}; simulated ARL {r.mean():.6g} +- {se:.3g} over "
          f"{r.size} runs (real/requested {r.mean() / arl:.3f} +- {se / arl:.3f}, "
          f"{time.time() - t0:.0f}s)")


def _delay_task(args: tuple[float, float, int, int]) -> tuple[np.ndarray, int, dict[float, int]]:
    arl, shift, reps, stream = args
    t = MultiCusumTest.design(arl, 1.0)
    rng = np.random.default_rng(4242 + stream + int(shift * 1000))
    pre = 300
    delays = []
    false = 0
    which: dict[float, int] = {}
    for _ in range(reps):
        t.reset()
        z = rng.standard_normal(pre + 3000)
        z[pre:] += shift
        i = t.update(z)
        if 0 <= i < pre:
            false += 1
            continue
        delays.append(i - pre + 1 if i >= 0 else 10**9)
        kk = t.tripped_k
        if kk is not None:
            which[kk] = which.get(kk, 0) + 1
    return np.asarray(delays, dtype=float), false, which


def cmd_delay(arl: float, reps: int) -> None:
    t = MultiCusumTest.design(arl, 1.0)
    print(f"# bank at joint ARL {arl:.6g}, min_shift 1: ks {t.ks}, hs "
          f"{tuple(round(v, 3) for v in t.hs)}; step after 300 in-control samples; "
          f"delay = trip index - step index + 1; {reps} reps per shift")
    print("# shift  bank-median  bank-mean  oracle-k  oracle-h  oracle-median  ratio  "
          "(false alarms before step; which chart tripped)")
    shifts = (0.5, 0.75, 1.0, 1.5, 2.0, 3.0)
    with mp.Pool(2) as pool:
        res = pool.map(_delay_task, [(arl, s, reps // 2, st) for s in shifts for st in range(2)])
    for n, s in enumerate(shifts):
        d = np.concatenate([res[2 * n][0], res[2 * n + 1][0]])
        f = res[2 * n][1] + res[2 * n + 1][1]
        w: dict[float, int] = {}
        for part in (res[2 * n][2], res[2 * n + 1][2]):
            for kk, c in part.items():
                w[kk] = w.get(kk, 0) + c
        k = s / 2.0
        h = design_h(arl, k)
        om = cusum_run_length_quantile(k, h, s, 0.5)
        bm = float(np.median(d))
        print(f"{s:4.2f} {bm:8.1f} {d.mean():8.2f}   {k:.3f} {h:7.3f} {om:6.0f}   "
              f"{bm / om:.3f}   ({f}; {dict(sorted(w.items()))})")
    sys.stdout.flush()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("cmd", choices=["curve", "direct", "delay"])
    ap.add_argument("--trips", type=int, default=4000)
    ap.add_argument("--shifts", type=str, default="")
    ap.add_argument("--arls", type=str, default="")
    ap.add_argument("--arl", type=float, default=604800)
    ap.add_argument("--min-shift", type=float, default=1.0)
    ap.add_argument("--runs", type=int, default=2000)
    ap.add_argument("--reps", type=int, default=4000)
    a = ap.parse_args()
    if a.cmd == "curve":
        shifts = [float(v) for v in a.shifts.split(",")] if a.shifts else list(MIN_SHIFTS)
        arls = [float(v) for v in a.arls.split(",")] if a.arls else list(IND_ARLS)
        cmd_curve(a.trips, shifts, arls)
    elif a.cmd == "direct":
        cmd_direct(a.arl, a.min_shift, a.runs)
    else:
        cmd_delay(a.arl, a.reps)


if __name__ == "__main__":
    main()
