"""Benchmark of the event layer (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_events.py            # full run, about 20 seconds on 2 cores (17 s, 2026-12-05)
    python tests/bench/bench_events.py --quick    # smaller samples, a smoke check

``run_bench.py`` runs it too, after the core figures.  Every figure is
measured in this run on simulated 1 Hz feeds with known truth, the default
settings unless a row says otherwise, and many random states; the table
prints each target with ok / MISSED.

Noise types (unit variance): iid Gaussian; AR(1) with phi 0.6 and 0.8;
Student-t(3) with 0.5% spikes of 6 sigma; gappy (iid, 5% of the gaps
between samples 2 to 60 s long); quantised (iid rounded to 0.5 sigma).
The oracle is a two-sided CUSUM with k = step / 2 designed for the same
in-control ARL (the reference implementation checked against Lucas &
Crosier 1982 in tests/core/test_arl.py); run_bench.py reports that ratio.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0
KINDS = ("iid", "ar06", "ar08", "t3spikes", "gappy", "quantised")
BATCH = 1024


def noise(kind: str, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Unit-variance noise of one kind, and the sample times."""
    t = T0 + np.arange(float(n))
    if kind in ("ar06", "ar08"):
        phi = 0.6 if kind == "ar06" else 0.8
        e = rng.standard_normal(n) * math.sqrt(1 - phi * phi)
        x, _ = lfilter([1.0], [1.0, -phi], e, zi=[rng.standard_normal() * phi])
        return x, t
    if kind == "t3spikes":
        x = rng.standard_t(3, n) / math.sqrt(3.0)
        spikes = rng.random(n) < 0.005
        x[spikes] += rng.choice([-6.0, 6.0], size=int(spikes.sum()))
        return x, t
    x = rng.standard_normal(n)
    if kind == "gappy":
        dt = np.ones(n)
        gaps = rng.random(n) < 0.05
        dt[gaps] = rng.uniform(2.0, 60.0, size=int(gaps.sum()))
        return x, T0 + np.cumsum(dt)
    if kind == "quantised":
        return np.round(x * 2.0) / 2.0, t
    return x, t


def feed(eng: StreamEngine, t: np.ndarray, x: np.ndarray) -> list:
    recs = []
    for a in range(0, t.shape[0], BATCH):
        recs += eng.process(t[a:a + BATCH], x[a:a + BATCH]).records
    return recs


# ------------------------------------------------------------------ steps
def _steps(args: tuple[str, int, int]) -> list[tuple[float, bool, int, float, float]]:
    """Per step: (size, confirmed within 1,000 samples, detected records, delay to
    confirmation from detection, 1 if the 90% interval covers the truth)."""
    kind, reps, state = args
    rng = np.random.default_rng(state)
    out = []
    for i in range(reps):
        size = (1.0, 1.5, 2.0, 3.0)[i % 4] * rng.choice([-1.0, 1.0])
        n = 3000
        x, t = noise(kind, n, rng)
        at = 1500
        x = 20.0 + x
        x[at:] += size
        recs = [r for r in feed(StreamEngine("s"), t, x) if r.detected_at >= t[at]]
        det = [r for r in recs if r.phase == "detected"]
        ends = [r for r in recs if r.phase in ("confirmed", "returned")]
        ok = bool(ends) and ends[0].as_of <= t[min(at + 1000, n - 1)]
        wait = math.nan
        cover = math.nan
        if ends:
            first = next(r for r in det if r.id == ends[0].id)
            wait = float(np.searchsorted(t, ends[0].as_of) - np.searchsorted(t, first.detected_at))
            cover = float(ends[0].shift_at_low <= t[at] <= ends[0].shift_at_high)
        out.append((abs(size), ok, len(det), wait, cover))
    return out


