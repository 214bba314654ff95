"""Benchmark of `shiftwatch replay` at historian scale: speed, memory, processes, layouts.

Usage, from the repository root with the package installed (``.[test]``)::

    python tests/bench/bench_replay.py            # 2.4 million and 50 million rows (about 10 minutes)
    python tests/bench/bench_replay.py --quick    # 2.4 million and 12 million rows
    python tests/bench/bench_replay.py --repeat 5 # more runs per figure (medians count)
    python tests/bench/bench_replay.py --part jobs --repeat 5   # target 3 alone (a minute)
    python tests/bench/bench_replay.py --part parquet --repeat 5  # target 4 alone, with its bound
    python tests/bench/bench_replay.py --part jobs --against /tmp/base   # paired with another checkout
    python tests/bench/bench_replay.py --part engines --repeat 5  # where the engines' time goes, in process

``--part engines`` feeds the bench's history (the same values, times one second apart) to the
engines in this process as replay feeds them, a call of 4,096 samples per stream (the last
3,808), and prints the CPU time of the engine's parts (timers around its methods: a part's own
time, without the parts it calls that are timed too), its watch stretches' cost fitted as a
fixed cost per stretch plus a cost per sample, and how often the warm-up's level holds samples.

``--against DIR`` (with ``--part jobs``, ``parquet`` or ``engines``) runs every figure of the part
for this checkout and for the one at DIR (its ``daemon/`` first on ``PYTHONPATH``), in
rounds that alternate which checkout goes first, and prints both sides' figures and the
ratio of each round's pair: on the shared machine two codes are compared only so.

The files are written under /tmp at run time and deleted afterwards: 200
streams of the invented Brackenfield plant at one sample a second (noise,
a step on every tenth stream, lone spikes, a fixed random state), as long
CSV with shiftwatch's RFC 3339 times, as wide CSV (time and 200 tag
columns) and as long Parquet (pyarrow, row groups of 1 million rows, and
once as one row group, for its peak memory).
Every replay is the real command line in its own process (``--out
/dev/null``), which reports its peak RSS (VmHWM) and CPU time.  Figures are
the medians of ``--repeat`` runs, all measured in this run; the machine is
shared, so single-process times are CPU times (user and system, as in
bench_report.py) and ``--jobs`` is judged on wall time.  The package's
bytecode is compiled first: with ``PYTHONDONTWRITEBYTECODE`` set, as on the
shared machine, every replay would otherwise compile shiftwatch's sources as
it starts (40 ms or so), which an installed package never does.  Targets:

1. long CSV of 2.4 million rows, one process: at most 1.0 times a bare
   stdlib ``csv`` parse of the same file run as a command (csv.reader,
   datetime.fromisoformat on the time, float on the value);
2. peak RSS of the 2.4 million and the 50 million (12 million with
   ``--quick``) row replays, one process: within 10% of each other and at
   most 150 MB;
3. ``--jobs 2`` at least 1.7 times faster than ``--jobs 1`` (on a 2-core
   machine; runs are paired and the median ratio of the pairs counts);
4. Parquet of the same rows: at most 0.5 times the long CSV's time;
5. wide CSV with 200 tags: at most 1.2 times the long CSV's time per value.

The script prints one table, the spread of the runs, and exits 0 only when
every target is met.  Besides the targets it measures, in the same runs:
what two bare parses side by side take against one, and two one-process
replays side by side against one (the most any ``--jobs 2`` could gain on
this machine as it is loaded now: the replays' numpy passes over chunk-sized
arrays share the caches, where the bare parse's plain Python hardly does), a replay whose
engines do nothing (reading, batching and output only: the rest of the
replay's CPU time is the engines'), and a bare ``csv.reader`` loop that
parses neither times nor values.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import run_bench  # the bare parse this bench compares with, shared with run_bench.py

from shiftwatch.core.timefmt import format_time

T0 = 1_788_000_000.0
STREAMS = 200
NAMES = [f"brackenfield/line{k // 25 + 1}/cell{k % 25:02d}/sensor" for k in range(STREAMS)]
PERIOD = 12_000  # seconds of distinct values; longer files repeat them with later times

# VmHWM, not ru_maxrss: Linux carries the high-water mark of the process that forked the runner
# across exec into ru_maxrss, so a runner started by a big bench process reported the bench's size.
RUNNER = """\
import resource, sys
from shiftwatch.cli import main
code = main(sys.argv[1:])
hwm = next(int(ln.split()[1]) for ln in open("/proc/self/status") if ln.startswith("VmHWM:"))
cpu = sum(getattr(resource.getrusage(w), f) for w in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN)
          for f in ("ru_utime", "ru_stime"))
