"""A damaged file among the good ones of a directory: a Parquet file whose footer is cut, a
0-byte ``.parquet``, a 0-byte ``.csv``, a header that fits no layout.

Before (2026-12-04) the first such file stopped the whole replay with exit status 2, and
nothing of the good files was replayed.  Now each is named with its reason, counted in the
summary and the report, the good files are replayed (the same records as the good files
named alone), and the exit status is 1, "some input was bad; the good was processed".  A
file named on the command line itself, or a directory none of whose files can be read, is
still refused with exit status 2.

References: pyarrow's own ``ParquetFile`` refuses each damaged Parquet file here (so the
file is damaged, not merely unusual), the stdlib csv module counts the good files' rows.
Demo data: the invented Brackenfield plant.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shiftwatch.replay import read_long_csv, replay_files

from .history import json_lines, readings, write_long

FILLER = "brackenfield/line4/filler/head1/fill"
CAPPER = "brackenfield/line4/capper/torque"
OVEN = "brackenfield/line4/oven/zone2_temp"


def _parquet(path: Path, name: str, n: int, random_state: int) -> Path:
    t, v = readings(n, [name], random_state=random_state)[name]
    pq.write_table(pa.table({"time": pa.array((t * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
                             "stream": [name] * n, "value": v}), path, row_group_size=1000)
    return path


@pytest.fixture
def dataset(tmp_path: Path) -> tuple[Path, list[Path], dict[Path, str]]:
    """A directory of three good files and four bad ones; returns it, the good files in path
    order, and each bad file with the words its problem must hold."""
    root = tmp_path / "line4"
    root.mkdir()
    good = [write_long(root / "a-filler.csv", readings(3000, [FILLER], random_state=3)),
            _parquet(root / "b-capper.parquet", CAPPER, 3000, 4),
            write_long(root / "d-oven.csv", readings(3000, [OVEN], random_state=5))]
    cut = root / "c-cut.parquet"
    data = _parquet(tmp_path / "whole.parquet", FILLER + "2", 3000, 6).read_bytes()
    cut.write_bytes(data[:-9])  # the footer's length and its PAR1 cut off
    with pytest.raises(Exception):  # noqa: B017 - pyarrow's own reading refuses it (ArrowInvalid, OSError)
        pq.ParquetFile(cut)
    (root / "c-empty.parquet").write_bytes(b"")
    (root / "e-empty.csv").write_bytes(b"")
    (root / "f-notes.csv").write_text("shift;operator\nB;Ana\n", encoding="utf-8")
    bad = {cut: "not a readable Parquet file: ", root / "c-empty.parquet": "the file is empty (0 bytes)",
           root / "e-empty.csv": "the file is empty", root / "f-notes.csv": "separated by semicolons"}
    return root, good, bad


def _rows(path: Path) -> int:
    if path.suffix == ".parquet":
        return pq.ParquetFile(path).metadata.num_rows
    with open(path, newline="") as f:
        return sum(1 for _ in csv.reader(f)) - 1


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_the_good_files_of_a_directory_are_replayed_and_each_bad_one_named(cli, dataset, jobs: str) -> None:
    root, good, bad = dataset
    res = cli("replay", "--jobs", jobs, str(root), timeout=120)
    alone = cli("replay", "--jobs", jobs, *map(str, good), timeout=120)
    assert "Traceback" not in res.stderr and alone.returncode == 0, alone.stderr
    assert res.returncode == 1, res.stderr
    assert res.stdout == alone.stdout and res.stdout.count("\n") >= 3
    lines = res.stderr.splitlines()
    named = lines[:len(bad)]
    for (path, why), line in zip(sorted(bad.items()), named):
        assert line.startswith((f"{path}: ", f"{path}:1: ")) and why in line, line
        assert line.endswith("; the file was skipped, the other files were replayed"), line
    rows = sum(_rows(p) for p in good)
    assert lines[-1].startswith(f"replayed {rows} rows in 3 stream(s)"), lines[-1]
    assert lines[-1].endswith(f"; {len(bad)} file(s) could not be read and were skipped"), lines[-1]


def test_the_report_names_the_files_not_read(cli, dataset, tmp_path: Path) -> None:
    root, _, bad = dataset
    res = cli("replay", "--jobs", "1", "--report", str(tmp_path / "report"), str(root), timeout=120)
    assert res.returncode == 1, res.stderr
    page = (tmp_path / "report" / "report.html").read_text(encoding="utf-8")
    assert f"{len(bad)} file(s) could not be read and were skipped" in page
    assert all(str(p) in page for p in bad)


def test_replay_files_names_them_in_file_order_and_replays_the_rest(dataset) -> None:
    root, good, bad = dataset
    got = replay_files([root], jobs=2, chunk_bytes=64 * 1024)
    alone = replay_files(good, jobs=1)
    assert json_lines(got.records) == json_lines(alone.records) and got.rows == alone.rows
    assert [m.split(":", 1)[0] for m in got.unread_files] == [str(p) for p in sorted(bad)]
    assert got.files_read == len(good)


@pytest.mark.parametrize("command", ["replay", "design"])
def test_a_bad_file_named_itself_is_still_refused(cli, dataset, command: str) -> None:
    # An engineer who names a file wants that file: a typo or a wrong file stops the command.
    _root, good, bad = dataset
    for path in bad:
        args = ([command, str(good[0]), str(path)] if command == "replay"
                else [command, "--from", str(good[0]), "--from", str(path)])
        res = cli(*args, timeout=60)
        assert res.returncode == 2 and res.stderr.startswith((f"shiftwatch: {path}: ", f"shiftwatch: {path}:1: ")), \
            res.stderr
        assert res.stdout == ""


def test_a_directory_of_which_no_file_can_be_read_is_refused(cli, dataset) -> None:
    root, good, bad = dataset
    for path in good:
        path.unlink()
    res = cli("replay", str(root), timeout=60)
    assert res.returncode == 2 and res.stdout == "", res.stderr
    assert res.stderr.startswith(f"shiftwatch: none of the {len(bad)} files could be read; the first: "
                                 f"{min(bad)}"), res.stderr


def test_fit_and_design_read_the_good_files_and_name_the_bad(cli, dataset) -> None:
    root, _good, bad = dataset
    read = read_long_csv([root])
    assert read.problems[:len(bad)] == read.problems and len(read.problems) == len(bad)
    assert sorted(read.streams) == sorted([FILLER, CAPPER, OVEN])
    res = cli("design", "--from", str(root), "--json", timeout=120)
    assert res.returncode == 1, res.stderr
    assert [line.split(":", 1)[0] for line in res.stderr.splitlines()] == [str(p) for p in sorted(bad)]


def test_the_progress_bar_counts_the_files_read_only(shiftwatch_cmd: list[str], tmp_path: Path,
                                                    stderr_on_terminal: Any) -> None:
    # On a terminal the bar's total is the bytes of the files replayed: a skipped file's bytes
    # would leave it short of its end.
    root = tmp_path / "line4"
    root.mkdir()
    good = write_long(root / "a-filler.csv", readings(90_000, [FILLER], random_state=3))
    assert good.stat().st_size > 4_000_000  # a bar is shown from 4 MB on
    (root / "b-cut.parquet").write_bytes(b"PAR1" + bytes(3_000_000))
    code, seen = stderr_on_terminal([*shiftwatch_cmd, "replay", "--jobs", "1", "--out", str(tmp_path / "a.jsonl"),
                                     str(root)])
    assert code == 1, seen[-800:]
    assert f"/{good.stat().st_size / 1e6:.2f}M [" in seen, seen[-800:]
    assert "1 file(s) could not be read and were skipped" in seen