def _second(args: tuple[int, int]) -> list[bool]:
    """A 2-sigma step, then 50 samples later a second one (every other one back)."""
    reps, state = args
    rng = np.random.default_rng(state)
    out = []
    for i in range(reps):
        n = 2000
        x = 10.0 + rng.standard_normal(n)
        x[1000:] += 2.0
        back = i % 2 == 0
        x[1050:] += -2.0 if back else 2.0
        t = T0 + np.arange(float(n))
        recs = feed(StreamEngine("s"), t, x)
        second = [r for r in recs if r.phase in ("confirmed", "returned") and abs(r.shift_at - t[1050]) <= 5]
        out.append(bool(second) and (second[0].phase == "returned") == back)
    return out


def _in_control(args: tuple[str, float, int, int]) -> tuple[int, int, int, int]:
    """Detections, confirmations, confirmed events below min_shift, samples watched."""
    kind, every, n, state = args
    rng = np.random.default_rng(state)
    x, t = noise(kind, n, rng)
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=every))
    recs = feed(eng, t, 50.0 + x)
    det = sum(r.phase == "detected" for r in recs)
    conf = [r for r in recs if r.phase in ("confirmed", "returned")]
    small = sum(abs(r.delta_sigma) < 1.0 for r in conf)
    return det, len(conf), small, n


def _slow(args: tuple[str, int, int, bool]) -> tuple[int, int, bool]:
    """A step-free 4-hour stream with slow change; with ``step``, a 2-sigma step at 2 h on top."""
    kind, n, state, step = args
    rng = np.random.default_rng(state)
    x = rng.standard_normal(n)
    i = np.arange(float(n))
    if kind == "cycle":
        x += 0.5 * np.sin(2 * math.pi * i / 1800.0 + rng.uniform(0, 2 * math.pi))
    elif kind == "ramp":
        x += 2.0 * i / n
    else:
        x += np.cumsum(0.01 * rng.standard_normal(n))
    at = n // 2
    if step:
        x[at:] += rng.choice([-2.0, 2.0])
    t = T0 + i
    recs = feed(StreamEngine("s"), t, x)
    det = sum(r.phase == "detected" for r in recs)
    conf = sum(r.phase in ("confirmed", "returned") for r in recs)
    found = any(r.phase in ("confirmed", "returned") and abs(r.shift_at - t[at]) <= 10 for r in recs)
    return det, conf, found