print("peak_rss_kb", hwm, cpu, file=sys.stderr)
sys.exit(code)
"""

# run_bench.py's bare parse, reporting its CPU time.
CPU_REPORT = """
import resource
use = resource.getrusage(resource.RUSAGE_SELF)
print(use.ru_utime + use.ru_stime, file=sys.stderr)
"""
BARE_PARSE = run_bench.BARE_PARSE + CPU_REPORT
# The csv module's loop alone (no time or value parsed): a note, not the target's baseline.
BARE_LOOP = """
import csv, sys
with open(sys.argv[1], newline="") as f:
    for row in csv.reader(f):
        pass
""" + CPU_REPORT
# The replay with engines that take every batch and do nothing: reading, batching, output.
# shiftwatch.cli first, as the command imports it: it sets OPENBLAS_NUM_THREADS=1 before numpy is
# imported.  Imported after numpy (through shiftwatch.core), it did not, and these runs alone paid
# for OpenBLAS's threads (0.62 against 0.40 s of CPU for the Parquet file, 5 alternated runs,
# 2026-12-04), which made the engines' share of a replay look smaller than it is.
NULL_ENGINE = """
import shiftwatch.cli
from shiftwatch.core import engine
empty = engine.BatchResult()
engine.StreamEngine.process = lambda self, t, v: empty
"""


def value_texts() -> list[list[str]]:
    """PERIOD x STREAMS values as text: noise, a step on every tenth stream, lone spikes."""
    rng = np.random.default_rng(2026)
    v = 100.0 + rng.standard_normal((PERIOD, STREAMS))
    v[PERIOD // 2:, ::10] += 1.5
    v[rng.random((PERIOD, STREAMS)) < 0.001] += 9.0
    return [[f"{x:.3f}" for x in row] for row in v.tolist()]


def write_long(path: Path, seconds: int, texts: list[list[str]]) -> int:
    with open(path, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        for a in range(0, seconds, 1000):
            out = []
            for i in range(a, min(seconds, a + 1000)):
                stamp = format_time(T0 + i)
                row = texts[i % PERIOD]
                out.extend(f"{stamp},{name},{row[k]}\n" for k, name in enumerate(NAMES))
            f.write("".join(out))
    return seconds * STREAMS


def write_wide(path: Path, seconds: int, texts: list[list[str]]) -> int:
    with open(path, "w", encoding="utf-8") as f:
        f.write("time," + ",".join(NAMES) + "\n")
        f.write("".join(f"{format_time(T0 + i)},{','.join(texts[i % PERIOD])}\n" for i in range(seconds)))
    return seconds * STREAMS


def write_parquet(path: Path, seconds: int, texts: list[list[str]], row_group_size: int = 1 << 20) -> int:
    import pyarrow as pa
    import pyarrow.parquet as pq

    values = np.array([[float(x) for x in row] for row in texts[:seconds]]).ravel()
    ms = (T0 * 1000 + 1000 * np.repeat(np.arange(seconds, dtype=np.int64), STREAMS)).astype(np.int64)
    table = pa.table({"time": pa.array(ms, pa.timestamp("ms", tz="UTC")),
                      "stream": pa.array(NAMES * seconds).dictionary_encode(), "value": values})
    pq.write_table(table, path, row_group_size=row_group_size)
    return seconds * STREAMS


def compile_package(root: Path | None = None) -> None:
    """Write the package's bytecode, as an installed package has it (see the module docstring):
    this one's, or that of the checkout at ``root``."""
    import compileall

    import shiftwatch

    where = Path(shiftwatch.__file__).parent if root is None else root / "daemon" / "shiftwatch"
    compileall.compile_dir(str(where), quiet=1)


def checkout_env(root: Path) -> dict[str, str]:
    """The environment that runs the package of the checkout at ``root`` (``--against``)."""
    if not (root / "daemon" / "shiftwatch" / "__init__.py").is_file():
        raise SystemExit(f"bench_replay: --against {root}: no daemon/shiftwatch package there")
    env = dict(os.environ)
    env["PYTHONPATH"] = str(root / "daemon") + os.pathsep + env.get("PYTHONPATH", "")
    return env


def run(args: list[str], prelude: str = "", env: dict[str, str] | None = None) -> tuple[float, float, float]:
    """Wall seconds, peak RSS (MB) and CPU seconds (with its children's) of the command line in a
    fresh process; ``prelude`` runs before it; ``env``: another checkout's (``checkout_env``)."""
    t0 = time.perf_counter()
    res = subprocess.run([sys.executable, "-c", prelude + RUNNER, *args], capture_output=True, text=True,
                         check=False, env=env)
    wall = time.perf_counter() - t0
    if res.returncode not in (0, 1):
        raise RuntimeError(f"replay exited {res.returncode}: {res.stderr[-800:]}")
    line = next(ln.split() for ln in res.stderr.splitlines() if ln.startswith("peak_rss_kb"))
    return wall, int(line[1]) / 1024.0, float(line[2])


