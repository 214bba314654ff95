"""A wide CSV whose header ends with a comma: an unnamed last column, as spreadsheets write it.

Before, replay, fit and design --from refused such a file whole (``column 5 of the header has
no name``, exit status 2), though nothing in it was lost. Now an unnamed column at the end of
the header whose cells are empty is ignored and named once, as a note, in the summary; a cell
there that holds something is named by file, line and column, counted and skipped, and the
rest of its row is read.

Reference: pandas' ``read_csv`` reads the same file (it names the column ``Unnamed: 5`` and
reads its empty cells as NaN); the records are those of each stream of pandas' reading fed to
its engine in one batch (the engine is batch-independent). Demo data: the invented
Brackenfield plant.
"""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from shiftwatch.replay import replay_files

from .history import STREAMS, json_lines, one_batch_records, printed_records, readings, write_wide

NOTE = "the header's column 6 has no name (the header ends with a comma); its empty cells were ignored"


def _with_trailing_comma(path: Path, out: Path, *, bare_rows: tuple[int, ...] = ()) -> Path:
    """The wide file with a comma at the end of the header and of each row (an empty unnamed
    column), but for the rows in ``bare_rows`` (counted from 0), left as they were."""
    lines = path.read_text().splitlines()
    body = [ln if i in bare_rows else ln + "," for i, ln in enumerate(lines[1:])]
    out.write_text("\n".join([lines[0] + ","] + body) + "\n")
    return out


def _pandas_records(path: Path) -> list[str]:
    frame = pd.read_csv(path, dtype={"time": str})
    assert list(frame.columns)[-1] == "Unnamed: 5" and frame["Unnamed: 5"].isna().all()
    times = np.asarray([datetime.fromisoformat(x).timestamp() for x in frame["time"]])
    series = {}
    for name in STREAMS:
        keep = frame[name].notna().to_numpy()
        series[name] = (times[keep], frame[name].to_numpy()[keep])
    return one_batch_records(series)


def test_an_unnamed_empty_last_column_is_ignored_and_noted_once(cli, tmp_path: Path) -> None:
    data = readings(4000)
    wide = _with_trailing_comma(write_wide(tmp_path / "plain.csv", data, missing=0.02), tmp_path / "sheet.csv",
                                bare_rows=(7, 8, 1500))  # rows without it: read as before
    expected = _pandas_records(wide)
    for jobs in ("1", "2"):
        got = cli("replay", "--jobs", jobs, str(wide))
        assert got.returncode == 0, got.stderr  # nothing was lost: not a problem
        assert printed_records(got.stdout) == expected and len(expected) >= 8
        assert got.stderr.count(NOTE) == 1, got.stderr
        assert f"; note: {wide}: {NOTE}\n" in got.stderr, got.stderr
        assert "unreadable" not in got.stderr and "has no name;" not in got.stderr
    # in pieces of 3,000 bytes, each read column-wise or row by row
    res = replay_files([wide], jobs=2, chunk_bytes=3000)
    assert json_lines(res.records) == expected
    assert res.problem_count == 0 and res.notes == [f"{wide}: {NOTE}"]
    name = next(iter(data))
    fit = cli("fit", str(wide), "--stream", name, "--json")
    assert fit.returncode == 0, fit.stderr
    assert json.loads(fit.stdout) == json.loads(cli("fit", str(tmp_path / "plain.csv"), "--stream", name,
                                                    "--json").stdout)
    assert f"note: {wide}: {NOTE}" in fit.stderr
    design = cli("design", "--from", str(wide), "--json")
    assert design.returncode == 0, design.stderr
    assert len(json.loads(design.stdout)["streams"]) == len(STREAMS)


def test_an_unnamed_column_that_holds_values_names_each_cell_and_reads_the_rest(cli, tmp_path: Path) -> None:
    data = readings(4000)
    wide = _with_trailing_comma(write_wide(tmp_path / "plain.csv", data), tmp_path / "sheet.csv")
    lines = wide.read_text().splitlines()
    for row in (100, 2500):
        lines[row] += "3.25"  # a value under no tag: whose is it?
    wide.write_text("\n".join(lines) + "\n")
    got = cli("replay", str(wide))
    assert got.returncode == 1, got.stderr
    for row in (100, 2500):
        assert (f"{wide}:{row + 1}: column 6 has no name in the header but holds '3.25'; the cell was "
                "skipped (in a wide file each column after time names a tag)") in got.stderr, got.stderr
    assert "; 2 unreadable row(s) or cell(s) skipped" in got.stderr, got.stderr
    # the rows' other cells were read: the records are those of the file without the stray cells
    frame_path = tmp_path / "clean.csv"
    frame_path.write_text("\n".join(ln.removesuffix("3.25") for ln in lines) + "\n")
    assert printed_records(got.stdout) == _pandas_records(frame_path)


def test_an_unnamed_column_between_tags_is_still_refused(cli, tmp_path: Path) -> None:
    bad = tmp_path / "gap.csv"
    bad.write_text("time,oven,,capper\n2026-03-02T06:00:00Z,1,,2\n")
    got = cli("replay", str(bad))
    assert got.returncode == 2
    assert f"{bad}:1: column 3 of the header has no name; in a wide file each column after time names a tag" \
        in got.stderr, got.stderr


def test_the_note_is_in_the_report_too(cli, tmp_path: Path) -> None:
    # The engineer who reads the HTML report, not the terminal, learns of the ignored column
    # as well (before, only stderr said it). The note is not among the problems.
    data = readings(1500)
    wide = _with_trailing_comma(write_wide(tmp_path / "plain.csv", data), tmp_path / "sheet.csv")
    got = cli("replay", "--report", str(tmp_path / "rep"), str(wide))
    assert got.returncode == 0, got.stderr
    html = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    import html as html_lib
    assert f'<li>{html_lib.escape(f"{wide}: {NOTE}")}</li>' in html, html[:3000]
    assert 'id="notes"' in html and 'id="unread"' not in html
