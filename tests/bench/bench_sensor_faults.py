"""What records two sensor faults produce (not part of the pytest run).

Usage, from the repository root with the package installed::

    python tests/bench/bench_sensor_faults.py                # 40 random states a case, about a minute
    python tests/bench/bench_sensor_faults.py --states 10    # a quicker look
    python tests/bench/bench_sensor_faults.py --cli 3        # also 3 states a case through `shiftwatch replay`

Generated 1 Hz fill weights (level 500 g, noise sigma 0.4 g, readings rounded to
0.01 g as a historian keeps them), iid and AR(1) 0.5 noise, numpy random states
1000 onwards, 3,000 readings each, the fault at reading 1,500:

``stuck_last`` / ``stuck_zero`` / ``stuck_level``
    the readings repeat the last good value / 0 (a fallback value) / the level
    itself from the fault on;
``spread2`` / ``spread3``
    the noise's standard deviation grows two / three times, the level unchanged;
``step1`` and ``none``
    a real 1-sigma step, and no fault at all (for comparison).

For each case it counts the records made after the fault by phase (``+stuck``:
the record names a repeated value, ``+spread``: a spread change), the streams
with a ``confirmed`` or ``returned`` record and with a size in sigmas claimed for
a stuck sensor, events still open at the end, and the lag from the fault to each
final record.  The faults are checked real by references outside the project:
scipy.stats.levene (Brown-Forsythe, centre at the median) and bartlett on the 200
readings either side of the fault for the spread; for a stuck run its probability
under the noise before it, P(two neighbouring readings rounded to 0.01 are equal)
from scipy.stats.norm to the power of the repeats (neighbouring pairs taken as
independent: common practice).  ``--cli`` replays some states through the real
``shiftwatch replay`` as a CSV and checks it gives the same records (id, phase,
delta) as the engine fed in batches of 50.
"""

from __future__ import annotations

import argparse
import collections
import json
import math
import os
import subprocess
import sys
import tempfile

import numpy as np
from scipy import stats

from shiftwatch.core.engine import StreamEngine
from shiftwatch.display import alert_summary

N, F, LEVEL, SIG, RES = 3000, 1500, 500.0, 0.4, 0.01
T0 = 1764633600.0
STREAM = "brackenfield/line3/filler/head5/fill"
FAULTS = ["none", "step1", "stuck_last", "stuck_zero", "stuck_level", "spread2", "spread3"]
NOISES = ["iid", "ar05"]


def noise(kind: str, rng: np.random.RandomState, n: int) -> np.ndarray:
    e = rng.standard_normal(n)
    if kind == "iid":
        return SIG * e
    phi = 0.5
    out = np.empty(n)
    prev = rng.standard_normal()
    for i in range(n):
        prev = phi * prev + math.sqrt(1 - phi * phi) * e[i]
        out[i] = prev
    return SIG * out


