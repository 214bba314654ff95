"""Replay's account of events, through the real CLI in a subprocess: events still
open when the files end are counted.

Demo data are set at the Brackenfield bottling plant, an invented site.  The
noise is simulated with fixed random states (scipy's lfilter as the AR(1)
recursion); the expected counts come from the engine's own state, read in
process, since what is checked is that the shell reports what the core holds.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from shiftwatch.core.engine import EVENT_OPEN, StreamEngine

T0 = 1_772_431_200.0
FILLER = "brackenfield/filler3/fill_g"
CAPPER = "brackenfield/capper1/torque_nm"


def write_long(path: Path, series: dict[str, np.ndarray]) -> None:
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for name, x in series.items():
            f.writelines(f"{T0 + i:.3f},{name},{v:.6f}\n" for i, v in enumerate(x.tolist()))


def records(text: str) -> list[dict]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


def test_the_summary_line_counts_events_still_open_when_the_files_end(cli, tmp_path: Path) -> None:
    # Trial defect 11: "0 shift(s) confirmed, ... 0 undecided" while 58 detected
    # records had no final record.  Here the filler steps 6 samples before the file
    # ends (detected, not decided yet), the capper 8 before (detected and confirmed).
    # (Failed before: the line had no count of open events.)
    rng = np.random.default_rng(21)
    filler = 500.0 + 0.8 * rng.standard_normal(400)
    filler[-6:] += 3.2
    rng = np.random.default_rng(21)
    capper = 2.4 + 0.05 * rng.standard_normal(400)
    capper[-8:] += 0.2
    open_at_end = 0
    for name, x in ((FILLER, filler), (CAPPER, capper)):
        eng = StreamEngine(name)
        eng.process(T0 + np.arange(x.shape[0], dtype=np.float64), np.round(x, 6))
        open_at_end += eng.state == EVENT_OPEN
    assert open_at_end == 1
    path = tmp_path / "line.csv"
    write_long(path, {FILLER: filler, CAPPER: capper})
    res = cli("replay", str(path))
    assert res.returncode == 0, res.stderr
    recs = records(res.stdout)
    finals = {r["id"] for r in recs if r["phase"] != "detected"}
    still_open = [r for r in recs if r["phase"] == "detected" and r["id"] not in finals]
    assert [r["stream"] for r in still_open] == [FILLER]
    assert ("replayed 800 rows in 2 stream(s): 1 shift(s) confirmed, 0 returned, 0 dismissed, "
            "0 undecided, 1 still open") in res.stderr

