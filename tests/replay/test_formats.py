"""The layouts plants export: long and wide CSV, Parquet, and the forms of time.

References: the stdlib csv module and datetime (history.py), pandas reading
the wide CSV, pyarrow reading the Parquet files, zoneinfo for local times.
Each replay is compared with the same readings replayed from another
layout, or fed to the engines in one batch here.
"""

from __future__ import annotations

import csv
import json
from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shiftwatch.replay import read_long_csv, replay_files

from .history import (
    STREAMS,
    json_lines,
    one_batch_records,
    printed_records,
    readings,
    stdlib_long,
    write_long,
    write_wide,
)


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict]:
    data = readings(4000)
    path = write_long(tmp_path_factory.mktemp("history") / "line2.csv", data)
    return path, data


# ------------------------------------------------------------------ times
def test_epoch_milliseconds_are_read_as_the_daemon_reads_them(cli, history, tmp_path: Path) -> None:
    # Epoch milliseconds (above 1e11, the daemon's rule) crashed replay and fit with
    # "year 58692 is out of range".
    path, data = history
    ms = write_long(tmp_path / "ms.csv", data, form="epoch_ms")
    rfc = cli("replay", str(path))
    got = cli("replay", str(ms))
    assert got.returncode == 0 and "Traceback" not in got.stderr, got.stderr
    assert got.stdout == rfc.stdout and got.stdout.count("\n") >= 8
    assert printed_records(got.stdout) == one_batch_records(stdlib_long(ms)[0])
    name = "brackenfield/line2/filler/head1/fill"
    fit_ms = cli("fit", str(ms), "--stream", name, "--json")
    fit_rfc = cli("fit", str(path), "--stream", name, "--json")
    assert fit_ms.returncode == 0, fit_ms.stderr
    assert json.loads(fit_ms.stdout) == json.loads(fit_rfc.stdout)


def _berlin_readings(start: datetime, random_state: int) -> tuple[dict[str, tuple[np.ndarray, np.ndarray]], list[str]]:
    """4,000 readings a stream, a second apart from ``start``, and their times as zoneinfo
    writes them in Europe/Berlin without an offset (milliseconds, as historians export)."""
    data = readings(4000, random_state=random_state, t0=start.timestamp())
    zone = ZoneInfo("Europe/Berlin")
    stamps = [datetime.fromtimestamp(t, zone).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3]
              for t in data[next(iter(data))][0].tolist()]
    return data, stamps


def test_times_without_an_offset_need_the_files_time_zone(cli, tmp_path: Path) -> None:
    # Local times in Europe/Berlin across the start of summer time (2026-03-29, 02:00 -> 03:00),
    # written by zoneinfo; with --timezone they are the same instants as the UTC file's.
    data, stamps = _berlin_readings(datetime(2026, 3, 29, 0, 10, tzinfo=UTC), random_state=4)
    assert stamps[0] == "2026-03-29T01:10:00.000" and stamps[-1] == "2026-03-29T03:16:39.000"
    local = write_long(tmp_path / "local.csv", data, stamps=stamps)
    utc = write_long(tmp_path / "utc.csv", data)
    refused = cli("replay", str(local))
    assert refused.returncode == 2 and "Traceback" not in refused.stderr  # no row read: status 2, as fit (2026-12-05; 1 before)
    assert "shiftwatch: no row could be read, so nothing was replayed" in refused.stderr
    assert (f"{local}:2: time '2026-03-29T01:10:00.000' has no UTC offset; say which time zone the file is "
            "in with --timezone") in refused.stderr
    assert refused.stdout == ""
    read = cli("replay", "--timezone", "Europe/Berlin", str(local))
    assert read.returncode == 0, read.stderr
    assert read.stdout == cli("replay", str(utc)).stdout and read.stdout
    gap = tmp_path / "gap.csv"
    gap.write_text("time,stream,value\n2026-03-29T02:30:00,x,1.0\n")
    res = cli("replay", "--timezone", "Europe/Berlin", str(gap))
    assert res.returncode == 2 and "does not exist in Europe/Berlin" in res.stderr  # no row read: status 2, as fit (2026-12-05; 1 before)
    res = cli("replay", "--timezone", "Europe/Bruxelles", str(utc))
    assert res.returncode == 2 and "--timezone Europe/Bruxelles: not an IANA time zone name" in res.stderr
    assert "Traceback" not in res.stderr


