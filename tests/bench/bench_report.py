"""Benchmark of the replay report (`shiftwatch replay --report`) against the same replay without it.

Usage, from the repository root with the package installed (``.[test]``)::

    python tests/bench/bench_report.py            # a week of 1 Hz samples on 5 streams (3 million rows)
    python tests/bench/bench_report.py --quick    # one day (432,000 rows)

The file is the invented Brackenfield bottling line (the demo's sensors,
levels and noise) at one sample a second, with a step on one stream every
few hours and lone spikes, written with a fixed random state.  Each replay
runs as the real command line in its own process, which reports its peak
RSS.  Targets:

1. memory: the peak RSS of the replay with ``--report`` is at most 1.10 times
   that of the same replay without it (the replay itself holds the file);
2. time: the replay with ``--report`` takes at most 1.5 times the CPU time
   (user and system; wall time is printed too, but this machine is shared).
   The extra is fixed, importing matplotlib and drawing one chart per
   stream, so the shorter ``--quick`` file is allowed 3 times;
3. bounded: the report's arrays for a stream (the envelope, the raw tail, the
   zooms, the spikes) peak at most 10% higher over a week (or a day with
   ``--quick``) than over two hours.

The script prints one table and exits 0 only when every target is met.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.timefmt import format_time
from shiftwatch.demo import SENSORS
from shiftwatch.report import StreamTrace

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
MEMORY_RATIO = 1.10
TIME_RATIO = 1.5

RUNNER = """\
import resource, sys
from shiftwatch.cli import main
code = main(sys.argv[1:])
use = resource.getrusage(resource.RUSAGE_SELF)
print("peak_rss_kb", use.ru_maxrss, use.ru_utime + use.ru_stime, file=sys.stderr)
sys.exit(code)
"""


def plant_values(n: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """n samples a second per sensor, a step every 6 hours on a rotating sensor, lone spikes."""
    out = {s.stream: s.level + s.sigma * rng.standard_normal(n) for s in SENSORS}
    for j, k in enumerate(range(3 * 3600, n, 6 * 3600)):
        s = SENSORS[j % len(SENSORS)]
        out[s.stream][k:] += (1.5 if j % 2 == 0 else -1.5) * s.sigma
    for s in SENSORS:
        idx = np.flatnonzero(rng.random(n) < 0.001)
        out[s.stream][idx] += 8 * s.sigma
    return out


def write_csv(path: Path, n: int) -> int:
    rng = np.random.default_rng(2026)
    vals = plant_values(n, rng)
    names = list(vals)
    with open(path, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        for a in range(0, n, 20_000):
            b = min(n, a + 20_000)
            lines = []
            for i in range(a, b):
                stamp = format_time(T0 + i)
                lines.extend(f"{stamp},{name},{vals[name][i]:.3f}\n" for name in names)
            f.write("".join(lines))
    return n * len(names)


def run_replay(csv: Path, report: Path | None) -> dict[str, float]:
    args = [sys.executable, "-c", RUNNER, "replay", "--out", str(csv.with_suffix(".jsonl")), str(csv)]
    if report is not None:
        args[4:4] = ["--report", str(report)]
    t0 = time.perf_counter()
    res = subprocess.run(args, capture_output=True, text=True, timeout=1800, check=False)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        raise RuntimeError(f"replay exited {res.returncode}: {res.stderr[-500:]}")
    line = next(ln.split() for ln in res.stderr.splitlines() if ln.startswith("peak_rss_kb"))
    return {"seconds": float(line[2]), "wall": wall, "rss_mb": int(line[1]) / 1024.0}


def trace_peak(n: int) -> int:
    """Largest size of one stream's report arrays over a replay of n samples."""
    rng = np.random.default_rng(7)
    s = SENSORS[3]
    v = s.level + s.sigma * rng.standard_normal(n)
    for k in range(3600, n, 6 * 3600):
        v[k:] += s.sigma * (1.5 if (k // 3600) % 2 else -1.5)
    t = T0 + np.arange(n, dtype=np.float64)
    eng = StreamEngine(s.stream)
    trace = StreamTrace(s.stream)
    peak = 0
    for a in range(0, n, 4096):
        trace.add_batch(t[a:a + 4096], v[a:a + 4096], eng.process(t[a:a + 4096], v[a:a + 4096]))
        peak = max(peak, trace.nbytes)
    return peak


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="one day instead of a week")
    opts = ap.parse_args()
    n = 86_400 if opts.quick else 7 * 86_400
    rows = []
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-report-") as tmp:
        csv = Path(tmp) / "brackenfield-line2.csv"
        t0 = time.perf_counter()
        total = write_csv(csv, n)
        print(f"[{time.perf_counter() - t0:5.0f} s] wrote {total:,} rows", file=sys.stderr, flush=True)
        plain = run_replay(csv, None)
        with_report = run_replay(csv, Path(tmp) / "report")
        plain2 = run_replay(csv, None)  # twice, the faster counts: this machine is shared
        base_s = min(plain["seconds"], plain2["seconds"])
        base_mb = max(plain["rss_mb"], plain2["rss_mb"])
        size_kb = (Path(tmp) / "report" / "report.html").stat().st_size / 1024
        events = sum(1 for line in csv.with_suffix(".jsonl").read_text().splitlines()
                     if json.loads(line)["phase"] != "detected")
    mem = with_report["rss_mb"] / base_mb
    rows.append((f"peak RSS, {total:,} rows", f"{with_report['rss_mb']:.0f} MB", f"{base_mb:.0f} MB without",
                 f"ratio {mem:.2f} <= {MEMORY_RATIO}", mem <= MEMORY_RATIO))
    spd = with_report["seconds"] / base_s
    time_ratio = 3.0 if opts.quick else TIME_RATIO
    rows.append((f"CPU time, {total:,} rows", f"{with_report['seconds']:.1f} s", f"{base_s:.1f} s without",
                 f"ratio {spd:.2f} <= {time_ratio}", spd <= time_ratio))
    short, week = trace_peak(7200), trace_peak(n)
    rows.append((f"report arrays per stream, {n:,} samples", f"{week / 1024:.0f} kB", (f"{short / 1024:.0f} kB "
                 "after 7,200"), f"ratio {week / short:.2f} <= 1.10", week <= 1.10 * short))
    w = [max(len(r[i]) for r in rows + [("target", "measured", "baseline", "goal", True)]) for i in range(4)]
    print("  ".join(h.ljust(w[i]) for i, h in enumerate(("target", "measured", "baseline", "goal"))) + "  result")
    for r in rows:
        print("  ".join(str(r[i]).ljust(w[i]) for i in range(4)) + "  " + ("ok" if r[4] else "MISSED"))
    print(f"  report.html {size_kb:,.0f} kB for {len(SENSORS)} streams, {events} decided events; wall time "
          f"{with_report['wall']:.1f} s with the report, {min(plain['wall'], plain2['wall']):.1f} s without")
    return 0 if all(r[4] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
