"""A replay of which no row could be read at all ends with exit status 2, as ``fit`` does.

Found by an outside trial of ``shiftwatch replay`` on historian exports (2026-12-05): an export
in local time replayed without ``--timezone`` (or with dates as a spreadsheet writes them, or a
Parquet file of naive timestamps) printed its first 20 problems, ``replayed 3000 rows in 0
stream(s) ...; 3000 unreadable row(s) or cell(s) skipped`` and exited with status 1, the status
of a replay whose good rows were replayed, with no records; a script that takes 1 for "some bad
rows" took an empty backtest for a clean one.  ``fit`` on the same file exits with status 2
(README, "``shiftwatch replay`` and ``fit``").

References: the same readings written in UTC, read with the stdlib ``csv`` module and
``datetime.fromisoformat`` (history.py) and fed to the engines in one batch; ``zoneinfo`` for
the local times (IANA tz database, Europe/Berlin, CET in March).
"""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from .history import (
    one_batch_records,
    printed_records,
    readings,
    stdlib_long,
    write_long,
    write_wide,
)

BERLIN = ZoneInfo("Europe/Berlin")


def _local(t: float) -> str:
    return datetime.fromtimestamp(t, BERLIN).replace(tzinfo=None).isoformat(sep=" ")


@pytest.mark.parametrize("jobs", ["1", "2"])
@pytest.mark.parametrize("form", ["long_csv", "wide_csv", "wide_parquet"])
def test_an_export_in_local_time_without_timezone_is_refused_with_status_2(cli, tmp_path: Path, form: str,
                                                                           jobs: str) -> None:
    data = readings(1500)
    t = next(iter(data.values()))[0]
    utc = write_long(tmp_path / "utc.csv", data)
    series, bad = stdlib_long(utc)
    assert not bad
    if form == "long_csv":
        path = write_long(tmp_path / "local.csv", data, stamps=[_local(x) for x in t])
        first = f"{path}:2: time '{_local(float(t[0]))}' has no UTC offset"
    elif form == "wide_csv":
        wide = write_wide(tmp_path / "utc_wide.csv", data)
        lines = wide.read_text().splitlines()
        path = tmp_path / "local_wide.csv"
        path.write_text("\n".join([lines[0]] + [_local(float(x)) + line[line.index(","):]
                                                for x, line in zip(t, lines[1:], strict=True)]) + "\n")
        first = f"{path}:2: time '{_local(float(t[0]))}' has no UTC offset"
    else:
        wall = np.array([datetime.fromisoformat(_local(float(x))).replace(tzinfo=UTC).timestamp() for x in t])
        path = tmp_path / "local_wide.parquet"
        pq.write_table(pa.table({"time": pa.array((wall * 1e6).round().astype(np.int64), pa.timestamp("us")),
                                 **{k: pa.array(v) for k, (_, v) in data.items()}}), path, row_group_size=600)
        first = f"{path}: row group 0, row 0, column time: the time has no UTC offset"

    got = cli("replay", "--jobs", jobs, str(path))
    assert "Traceback" not in got.stderr
    assert got.returncode == 2, got.stderr[-2000:]
    assert got.stdout == ""
    assert first in got.stderr, got.stderr[:2000]
    last = got.stderr.strip().splitlines()[-1]
    assert last.startswith("shiftwatch: no row could be read") and "--timezone" in last, last
    # fit says the same of the file with the same status
    fit = cli("fit", str(path), "--stream", next(iter(data)))
    assert fit.returncode == 2, fit.stderr[-2000:]

    # With the zone named, the file replays as the readings in UTC do
    ok = cli("replay", "--jobs", jobs, "--timezone", "Europe/Berlin", str(path))
    assert ok.returncode == 0, ok.stderr[-2000:]
    assert printed_records(ok.stdout) == one_batch_records(series) and ok.stdout.count("\n") >= 4


def test_a_file_with_some_rows_read_still_exits_with_status_1(cli, tmp_path: Path) -> None:
    # The rows that could be read are replayed: exit status 1, as the README says for bad rows.
    data = readings(1500)
    t = next(iter(data.values()))[0]
    stamps = [_local(float(x)) if i % 2 else f"{datetime.fromtimestamp(float(x), UTC).isoformat()}"
              for i, x in enumerate(t)]
    path = write_long(tmp_path / "half.csv", data, stamps=stamps)
    got = cli("replay", str(path))
    assert got.returncode == 1, got.stderr[-2000:]
    assert "no row could be read" not in got.stderr
    assert f"; {len(data) * (t.shape[0] // 2)} unreadable row(s) or cell(s) skipped" in got.stderr
    # the rows with an offset (every other one) are those replayed
    want = one_batch_records({k: (tt[::2], v[::2]) for k, (tt, v) in data.items()})
    assert printed_records(got.stdout) == want and len(want) >= 2
