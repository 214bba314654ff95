"""Benchmark of `shiftwatch fit` on one long stream: its peak memory against the series itself.

Usage, from the repository root with the package installed (``.[test]``)::

    python tests/bench/bench_fit.py              # 4 million rows
    python tests/bench/bench_fit.py --quick      # 1 million rows
    python tests/bench/bench_fit.py --repeat 5   # more runs per figure (medians count)

The file is written under /tmp at run time and deleted afterwards: one fill-weight stream of
the invented Brackenfield plant, two samples a second, a step of 1.5 sigma at 65% of it (a
fixed random state), as long CSV with epoch times.  ``fit --json`` runs as the real command
line in its own process and reports its peak RSS (VmHWM).  The baseline, measured in the same
run and alternated with it: a process that imports the same modules and holds the series'
times and values as two float64 arrays, the least any fit of it must hold.  Target: the fit's
peak at most 5 arrays of the series' length (8 bytes a row) above the baseline's
(before 2026-12-04 it was about 15: 582 MB for 4 million rows; the core's ``fit_step`` took
nine arrays at once, the command line's sort and filter four more).  Memory does not depend on
the machine's load, but the runs are alternated all the same and the medians reported with
their range.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

RUNNER = """\
import sys
from shiftwatch.cli import main
code = main(sys.argv[1:])
hwm = next(int(ln.split()[1]) for ln in open("/proc/self/status") if ln.startswith("VmHWM:"))
print("peak_rss_kb", hwm, file=sys.stderr)
sys.exit(code)
"""

BASELINE = """\
import sys
import numpy as np
import shiftwatch.cli, shiftwatch.replay, shiftwatch.core.stepfit
n = int(sys.argv[1])
t = np.arange(n, dtype=np.float64)
v = np.ones(n)
hwm = next(int(ln.split()[1]) for ln in open("/proc/self/status") if ln.startswith("VmHWM:"))
print("peak_rss_kb", hwm, file=sys.stderr)
"""

#: Arrays of the series' length the fit may hold above the baseline's two.
TARGET_ARRAYS = 5.0


def write_stream(path: Path, n: int) -> None:
    rng = np.random.default_rng(12)
    t0 = 1772431200.0
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for a in range(0, n, 200_000):
            i = np.arange(a, min(n, a + 200_000))
            v = 500.0 + 0.8 * rng.standard_normal(i.size) + 1.2 * (i >= int(0.65 * n))
            f.write("".join(f"{t0 + 0.5 * k:.1f},brackenfield/filler3/fill_g,{x:.4f}\n"
                            for k, x in zip(i.tolist(), v.tolist())))


def peak_mb(code: str, args: list[str]) -> float:
    res = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise RuntimeError(f"exited {res.returncode}: {res.stderr[-800:]}")
    line = next(ln.split() for ln in res.stderr.splitlines() if ln.startswith("peak_rss_kb"))
    return int(line[1]) / 1024.0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="1 million rows instead of 4 million")
    ap.add_argument("--repeat", type=int, default=3, help="runs of each (default 3)")
    args = ap.parse_args()
    n = 1_000_000 if args.quick else 4_000_000
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-fit-") as tmp:
        path = Path(tmp) / "filler3.csv"
        write_stream(path, n)
        fit, base = [], []
        for _ in range(args.repeat):
            fit.append(peak_mb(RUNNER, ["fit", "--json", str(path)]))
            base.append(peak_mb(BASELINE, [str(n)]))
        size = os.path.getsize(path)
    array_mb = n * 8 / 2**20
    extra = [(f - b) / array_mb for f, b in zip(fit, base)]
    ok = statistics.median(extra) <= TARGET_ARRAYS
    print(f"fit of one stream of {n:,} rows ({size / 1e6:.0f} MB of CSV); an array of it is {array_mb:.1f} MiB")
    print(f"  fit --json peak RSS  {statistics.median(fit):7.1f} MiB  ({min(fit):.1f}-{max(fit):.1f})")
    print(f"  baseline peak RSS    {statistics.median(base):7.1f} MiB  ({min(base):.1f}-{max(base):.1f})")
    print(f"  above the baseline   {statistics.median(extra):7.2f} arrays of the series' length "
          f"({min(extra):.2f}-{max(extra):.2f}); target at most {TARGET_ARRAYS:g}: {'met' if ok else 'MISSED'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
