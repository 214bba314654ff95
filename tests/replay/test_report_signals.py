"""A signal that arrives while the report draws still ends the replay the way it should.

CI saw ``replay --report`` killed by SIGTERM exit 1 with a traceback ending in
``ValueError: Invalid bounding box`` from matplotlib's Agg renderer: the report turns
SIGTERM into an exception while it writes (so the unfinished file is removed), and that
exception, raised in Python code that matplotlib's compiled renderer had called, came out
of the renderer as another exception.  The C API lets an extension replace a pending
exception with its own (``PyErr_SetString`` after a failed call; Python/C API reference,
"Exception Handling"), so any exception may come out of a drawing call.  What counts is
that the signal came: the process then ends by SIGTERM (status -15, or 143 through a
shell; POSIX), and Ctrl-C ends it as KeyboardInterrupt does (the CLI's 130).

These tests deliver the signal inside the report's guard and let a stand-in for the
renderer swap the exception, so the outcome does not depend on where the signal lands.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

SCRIPT = textwrap.dedent("""
    import os, signal, sys
    from shiftwatch.report import _unwinding_on_termination

    signum = int(sys.argv[1])
    swap = sys.argv[2] == "swap"

    def draw():
        # the renderer: it calls back into Python, and replaces what the call raised
        try:
            os.kill(os.getpid(), signum)
            for _ in range(10_000_000):
                pass  # the handler runs between two bytecodes of this loop
        except BaseException:
            if swap:
                raise ValueError("Invalid bounding box") from None
            raise
        print("the signal never came", flush=True)

    try:
        with _unwinding_on_termination():
            try:
                draw()
            finally:
                print("cleaned up", flush=True)
    except KeyboardInterrupt:
        print("interrupted", flush=True)
        sys.exit(130)
    print("went on after the signal", flush=True)
""")


def run(signum: int, mode: str) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ)
    daemon = str(Path(__file__).resolve().parents[2] / "daemon")
    env["PYTHONPATH"] = daemon + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, "-c", SCRIPT, str(signum), mode], capture_output=True, text=True,
                          env=env, timeout=60, check=False)


@pytest.mark.parametrize("mode", ["swap", "keep"])
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP], ids=["SIGTERM", "SIGHUP"])
def test_a_termination_signal_ends_the_process_by_that_signal_whatever_the_renderer_raises(
        signum: int, mode: str) -> None:
    res = run(signum, mode)
    assert res.returncode == -signum, (res.returncode, res.stdout, res.stderr[-1500:])
    assert res.stdout == "cleaned up\n"  # the unwinding ran (the unfinished file is removed there)
    assert "Traceback" not in res.stderr


@pytest.mark.parametrize("mode", ["swap", "keep"])
def test_ctrl_c_ends_the_report_as_an_interrupt_whatever_the_renderer_raises(mode: str) -> None:
    res = run(signal.SIGINT, mode)
    assert res.returncode == 130, (res.returncode, res.stdout, res.stderr[-1500:])
    assert res.stdout == "cleaned up\ninterrupted\n"
    assert "Traceback" not in res.stderr