def test_the_hour_repeated_when_clocks_go_back_is_read_as_each_stream_s_times_say(cli, tmp_path: Path) -> None:
    # Local times in Europe/Berlin across the end of summer time (2026-10-25, 03:00 CEST ->
    # 02:00 CET), written by zoneinfo: the local hour 02:00 to 03:00 happens twice, and an
    # export in local time writes both as 02:xx (PEP 495: the second has fold=1, which no
    # text shows).  Read as its first occurrence, the second hour stood before the samples
    # it followed and was set aside as out of order (an hour of every stream lost).  Each
    # stream's times now say which it is: a time of the repeated hour that goes back by
    # more than half an hour from the stream's last is its second occurrence.  The
    # reference is the same readings written in UTC.
    data, stamps = _berlin_readings(datetime(2026, 10, 25, 0, 10, tzinfo=UTC), random_state=5)
    assert stamps[0] == "2026-10-25T02:10:00.000" and stamps[2999] == "2026-10-25T02:59:59.000"
    assert stamps[3000] == "2026-10-25T02:00:00.000" and stamps[-1] == "2026-10-25T02:16:39.000"
    local = write_long(tmp_path / "local.csv", data, stamps=stamps)
    utc = write_long(tmp_path / "utc.csv", data)
    expected = cli("replay", str(utc))
    assert expected.returncode == 0 and expected.stdout.count("\n") >= 4
    read = cli("replay", "--timezone", "Europe/Berlin", "--report", str(tmp_path / "rep"), str(local))
    assert read.returncode == 0, read.stderr[-2000:]
    assert read.stdout == expected.stdout
    assert "4000 time(s) in the hour repeated when the clocks went back" in read.stderr
    # and the report says so too, among its notes on the files
    page = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    assert 'id="notes"' in page and "4000 time(s) in the hour repeated when the clocks went back" in page
    # The same through more than one process, the file in several chunks (streams are fed
    # by their owner, which keeps each stream's last time).
    chunked = replay_files([local], jobs=2, timezone="Europe/Berlin", chunk_bytes=64 * 1024)
    whole = replay_files([utc], jobs=1)
    assert [r.to_dict() for r in chunked.records] == [r.to_dict() for r in whole.records]
    assert chunked.repeated_hour == 4000 and chunked.problem_count == whole.problem_count
    # Parquet with wall-clock timestamps (no time zone), read by row group.
    names = list(data)
    wall = [datetime.fromisoformat(s) for s in stamps]
    table = pa.table({"time": pa.array([w for w in wall for _ in names], pa.timestamp("ms")),
                      "stream": pa.array(names * len(wall)),
                      "value": pa.array(np.stack([data[k][1] for k in names], axis=1).ravel())})
    naive = tmp_path / "local.parquet"
    pq.write_table(table, naive, row_group_size=5000)
    res = cli("replay", "--timezone", "Europe/Berlin", str(naive))
    assert res.returncode == 0, res.stderr[-2000:]
    assert res.stdout == expected.stdout
    # fit reads the hour as replay does: the step it fits is the UTC file's.
    name = next(iter(data))
    fit_local = cli("fit", "--timezone", "Europe/Berlin", str(local), "--stream", name, "--json")
    fit_utc = cli("fit", str(utc), "--stream", name, "--json")
    assert fit_local.returncode == 0, fit_local.stderr
    assert json.loads(fit_local.stdout) == json.loads(fit_utc.stdout)
    # A row that is merely late within the first hour (less than half an hour) is still set
    # aside as out of order, not moved an hour on.
    late = tmp_path / "late.csv"
    late.write_text("time,stream,value\n2026-10-25T02:10:00,x,1.0\n2026-10-25T02:11:00,x,1.0\n"
                    "2026-10-25T02:10:30,x,1.0\n2026-10-25T02:12:00,x,1.0\n")
    res = cli("replay", "--timezone", "Europe/Berlin", str(late))
    assert res.returncode == 1 and f"{late}:4: stream x:" in res.stderr, res.stderr


@pytest.mark.parametrize(("zone", "utc_start"), [
    ("Europe/Berlin", "2026-10-25T00:20:00+00:00"),  # 03:00 CEST -> 02:00 CET, an hour
    ("America/New_York", "2026-11-01T05:20:00+00:00"),  # 02:00 EDT -> 01:00 EST, an hour
    ("Australia/Lord_Howe", "2026-04-04T14:20:00+00:00"),  # 02:00 -> 01:30 local, half an hour
])
@pytest.mark.parametrize("every", [1.0, 60.0, 600.0])
def test_repeated_hours_of_several_zones_read_as_zoneinfo_writes_them(zone: str, utc_start: str,
                                                                      every: float) -> None:
    # The reference: zoneinfo's own local times of known instants (PEP 495), written as text
    # without their offset, read back with parse_time (first occurrence) and sorted out by
    # RepeatedHour, in pieces of 97 readings (as chunks cut a stream's rows).
    from shiftwatch.sources import RepeatedHour, parse_time

    tz = ZoneInfo(zone)
    t0 = datetime.fromisoformat(utc_start).timestamp()
    true = t0 + every * np.arange(int(7200 / every))
    texts = [datetime.fromtimestamp(t, tz).strftime("%Y-%m-%dT%H:%M:%S") for t in true.tolist()]
    read = np.array([parse_time(x, tz) for x in texts])
    assert bool((read != true).any())  # the first occurrence is not the truth for every reading
    rh = RepeatedHour(tz)
    pieces = [rh.follow(zone, read[a:a + 97]) for a in range(0, read.shape[0], 97)]
    assert np.concatenate(pieces).tolist() == true.tolist()
    assert rh.moved == int((read != true).sum())  # (the pieces given were not changed)


# ------------------------------------------------------------------- wide
def test_wide_csv_reads_as_pandas_reads_it(cli, history, tmp_path: Path) -> None:
    path, data = history
    wide = write_wide(tmp_path / "wide.csv", data, missing=0.02)
    # Reference: pandas reads the wide file; an empty cell is NaN there and a missing reading here.
    frame = pd.read_csv(wide, dtype={"time": str})
    times = [datetime.fromisoformat(x).timestamp() for x in frame["time"]]
    series = {}
    for name in STREAMS:
        keep = frame[name].notna().to_numpy()
        series[name] = (np.asarray(times)[keep], frame[name].to_numpy()[keep])
    expected = one_batch_records(series)
    for jobs in ("1", "2"):
        res = cli("replay", "--jobs", jobs, str(wide))
        assert res.returncode == 0, res.stderr
        assert printed_records(res.stdout) == expected and len(expected) >= 8
        assert "replayed 4000 rows in 4 stream(s)" in res.stderr
    res = replay_files([wide], jobs=2, chunk_bytes=3000)
    assert json_lines(res.records) == expected
    full = write_wide(tmp_path / "full.csv", data)
    assert cli("replay", "--layout", "wide", str(full)).stdout == cli("replay", str(path)).stdout


def test_a_bad_cell_of_a_wide_file_names_its_line_and_tag(cli, history, tmp_path: Path) -> None:
    _, data = history
    wide = write_wide(tmp_path / "wide.csv", data)
    lines = wide.read_text().splitlines()
    cells = lines[100].split(",")
    cells[2] = "12,5".replace(",", ";")
    lines[100] = ",".join(cells)
    wide.write_text("\n".join(lines) + "\n")
    res = cli("replay", str(wide))
    assert res.returncode == 1
    assert f"{wide}:101: brackenfield/line2/filler/head2/fill: value '12;5' is not a number" in res.stderr
    assert "1 unreadable row(s) or cell(s) skipped" in res.stderr and res.stdout.count("\n") >= 8
    dup = tmp_path / "dup.csv"
    dup.write_text("time,oven,oven\n2026-03-02T06:00:00Z,1,2\n")
    res = cli("replay", str(dup))
    assert res.returncode == 2 and f"{dup}:1: the header names tag 'oven' twice" in res.stderr


