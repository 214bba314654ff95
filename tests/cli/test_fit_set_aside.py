"""Values that `fit` and `design --from` set aside are named, counted and make exit status 1.

Before, `fit` dropped NaN and infinite values without a word and exited 0, and kept values
beyond 1e150 in magnitude, which replay's engine sets aside as ``infinite`` (their squares
overflow the step fit). `design --from` dropped them without a word as well. Replay names
each such sample (``file:line: stream NAME: value is NaN``), counts it under ``nan`` or
``infinite`` in its summary and exits 1; `fit` and `design --from` now do the same.

References: the Nile series (Cobb 1978, shipped in statsmodels' datasets) has one break,
its last old year 1898 (observation 28), segment means 1097.75 and 849.97 (R strucchange,
``breakpoints(Nile ~ 1)`` and ``coef()``; tests/core/test_stepfit.py holds the fit to that
output). The values set aside are extra rows between the Nile's, so the fit of the rest must
be that one. Exit status 1 for data with problems is replay's (README, "Bad input").
Demo stream: the invented Brackenfield plant.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

STREAM = "brackenfield/line1/scale/net"
#: Extra rows, after the Nile value of the index given (written 30 s after it): the texts
#: replay reads as NaN or infinite, and a value past 1e150 in magnitude.
EXTRA = {3: "nan", 10: "NaN", 40: "inf", 55: "-Infinity", 70: "1e200"}


def _nile() -> list[float]:
    from statsmodels.datasets import nile

    return [float(x) for x in nile.load_pandas().data["volume"].to_numpy(float)]


def _write(path: Path) -> tuple[Path, dict[str, int]]:
    """The Nile series one reading a minute with the extra rows; the line of each extra row."""
    lines = ["time,stream,value"]
    where = {}
    for i, v in enumerate(_nile()):
        lines.append(f"{1_790_000_000 + 60 * i},{STREAM},{v!r}")
        if i in EXTRA:
            lines.append(f"{1_790_000_000 + 60 * i + 30},{STREAM},{EXTRA[i]}")
            where[EXTRA[i]] = len(lines)
    path.write_text("\n".join(lines) + "\n")
    return path, where


@pytest.mark.parametrize("json_out", [False, True])
def test_fit_names_and_counts_the_values_it_sets_aside_and_exits_1(cli, tmp_path: Path, json_out: bool) -> None:
    path, where = _write(tmp_path / "nile.csv")
    got = cli("fit", str(path), *(["--json"] if json_out else []))
    assert got.returncode == 1, got.stderr  # replay's exit status for data with problems
    for text, line in where.items():
        reason = "value is NaN" if text.lower() == "nan" else "value is infinite or beyond 1e150 in magnitude"
        assert f"{path}:{line}: stream {STREAM}: {reason}\n" in got.stderr, (text, got.stderr)
    assert "samples set aside: infinite 3, nan 2; the fit used the other 100\n" in got.stderr, got.stderr
    if json_out:
        d = json.loads(got.stdout)
        assert d["n_before"] == 28 and d["n_before"] + d["n_after"] == 100  # strucchange: 28 of 100
        assert d["level_before"] == pytest.approx(1097.75, abs=0.01)  # strucchange coef()
        assert d["level_after"] == pytest.approx(849.97, abs=0.01)
    else:
        assert f"{STREAM}: one step at " in got.stdout
        assert "(standard error" in got.stdout and "28 samples" in got.stdout


def test_fit_without_values_set_aside_still_exits_0(cli, tmp_path: Path) -> None:
    path = tmp_path / "clean.csv"
    path.write_text("time,stream,value\n" + "".join(
        f"{1_790_000_000 + 60 * i},{STREAM},{v!r}\n" for i, v in enumerate(_nile())))
    got = cli("fit", str(path), "--json")
    assert got.returncode == 0, got.stderr
    assert "set aside" not in got.stderr and got.stderr == ""
    assert json.loads(got.stdout)["n_before"] == 28


def test_fit_with_too_few_values_left_names_those_set_aside(cli, tmp_path: Path) -> None:
    path = tmp_path / "few.csv"
    path.write_text("time,stream,value\n" + "".join(
        f"{1_790_000_000 + 60 * i},{STREAM},{v}\n" for i, v in enumerate(["1.0", "nan", "2.0", "inf", "3.0"])))
    got = cli("fit", str(path))
    assert got.returncode == 2, got.stderr
    assert f"{path}:3: stream {STREAM}: value is NaN\n" in got.stderr, got.stderr
    assert f"{path}:5: stream {STREAM}: value is infinite" in got.stderr, got.stderr
    assert f"stream {STREAM!r} has 3 usable samples; a step fit needs at least 5" in got.stderr


def test_design_from_names_and_counts_the_values_it_sets_aside_and_exits_1(cli, tmp_path: Path) -> None:
    rng = np.random.default_rng(20261204)
    rows = ["time,stream,value"]
    for i, v in enumerate(500.0 + 0.8 * rng.standard_normal(3000)):
        rows.append(f"{1_790_000_000 + i},{STREAM},{v:.4f}")
        if i == 1000:
            rows.append(f"{1_790_000_000 + i + 0.5},{STREAM},nan")
    path = tmp_path / "filler.csv"
    path.write_text("\n".join(rows) + "\n")
    got = cli("design", "--from", str(path), "--json")
    assert got.returncode == 1, got.stderr
    assert f"{path}:1003: stream {STREAM}: value is NaN\n" in got.stderr, got.stderr
    assert "samples set aside: nan 1; the suggestions use the other samples\n" in got.stderr, got.stderr
    assert json.loads(got.stdout)["streams"][0]["stream"] == STREAM


# ------------------------------------------------------------ D14: times replay sets aside
def _write_with_bad_times(path: Path) -> tuple[Path, dict[int, str]]:
    """The Nile series one reading a minute, with 30 rows repeating the time of the row before
    (another value) and 18 rows going back 50 minutes, between the Nile's rows; the line and
    reason of each extra row as screening names it (RFC-free facts of the series' order: a
    repeated time is duplicate_time while the stream's window holds it, a time before the
    newest accepted one is out_of_order otherwise; core/screen.py's REASONS)."""
    nile = _nile()
    lines = ["time,stream,value"]
    extra: dict[int, str] = {}
    for i, v in enumerate(nile):
        t = 1_790_000_000 + 60 * i
        lines.append(f"{t},{STREAM},{v!r}")
        if i % 3 == 1 and len([r for r in extra.values() if r == "duplicate_time"]) < 30:
            lines.append(f"{t},{STREAM},{v + 500.0!r}")
            extra[len(lines)] = "duplicate_time"
        elif i % 3 == 2 and i >= 45 and len([r for r in extra.values() if r == "out_of_order"]) < 18:
            lines.append(f"{t - 3000 + 30},{STREAM},{v - 500.0!r}")  # 49.5 minutes back, no time repeated
            extra[len(lines)] = "out_of_order"
    path.write_text("\n".join(lines) + "\n")
    return path, extra


def test_fit_sets_aside_the_repeated_and_earlier_times_replay_sets_aside(cli, tmp_path: Path) -> None:
    path, extra = _write_with_bad_times(tmp_path / "nile-times.csv")
    assert sorted(extra.values()).count("duplicate_time") == 30 and list(extra.values()).count("out_of_order") == 18
    replay = cli("replay", str(path), "--out", str(tmp_path / "records.jsonl"))
    got = cli("fit", str(path), "--json")
    # Before the fix: exit 0, nothing said, and the 48 extra rows fitted with the Nile's 100.
    assert got.returncode == 1, got.stderr  # replay's exit status for data with problems
    assert replay.returncode == 1, replay.stderr
    sentences = {"duplicate_time": "time stamp repeats one already accepted for this stream",
                 "out_of_order": "time stamp is earlier than one already accepted for this stream"}
    fit_lines = [ln for ln in got.stderr.splitlines() if f": stream {STREAM}: time stamp" in ln]
    replay_lines = [ln for ln in replay.stderr.splitlines() if f": stream {STREAM}: time stamp" in ln]
    assert fit_lines == replay_lines and len(fit_lines) == 20, (got.stderr, replay.stderr)  # the first 20
    for line_no, reason in sorted(extra.items())[:20]:
        assert f"{path}:{line_no}: stream {STREAM}: {sentences[reason]}" in fit_lines, (line_no, got.stderr)
    assert "samples set aside: duplicate_time 30, out_of_order 18; the fit used the other 100\n" in got.stderr
    d = json.loads(got.stdout)
    assert d["n_before"] == 28 and d["n_before"] + d["n_after"] == 100  # strucchange: 28 of 100
    assert d["level_before"] == pytest.approx(1097.75, abs=0.01)  # strucchange coef()
    assert d["level_after"] == pytest.approx(849.97, abs=0.01)


def test_fit_of_a_file_sorted_newest_first_sets_aside_what_replay_does(cli, tmp_path: Path) -> None:
    path = tmp_path / "newest-first.csv"
    rng = np.random.default_rng(20261205)
    rows = [f"{1_790_000_000 + i},{STREAM},{v:.4f}" for i, v in enumerate(500.0 + 0.8 * rng.standard_normal(500))]
    path.write_text("time,stream,value\n" + "\n".join(reversed(rows)) + "\n")
    replay = cli("replay", str(path), "--out", str(tmp_path / "records.jsonl"))
    got = cli("fit", str(path))
    assert replay.returncode == 1 and "out_of_order" in replay.stderr, replay.stderr
    # Before the fix: fit sorted the rows and exited 0; replay sets aside 499 of 500.
    assert got.returncode == 2, got.stderr
    assert "samples set aside: out_of_order 499" in got.stderr, got.stderr
    assert f"stream {STREAM!r} has 1 usable samples; a step fit needs at least 5" in got.stderr