def _first_alert(args: tuple[int, int]) -> list[int]:
    reps, state = args
    rng = np.random.default_rng(state)
    out = []
    for _ in range(reps):
        x = rng.standard_normal(200)
        x[20:] += 3.0
        t = T0 + np.arange(200.0)
        recs = StreamEngine("s").process(t, x).records
        out.append(int(np.searchsorted(t, recs[0].detected_at)) if recs else 10**6)
    return out


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    q = args.quick
    started = time.time()
    rows: list[tuple[str, str, str, bool]] = []
    with ProcessPoolExecutor(2) as pool:
        reps = 20 if q else 100
        step_res: dict[str, list] = {}
        for kind, res in zip(KINDS, pool.map(_steps, [(k, reps, 7000 + j) for j, k in enumerate(KINDS)])):
            step_res[kind] = res
        allres = [r for res in step_res.values() for r in res]
        conf = {k: sum(r[1] for r in v) / len(v) for k, v in step_res.items()}
        rows.append(("steps >= min_shift confirmed within 1,000 samples", ">= 99% each",
                     ", ".join(f"{k} {100 * v:.0f}%" for k, v in conf.items()),
                     min(conf.values()) >= 0.99))
        ndet = np.array([r[2] for r in allres])
        rows.append(("detected records per real step", "exactly 1 in >= 99%, never > 2",
                     f"exactly 1: {100 * np.mean(ndet == 1):.1f}%, max {ndet.max()} ({len(ndet)} steps)",
                     bool(np.mean(ndet == 1) >= 0.99 and ndet.max() <= 2)))
        waits = np.array([r[3] for r in allres if r[0] >= 1.5 and not math.isnan(r[3])])
        rows.append(("median samples from detection to confirmed, steps >= 1.5 sigma", "<= 10",
                     f"{np.median(waits):.0f} (p90 {np.percentile(waits, 90):.0f})", bool(np.median(waits) <= 10)))
        cov = np.array([r[4] for r in allres if not math.isnan(r[4])])
        iid_cov = np.array([r[4] for r in step_res["iid"] if not math.isnan(r[4])])
        rows.append(("90% shift-time interval coverage", "85-95%",
                     f"iid {100 * iid_cov.mean():.0f}%, all kinds {100 * cov.mean():.0f}%",
                     bool(0.85 <= iid_cov.mean() <= 0.95)))
        sec = [v for res in pool.map(_second, [(25 if q else 100, 8000 + j) for j in range(2)]) for v in res]
        rows.append(("second step or return 50 samples after a confirmed 2 sigma step", ">= 95% found",
                     f"{100 * np.mean(sec):.0f}% of {len(sec)}", bool(np.mean(sec) >= 0.95)))
        fa = [v for res in pool.map(_first_alert, [(25 if q else 100, 9000 + j) for j in range(2)]) for v in res]
        found = [v for v in fa if v < 10**6]
        rows.append(("first alert on a new stream (3 sigma step at sample 20)", "by sample 30",
                     f"median sample {np.median(found):.0f}, found {len(found)} of {len(fa)}",
                     bool(len(found) == len(fa) and np.median(found) <= 30)))
        for every, label, n_total in ((604800.0, "7d", 2_000_000 if q else 12_000_000),
                                      (3600.0, "1h", 500_000 if q else 2_000_000)):
            chunk = 500_000
            jobs = [(k, every, chunk, 10_000 + 97 * j + i) for j, k in enumerate(KINDS)
                    for i in range(n_total // chunk)]
            acc: dict[str, list[int]] = {k: [0, 0, 0, 0] for k in KINDS}
            for (k, *_), res in zip(jobs, pool.map(_in_control, jobs)):
                for j in range(4):
                    acc[k][j] += res[j]
            nominal = 1e6 / every
            ratios = {k: (v[0] / v[3] * 1e6) / nominal for k, v in acc.items()}
            small = sum(v[2] for v in acc.values())
            rows.append((f"in-control detections per million / nominal, false_alarm_every {label}",
                         "0.5-1.5x each",
                         ", ".join(f"{k} {r:.2f}" for k, r in ratios.items())
                         + f" ({n_total / 1e6:.1f} M samples each; nominal {nominal:.3g}/M)",
                         all(0.5 <= r <= 1.5 for r in ratios.values())))
            rows.append((f"confirmed in-control events below min_shift, {label}", "0",
                         f"{small} (confirmed in all: {sum(v[1] for v in acc.values())})", small == 0))
        n4h = 4 * 3600
        streams = 6 if q else 30
        for kind in ("cycle", "ramp", "walk"):
            res = list(pool.map(_slow, [(kind, n4h, 11_000 + i, False) for i in range(streams)]))
            det_h = sum(r[0] for r in res) / (streams * 4)
            conf_h = sum(r[1] for r in res) / (streams * 4)
            stepped = list(pool.map(_slow, [(kind, n4h, 12_000 + i, True) for i in range(streams)]))
            found = np.mean([r[2] for r in stepped])
            rows.append((f"slow change, {kind}: per stream-hour; 2 sigma steps on top found",
                         "<= 0.5 detected, <= 0.25 confirmed; >= 80%",
                         f"{det_h:.2f} detected, {conf_h:.2f} confirmed; {100 * found:.0f}%",
                         bool(det_h <= 0.5 and conf_h <= 0.25 and found >= 0.8)))
    print(f"\nEvent layer ({'quick' if q else 'full'} run, {time.time() - started:.0f} s)\n")
    print("| measure | target | measured | |")
    print("|---|---|---|---|")
    for name, target, measured, ok in rows:
        print(f"| {name} | {target} | {measured} | {'ok' if ok else 'MISSED'} |")
    return 0 if all(r[3] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