def replay(path: Path, jobs: int, prelude: str = "", env: dict[str, str] | None = None) -> tuple[float, float, float]:
    return run(["replay", "--jobs", str(jobs), "--out", os.devnull, str(path)], prelude, env)


def bare(path: Path, script: str = BARE_PARSE) -> tuple[float, float]:
    """Wall and CPU seconds of the bare parse."""
    t0 = time.perf_counter()
    res = subprocess.run([sys.executable, "-c", script, str(path)], check=True, capture_output=True, text=True)
    return time.perf_counter() - t0, float(res.stderr.split()[-1])


def bare_pair(path: Path) -> float:
    """Wall seconds of two bare parses started together, until both have ended."""
    t0 = time.perf_counter()
    procs = [subprocess.Popen([sys.executable, "-c", BARE_PARSE, str(path)], stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL) for _ in range(2)]
    for p in procs:
        if p.wait() != 0:
            raise RuntimeError("the bare parse failed")
    return time.perf_counter() - t0


def replay_pair(path: Path, env: dict[str, str] | None = None) -> float:
    """Wall seconds of two one-process replays of the file started together, until both have
    ended: what this machine gives two processes that share nothing (no rows handed over)."""
    t0 = time.perf_counter()
    procs = [subprocess.Popen([sys.executable, "-c", RUNNER, "replay", "--jobs", "1", "--out", os.devnull, str(path)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env) for _ in range(2)]
    for p in procs:
        if p.wait() not in (0, 1):
            raise RuntimeError("the replay failed")
    return time.perf_counter() - t0


def med(xs: list[float]) -> float:
    return statistics.median(xs)


def spread(xs: list[float]) -> str:
    return f"{min(xs):.2f}-{max(xs):.2f} s" if len(xs) > 1 else f"{xs[0]:.2f} s"


def jobs_only(repeat: int) -> int:
    """Target 3 alone: paired --jobs 1 / --jobs 2 wall times and the side-by-side ceiling."""
    say = lambda msg: print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-replay-", dir="/tmp") as tmp:
        long_csv = Path(tmp) / "long.csv"
        n = write_long(long_csv, 12_000, value_texts())
        compile_package()
        ones, twos, twins, loads = [], [], [], []
        for i in range(repeat):
            loads.append(os.getloadavg()[0])
            if i % 2 == 0:
                one, two = replay(long_csv, 1), replay(long_csv, 2)
            else:
                two, one = replay(long_csv, 2), replay(long_csv, 1)
            ones.append(one)
            twos.append(two)
            twins.append(2 * one[0] / replay_pair(long_csv))
            say(f"pair {i + 1}: --jobs 1 {one[0]:.3f} s, --jobs 2 {two[0]:.3f} s, speed-up {one[0] / two[0]:.2f}, "
                f"two side by side {twins[-1]:.2f}, load {loads[-1]:.2f}")
    pairs = [a[0] / b[0] for a, b in zip(ones, twos)]
    sp = med(pairs)
    print(f"long CSV, {n:,} rows: --jobs 1 wall {med([o[0] for o in ones]):.3f} s ({spread([o[0] for o in ones])}), "
          f"--jobs 2 {med([t[0] for t in twos]):.3f} s ({spread([t[0] for t in twos])})")
    print(f"speed-up per pair {', '.join(f'{x:.2f}' for x in pairs)}: median {sp:.2f} >= 1.7 "
          f"{'ok' if sp >= 1.7 else 'MISSED'}")
    print(f"two one-process replays side by side against one: {med(twins):.2f} "
          f"({', '.join(f'{x:.2f}' for x in twins)}); CPU of all --jobs 2 processes "
          f"{med([t[2] for t in twos]) / med([o[2] for o in ones]):.2f} x one process's; "
          f"load average before each pair {', '.join(f'{x:.2f}' for x in loads)}")
    return 0 if sp >= 1.7 else 1


def _sides(other: Path | None) -> list[tuple[str, dict[str, str] | None]]:
    """The checkouts a part measures: this one, and with ``--against`` the one at ``other``."""
    return [("this", None)] + ([(f"against {other}", checkout_env(other))] if other is not None else [])


def jobs_against(repeat: int, other: Path) -> int:
    """Target 3 for this checkout and another, in rounds: each side's --jobs 1 and --jobs 2 (which
    side, and which of the two, goes first alternating from round to round), the side-by-side
    ceiling once a round, and the ratio of the two sides' --jobs 2 wall times."""
    say = lambda msg: print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)
    sides = _sides(other)
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-replay-", dir="/tmp") as tmp:
        long_csv = Path(tmp) / "long.csv"
        n = write_long(long_csv, 12_000, value_texts())
        compile_package()
        compile_package(other)
        got: dict[str, list[tuple[tuple[float, float, float], tuple[float, float, float]]]] = {
            name: [] for name, _ in sides}
        twins, loads = [], []
        for i in range(repeat):
            loads.append(os.getloadavg()[0])
            for name, env in (sides if i % 2 == 0 else sides[::-1]):
                if (i // 2) % 2 == 0:
                    one, two = replay(long_csv, 1, env=env), replay(long_csv, 2, env=env)
                else:
                    two, one = replay(long_csv, 2, env=env), replay(long_csv, 1, env=env)
                got[name].append((one, two))
            twins.append(2 * got["this"][-1][0][0] / replay_pair(long_csv))
            say(f"round {i + 1}: " + "; ".join(
                f"{name}: --jobs 1 {got[name][-1][0][0]:.3f} s, --jobs 2 {got[name][-1][1][0]:.3f} s, "
                f"speed-up {got[name][-1][0][0] / got[name][-1][1][0]:.2f}" for name, _ in sides)
                + f"; two side by side {twins[-1]:.2f}, load {loads[-1]:.2f}")
    print(f"long CSV, {n:,} rows, {repeat} rounds; load average before each "
          f"{', '.join(f'{x:.2f}' for x in loads)}; two one-process replays side by side against one: "
          f"{med(twins):.2f} ({', '.join(f'{x:.2f}' for x in twins)})")
    for name, _ in sides:
        rows = got[name]
        pairs = [a[0] / b[0] for a, b in rows]
        print(f"{name}: --jobs 1 wall {med([a[0] for a, _ in rows]):.3f} s ({spread([a[0] for a, _ in rows])}), "
              f"--jobs 2 {med([b[0] for _, b in rows]):.3f} s ({spread([b[0] for _, b in rows])}); speed-up per "
              f"round {', '.join(f'{x:.2f}' for x in pairs)}: median {med(pairs):.2f}; CPU of --jobs 2 "
              f"{med([b[2] for _, b in rows]) / med([a[2] for a, _ in rows]):.2f} x one process's")
    mine, theirs = got["this"], got[sides[1][0]]
    ratios = [a[1][0] / b[1][0] for a, b in zip(mine, theirs)]
    print(f"this --jobs 2 / against --jobs 2 (wall) per round {', '.join(f'{x:.3f}' for x in ratios)}: "
          f"median {med(ratios):.3f}")
    return 0 if med([a[0] / b[0] for a, b in mine]) >= 1.7 else 1


def parquet_part(repeat: int, other: Path | None) -> int:
    """Target 4 alone (CPU, one process): the long CSV and the Parquet file of the same rows, each
    also with engines that do nothing (C and P), so the engines' CPU E and the bound the target
    sets on them, (P + E) / (C + E) <= 0.5 only while E <= C - 2 P, are measured in the same
    runs.  With ``other``, both checkouts in rounds that alternate which goes first."""
    say = lambda msg: print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)
    sides = _sides(other)
    kinds = (("csv", False), ("parquet", False), ("csv", True), ("parquet", True))
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-replay-", dir="/tmp") as tmp:
        d = Path(tmp)
        texts = value_texts()
        files = {"csv": d / "long.csv", "parquet": d / "long.parquet"}
        n = write_long(files["csv"], 12_000, texts)
        write_parquet(files["parquet"], 12_000, texts)
        compile_package()
        if other is not None:
            compile_package(other)
        cpu: dict[tuple[str, str, bool], list[float]] = {}
        loads = []
        for i in range(repeat):
            loads.append(os.getloadavg()[0])
            for name, env in (sides if i % 2 == 0 else sides[::-1]):
                for kind, null in (kinds if i % 2 == 0 else kinds[::-1]):
                    cpu.setdefault((name, kind, null), []).append(
                        replay(files[kind], 1, NULL_ENGINE if null else "", env)[2])
            say(f"round {i + 1}: " + "; ".join(
                f"{name}: Parquet / long CSV {cpu[name, 'parquet', False][-1] / cpu[name, 'csv', False][-1]:.2f}"
                for name, _ in sides) + f", load {loads[-1]:.2f}")
    print(f"{n:,} rows, {repeat} rounds, CPU seconds (user + system), one process; load average before each "
          f"round {', '.join(f'{x:.2f}' for x in loads)}")
    ok = False
    for name, _ in sides:
        c_all, p_all = cpu[name, "csv", False], cpu[name, "parquet", False]
        c0, p0 = med(cpu[name, "csv", True]), med(cpu[name, "parquet", True])
        per = [a / b for a, b in zip(p_all, c_all)]
        e = med([a - b for a, b in zip(c_all, cpu[name, "csv", True])])
        print(f"{name}: long CSV {med(c_all):.3f} s ({spread(c_all)}), Parquet {med(p_all):.3f} s "
              f"({spread(p_all)}); ratio per round {', '.join(f'{x:.3f}' for x in per)}: median {med(per):.3f} "
              f"<= 0.5 {'ok' if med(per) <= 0.5 else 'MISSED'}; engines that do nothing: long CSV C = {c0:.3f} s, "
              f"Parquet P = {p0:.3f} s, so the engines E = {e:.3f} s and the target needs E <= C - 2 P = "
              f"{c0 - 2 * p0:.3f} s")
        if name == "this":
            ok = med(per) <= 0.5
    if other is not None:
        for key, label in ((("csv", False), "long CSV"), (("parquet", False), "Parquet"),
                           (("csv", True), "long CSV, engines that do nothing"),
                           (("parquet", True), "Parquet, engines that do nothing")):
            r = [a / b for a, b in zip(cpu[("this", *key)], cpu[(sides[1][0], *key)])]
            print(f"this / against, {label} (CPU) per round {', '.join(f'{x:.3f}' for x in r)}: median {med(r):.3f}")
    return 0 if ok else 1