def stream(fault: str, kind: str, state: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.RandomState(state)
    base = noise(kind, rng, N)
    x = LEVEL + base
    if fault == "step1":
        x[F:] += SIG
    elif fault.startswith("spread"):
        x[F:] = LEVEL + float(fault[-1]) * base[F:]
    x = np.round(x / RES) * RES
    if fault == "stuck_last":
        x[F:] = x[F - 1]
    elif fault == "stuck_zero":
        x[F:] = 0.0
    elif fault == "stuck_level":
        x[F:] = LEVEL
    return T0 + np.arange(N, dtype=float), x


def reference(fault: str, x: np.ndarray) -> dict[str, float]:
    a, b = x[F - 200:F], x[F:F + 200]
    if fault.startswith("spread") or fault == "none":
        return {"levene_p": float(stats.levene(a, b, center="median").pvalue),
                "bartlett_p": float(stats.bartlett(a, b).pvalue)}
    if fault.startswith("stuck"):
        s = float(np.std(a, ddof=1)) * math.sqrt(2)
        p1 = float(stats.norm.cdf(RES / 2, scale=s) - stats.norm.cdf(-RES / 2, scale=s))
        return {"p_repeat": p1, "log10_p_run": (N - F - 1) * math.log10(p1)}
    return {}


def run_engine(t: np.ndarray, x: np.ndarray, batch: int = 50) -> tuple[list[dict], StreamEngine]:
    eng = StreamEngine(STREAM, unit="g")
    recs = []
    for i in range(0, len(t), batch):
        recs.extend(eng.process(t[i:i + batch], x[i:i + batch]).records)
    return [r.to_dict() | {"summary": alert_summary(r), "_as_of": r.as_of} for r in recs], eng


def run_cli(t: np.ndarray, x: np.ndarray, stream: str = STREAM) -> list[dict]:
    """The records of ``shiftwatch replay`` (a subprocess) on a long CSV of one stream."""
    with tempfile.TemporaryDirectory() as d:
        p = os.path.join(d, "history.csv")
        with open(p, "w") as f:
            f.write("time,stream,value\n")
            f.writelines(f"{ti:.3f},{stream},{float(xi)!r}\n" for ti, xi in zip(t, x, strict=True))
        out = subprocess.run([sys.executable, "-m", "shiftwatch", "replay", p], capture_output=True,
                             text=True, check=False)
        return [json.loads(line) for line in out.stdout.splitlines() if line.strip()]


def tally(fault: str, kind: str, states: range) -> tuple[collections.Counter, dict, dict, dict]:
    c: collections.Counter = collections.Counter()
    lags: dict[str, list[float]] = collections.defaultdict(list)
    refs: dict[str, list[float]] = collections.defaultdict(list)
    examples: dict[str, str] = {}
    for state in states:
        t, x = stream(fault, kind, state)
        for k, v in reference(fault, x).items():
            refs[k].append(v)
        recs, eng = run_engine(t, x)
        after = [r for r in recs if r["_as_of"] >= T0 + F]
        c["streams"] += 1
        c["records before the fault"] += sum(r["_as_of"] < T0 + F for r in recs)
        c["detected"] += sum(r["phase"] == "detected" for r in after)
        c["detected+stuck"] += sum(r["phase"] == "detected" and "repeated_value" in r for r in after)
        for r in after:
            if r["phase"] == "detected":
                continue
            key = r["phase"] + ("+stuck" if "repeated_value" in r else "") + ("+spread" if "spread_ratio" in r else "")
            c[key] += 1
            lags[key].append(r["_as_of"] - (T0 + F))
            examples.setdefault(key, r["summary"])
        c["streams with no record"] += not after
        c["open at the end"] += eng.state == "event_open"
        c["streams with confirmed/returned"] += any(r["phase"] in ("confirmed", "returned") for r in after)
        c["streams claiming sigma for a stuck sensor"] += fault.startswith("stuck") and any(
            "sigma)" in r["summary"] for r in after)
    return c, lags, refs, examples


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--states", type=int, default=40)
    ap.add_argument("--cli", type=int, default=0, help="also replay this many states a case through the CLI")
    ap.add_argument("--faults", default=",".join(FAULTS))
    a = ap.parse_args()
    states = range(1000, 1000 + a.states)
    print(f"{a.states} random states a case, fault at reading {F} of {N}, level {LEVEL} g, sigma {SIG} g")
    for fault in a.faults.split(","):
        for kind in NOISES:
            c, lags, refs, ex = tally(fault, kind, states)
            print(f"== {fault} {kind}: " + ", ".join(f"{k} {v}" for k, v in c.items() if v))
            for k in sorted(lags):
                print(f"     {k:24s} {len(lags[k]):4d}, median {np.median(lags[k]):.0f} s after the fault;"
                      f" e.g. {ex[k]}")
            if refs:
                print("     reference: " + ", ".join(f"{k} median {np.median(v):.3g}, max {np.max(v):.3g}"
                                                   for k, v in refs.items()))
            if a.cli:
                same = 0
                for state in list(states)[:a.cli]:
                    t, x = stream(fault, kind, state)
                    er, _ = run_engine(t, x)
                    cr = run_cli(t, x)
                    same += [(r["id"], r["phase"], r["delta"]) for r in er] == [
                        (r["id"], r["phase"], r["delta"]) for r in cr]
                print(f"     shiftwatch replay: {same} of {a.cli} states the same records (id, phase, delta)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