# ----------------------------------------------------------------- Parquet
def arrow_long(data: dict, unit: str = "ms") -> pa.Table:
    names = list(data)
    t = data[names[0]][0]
    n = t.shape[0]
    return pa.table({
        "time": pa.array((np.repeat(t, len(names)) * {"ms": 1e3, "us": 1e6}[unit]).round().astype(np.int64),
                         pa.timestamp(unit, tz="UTC")),
        "stream": pa.array(names * n).dictionary_encode(),
        "value": pa.array(np.stack([data[k][1] for k in names], axis=1).ravel()),
    })


def test_parquet_long_and_wide_give_the_records_of_the_csv(cli, history, tmp_path: Path) -> None:
    path, data = history
    long_pq = tmp_path / "long.parquet"
    pq.write_table(arrow_long(data, "us"), long_pq, row_group_size=3000)
    names = list(data)
    wide_pq = tmp_path / "wide.parquet"
    pq.write_table(pa.table({"time": (data[names[0]][0] * 1000).round().astype(np.int64),  # epoch ms
                             **{k: data[k][1] for k in names}}), wide_pq, row_group_size=700)
    csv_out = cli("replay", str(path)).stdout
    for f in (long_pq, wide_pq):
        for jobs in ("1", "2"):
            res = cli("replay", "--jobs", jobs, str(f))
            assert res.returncode == 0, res.stderr
            assert res.stdout == csv_out, f
    # Reference for the reader: pyarrow's own reading of the file, per stream in row order.
    frame = pq.read_table(long_pq).to_pandas()
    read = read_long_csv([long_pq])
    for name in names:
        rows = frame[frame["stream"] == name]
        assert read.streams[name].values.tolist() == rows["value"].tolist()
        assert read.streams[name].times.tolist() == [x.timestamp() for x in rows["time"]]


def test_parquet_columns_read_from_their_buffers_as_pyarrow_computes_them() -> None:
    # The reader takes validity and values from the arrays' buffers (pyarrow.compute costs
    # 0.15 s to import); reference: pyarrow.compute's is_valid and fill_null on the same arrays,
    # sliced at odd offsets so that the bitmaps do not start on a byte.
    import pyarrow.compute as pc

    from shiftwatch.sources import _arrow_plain, _arrow_valid

    rng = np.random.default_rng(12)
    n = 1000
    nulls = rng.random(n) < 0.2
    ints = rng.integers(-(2**40), 2**40, n)
    columns = [
        pa.array(np.where(nulls, 0.0, rng.standard_normal(n)), pa.float64(), mask=nulls),
        pa.array(rng.standard_normal(n), pa.float64()),
        pa.array(ints, pa.timestamp("us", tz="UTC"), mask=nulls),
        pa.array(ints, pa.timestamp("ms")),
        pa.array(rng.integers(0, 100, n).astype(np.int32), pa.int32(), mask=nulls),
        pa.array(rng.integers(0, 100, n).astype(np.uint8), pa.uint8(), mask=nulls),
        pa.array([None if m else f"s{k % 7}" for k, m in enumerate(nulls)]).dictionary_encode().indices,
        pa.nulls(n, pa.float64()),
    ]
    for col in columns:
        for a, b in ((0, n), (3, 517), (13, n)):
            part = col.slice(a, b - a)
            valid = _arrow_valid(part)
            assert valid.tolist() == pc.is_valid(part).to_pylist()
            fill = 0 if not pa.types.is_floating(part.type) else float("nan")
            got = _arrow_plain(part, valid, fill)
            assert got is not None
            if pa.types.is_timestamp(part.type):
                part = part.cast(pa.int64())
            want = pc.fill_null(part, fill).to_numpy(zero_copy_only=False)
            np.testing.assert_array_equal(got, want)
    assert _arrow_plain(pa.array(["1.5"]), np.ones(1, dtype=bool), 0) is None  # cast by the caller


def test_bad_parquet_rows_are_named_by_row_group_row_and_column(cli, history, tmp_path: Path) -> None:
    _, data = history
    table = arrow_long(data)
    times = table.column("time").to_pylist()
    values = table.column("value").to_pylist()
    times[2005] = None
    values[3010] = None
    values[3020] = float("nan")
    table = table.set_column(0, "time", pa.array(times, pa.timestamp("ms", tz="UTC")))
    table = table.set_column(2, "value", pa.array(values, pa.float64()))
    f = tmp_path / "bad.parquet"
    pq.write_table(table, f, row_group_size=1000)
    res = cli("replay", str(f))
    assert res.returncode == 1 and "Traceback" not in res.stderr
    assert f"{f}: row group 2, row 5, column time: no time (null)" in res.stderr
    assert f"{f}: row group 3, row 10, column value: no value (null)" in res.stderr
    assert f"{f}: row group 3, row 20: stream {table.column('stream')[3020]}: value is NaN" in res.stderr
    assert "2 unreadable row(s) or cell(s) skipped" in res.stderr and res.stdout.count("\n") >= 8
    naive = tmp_path / "naive.parquet"
    pq.write_table(table.set_column(0, "time", pa.array(times, pa.timestamp("ms"))), naive)
    res = cli("replay", str(naive))
    assert res.returncode == 2 and f"{naive}: row group 0, row 0, column time: the time has no UTC offset" in res.stderr
    assert "shiftwatch: no row could be read, so nothing was replayed" in res.stderr  # no row read: status 2, as fit (2026-12-05; 1 before)
    res = cli("replay", "--timezone", "UTC", str(naive))
    assert res.stdout == cli("replay", str(f)).stdout
    # A damaged page in row group 1 (its footer still sound): that group's rows are counted and
    # skipped, the others replayed.
    damaged = tmp_path / "damaged.parquet"
    pq.write_table(arrow_long(data), damaged, row_group_size=4000)
    offset = pq.ParquetFile(damaged).metadata.row_group(1).column(2).data_page_offset
    raw = bytearray(damaged.read_bytes())
    raw[offset + 10:offset + 200] = b"\xab" * 190
    damaged.write_bytes(raw)
    res = cli("replay", "--jobs", "2", str(damaged))
    assert res.returncode == 1 and "Traceback" not in res.stderr, res.stderr
    assert f"{damaged}: row group 1: unreadable from row 0 on (" in res.stderr
    assert "its last 4000 rows were skipped" in res.stderr and "4000 unreadable row(s) or cell(s) skipped" in res.stderr
    assert "replayed 16000 rows in 4 stream(s)" in res.stderr
    broken = tmp_path / "broken.parquet"
    broken.write_bytes(b"PAR1" + bytes(100))
    res = cli("replay", str(broken))
    assert res.returncode == 2 and f"{broken}: not a readable Parquet file" in res.stderr
    assert "Traceback" not in res.stderr


