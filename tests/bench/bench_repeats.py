"""What counting runs of one repeated reading costs a replay, in instructions (not part of the pytest run).

Usage, from the repository root with the package installed and valgrind on the path::

    python tests/bench/bench_repeats.py --against /tmp/base          # this checkout against another
    python tests/bench/bench_repeats.py --against /tmp/base --rows 5000 --repeat 2

``--against DIR`` is another checkout (its ``daemon/`` first on ``PYTHONPATH``), e.g. a
``git worktree add /tmp/base <commit>`` of the code before the count (core/repeats.py).
Each side replays the same long CSV with the real command line (``shiftwatch replay FILE
--out /dev/null``) under ``valgrind --tool=callgrind`` and the figure is the instructions
executed (callgrind's ``summary``: Ir), whole process, start-up and imports included;
the sides alternate which goes first.  Instruction counts do not move with the load of
the shared machine; string hashing is fixed for both sides (``PYTHONHASHSEED``), and the
very first run after a change still counts a little more (take ``--repeat 3`` or more).

The history: 24 streams of the invented Brackenfield plant at one reading a second,
``--rows`` readings each (20,000 by default), 0.4 noise at three resolutions (full
doubles, 0.01 as a historian keeps fill weights, 0.5: a coarse resolution whose readings
repeat a third of the time), iid and AR(1) 0.5, a 1-sigma step on one stream in four, and
on one stream in six a sensor frozen at its level for 600 readings (so that both the
common path, where no run can reach its limit, and the exact one are taken).
"""

from __future__ import annotations

import argparse
import math
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
T0 = 1_772_431_200.0


def write_history(path: Path, rows: int) -> None:
    rng = np.random.RandomState(2026)
    cols = []
    names = []
    for s in range(24):
        e = rng.standard_normal(rows)
        if s % 2:
            out = np.empty(rows)
            prev = 0.0
            for i in range(rows):
                prev = 0.5 * prev + math.sqrt(0.75) * e[i]
                out[i] = prev
            e = out
        x = 500.0 + 0.4 * e
        if s % 4 == 0:
            x[rows // 2:] += 0.4
        res = (None, 0.01, 0.5)[s % 3]
        if res is not None:
            x = np.round(x / res) * res
        if s % 6 == 1:
            x[rows // 3: rows // 3 + 600] = 500.0
        cols.append(x)
        names.append(f"brackenfield/line2/filler/head{s}/fill")
    from datetime import UTC, datetime

    with path.open("w") as f:
        f.write("time,stream,value\n")
        lists = [x.tolist() for x in cols]
        for i in range(rows):
            t = datetime.fromtimestamp(T0 + i, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
            for name, x in zip(names, lists):
                f.write(f"{t},{name},{x[i]!r}\n")


def instructions(checkout: Path, csv: Path, out: Path) -> int:
    # (string hashing fixed: with it random, one side's count moved by about half a percent
    # from run to run)
    env = dict(os.environ, PYTHONPATH=str(checkout / "daemon"), OPENBLAS_NUM_THREADS="1", PYTHONHASHSEED="0")
    subprocess.run([sys.executable, "-m", "compileall", "-q", str(checkout / "daemon" / "shiftwatch")],
                   check=True, env=env)
    cmd = ["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}", sys.executable, "-m", "shiftwatch",
               "replay", str(csv), "--out", "/dev/null"]
    res = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise SystemExit(f"replay under callgrind failed ({res.returncode}): {res.stderr[-2000:]}")
    m = re.search(r"^summary:\s+(\d+)", out.read_text(errors="replace"), re.MULTILINE)
    if m is None:
        raise SystemExit(f"no summary in {out}")
    return int(m[1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--against", required=True, type=Path, help="the other checkout (the code before)")
    ap.add_argument("--rows", type=int, default=20_000)
    ap.add_argument("--repeat", type=int, default=1)
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        csv = Path(d) / "history.csv"
        write_history(csv, a.rows)
        print(f"history: 24 streams x {a.rows:,} rows ({csv.stat().st_size / 1e6:.1f} MB)")
        sides = {"this": ROOT, "against": a.against.resolve()}
        got: dict[str, list[int]] = {k: [] for k in sides}
        for r in range(a.repeat):
            order = list(sides) if r % 2 == 0 else list(sides)[::-1]
            for k in order:
                n = instructions(sides[k], csv, Path(f"/tmp/callgrind.repeats.{k}.{r}.out"))
                got[k].append(n)
                print(f"  round {r + 1}: {k:8s} {n:,} instructions (/tmp/callgrind.repeats.{k}.{r}.out)")
        ratios = [t / b for t, b in zip(got["this"], got["against"])]
        print("this / against: " + ", ".join(f"{x:.4f}" for x in ratios)
              + f"  (median {float(np.median(ratios)):.4f}; target at most 1.01)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
