"""Detection and speed benchmark of the core (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/run_bench.py            # full run, a few minutes on 2 cores
    python tests/bench/run_bench.py --quick    # smaller samples, for a smoke check

Every figure is measured in this run on simulated 1 Hz feeds with the default
settings (false_alarm_every = 7d, min_shift_sigma = 1).  Targets:

- false alarms: at most 1 per 500,000 in-control samples on iid Gaussian,
  AR(1) phi = 0.6, and t(3) noise with 0.5% spikes of 6 sigma;
- delay: median detection delay at most 1.2 times an oracle CUSUM tuned to the
  exact shift (k = shift / 2, same in-control ARL) for 0.75, 1, 1.5, 2 sigma
  (issue 10's target; it was within 15% before the level followed slow change,
  which costs 5-15% of delay: 1.00-1.09 before, 1.14-1.20 after);
- shift time: median |shift_at error| of 3 samples or less;
- interval: coverage of the 90% shift-time interval between 85% and 95%;
- river's PageHinkley and ADWIN at their defaults on the same data;
- speed: engine throughput at least 5x river PageHinkley's per-sample rate,
  and replay of a 240,000-row CSV at most 2x a bare stdlib parse of it.

Speed is reported as ratios to baselines measured in the same run, because
the machine is noisy.
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from shiftwatch.core.arl import design_h
from shiftwatch.core.cusum import CusumTest
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings
from shiftwatch.core.timefmt import format_time

ARL0 = 7 * 86400.0  # samples at 1 Hz
T0 = 1_788_000_000.0
BATCH = 4096
SHIFTS = (0.75, 1.0, 1.5, 2.0)


# ----------------------------------------------------------------- noise
def noise(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    """Unit-variance in-control noise of the three kinds in the targets."""
    if kind == "iid":
        return rng.standard_normal(n)
    if kind == "ar1":
        phi = 0.6
        e = rng.standard_normal(n) * math.sqrt(1 - phi * phi)
        # AR(1) by a linear filter, started in its stationary distribution.
        from scipy.signal import lfilter

        x, _ = lfilter([1.0], [1.0, -phi], e, zi=[rng.standard_normal() * phi])
        return x
    if kind == "t3spikes":
        x = rng.standard_t(3, n) / math.sqrt(3.0)  # unit variance
        spikes = rng.random(n) < 0.005
        x[spikes] += rng.choice([-6.0, 6.0], size=int(spikes.sum()))
        return x
    raise ValueError(kind)


def feed(engine: StreamEngine, t: np.ndarray, x: np.ndarray) -> list:
    recs = []
    for a in range(0, t.shape[0], BATCH):
        recs += engine.process(t[a:a + BATCH], x[a:a + BATCH]).records
    return recs


# ----------------------------------------------------------- false alarms
def _false_alarm_chunk(args: tuple[str, int, int]) -> tuple[int, int, int]:
    kind, n, seed = args
    rng = np.random.default_rng(seed)
    x = 100.0 + 2.0 * noise(kind, n, rng)
    t = T0 + np.arange(float(n))
    eng = StreamEngine(f"bench/{kind}")
    recs = feed(eng, t, x)
    detected = sum(r.phase == "detected" for r in recs)
    confirmed = sum(r.phase == "confirmed" for r in recs)
    watched = n - DetectionSettings().warmup_samples
    return detected, confirmed, watched


def false_alarms(kind: str, total: int, pool: ProcessPoolExecutor) -> tuple[int, int, int]:
    chunk = 1_000_000
    jobs = [(kind, min(chunk, total - a), 1000 + i) for i, a in enumerate(range(0, total, chunk))]
    det = conf = watched = 0
    for d, c, w in pool.map(_false_alarm_chunk, jobs):
        det += d
        conf += c
        watched += w
    return det, conf, watched


# ------------------------------------------------------------------ delay
PRE = 5000  # in-control samples after the warm-up, before the step (steady state)


def _delay_chunk(args: tuple[float, int, int]) -> list[tuple[float, float, float, float, float]]:
    """(engine delay, oracle delay, |shift_at error|, covered, detected before step) per replication."""
    shift, reps, seed = args
    rng = np.random.default_rng(seed)
    s = DetectionSettings()
    n0 = s.warmup_samples + PRE
    h = design_h(ARL0, shift / 2.0)
    out = []
    for _ in range(reps):
        n = n0 + 800
        z = rng.standard_normal(n)
        z[n0:] += shift
        x = 50.0 + 0.5 * z
        t = T0 + np.arange(float(n))
        eng = StreamEngine("bench/delay")
        recs = feed(eng, t, x)
        early = any(r.phase == "detected" and r.detected_at < t[n0] for r in recs)
        det = [r for r in recs if r.phase == "detected" and r.detected_at >= t[n0]]
        conf = [r for r in recs if r.phase == "confirmed" and r.detected_at >= t[n0]]
        delay = (det[0].detected_at - t[n0] + 1) if det else math.inf
        if conf:
            err = abs(conf[0].shift_at - t[n0])
            covered = float(conf[0].shift_at_low <= t[n0] <= conf[0].shift_at_high)
        else:
            err, covered = math.nan, math.nan
        # Oracle: two-sided CUSUM with the true mean and sigma, k = shift / 2,
        # started fresh at the step (zero state), on the same samples.
        oracle = CusumTest(shift / 2.0, h)
        j = oracle.update(z[n0:])
        odelay = j + 1 if j >= 0 else math.inf
        out.append((delay, odelay, err, covered, float(early)))
    return out


def delays(shift: float, reps: int, pool: ProcessPoolExecutor) -> np.ndarray:
    per = 25
    jobs = [(shift, min(per, reps - a), 5000 + int(shift * 100) * 100 + i)
            for i, a in enumerate(range(0, reps, per))]
    rows = []
    for part in pool.map(_delay_chunk, jobs):
        rows += part
    return np.array(rows)


# ------------------------------------------------------------------ river
def river_side_by_side(n_ic: int, reps: int) -> dict[str, dict[str, float]]:
    """river PageHinkley and ADWIN at their defaults on the same kind of data."""
    from river import drift

    out: dict[str, dict[str, float]] = {}
    for name, make in (("page_hinkley", drift.PageHinkley), ("adwin", drift.ADWIN)):
        rng = np.random.default_rng(77)
        # False alarms on iid in-control data (same scale as the engine's feeds).
        x = 100.0 + 2.0 * rng.standard_normal(n_ic)
        det = make()
        alarms = 0
        for v in x:
            det.update(float(v))
            if det.drift_detected:
                alarms += 1
        res = {"false_alarms_per_500k": alarms * 500_000 / n_ic}
        for shift in SHIFTS:
            ds = []
            for _ in range(reps):
                z = rng.standard_normal(PRE + 120 + 800)
                z[PRE + 120:] += shift
                det = make()
                d = math.inf
                for i, v in enumerate(50.0 + 0.5 * z):
                    det.update(float(v))
                    if det.drift_detected and i >= PRE + 120:
                        d = i - (PRE + 120) + 1
                        break
                ds.append(d)
            res[f"delay_{shift}"] = float(np.median(ds))
        out[name] = res
    return out


# ------------------------------------------------------------------ speed
def engine_throughput(n: int = 2_000_000) -> float:
    """Samples per second of one stream in steady state (baseline settled,
    designs cached), fed in batches of 4096."""
    rng = np.random.default_rng(1)
    warm = 300_000
    x = 10.0 + rng.standard_normal(warm + n)
    t = T0 + np.arange(float(warm + n))
    eng = StreamEngine("bench/speed")
    feed(eng, t[:warm], x[:warm])
    start = time.perf_counter()
    feed(eng, t[warm:], x[warm:])
    return n / (time.perf_counter() - start)


def page_hinkley_throughput(n: int = 300_000) -> float:
    from river import drift

    rng = np.random.default_rng(1)
    xs = (10.0 + rng.standard_normal(n)).tolist()
    ph = drift.PageHinkley()
    start = time.perf_counter()
    for v in xs:
        ph.update(v)
    return n / (time.perf_counter() - start)


def write_csv(path: str, rows: int) -> None:
    rng = np.random.default_rng(3)
    streams = ["brackenfield/filler3/fill_g", "brackenfield/oven2/zone4_c", "brackenfield/capper1/torque_nm"]
    per = rows // len(streams)
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for i in range(per):
            stamp = format_time(T0 + i)
            for k, name in enumerate(streams):
                v = 100.0 * (k + 1) + rng.standard_normal() + (1.0 if i > per // 2 else 0.0)
                f.write(f"{stamp},{name},{v:.4f}\n")


BARE_PARSE = """
import csv, sys
from datetime import datetime
with open(sys.argv[1], newline="") as f:
    r = csv.reader(f)
    next(r)
    for row in r:
        datetime.fromisoformat(row[0])
        float(row[2])