def test_the_report_of_several_processes_is_the_report_of_one(cli, history, tmp_path: Path) -> None:
    path, _ = history
    one = cli("replay", "--jobs", "1", "--report", str(tmp_path / "one"), str(path))
    two = cli("replay", "--jobs", "2", "--report", str(tmp_path / "two"), str(path))
    assert one.returncode == two.returncode == 0, one.stderr + two.stderr
    html_one = (tmp_path / "one" / "report.html").read_text()
    assert (tmp_path / "two" / "report.html").read_text() == html_one
    assert html_one.count('<img src="data:image/png;base64,') == 4


def test_fit_reads_what_replay_reads(cli, history, tmp_path: Path) -> None:
    path, data = history
    wide_pq = tmp_path / "wide.parquet"
    names = list(data)
    pq.write_table(pa.table({"time": data[names[0]][0], **{k: data[k][1] for k in names}}), wide_pq)
    for name in names:
        a = cli("fit", str(path), "--stream", name, "--json")
        b = cli("fit", str(wide_pq), "--stream", name, "--json")
        assert a.returncode == b.returncode == 0, b.stderr
        assert json.loads(a.stdout) == json.loads(b.stdout)
        assert json.loads(a.stdout)["stream"] == name and json.loads(a.stdout)["p_value"] < 1e-6


def test_csv_files_in_stream_directories_take_the_directory_s_stream(cli, tmp_path: Path) -> None:
    # README: in a `stream=NAME` directory (as pyarrow writes a dataset partitioned by stream) a
    # long file needs no `stream` column.  CSV files there were read as wide files with one tag
    # called `value`: two pumps' rows merged into one stream and half of them were set aside.
    # Reference: each stream's rows in a long CSV of its own, read by the stdlib csv module and
    # fed to its engine in one batch (history.py).
    data = readings(3000)
    names = list(data)
    for name in names:
        t, v = data[name]
        d = tmp_path / "dataset" / f"stream={name.replace('/', '%2F')}"
        d.mkdir(parents=True)
        (d / "part-0.csv").write_text("time,value\n" + "".join(f"{x:.3f},{y}\n" for x, y in zip(t, v)))
    res = cli("replay", "--jobs", "1", str(tmp_path / "dataset"))
    assert res.returncode == 0, res.stderr
    assert f"replayed {3000 * len(names)} rows in {len(names)} stream(s)" in res.stderr
    reference = one_batch_records(stdlib_long(write_long(tmp_path / "long.csv", data, form="epoch_s"))[0])
    assert printed_records(res.stdout) == reference and len(reference) >= 4
    # --layout long takes them too (a partition supplies the stream column)
    assert cli("replay", "--layout", "long", str(tmp_path / "dataset")).stdout == res.stdout


def test_a_file_that_is_not_utf8_is_named_once_and_no_row_is_counted_unreadable(cli, tmp_path: Path) -> None:
    # A Latin-1 export: every row was replayed, yet the summary said "1 unreadable row(s)
    # skipped" (the note about the file was counted as a row).  Reference for the bytes: the
    # stdlib's latin-1 codec writes "é" as the single byte 0xE9, which is not UTF-8.
    data = readings(1000)
    text = write_long(tmp_path / "u.csv", data).read_text().replace("oven/zone3_temp", "four/température")
    path = tmp_path / "latin1.csv"
    path.write_bytes(text.encode("latin-1"))
    res = cli("replay", "--jobs", "1", str(path))
    assert res.returncode == 1 and "Traceback" not in res.stderr
    assert f"{path}: the file is not valid UTF-8; unreadable characters were replaced" in res.stderr
    assert "replayed 4000 rows in 4 stream(s)" in res.stderr
    assert "unreadable row(s)" not in res.stderr
    assert "1 file(s) not valid UTF-8" in res.stderr


def test_headers_that_fit_no_layout_whole_are_refused_with_what_is_missing(cli, tmp_path: Path) -> None:
    # Found by an outside trial: `time,time,b,c` made a stream called "time" of the second time
    # column, and a Parquet file of time and stream with no value was read as wide, its stream
    # column refused as "not numbers", which hid the missing column.  README: `--layout auto`
    # takes a file with `stream` and `value` columns as long; say `--layout wide` when a tag
    # is called `stream` or `value`.
    twice = tmp_path / "twice.csv"
    twice.write_text("time,Time,b\n2026-03-02T06:00:00Z,2026-03-02T06:00:00Z,1\n")
    res = cli("replay", str(twice))
    assert res.returncode == 2 and f"{twice}:1: the header names time twice" in res.stderr, res.stderr
    no_value = tmp_path / "no_value.parquet"
    pq.write_table(pa.table({"time": pa.array([0, 1000], pa.timestamp("ms", tz="UTC")),
                             "stream": ["brackenfield/line2/capper/torque"] * 2}), no_value)
    res = cli("replay", str(no_value))
    assert res.returncode == 2 and "header lacks column(s) value" in res.stderr, res.stderr
    lone = tmp_path / "lone.csv"
    lone.write_text("time,value\n2026-03-02T06:00:00Z,1.5\n2026-03-02T06:00:01Z,1.6\n")
    res = cli("replay", str(lone))
    assert res.returncode == 2 and "header lacks column(s) stream" in res.stderr
    assert "--layout wide" in res.stderr  # the way to read a tag called value
    res = cli("replay", "--layout", "wide", str(lone))
    assert res.returncode == 0 and "replayed 2 rows in 1 stream(s)" in res.stderr, res.stderr