# The engines alone, fed the bench's history in process (``--part engines``); with ``--against`` each
# side in a fresh process of its own, which prints the CPU seconds of its feeding runs.
ENGINE_FEED = """
import os, sys, time
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
import numpy as np
from shiftwatch.core.engine import StreamEngine
sys.path.insert(0, sys.argv[1])
import bench_replay as b
values = np.array([[float(x) for x in row] for row in b.value_texts()])
times = b.T0 + np.arange(b.PERIOD, dtype=np.float64)
cols = [np.ascontiguousarray(values[:, k]) for k in range(b.STREAMS)]
def feed():
    engines = [StreamEngine(name) for name in b.NAMES]
    c0 = time.process_time()
    for a in range(0, b.PERIOD, 4096):
        for k, eng in enumerate(engines):
            eng.process(times[a:a + 4096], cols[k][a:a + 4096])
    return time.process_time() - c0
feed()
print(" ".join(f"{feed():.4f}" for _ in range(int(sys.argv[2]))))
"""


def engine_parts(repeat: int) -> None:
    """The table of ``--part engines``: the engine's parts timed in this process."""
    import collections
    import functools

    from shiftwatch.core import engine as eng_mod
    from shiftwatch.core import multicusum

    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    values = np.array([[float(x) for x in row] for row in value_texts()])
    times = T0 + np.arange(PERIOD, dtype=np.float64)
    cols = [np.ascontiguousarray(values[:, k]) for k in range(STREAMS)]
    own: collections.Counter[str] = collections.Counter()
    calls: collections.Counter[str] = collections.Counter()
    inner: list[float] = []
    stretches: list[tuple[int, float]] = []
    clock = time.process_time
    se = eng_mod.StreamEngine
    parts = [(se, "process", "process: screening, the loop over phases, tallies"),
             (se, "_warm", "first warm-up's end: robust baseline, step fit, lone outliers"),
             (se, "_young_loop", "young level, sample by sample (first warm-up, after a step)"),
             (eng_mod, "weigh_splits", "young level's split screens, weighed together"),
             (se, "_young_event", "young level's events"),
             (se, "_watch", "watch stretch: the rest"),
             (se, "_split_spikes", "watch stretch: spike split"),
             (se, "_follow_plan", "watch stretch: follower's path"),
             (multicusum.MultiCusumTest, "update", "watch stretch: CUSUM bank"),
             (se, "_append", "watch stretch: window and baseline sums"),
             (se, "_refine", "refinement of the baseline"),
             (se, "_design_test", "refinement: the test designed again"),
             (se, "_track", "open event: tracking"),
             (se, "_open_event", "event opened"),
             (se, "_decide", "event decided")]

    def timed(f: Any, label: str) -> Any:
        @functools.wraps(f)
        def g(*a: Any, **k: Any) -> Any:
            t0 = clock()
            inner.append(0.0)
            try:
                return f(*a, **k)
            finally:
                dt = clock() - t0
                own[label] += dt - inner.pop()
                calls[label] += 1
                if inner:
                    inner[-1] += dt
        return g

    watch = se._watch

    def watch_stretch(self: Any, t: Any, x: Any, idx: Any, result: Any, bounds: Any = None) -> int:
        young = self._young.level is not None
        t0 = clock()
        used = watch(self, t, x, idx, result, bounds)
        if not young:
            stretches.append((used, clock() - t0))
        return used

    saved = [(o, name, getattr(o, name)) for o, name, _ in parts]
    releases = [0, 0]
    release = eng_mod.SelfStart.release

    def counted_release(ys: Any) -> None:
        if ys.held:
            releases[0] += 1
            releases[1] += len(ys.held)
        release(ys)

    try:
        se._watch = watch_stretch  # type: ignore[method-assign]
        for o, name, label in parts:
            setattr(o, name, timed(getattr(o, name), label))
        eng_mod.SelfStart.release = counted_release  # type: ignore[method-assign]
        young_samples = [0]
        loop = se._young_loop

        def young_loop(self: Any, *a: Any) -> int:
            used = loop(self, *a)
            young_samples[0] += used
            return int(used)

        se._young_loop = young_loop  # type: ignore[method-assign]
        totals = []
        for r in range(repeat + 1):
            if r == 1:  # the first run warms the caches (designs, critical values) and is not counted
                own.clear()
                calls.clear()
                stretches.clear()
                releases[:] = [0, 0]
                young_samples[0] = 0
            engines = [se(name) for name in NAMES]
            c0 = clock()
            for a in range(0, PERIOD, 4096):
                for k, e in enumerate(engines):
                    e.process(times[a:a + 4096], cols[k][a:a + 4096])
            if r:
                totals.append(clock() - c0)
    finally:
        eng_mod.SelfStart.release = release  # type: ignore[method-assign]
        for o, name, f in saved:  # the methods as they were (the wrappers' wrappers too)
            setattr(o, name, f)
    timed_total = sum(own.values()) / repeat
    print(f"engines fed the bench's history ({STREAMS} streams x {PERIOD:,} samples, calls of 4,096), in process, "
          f"{repeat} runs after one uncounted: CPU {med(totals):.3f} s ({spread(totals)}) with the timers; "
          f"the timed parts {timed_total:.3f} s a run")
    w = max(len(label) for _, _, label in parts)
    for label, v in own.most_common():
        print(f"  {label.ljust(w)}  {v / repeat * 1000:7.1f} ms  {v / repeat / timed_total:6.1%}  "
              f"{calls[label] // repeat:6d} calls")
    a = np.array(stretches, dtype=np.float64)
    fit = np.linalg.lstsq(np.column_stack([np.ones(a.shape[0]), a[:, 0]]), a[:, 1], rcond=None)[0]
    print(f"  watch stretches: {a.shape[0] // repeat:,} a run, {a[:, 0].sum() / repeat:,.0f} samples, "
          f"{a[:, 1].sum() / repeat:.3f} s; fitted {fit[0] * 1e6:.0f} us a stretch + {fit[1] * 1e9:.0f} ns a sample")
    for lo, hi in ((0, 64), (64, 256), (256, 1024), (1024, 1 << 20)):
        sel = a[(a[:, 0] >= lo) & (a[:, 0] < hi)]
        if sel.shape[0]:
            print(f"    {lo:,} to {hi - 1:,} samples: {sel.shape[0] // repeat:,} stretches, "
                  f"{sel[:, 1].sum() / repeat * 1000:.0f} ms, median {np.median(sel[:, 1]) * 1e6:.0f} us")
    print(f"  young level: {young_samples[0] // repeat:,} samples a run, "
          f"{own['young level, sample by sample (first warm-up, after a step)'] / max(young_samples[0], 1) * 1e6:.2f}"
          f" us each; it held samples {releases[0] // repeat:,} times ({releases[1] // repeat:,} samples), "
          f"once every {young_samples[0] / max(releases[0], 1):.0f} samples")


