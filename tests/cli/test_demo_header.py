"""The demo's header tells a line operator what the alerts' figures mean before the first
alert: the step's size in the reading's unit and in sigmas, and that a sigma is the
reading's ordinary noise (its standard deviation; common practice in statistical process
control, e.g. the NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3, from memory).

A new user's first run (2026-12-05): the alert lines said "stepped up 1.11 g (1.9 sigma)"
and nothing the demo printed said what a sigma was; only the README did.  The real
command line runs in a subprocess with its own broker.
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path


def test_the_header_says_what_a_sigma_is_before_any_alert(shiftwatch_cmd: list[str], tmp_path: Path) -> None:
    env = dict(os.environ, TMPDIR=str(tmp_path))
    res = subprocess.run(shiftwatch_cmd + ["demo", "--duration", "3s", "--metrics-listen", "127.0.0.1:0"],
                         capture_output=True, check=False, text=True, timeout=120, env=env)
    assert res.returncode == 0, res.stderr[-2000:]
    lines = res.stdout.splitlines()
    said = [i for i, line in enumerate(lines) if line.startswith("  sizes    ")]
    assert len(said) == 1, res.stdout
    assert lines[said[0]] == ("  sizes    each alert gives the step in the reading's unit and in sigmas: "
                              "one sigma is the reading's"), res.stdout
    assert lines[said[0] + 1] == ("           ordinary noise (its standard deviation), so a 1 sigma step "
                                  "is hard to see by eye on a trend"), res.stdout
    advisory = [i for i, line in enumerate(lines) if "Advisory only" in line]
    assert advisory and said[0] < advisory[0], res.stdout