def test_repeated_hours_are_looked_for_only_in_the_years_zoneinfo_knows() -> None:
    # A time far past the year 9999 (an epoch number in the wrong unit, say) must not stop
    # the replay: datetime refuses such years ("year 10000 is out of range").
    from shiftwatch.sources import RepeatedHour

    rh = RepeatedHour(ZoneInfo("Europe/Berlin"))
    t = np.array([-1e11, 1.7e9, 2.6e11, 1e12, 1e15])
    assert rh.follow("x", t) is t and rh.moved == 0


# ----------------------------------------------------------- quotes left open
def _open_quotes(path: Path) -> tuple[Path, Path]:
    """The file with a quote left open before a stream name on line 102 (an export that cut a
    quoted name), another one on line 15,001 near the end, and a legitimately quoted name on
    line 110 that the first one's field would run into; and the same file without lines 102 and
    15,001, read by the stdlib csv module as the reference."""
    lines = path.read_text().splitlines(keepends=True)
    t, name, v = lines[101].split(",")
    lines[101] = f'{t},"{name},{v}'
    t, name, v = lines[109].split(",")
    lines[109] = f'{t},"{name}",{v}'
    t, name, v = lines[15000].split(",")
    lines[15000] = f'{t},"{name},{v}'
    lines[300] = lines[300].rsplit(",", 1)[0] + ",n/a\n"
    broken = path.with_name("open-quote.csv")
    broken.write_text("".join(lines))
    good = path.with_name("without.csv")
    good.write_text("".join(ln for i, ln in enumerate(lines) if i not in (101, 15000)))
    return broken, good


@pytest.mark.parametrize("jobs,chunk_bytes", [(1, 1 << 30), (1, 4099), (2, 65536)])
def test_a_quote_left_open_costs_its_own_line_not_the_rest_of_the_file(history, tmp_path: Path, jobs: int,
                                                                        chunk_bytes: int) -> None:
    # A quote opened and never closed made the csv module read on to the next quote or the end
    # of the file as one field: a small file lost every row after it, named by the line where
    # the file ended ("expected 3 columns, got 2"), and a large one the rows up to the 128 KiB
    # field limit ("field larger than field limit"), counted as one unreadable row (found by an
    # outside trial: fit then found a step in the first 50 rows and missed the real one).
    src, _ = history
    copy = tmp_path / "line2.csv"
    copy.write_bytes(src.read_bytes())
    broken, good = _open_quotes(copy)
    series, bad = stdlib_long(good)
    assert bad == [300]  # the n/a value, on line 301 of the file: line 300 of the one without line 102
    res = replay_files([broken], jobs=jobs, chunk_bytes=chunk_bytes)
    assert json_lines(res.records) == one_batch_records(series) and len(res.records) >= 8
    quote = "a quote opens a field here that is not closed on its line"
    assert res.read_problems == [f"{broken}:102: {quote}; the line was skipped and the lines after it read as rows",
                                 f"{broken}:301: value 'n/a' is not a number",
                                 f"{broken}:15001: {quote}; the line was skipped and the lines after it read as rows"]
    assert res.read_problem_count == 3
    assert res.rows == 4 * 4000


def test_fit_of_a_file_with_a_quote_left_open_fits_every_other_row(cli, history, tmp_path: Path) -> None:
    src, _ = history
    copy = tmp_path / "line2.csv"
    copy.write_bytes(src.read_bytes())
    broken, good = _open_quotes(copy)
    name = "brackenfield/line2/filler/head1/fill"
    got = cli("fit", str(broken), "--stream", name, "--json")
    want = cli("fit", str(good), "--stream", name, "--json")
    assert got.returncode == 1 and want.returncode == 1, got.stderr
    assert f"{broken}:102: a quote opens a field here that is not closed on its line" in got.stderr
    assert json.loads(got.stdout) == json.loads(want.stdout)


# ------------------------------------------------------------ what is counted
def _report_total(report: Path, name: str) -> int:
    html = (report / "report.html").read_text()
    mark = f'data-total="{name}">'
    assert mark in html, name
    return int(html.split(mark, 1)[1].split("<", 1)[0].replace(",", ""))


