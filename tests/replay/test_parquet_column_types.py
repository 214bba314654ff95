"""Parquet columns that hold the same numbers, names and times a CSV writes as text.

Found by an outside trial of ``shiftwatch replay`` on historian exports (2026-12-05):

- an integer column holding a number beyond 2**53 (a time column of epoch nanoseconds as
  pandas writes ``df.time.astype("int64")``, or a counter tag) stopped replay, fit and design
  with a pyarrow traceback ("Integer value ... not in range"), exit status 1, nothing written;
- a decimal column (``decimal128``, as SQL exports write them) was read through pyarrow's
  decimal-to-double cast, which is not correctly rounded (``-123.4567`` read as
  ``-123.45670000000001``), so about a third of its values differed in the last bit from the
  same numbers in a CSV, and ``fit --json`` printed other figures.
- a stream or time column of Arrow's ``string_view`` type was refused, every row skipped.

References: the CSV of the same numbers as text (read by replay, and by the stdlib ``csv``
module and ``float`` in history.py); Python's ``float(int)`` and ``float(str)``, correctly
rounded to the nearest double (IEEE 754-2019 section 5.4.1 and 5.12.2; the Python documentation
of ``float``); ``decimal.Decimal`` for the decimal column's exact values.
"""

from __future__ import annotations

import decimal
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from .history import one_batch_records, printed_records, readings, stdlib_long, write_long

HEAD1 = "brackenfield/line2/filler/head1/fill"


def _long_table(data: dict[str, tuple[np.ndarray, np.ndarray]], time_col: pa.Array,
                value_col: pa.Array) -> pa.Table:
    names = list(data)
    n = next(iter(data.values()))[0].shape[0]
    return pa.table({"time": time_col, "stream": pa.array(names * n), "value": value_col})


