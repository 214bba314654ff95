"""What `shiftwatch fit` prints for a person: whether the data support a step at all.

Before, it headed every fit "one step at ...", also on a series with no step (p-value
0.62), where the split it printed is only the best of many that chance offers.

References: the Nile series (Cobb 1978, shipped in statsmodels' datasets) has one
break, after 1898, with sup-F 75.93 (R strucchange, ``sctest(Fstats(Nile ~ 1, from =
0.15), type = "supF")``; tests/core/test_stepfit.py holds the fit to that output). A
series of independent normal draws has none. Judging a p-value against one minus the
confidence level is common practice.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

STREAM = "brackenfield/line1/scale/net"


def _write(path: Path, values: np.ndarray) -> Path:
    with open(path, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{1_790_000_000 + 60 * i},{STREAM},{v!r}\n" for i, v in enumerate(values.tolist()))
    return path


def _nile() -> np.ndarray:
    from statsmodels.datasets import nile

    return nile.load_pandas().data["volume"].to_numpy(float)


@pytest.mark.parametrize("level", ["0.9", "0.95"])
def test_fit_says_whether_the_step_is_supported_at_the_level_asked(cli, tmp_path: Path, level: str) -> None:
    rng = np.random.default_rng(20261204)
    flat = _write(tmp_path / "flat.csv", 50.0 + 0.2 * rng.standard_normal(600))
    river = _write(tmp_path / "nile.csv", _nile())
    for path, supported in ((flat, False), (river, True)):
        text = cli("fit", str(path), "--level", level)
        js = cli("fit", str(path), "--level", level, "--json")
        assert text.returncode == 0 and js.returncode == 0, text.stderr + js.stderr
        p = json.loads(js.stdout)["p_value"]
        alpha = 1.0 - float(level)
        assert (p < alpha) is supported, p
        head = text.stdout.splitlines()[0]
        pct = f"{float(level):.0%}"
        if supported:
            assert head.startswith(f"{STREAM}: one step at "), head
        else:
            assert head.startswith(f"{STREAM}: no step at the {pct} level (p-value "), head
            assert "the best single split is at " in head, head
        assert f"p-value {p:.2g}" in text.stdout
