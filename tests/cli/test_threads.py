"""A command's process starts no BLAS worker threads.

numpy's wheels link OpenBLAS, which starts one worker thread a core when numpy is
imported (OpenBLAS README, "Setting the number of threads using environment
variables": OPENBLAS_NUM_THREADS caps them; it is read once, at load).  shiftwatch's
numpy work is vectors of a few hundred to a few thousand samples, far below the sizes
OpenBLAS splits between threads, so the workers only cost their start (about 70 ms of
CPU a command on a 2-core machine, measured 2026-12-04 with /usr/bin/time).  The
command line therefore sets the variable to 1 unless the user has set it.  The count of
a process's threads is the entries of /proc/self/task (proc(5)).
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

PROBE = textwrap.dedent("""
    import os, sys
    from shiftwatch.cli import main
    code = main(["replay", "--jobs", "1", "--out", os.devnull, sys.argv[1]])
    import numpy  # already imported by the replay
    print(code, len(os.listdir("/proc/self/task")), os.environ.get("OPENBLAS_NUM_THREADS"))
""")


def run_probe(path: str, env: dict[str, str]) -> list[str]:
    res = subprocess.run([sys.executable, "-c", PROBE, path], capture_output=True, text=True, check=True,
                         timeout=120, env=env)
    return res.stdout.split()


def sample_file(tmp_path) -> str:
    path = tmp_path / "filler.csv"
    rows = "".join(f"2026-03-02T06:00:{s:02d}Z,brackenfield/line1/filler/weight,{500 + s % 3}\n" for s in range(40))
    path.write_text("time,stream,value\n" + rows, encoding="utf-8")
    return str(path)


def test_a_command_runs_in_one_thread_however_many_cores(tmp_path) -> None:
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    code, threads, setting = run_probe(sample_file(tmp_path), env)
    assert code == "0"
    assert setting == "1"
    assert threads == "1"


def test_a_users_own_blas_thread_count_is_kept(tmp_path) -> None:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="2")
    code, threads, setting = run_probe(sample_file(tmp_path), env)
    assert code == "0"
    assert setting == "2"
    # OpenBLAS starts (count - 1) workers beside the calling thread, capped by the cores
    # it sees; on a machine with one core the count stays 1.
    cores = len(os.sched_getaffinity(0))
    assert threads == str(min(2, max(1, cores)))
