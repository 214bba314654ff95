"""A file written to while it is replayed is named, whatever the write: not only a cut.

Found by an outside trial of ``shiftwatch replay`` (2026-12-05): an export of 137 MB rewritten
in place under a running replay (``cp new.csv export.csv``: the same length, other readings)
was replayed as a mixture of the two files' bytes, 488 shifts confirmed and 77,546 spikes
instead of 200 and none, with exit status 0; the README promises that an export rewritten under
a replay gives ``FILE: the file changed while it was read`` and exit status 2, which only a
file found shorter than planned gave.  Rows appended to the file while it was read were
replayed too, a row cut by the writer reported as bad.

References: stat(2) (POSIX.1-2017, ``<sys/stat.h>``): a write to a file updates its
``st_mtime``, and a file replaced by rename(2) has another ``st_ino``; the file left untouched
replays as before (history.py's stdlib reading, fed to the engines in one batch).
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shiftwatch.replay import CsvFormatError, read_long_csv, replay_files

from .history import json_lines, one_batch_records, readings, stdlib_long, write_long


def _rewrite_in_place(path: Path) -> None:
    """The same bytes' length, other readings (each digit 4 read as 7), in the same inode."""
    data = path.read_bytes()
    with open(path, "r+b") as f:
        f.write(data.replace(b"4", b"7"))


def _append(path: Path) -> None:
    with open(path, "ab") as f:
        f.write(b"2030-01-01T00:00:00Z,brackenfield/line2/capper/torque,2.4\n2030-01-01T00:00:01Z,bracken")


def _replace(path: Path) -> None:
    tmp = path.with_name(path.name + ".new")
    tmp.write_bytes(path.read_bytes().replace(b"4", b"7"))
    os.replace(tmp, path)


@pytest.mark.parametrize("jobs", [1, 2])
@pytest.mark.parametrize("write", [_rewrite_in_place, _append, _replace])
def test_a_csv_written_to_while_it_is_replayed_is_named(tmp_path: Path, jobs: int, write) -> None:
    path = write_long(tmp_path / "line2.csv", readings(3000))
    series, bad = stdlib_long(path)
    assert not bad
    assert path.stat().st_size > 10 * 20_000  # ten chunks and more
    untouched = replay_files([path], jobs=jobs, chunk_bytes=20_000)
    assert json_lines(untouched.records) == one_batch_records(series)
    time.sleep(0.05)  # a write now has another modification time than the file's writing had
    done = []

    def during(nbytes: int) -> None:
        if not done:  # after the first chunk read
            done.append(nbytes)
            write(path)

    with pytest.raises(CsvFormatError, match=r"line2\.csv: the file changed while it was read"):
        replay_files([path], jobs=jobs, chunk_bytes=20_000, progress=during)
    assert done


def test_a_parquet_file_rewritten_while_it_is_replayed_is_named(tmp_path: Path) -> None:
    data = readings(3000)
    names = list(data)
    t = np.repeat(data[names[0]][0], len(names))
    table = pa.table({"time": pa.array((t * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
                      "stream": pa.array(names * data[names[0]][0].shape[0]),
                      "value": np.stack([data[k][1] for k in names], axis=1).ravel()})
    path = tmp_path / "line2.parquet"
    pq.write_table(table, path, row_group_size=1000)
    other = table.set_column(2, "value", pa.array(table.column("value").to_numpy() + 1.0))
    time.sleep(0.05)
    done = []

    def during(nbytes: int) -> None:
        if not done:
            done.append(nbytes)
            pq.write_table(other, path, row_group_size=1000)  # the same inode, opened "wb"

    with pytest.raises(CsvFormatError, match=r"line2\.parquet: the file changed while it was read"):
        replay_files([path], jobs=1, progress=during)
    assert done


def test_fit_reading_a_file_that_is_appended_to_names_it(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # read_long_csv (fit, design --from) reads the same way; it is told on its last read.
    from shiftwatch import sources

    path = write_long(tmp_path / "line2.csv", readings(3000))
    time.sleep(0.05)
    real = sources.tasks

    def tasks_then_append(*args, **kw):
        yield from real(*args, **kw)
        _append(path)

    monkeypatch.setattr("shiftwatch.replay.tasks", tasks_then_append)
    with pytest.raises(CsvFormatError, match=r"line2\.csv: the file changed while it was read"):
        read_long_csv([path])