def engines_part(repeat: int, other: Path | None) -> int:
    """``--part engines``: the table, and with ``other`` both checkouts' engines' CPU in rounds."""
    engine_parts(repeat)
    if other is None:
        return 0
    here = str(Path(__file__).resolve().parent)
    compile_package()
    compile_package(other)
    got: dict[str, list[float]] = {}
    sides = _sides(other)
    for i in range(repeat):
        for name, env in (sides if i % 2 == 0 else sides[::-1]):
            res = subprocess.run([sys.executable, "-c", ENGINE_FEED, here, "3"], capture_output=True, text=True,
                                 check=True, env=env)
            got.setdefault(name, []).append(med([float(x) for x in res.stdout.split()]))
    for name, _ in sides:
        print(f"{name}: engines' CPU, median of 3 feedings a round: {med(got[name]):.3f} s ({spread(got[name])})")
    r = [a / b for a, b in zip(got["this"], got[sides[1][0]])]
    print(f"this / against per round {', '.join(f'{x:.3f}' for x in r)}: median {med(r):.3f}")
    return 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="12 million rows instead of 50 million for memory")
    ap.add_argument("--repeat", type=int, default=3, help="runs per timed figure (default 3)")
    ap.add_argument("--part", choices=("all", "jobs", "parquet", "engines"), default="all",
                    help="jobs: target 3 alone, --jobs 1 and --jobs 2 alternately (which goes first "
                         "alternating too), --repeat pairs, and two one-process replays side by side "
                         "after each pair; parquet: target 4 alone, with engines that do nothing too; "
                         "engines: where the engines' time goes, in process")
    ap.add_argument("--against", type=Path, metavar="DIR",
                    help="another checkout (its daemon/ is put first on PYTHONPATH) measured in the same "
                         "rounds, alternating, with --part jobs, parquet or engines")
    opts = ap.parse_args()
    if opts.against is not None and opts.part == "all":
        ap.error("--against is for --part jobs, parquet or engines")
    if opts.part == "jobs":
        return jobs_only(opts.repeat) if opts.against is None else jobs_against(opts.repeat, opts.against)
    if opts.part == "parquet":
        return parquet_part(opts.repeat, opts.against)
    if opts.part == "engines":
        return engines_part(opts.repeat, opts.against)
    small_s = 12_000  # 2.4 million rows
    big_s = 60_000 if opts.quick else 250_000
    rows: list[tuple[str, str, str, str, bool]] = []
    notes: list[str] = []
    say = lambda msg: print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-replay-", dir="/tmp") as tmp:
        d = Path(tmp)
        texts = value_texts()
        long_csv, wide_csv, parquet = d / "long.csv", d / "wide.csv", d / "long.parquet"
        n = write_long(long_csv, small_s, texts)
        write_wide(wide_csv, small_s, texts)
        write_parquet(parquet, small_s, texts)
        say(f"wrote {n:,} rows: long CSV {long_csv.stat().st_size / 1e6:.0f} MB, wide CSV "
            f"{wide_csv.stat().st_size / 1e6:.0f} MB, Parquet {parquet.stat().st_size / 1e6:.0f} MB")

        # 1. speed against a bare parse; 3. --jobs 2 against --jobs 1 (paired runs).  This machine
        # is shared (and its hypervisor steals time), so single-process figures compare CPU time
        # (user + system), as bench_report.py does; wall times are printed beside them.
        compile_package()
        bares, loops, ones, twos, pairs, nulls, ceilings, mem_small = [], [], [], [], [], [], [], []
        twins: list[float] = []
        for _ in range(opts.repeat):
            bares.append(bare(long_csv))
            one = replay(long_csv, 1)
            two = replay(long_csv, 2)
            ones.append(one)
            twos.append(two)
            mem_small.append(one[1])
            pairs.append(one[0] / two[0])
            ceilings.append(2 * bares[-1][0] / bare_pair(long_csv))
            twins.append(2 * one[0] / replay_pair(long_csv))
            nulls.append(replay(long_csv, 1, NULL_ENGINE))
            loops.append(bare(long_csv, BARE_LOOP))
        say(f"bare parse {spread([b[0] for b in bares])}, --jobs 1 {spread([o[0] for o in ones])}, "
            f"--jobs 2 {spread([t[0] for t in twos])} (wall)")
        cpu1 = med([o[2] for o in ones])
        cpu_bare = med([b[1] for b in bares])
        r = cpu1 / cpu_bare
        rows.append((f"long CSV, {n:,} rows, one process", f"{cpu1:.2f} s CPU",
                     f"bare csv parse {cpu_bare:.2f} s", f"ratio {r:.2f} <= 1.0", r <= 1.0))
        notes.append(f"long CSV --jobs 1: CPU {spread([o[2] for o in ones])}, wall {spread([o[0] for o in ones])}; "
                     f"bare parse: CPU {spread([b[1] for b in bares])}, wall {spread([b[0] for b in bares])}; "
                     f"CPU ratio per run {', '.join(f'{a[2] / b[1]:.2f}' for a, b in zip(ones, bares))}")
        cpu_null = med([x[2] for x in nulls])
        notes.append(f"the same replay with engines that do nothing: CPU {cpu_null:.2f} s ({spread([x[2] for x in nulls])}),"
                     f" so the engines take {cpu1 - cpu_null:.2f} s, {(cpu1 - cpu_null) / cpu1:.0%} of the replay; "
                     f"a bare csv.reader loop without times or values: CPU {med([x[1] for x in loops]):.2f} s")
        sp = med(pairs)
        rows.append(("--jobs 2 against --jobs 1 (wall)", f"{med([t[0] for t in twos]):.2f} s",
                     f"{med([o[0] for o in ones]):.2f} s",
                     f"speed-up {sp:.2f} >= 1.7 (median of {len(pairs)} pairs)", sp >= 1.7))
        notes.append(f"--jobs 2: wall {spread([t[0] for t in twos])}, CPU of all its processes "
                     f"{spread([t[2] for t in twos])} ({med([t[2] for t in twos]) / cpu1:.2f} x one process's); "
                     f"speed-up per pair {', '.join(f'{x:.2f}' for x in pairs)}; two bare parses side by side "
                     f"against one: {med(ceilings):.2f} x ({', '.join(f'{x:.2f}' for x in ceilings)}); two "
                     f"one-process replays side by side against one: {med(twins):.2f} x "
                     f"({', '.join(f'{x:.2f}' for x in twins)}), the most two replay processes that hand "
                     "nothing over gained on this machine in these runs")

        # 4. Parquet; 5. wide CSV (CPU time, one process)
        pqs = [replay(parquet, 1) for _ in range(opts.repeat)]
        cpu_pq = med([p[2] for p in pqs])
        r = cpu_pq / cpu1
        rows.append(("Parquet, same rows, one process", f"{cpu_pq:.2f} s CPU",
                     f"long CSV {cpu1:.2f} s", f"ratio {r:.2f} <= 0.5", r <= 0.5))
        pq_null = med([replay(parquet, 1, NULL_ENGINE)[2] for _ in range(opts.repeat)])
        notes.append(f"Parquet: CPU {spread([p[2] for p in pqs])}, wall {spread([p[0] for p in pqs])}, "
                     f"peak RSS {max(p[1] for p in pqs):.0f} MB; with engines that do nothing: CPU {pq_null:.2f} s")
        # The same rows written as one row group (as Spark and some historians write them): read
        # in pieces, so the peak is that of the file in groups of a million rows.
        one_group = d / "one_group.parquet"
        write_parquet(one_group, small_s, texts, row_group_size=small_s * STREAMS)
        og = replay(one_group, 1)
        one_group.unlink()
        notes.append(f"Parquet in one row group of {small_s * STREAMS:,} rows: peak RSS {og[1]:.0f} MB "
                     f"(groups of 1,048,576 rows: {max(p[1] for p in pqs):.0f} MB), CPU {og[2]:.2f} s")
        wides = [replay(wide_csv, 1) for _ in range(opts.repeat)]
        cpu_wide = med([w[2] for w in wides])
        r = cpu_wide / cpu1  # the same values: per value, the same ratio
        rows.append((f"wide CSV, {STREAMS} tags, same values", f"{cpu_wide:.2f} s CPU",
                     f"long CSV {cpu1:.2f} s", f"ratio per value {r:.2f} <= 1.2", r <= 1.2))
        notes.append(f"wide CSV: CPU {spread([w[2] for w in wides])}, wall {spread([w[0] for w in wides])}")
        for f in (wide_csv, parquet):
            f.unlink()

        # 2. memory, 2.4 million against big_s * 200 rows
        big = d / "big.csv"
        t0 = time.perf_counter()
        nb = write_long(big, big_s, texts)
        say(f"wrote {nb:,} rows ({big.stat().st_size / 1e9:.1f} GB) in {time.perf_counter() - t0:.0f} s")
        wb, mb, _ = replay(big, 1)
        big.unlink()
        ms = max(mem_small)
        close = abs(mb - ms) <= 0.10 * ms
        rows.append((f"peak RSS, {n:,} and {nb:,} rows", f"{mb:.0f} MB", f"{ms:.0f} MB",
                     "within 10%, <= 150 MB", close and max(mb, ms) <= 150))
        notes.append(f"peak RSS of the small replays: {', '.join(f'{x:.0f}' for x in mem_small)} MB; "
                     f"the big replay took {wb:.0f} s ({nb / wb / 1e6:.2f} M rows/s)")
        long_csv.unlink()
    w = [max(len(r[i]) for r in rows + [("target", "measured", "baseline", "goal", True)]) for i in range(4)]
    print("  ".join(h.ljust(w[i]) for i, h in enumerate(("target", "measured", "baseline", "goal"))) + "  result")
    for r in rows:
        print("  ".join(str(r[i]).ljust(w[i]) for i in range(4)) + "  " + ("ok" if r[4] else "MISSED"))
    for note in notes:
        print("  " + note)
    return 0 if all(r[4] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