def test_unreadable_cells_of_a_wide_file_are_not_counted_as_rows_skipped(cli, tmp_path: Path) -> None:
    # A wide Parquet file of 600 rows with two columns of text besides its numbers: every row
    # was replayed (its numbers), yet the summary said "1200 unreadable row(s) skipped", twice
    # the rows the file holds (a cell counted as a row; found by an outside trial).
    data = readings(600, ("x", "y"))
    t = data["x"][0]
    table = pa.table({"time": pa.array((t * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
                      "x": data["x"][1], "y": data["y"][1],
                      "flag": pa.array([True] * 600), "note": pa.array([f"n{i}" for i in range(600)])})
    f = tmp_path / "wide.parquet"
    pq.write_table(table, f)
    res = cli("replay", "--report", str(tmp_path / "report"), str(f))
    assert res.returncode == 1 and "Traceback" not in res.stderr, res.stderr
    assert f"{f}: row group 0, column flag: holds bool, not numbers; its values were skipped" in res.stderr
    assert "replayed 600 rows in 2 stream(s)" in res.stderr
    assert "unreadable row(s) skipped" not in res.stderr
    assert "; 1200 unreadable row(s) or cell(s) skipped" in res.stderr
    assert _report_total(tmp_path / "report", "unreadable rows or cells") == 1200


def test_the_report_of_a_file_that_is_not_utf8_counts_no_row_unreadable(cli, tmp_path: Path) -> None:
    # The summary line stopped counting the note about a Latin-1 file as an unreadable row;
    # the report's totals still said "unreadable rows 1" (found by an outside trial).
    text = write_long(tmp_path / "u.csv", readings(1000)).read_text().replace("oven/zone3_temp", "four/température")
    path = tmp_path / "latin1.csv"
    path.write_bytes(text.encode("latin-1"))
    res = cli("replay", "--report", str(tmp_path / "report"), str(path))
    assert res.returncode == 1 and "Traceback" not in res.stderr and "1 file(s) not valid UTF-8" in res.stderr
    assert _report_total(tmp_path / "report", "unreadable rows or cells") == 0


# ------------------------------------------------------------ times out of range
def test_epoch_microseconds_and_nanoseconds_are_refused_row_by_row_not_with_a_traceback(
        cli, history, tmp_path: Path) -> None:
    # Epoch microseconds or nanoseconds (as some historians and InfluxDB export) were read as
    # milliseconds of the year 58,132 or 56,164,658, and replay and fit ended in a traceback
    # ("year 58132 is out of range") where the records were written (found by an outside trial).
    # A few such rows among good ones: they are named and skipped, the others replayed.
    src, _ = history
    lines = src.read_text().splitlines(keepends=True)
    bad = {101: "us", 2001: "ns", 3001: "us"}
    hint = ("is past the year 9999 (shiftwatch reads epoch seconds, and epoch milliseconds above "
            "100,000,000,000: divide epoch microseconds or nanoseconds first)")
    for i, unit in bad.items():
        t, name, v = lines[i].split(",")
        lines[i] = f"{round(datetime.fromisoformat(t).timestamp() * {'us': 10**6, 'ns': 10**9}[unit])},{name},{v}"
    mixed = tmp_path / "mixed.csv"
    mixed.write_text("".join(lines))
    good = tmp_path / "good.csv"
    good.write_text("".join(ln for i, ln in enumerate(lines) if i not in bad))
    for jobs in ("1", "2"):
        res = cli("replay", "--jobs", jobs, str(mixed))
        assert res.returncode == 1 and "Traceback" not in res.stderr, res.stderr
        assert printed_records(res.stdout) == one_batch_records(stdlib_long(good)[0])
        for i in bad:
            assert f"{mixed}:{i + 1}: time '{lines[i].split(',')[0]}' {hint}" in res.stderr
        assert "; 3 unreadable row(s) or cell(s) skipped" in res.stderr
    # A whole file in epoch microseconds: every row named, no traceback, fit says why.
    us = tmp_path / "us.csv"
    us.write_text("time,stream,value\n" + "".join(f"{1772431200 * 10**6 + i * 10**6},tank,{i % 7}\n"
                                                   for i in range(300)))
    res = cli("replay", str(us))
    assert res.returncode == 2 and "Traceback" not in res.stderr and res.stdout == "", res.stderr  # no row read: status 2, as fit (2026-12-05; 1 before)
    assert f"{us}:2: time '1772431200000000' {hint}" in res.stderr
    fit = cli("fit", str(us))
    assert fit.returncode == 2 and "Traceback" not in fit.stderr, fit.stderr
    assert f"no stream could be read: no row was usable; the first problem: {us}:2: time" in fit.stderr
    # Parquet: an int64 time column in microseconds, and a timestamp column past the year 9999.
    n = 300
    for kind, col in (("int", pa.array([1772431200 * 10**6 + i * 10**6 for i in range(n)], pa.int64())),
                      ("stamp", pa.array([253402300800 * 1000 + i * 1000 for i in range(n)],
                                         pa.timestamp("ms", tz="UTC")))):
        f = tmp_path / f"{kind}.parquet"
        pq.write_table(pa.table({"time": col, "stream": ["tank"] * n, "value": [float(i % 7) for i in range(n)]}), f)
        res = cli("replay", str(f))
        assert res.returncode == 2 and "Traceback" not in res.stderr and res.stdout == "", res.stderr  # no row read
        assert (f"{f}: row group 0, row 0, column time: the time is past the year 9999 (shiftwatch reads epoch "
                "seconds") in res.stderr


def test_a_byte_order_mark_before_a_quoted_header_is_read(cli, history, tmp_path: Path) -> None:
    # Windows PowerShell's Export-Csv writes a UTF-8 byte order mark and quotes every field:
    # '\ufeff"time","stream","value"'. The mark stood before the quote, so the csv module read
    # the field as the text '\ufeff"time"' and the file was refused ("header lacks column(s)
    # time"; found by an outside trial). Reference: the stdlib csv module with utf-8-sig.
    src, data = history
    quoted = tmp_path / "export.csv"
    rows = [",".join(f'"{x}"' for x in line.split(",")) for line in src.read_text().splitlines()]
    quoted.write_text("\ufeff" + "\n".join(rows) + "\n", encoding="utf-8")
    import csv

    with open(quoted, newline="", encoding="utf-8-sig") as f:
        assert next(csv.reader(f)) == ["time", "stream", "value"]
    res = cli("replay", str(quoted))
    assert res.returncode == 0, res.stderr
    assert res.stdout == cli("replay", str(src)).stdout and res.stdout.count("\n") >= 8
    wide = write_wide(tmp_path / "wide.csv", data)
    wide_rows = [",".join(f'"{x}"' for x in line.split(",")) for line in wide.read_text().splitlines()]
    quoted_wide = tmp_path / "export-wide.csv"
    quoted_wide.write_text("\ufeff" + "\n".join(wide_rows) + "\n", encoding="utf-8")
    res = cli("replay", str(quoted_wide))
    assert res.returncode == 0, res.stderr
    assert res.stdout == cli("replay", str(wide)).stdout


@pytest.mark.parametrize("kind", ["semicolons", "tabs", "utf-16"])
def test_a_file_in_another_csv_dialect_is_refused_saying_what_it_is(cli, history, tmp_path: Path,
                                                                    kind: str) -> None:
    # European Excel writes semicolons, "Text (Tab delimited)" tabs and "Unicode Text" UTF-16
    # with tabs: each was refused with the header as it read it ("got time;stream;value", or
    # "got ��t i m e ...") and no word of why (found by an outside trial).
    src, _ = history
    text = src.read_text()
    path = tmp_path / f"{kind}.csv"
    if kind == "semicolons":
        path.write_text(text.replace(",", ";"))
        why = "the header is separated by semicolons; shiftwatch reads comma-separated files"
    elif kind == "tabs":
        path.write_text(text.replace(",", "\t"))
        why = "the header is separated by tabs; shiftwatch reads comma-separated files"
    else:
        path.write_text(text.replace(",", "\t"), encoding="utf-16")
        why = "the file is UTF-16 (it starts with a UTF-16 byte order mark); save it as UTF-8 CSV"
    res = cli("replay", str(path))
    assert res.returncode == 2 and "Traceback" not in res.stderr, res.stderr
    assert res.stderr.startswith(f"shiftwatch: {path}:1: {why}"), res.stderr


def test_a_row_with_more_fields_than_the_header_is_refused_not_cut_short(cli, history, tmp_path: Path) -> None:
    # A value written with a decimal comma and no quotes ("499,97") makes a row one field longer
    # than the header: the row was read with the value's integer part (499) and the rest
    # dropped without a word, in a long file and in a wide one, where the tags after it took
    # their neighbours' digits (found by an outside trial). An empty field past the header's
    # (a trailing comma) still reads.
    src, data = history
    lines = src.read_text().splitlines(keepends=True)
    t, name, v = lines[101].rstrip("\n").split(",")
    lines[101] = f"{t},{name},{v.replace('.', ',')}\n"  # 499.9945 -> 499,9945
    lines[102] = lines[102].rstrip("\n") + ",\n"  # a trailing comma: read
    long = tmp_path / "comma.csv"
    long.write_text("".join(lines))
    good = tmp_path / "good.csv"
    good.write_text("".join(ln for i, ln in enumerate(lines) if i != 101))
    res = cli("replay", str(long))
    assert res.returncode == 1, res.stderr
    assert f"{long}:102: expected 3 columns, got 4" in res.stderr
    assert res.stdout == cli("replay", str(good)).stdout and res.stdout.count("\n") >= 8
    wide = write_wide(tmp_path / "wide.csv", data)
    rows = wide.read_text().splitlines(keepends=True)
    cells = rows[50].rstrip("\n").split(",")
    cells[1] = cells[1].replace(".", ",")
    rows[50] = ",".join(cells) + "\n"
    wide.write_text("".join(rows))
    res = cli("replay", str(wide))
    assert res.returncode == 1 and f"{wide}:51: expected 5 columns, got 6" in res.stderr, res.stderr


@pytest.mark.parametrize("jobs", ["1", "2"])
def test_a_wide_row_that_stops_short_keeps_its_cells_and_is_counted(cli, history, tmp_path: Path,
                                                                     jobs: str) -> None:
    # Some exports leave out the empty cells at the end of a row ("t,1.5" under a header of four
    # tags). Such a row was refused whole, its good cells lost (found by an outside trial). Now
    # its cells are read, the missing ones as empty, and the row is named and counted. The
    # reference: the same file with the missing cells written out empty (stdlib csv reads both
    # to the same fields but for the missing ones, RFC 4180's one-record-a-line layout).
    _src, data = history
    full = write_wide(tmp_path / "full.csv", data)
    rows = full.read_text().splitlines(keepends=True)
    ncols = len(rows[0].split(","))
    short_at = (40, 41, 300, 1200)
    for i in short_at:
        cells = rows[i].rstrip("\n").split(",")
        cells[2:] = ["" for _ in cells[2:]]  # the reference: empty cells past the first tag
        rows[i] = ",".join(cells) + "\n"
    full.write_text("".join(rows))
    cut = tmp_path / "cut.csv"
    cut.write_text("".join(ln.rstrip("\n").rstrip(",") + "\n" if i in short_at else ln
                           for i, ln in enumerate(rows)))
    assert all(len(r) == 2 for r in (next(csv.reader([cut.read_text().splitlines()[i]])) for i in short_at))
    want = cli("replay", "--jobs", jobs, str(full))
    assert want.returncode == 0, want.stderr
    got = cli("replay", "--jobs", jobs, str(cut))
    assert got.returncode == 1, got.stderr
    assert got.stdout == want.stdout and want.stdout.count("\n") >= 4
    for i in short_at:
        assert (f"{cut}:{i + 1}: expected {ncols} columns, got 2; the {ncols - 2} missing at the end are "
                "read as empty cells") in got.stderr
    assert f"; {len(short_at)} unreadable row(s) or cell(s) skipped" in got.stderr
    # The cells the short rows have are taken: every stream holds as many samples as from the
    # reference file (the first tag's included).
    a, b = replay_files([full], jobs=int(jobs)), replay_files([cut], jobs=int(jobs))
    assert {n: o.samples_total for n, o in b.streams.items()} == {n: o.samples_total for n, o in a.streams.items()}


@pytest.mark.parametrize("int_type", [pa.int64(), pa.uint32(), pa.int16()])
def test_a_parquet_stream_column_of_integers_reads_as_their_decimal_names(cli, tmp_path: Path, int_type) -> None:
    # Historians often export tags by number. A long Parquet file with an integer stream column
    # was refused ("holds int64, not stream names"); a CSV of the same numbers read fine. The
    # reference is the CSV (the numbers as text) and pyarrow's cast of the column to strings.
    ids = [1001, 1002, 2417]
    data = readings(1500, streams=[str(i) for i in ids])
    csv_path = write_long(tmp_path / "tags.csv", data)
    t = data[str(ids[0])][0]
    n = t.shape[0]
    table = pa.table({
        "time": pa.array((np.repeat(t, len(ids)) * 1e3).round().astype(np.int64), pa.timestamp("ms", tz="UTC")),
        "stream": pa.array(ids * n, int_type),
        "value": pa.array(np.stack([data[str(i)][1] for i in ids], axis=1).ravel()),
    })
    assert table.column("stream").cast(pa.string()).to_pylist()[:3] == ["1001", "1002", "2417"]
    pq_path = tmp_path / "tags.parquet"
    pq.write_table(table, pq_path, row_group_size=1000)
    want = cli("replay", str(csv_path))
    assert want.returncode == 0, want.stderr
    for jobs in ("1", "2"):
        got = cli("replay", "--jobs", jobs, str(pq_path))
        assert got.returncode == 0, got.stderr
        assert got.stdout == want.stdout and got.stdout.count("\n") >= 1


@pytest.mark.parametrize(("header", "column", "layout"), [
    ("time,stream,value,value", "value", "auto"), ("time,stream,Stream,value", "stream", "auto"),
    ("time,stream,value, VALUE", "value", "long"), ("time,time,value", "time", "auto"),
    ("time,stream,value,time", "time", "long"), ("time,value,value", "value", "partition")])
def test_a_long_header_that_names_a_column_twice_is_refused_naming_it(cli, tmp_path: Path, header: str,
                                                                      column: str, layout: str) -> None:
    # Found by an outside tester: a long file with `value` or `stream` twice was read with the first
    # of them without a word (a wide file with a tag twice is refused), and `time,time,value` was
    # refused as lacking a stream column though the README says "A header that names time twice is
    # refused".  RFC 4180 (section 2) gives a header one name per field and does not say which of
    # two equal names counts; pandas' read_csv renames the second (`value.1`, from memory), so
    # readers disagree on which column a repeated name means.
    where = tmp_path / "stream=brackenfield%2Fline2%2Fcapper%2Ftorque" if layout == "partition" else tmp_path
    where.mkdir(exist_ok=True)
    path = where / "twice.csv"
    n = len(header.split(","))
    path.write_text(f"{header}\n" + "".join(
        ",".join([f"2026-03-02T06:00:{i:02d}Z"] + ["1.5"] * (n - 1)) + "\n" for i in range(3)))
    args = ["--layout", layout] if layout != "partition" else []
    res = cli("replay", *args, str(path))
    assert "Traceback" not in res.stderr
    assert res.returncode == 2 and res.stdout == "", res.stderr
    assert res.stderr.startswith(f"shiftwatch: {path}:1: the header names {column} twice"), res.stderr


# The command line in a process of its own, telling which of pyarrow's modules the replay imported.
_IMPORTS_PROBE = """
import sys
from shiftwatch.cli import main
code = main(sys.argv[1:])
print("imported:", " ".join(m for m in ("pyarrow.compute", "pandas") if m in sys.modules), file=sys.stderr)
sys.exit(code)
"""


@pytest.mark.parametrize("text_type", [pa.string(), pa.large_string()])
def test_a_parquet_stream_column_of_plain_text_is_read_as_a_dictionary(tmp_path: Path, text_type) -> None:
    # pandas and Spark write a stream column as plain text (the names' dictionary is the pages',
    # the column's type is string).  Each slice was dictionary-encoded after reading (a hash of
    # every row), whose first call imported pyarrow.compute (0.1 s of CPU, as much as reading
    # the bench's 2.4 million rows); pyarrow now reads the column as a dictionary
    # (read_dictionary).  Reference: the CSV of the same rows (the stdlib csv module's rows fed
    # to the engines in one batch per stream, and the command's output for it).
    import subprocess
    import sys

    data = readings(3000)
    csv_path = write_long(tmp_path / "line2.csv", data)
    names = list(data)
    t = data[names[0]][0]
    table = pa.table({
        "time": pa.array((np.repeat(t, len(names)) * 1e3).round().astype(np.int64), pa.timestamp("ms", tz="UTC")),
        "stream": pa.array(names * t.shape[0], text_type),
        "value": pa.array(np.stack([data[k][1] for k in names], axis=1).ravel()),
    })
    pq_path = tmp_path / "line2.parquet"
    pq.write_table(table, pq_path, row_group_size=5000)
    assert pq.ParquetFile(pq_path).schema_arrow.field("stream").type == text_type

    def run(path: Path, *args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-c", _IMPORTS_PROBE, "replay", *args, str(path)],
                              capture_output=True, text=True, timeout=300, check=False)

    want = run(csv_path)
    assert want.returncode == 0, want.stderr
    assert want.stdout.count("\n") >= 2
    assert printed_records(want.stdout) == one_batch_records(stdlib_long(csv_path)[0])
    for jobs in ("1", "2"):
        got = run(pq_path, "--jobs", jobs)
        assert got.returncode == 0, got.stderr
        assert got.stdout == want.stdout
        assert "imported: \n" in got.stderr  # neither pyarrow.compute nor pandas


def test_a_parquet_stream_column_of_bytes_is_still_refused_by_name(cli, tmp_path: Path) -> None:
    # Only text is read as a dictionary: pyarrow would read bytes as one too, and their names
    # would be Python's repr of them (b'...').
    n = 50
    table = pa.table({
        "time": pa.array(1_788_000_000_000 + 1000 * np.arange(n), pa.timestamp("ms", tz="UTC")),
        "stream": pa.array([b"brackenfield/line2/oven/zone3_temp"] * n, pa.binary()),
        "value": pa.array(np.full(n, 182.0)),
    })
    path = tmp_path / "bytes.parquet"
    pq.write_table(table, path)
    got = cli("replay", str(path))
    assert got.returncode == 2, got.stderr  # no row read: status 2, as fit (2026-12-05; 1 before)
    assert "column stream: holds binary, not stream names; the rows were skipped" in got.stderr
    assert "b'" not in got.stdout + got.stderr