def _interleaved(data: dict[str, tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    names = list(data)
    t = np.repeat(next(iter(data.values()))[0], len(names))
    v = np.stack([data[k][1] for k in names], axis=1).ravel()
    return t, v


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_an_integer_time_column_of_epoch_nanoseconds_is_refused_row_by_row_without_a_traceback(
        cli, tmp_path: Path, jobs: str) -> None:
    # A wide Parquet file whose int64 time column holds epoch seconds, except every 97th row
    # written in nanoseconds. The README promises epoch micro- or nanoseconds are refused row by
    # row with a hint; the CSV of the same numbers is, and its other rows are replayed.
    data = readings(1500, streams=[HEAD1, "brackenfield/line2/capper/torque"])
    t = next(iter(data.values()))[0].astype(np.int64)
    ns_rows = np.arange(5, t.shape[0], 97)
    written = t.copy()
    written[ns_rows] = t[ns_rows] * 10**9
    assert int(written.max()) > 2**53  # beyond the integers a double holds exactly
    table = pa.table({"time": pa.array(written, pa.int64()), **{k: pa.array(v) for k, (_, v) in data.items()}})
    pq_path = tmp_path / "wide_ns.parquet"
    pq.write_table(table, pq_path, row_group_size=400)
    csv_path = tmp_path / "wide_ns.csv"
    csv_path.write_text("time," + ",".join(data) + "\n" + "".join(
        f"{written[i]}," + ",".join(str(data[k][1][i]) for k in data) + "\n" for i in range(t.shape[0])))

    want = cli("replay", str(csv_path))
    got = cli("replay", "--jobs", jobs, str(pq_path))
    assert "Traceback" not in got.stderr, got.stderr[-2000:]
    assert want.returncode == 1 and got.returncode == 1, got.stderr[-2000:]
    assert got.stdout == want.stdout and got.stdout.count("\n") >= 2
    # The good rows are those of the rows kept, fed to the engines in one batch.
    keep = np.ones(t.shape[0], dtype=bool)
    keep[ns_rows] = False
    assert printed_records(got.stdout) == one_batch_records(
        {k: (t[keep].astype(np.float64), v[keep]) for k, (_, v) in data.items()})
    first = f"{pq_path}: row group 0, row 5, column time: the time is past the year 9999"
    assert first in got.stderr, got.stderr[:2000]
    assert f"; {ns_rows.shape[0]} unreadable row(s) or cell(s) skipped" in got.stderr
    assert f"; {ns_rows.shape[0]} unreadable row(s) or cell(s) skipped" in want.stderr

    fit = cli("fit", str(pq_path), "--stream", HEAD1, "--json")
    fit_csv = cli("fit", str(csv_path), "--stream", HEAD1, "--json")
    assert "Traceback" not in fit.stderr, fit.stderr[-2000:]
    assert fit.returncode == fit_csv.returncode == 1, fit.stderr[-2000:]
    assert json.loads(fit.stdout) == json.loads(fit_csv.stdout)


@pytest.mark.parametrize("int_type", [pa.int64(), pa.uint64()])
def test_integer_values_beyond_two_to_the_53_read_as_the_nearest_double(cli, tmp_path: Path, int_type) -> None:
    # A counter tag (totalised flow, a packet count) beyond 2**53: each value is read as the
    # double nearest to it, as the CSV's text is (Python's float(int), correctly rounded).
    rng = np.random.default_rng(53)
    data = readings(1200, streams=[HEAD1])
    t = data[HEAD1][0]
    base = 2**60 + 12345
    ints = [base + int(k) for k in rng.integers(0, 2**40, t.shape[0])]
    ints[700:] = [x + 2**52 for x in ints[700:]]  # a step of about 4.5e15
    table = pa.table({"time": pa.array((t * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
                      HEAD1: pa.array(ints, int_type)})
    pq_path = tmp_path / "counter.parquet"
    pq.write_table(table, pq_path, row_group_size=500)
    csv_path = write_long(tmp_path / "counter.csv", {HEAD1: (t, np.zeros(t.shape[0]))})
    lines = csv_path.read_text().splitlines()
    csv_path.write_text("\n".join([lines[0]] + [f"{line.rsplit(',', 1)[0]},{x}" for line, x in
                                                zip(lines[1:], ints, strict=True)]) + "\n")
    series, bad = stdlib_long(csv_path)
    assert not bad and series[HEAD1][1] == [float(x) for x in ints]

    got = cli("replay", str(pq_path))
    want = cli("replay", str(csv_path))
    assert "Traceback" not in got.stderr, got.stderr[-2000:]
    assert got.returncode == 0 == want.returncode, got.stderr[-2000:]
    assert got.stdout == want.stdout and got.stdout.count("\n") >= 1
    assert printed_records(got.stdout) == one_batch_records(series)
    fit = cli("fit", str(pq_path), "--json")
    assert "Traceback" not in fit.stderr and fit.returncode == 0, fit.stderr[-2000:]
    assert json.loads(fit.stdout) == json.loads(cli("fit", str(csv_path), "--json").stdout)


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_a_decimal_value_column_reads_as_the_same_numbers_written_as_text(cli, tmp_path: Path, jobs: str) -> None:
    data = readings(2500)
    t, v = _interleaved(data)
    texts = [f"{x:.4f}" for x in v]
    exact = [decimal.Decimal(s) for s in texts]
    # pyarrow's own cast differs from float(text) on many of these values (the defect's cause)
    cast = np.asarray(pa.array(exact, pa.decimal128(10, 4)).cast(pa.float64()))
    assert int((cast != np.array([float(s) for s in texts])).sum()) > 100
    table = _long_table(data, pa.array((t * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
                        pa.array(exact, pa.decimal128(10, 4)))
    pq_path = tmp_path / "line2_decimal.parquet"
    pq.write_table(table, pq_path, row_group_size=3000)
    csv_path = write_long(tmp_path / "line2.csv", data)
    series, bad = stdlib_long(csv_path)
    assert not bad

    want = cli("replay", str(csv_path))
    got = cli("replay", "--jobs", jobs, str(pq_path))
    assert got.returncode == 0 == want.returncode, got.stderr[-2000:]
    assert got.stdout == want.stdout and got.stdout.count("\n") >= 4
    assert printed_records(got.stdout) == one_batch_records(series)
    for name in data:
        fit = cli("fit", str(pq_path), "--stream", name, "--json")
        fit_csv = cli("fit", str(csv_path), "--stream", name, "--json")
        assert fit.returncode == 0 == fit_csv.returncode, fit.stderr
        assert json.loads(fit.stdout) == json.loads(fit_csv.stdout), name


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_string_view_stream_and_time_columns_read_as_string_columns_do(cli, tmp_path: Path, jobs: str) -> None:
    # Arrow's string_view type (kept in the Parquet file's Arrow schema when a writer built on
    # Arrow's view types wrote it; from memory, newer dataframe libraries do) was refused:
    # "holds string_view, not stream names" and "... not times", every row skipped. The
    # reference is the same table with plain string columns, and the CSV it came from.
    data = readings(2000)
    csv_path = write_long(tmp_path / "line2.csv", data)
    series, bad = stdlib_long(csv_path)
    assert not bad
    lines = csv_path.read_text().splitlines()[1:]
    times = [line.split(",")[0] for line in lines]
    names = [line.split(",")[1] for line in lines]
    values = [float(line.split(",")[2]) for line in lines]
    plain = tmp_path / "plain.parquet"
    view = tmp_path / "view.parquet"
    pq.write_table(pa.table({"time": pa.array(times), "stream": pa.array(names), "value": values}),
                   plain, row_group_size=2500)
    pq.write_table(pa.table({"time": pa.array(times, pa.string_view()), "stream": pa.array(names, pa.string_view()),
                             "value": values}), view, row_group_size=2500)
    assert pq.read_schema(view).field("stream").type == pa.string_view()
    want = cli("replay", str(plain))
    got = cli("replay", "--jobs", jobs, str(view))
    assert want.returncode == 0 == got.returncode, got.stderr[-2000:]
    assert got.stdout == want.stdout and got.stdout.count("\n") >= 4
    assert printed_records(got.stdout) == one_batch_records(series)