"""


def bare_parse(path: str) -> float:
    """Wall time of a bare stdlib parse of the file, run as a command like replay is."""
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", BARE_PARSE, path], check=True, capture_output=True)
    return time.perf_counter() - start


def replay_time(path: str) -> float:
    exe = [sys.executable, "-m", "shiftwatch", "replay", "--out", os.devnull, path]
    start = time.perf_counter()
    subprocess.run(exe, check=True, capture_output=True)
    return time.perf_counter() - start


# ------------------------------------------------------------------- main
def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    ic_total = 1_000_000 if args.quick else 5_000_000
    reps = 100 if args.quick else 300
    failures: list[str] = []
    print(f"shiftwatch core benchmark ({'quick' if args.quick else 'full'} run), defaults: "
          f"false_alarm_every=7d at 1 Hz (ARL0={ARL0:,.0f}), min_shift_sigma=1, "
          f"test={DetectionSettings().test}\n")

    with ProcessPoolExecutor(max_workers=2) as pool:
        print("False alarms (detected records on in-control data)")
        print(f"  {'noise':<26}{'samples':>12}{'detected':>10}{'confirmed':>11}{'per 500k':>10}  target <= 1")
        for kind, label in (("iid", "iid Gaussian"), ("ar1", "AR(1) phi=0.6"),
                            ("t3spikes", "t(3) + 0.5% 6-sigma spikes")):
            d, c, w = false_alarms(kind, ic_total, pool)
            rate = d * 500_000 / w
            ok = rate <= 1.0
            failures += [] if ok else [f"false alarms {label}"]
            print(f"  {label:<26}{w:>12,}{d:>10}{c:>11}{rate:>10.2f}  {'ok' if ok else 'MISSED'}")

        print("\nDetection delay on iid noise (median samples from the step to the detected record)")
        print(f"  {'shift':>6}{'engine':>9}{'oracle':>9}{'ratio':>8}{'|shift_at err|':>16}{'coverage':>10}{'early':>7}")
        for shift in SHIFTS:
            r = delays(shift, reps, pool)
            med, omed = float(np.median(r[:, 0])), float(np.median(r[:, 1]))
            err = float(np.nanmedian(r[:, 2]))
            cov = float(np.nanmean(r[:, 3]))
            ratio = med / omed
            ok = ratio <= 1.2 and err <= 3 and 0.85 <= cov <= 0.95
            failures += [] if ok else [f"delay/shift time/coverage at {shift} sigma"]
            print(f"  {shift:>6.2f}{med:>9.1f}{omed:>9.1f}{ratio:>8.2f}{err:>16.1f}{cov:>10.3f}"
                  f"{r[:, 4].mean():>7.3f}  {'ok' if ok else 'MISSED'}")
        print("  targets: ratio <= 1.2, |shift_at err| <= 3, coverage in [0.85, 0.95]")

    print("\nriver at its defaults on the same kinds of data")
    rv = river_side_by_side(200_000 if args.quick else 500_000, 40 if args.quick else 100)
    print(f"  {'detector':<14}{'false alarms/500k':>19}" + "".join(f"{'delay ' + str(s):>12}" for s in SHIFTS))
    for name, res in rv.items():
        print(f"  {name:<14}{res['false_alarms_per_500k']:>19.1f}"
              + "".join(f"{res[f'delay_{s}']:>12.1f}" for s in SHIFTS))

    print("\nSpeed (ratios to baselines measured in this run)")
    eng = engine_throughput(500_000 if args.quick else 2_000_000)
    ph = page_hinkley_throughput()
    ok = eng / ph >= 5
    failures += [] if ok else ["engine throughput"]
    print(f"  engine {eng:,.0f} samples/s, river PageHinkley {ph:,.0f} samples/s: "
          f"ratio {eng / ph:.1f} (target >= 5) {'ok' if ok else 'MISSED'}")
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "replay.csv")
        write_csv(path, 240_000)
        bare = min(bare_parse(path) for _ in range(5))
        rep = min(replay_time(path) for _ in range(5))
    ok = rep / bare <= 2
    failures += [] if ok else ["replay speed"]
    print(f"  replay of 240,000 rows {rep:.2f} s, bare stdlib parse {bare:.2f} s (both whole commands, best of 5): "
          f"ratio {rep / bare:.2f} (target <= 2) {'ok' if ok else 'MISSED'}")

    print("\n" + ("all targets met" if not failures else "targets missed: " + "; ".join(failures)))
    return 0 if not failures else 1


if __name__ == "__main__":
    sys.exit(main())
