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


def _stopped_line(path: Path, step: float, state: int) -> tuple[Path, float, float]:
    """A Brackenfield filler read once a second, 1,200 readings at 500 g, stopped for
    half an hour (no readings), then 1,200 readings ``step`` g higher; the file, the last
    reading before the stop and the first after it."""
    rng = np.random.default_rng(state)
    x = 500.0 + 0.5 * rng.standard_normal(2400)
    x[1200:] += step
    t = 1_796_000_000.0 + np.arange(2400.0)
    t[1200:] += 1800.0
    with open(path, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{ti:.0f},{STREAM},{v!r}\n" for ti, v in zip(t.tolist(), x.tolist(), strict=True))
    return path, float(t[1199]), float(t[1200])


@pytest.mark.parametrize("state", [1, 2, 3])
def test_fit_names_a_pause_at_the_start_of_the_step_interval(cli, tmp_path: Path, state: int) -> None:
    # A new user's trial (2026-12-05): a filler stopped for half an hour and came back
    # higher; `shiftwatch fit` said "one step at 07:10:00.000Z", interval 07:10:00 to
    # 07:10:00, and nothing of the 30 minutes in which the step may have come, where
    # replay's records name the pause (gap_from) and say it in the summary.  The truth
    # is the data's construction: every reading before the stop at 500 g, every one
    # after it 2 g higher, so the step came during the stop.
    from shiftwatch.core.timefmt import format_time

    path, last, first = _stopped_line(tmp_path / "stop.csv", 2.0, state)
    js = cli("fit", str(path), "--json")
    text = cli("fit", str(path))
    assert js.returncode == 0 and text.returncode == 0, js.stderr + text.stderr
    d = json.loads(js.stdout)
    assert d["shift_at_low"] == format_time(first), d
    assert d["gap_from"] == format_time(last), d
    assert (f"  the first reading after 30 min without readings, since {format_time(last)}: "
            "the step may have come at any moment of the pause") in text.stdout, text.stdout


@pytest.mark.parametrize("state", [1, 2, 3])
def test_fit_names_a_pause_inside_the_step_interval(cli, tmp_path: Path, state: int) -> None:
    # A step of 0.3 sigma across the same stop: the interval at 90% reaches from before
    # the stop to after it, so the fit's own split (a reading either side) says little;
    # the pause inside the interval is named.  Truth: the data's construction, as above.
    from shiftwatch.core.timefmt import format_time

    path, last, first = _stopped_line(tmp_path / "small.csv", 0.15, state)
    js = cli("fit", str(path), "--json")
    text = cli("fit", str(path))
    assert js.returncode == 0 and text.returncode == 0, js.stderr + text.stderr
    d = json.loads(js.stdout)
    assert d["shift_at_low"] <= format_time(last) and d["shift_at_high"] >= format_time(first), d
    assert d["gap_from"] == format_time(last), d
    assert (f"  the readings paused after {format_time(last)}, inside the interval: the step may lie "
            "anywhere in it") in text.stdout, text.stdout


def test_fit_of_readings_without_a_pause_names_none(cli, tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    x = 500.0 + 0.5 * rng.standard_normal(2400)
    x[1200:] += 2.0
    path = _write(tmp_path / "steady.csv", x)
    js = cli("fit", str(path), "--json")
    text = cli("fit", str(path))
    assert js.returncode == 0 and text.returncode == 0, js.stderr + text.stderr
    assert "gap_from" not in json.loads(js.stdout)
    assert "without readings" not in text.stdout and "paused" not in text.stdout
    assert text.stdout.startswith(f"{STREAM}: one step at "), text.stdout


def test_the_command_list_says_replay_reads_parquet_too(cli) -> None:
    # A new user's first look (2026-12-05): `shiftwatch --help` said replay runs "CSV files",
    # while `replay --help` and the README take CSV or Parquet files and directories of them.
    res = cli("--help")
    assert res.returncode == 0, res.stderr
    text = " ".join(res.stdout.split())
    assert "replay run CSV or Parquet files (or directories of them) through the detection engine" in text, text


def test_a_p_value_too_small_for_a_double_is_not_printed_as_zero(cli, tmp_path: Path) -> None:
    # A new user's half-hour stop (2026-12-05) with a 2 g step on 0.5 g of noise over 2,400
    # readings: fit printed "p-value 0", which no test of one step against none can give
    # (a p-value is a probability of a statistic at least as large under "no step": never 0).
    # The double underflowed (smallest positive double about 4.9e-324, IEEE 754 binary64).
    path, _, _ = _stopped_line(tmp_path / "stop.csv", 2.0, 1)
    js = cli("fit", str(path), "--json")
    text = cli("fit", str(path))
    assert js.returncode == 0 and text.returncode == 0, js.stderr + text.stderr
    assert json.loads(js.stdout)["p_value"] == 0.0  # the case in question: underflowed
    assert "p-value 0\n" not in text.stdout, text.stdout
    assert "one step against none: F " in text.stdout and ", p-value below 1e-300\n" in text.stdout, text.stdout
