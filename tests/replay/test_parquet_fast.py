"""The short ways through a Parquet slice held to the reference path bit for bit.

``sources.PARQUET_FAST`` (True) skips the search for nulls in a column pyarrow
counts none in, uses a stream column's dictionary indices as the codes when its
names are distinct and not empty, and sorts codes as 16-bit integers;
``PARQUET_FAST = False`` runs every check on every slice and sorts the codes as
64-bit integers.  Both must give the same blocks: the same streams in the same
order, the same times, values and places to the bit, the same problems and
counts.  The files are random (a fixed seed): nulls in each column or none,
names repeated with spaces around them, empty names, plain and integer stream
columns, wide files with empty cells, several row groups and several slices a
piece, and dictionaries of 32,766 to 32,768 names around the 16-bit sort's bound.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shiftwatch import sources
from shiftwatch.replay import replay_files

T0_MS = 1_788_000_000_000


def blocks(path: Path, fast: bool, monkeypatch: pytest.MonkeyPatch) -> list[sources.Block]:
    monkeypatch.setattr(sources, "PARQUET_FAST", fast)
    srcs = sources.open_sources([path], "auto", [])
    with sources.OpenFiles() as opened:
        return [sources.parse_task(task, srcs, None, opened) for task in sources.tasks(srcs, None)]


def joined(block: sources.Block) -> dict[str, tuple[bytes, bytes, bytes, tuple[str, ...]]]:
    """A block as its readers see it: each stream's rows (times, values, places) in file order,
    joined over its parts, with their types, the streams in the order the parts first name them.
    The reference way makes a part per stream and slice, the short way one per stream and piece."""
    out: dict[str, list[list[np.ndarray]]] = {}
    for name, *arrays in block.parts:
        for kept, x in zip(out.setdefault(name, [[], [], []]), arrays):
            kept.append(x)
    return {name: (*(np.concatenate(x).tobytes() for x in cols),
                   tuple(str(x.dtype) for c in cols for x in c))
            for name, cols in out.items()}


def assert_same(a: list[sources.Block], b: list[sources.Block]) -> None:
    assert len(a) == len(b)
    for x, y in zip(a, b):
        assert (x.index, x.file, x.rows, x.nbytes, x.unlisted, x.note, x.remark) == \
            (y.index, y.file, y.rows, y.nbytes, y.unlisted, y.note, y.remark)
        assert x.problems == y.problems
        jx, jy = joined(x), joined(y)
        assert list(jx) == list(jy)  # the same streams, first met in the same order
        for name in jx:
            assert jx[name][:3] == jy[name][:3], name
            assert set(jx[name][3]) == set(jy[name][3]) == {"float64", "int64"}, name


def with_nulls(values: list, rng: np.random.Generator, share: float) -> list:
    return [None if rng.random() < share else x for x in values]


def random_long(path: Path, rng: np.random.Generator) -> Path:
    n = int(rng.integers(1, 5000))
    pool = [f"brackenfield/line{k % 3 + 1}/filler/head{k}" for k in range(int(rng.integers(1, 40)))]
    kind = rng.integers(0, 4)
    if kind == 1:  # the same name with spaces around it, under another code
        pool += [f" {pool[0]} ", f"{pool[-1]}  "]
    elif kind == 2:  # empty names
        pool += ["", "   "]
    names = [pool[i] for i in rng.integers(0, len(pool), n)]
    null_share = [0.0, 0.001, 0.05][int(rng.integers(0, 3))]
    times = (T0_MS + 1000 * np.arange(n)).tolist()
    values = (100.0 + rng.standard_normal(n)).round(3).tolist()
    stream_kind = rng.integers(0, 3)
    if stream_kind == 0:
        stream = pa.array(with_nulls(names, rng, null_share)).dictionary_encode()
    elif stream_kind == 1:
        stream = pa.array(with_nulls(names, rng, null_share), pa.string())  # plain, not a dictionary
    else:
        stream = pa.array(with_nulls([len(x) % 7 for x in names], rng, null_share), pa.int32())
    table = pa.table({
        "time": pa.array(with_nulls(times, rng, null_share if rng.random() < 0.5 else 0.0),
                         pa.timestamp("ms", tz="UTC")),
        "stream": stream,
        "value": pa.array(with_nulls(values, rng, null_share if rng.random() < 0.5 else 0.0), pa.float64()),
    })
    pq.write_table(table, path, row_group_size=int(rng.integers(50, 3000)))
    return path


def random_wide(path: Path, rng: np.random.Generator) -> Path:
    n = int(rng.integers(1, 3000))
    tags = int(rng.integers(1, 12))
    null_share = [0.0, 0.01, 0.3][int(rng.integers(0, 3))]
    cols: dict[str, pa.Array] = {
        "time": pa.array(with_nulls((T0_MS + 1000 * np.arange(n)).tolist(), rng, null_share / 10),
                         pa.timestamp("ms", tz="UTC"))}
    for k in range(tags):
        cols[f"brackenfield/line1/tag{k}"] = pa.array(
            with_nulls((50.0 + rng.standard_normal(n)).tolist(), rng, null_share), pa.float64())
    pq.write_table(pa.table(cols), path, row_group_size=int(rng.integers(50, 2000)))
    return path


@pytest.fixture
def small_slices(monkeypatch: pytest.MonkeyPatch) -> None:
    # several slices a piece and several pieces a row group, as in files of millions of rows
    monkeypatch.setattr(sources, "PARQUET_SLICE", 300)
    monkeypatch.setattr(sources, "PARQUET_SLICE_MIN_ROWS", 1)
    monkeypatch.setattr(sources, "PARQUET_PIECE", 1200)


@pytest.mark.usefixtures("small_slices")
@pytest.mark.parametrize("seed", range(40))
def test_long_parquet_slices_read_the_short_way_give_the_reference_blocks(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, seed: int) -> None:
    path = random_long(tmp_path / "long.parquet", np.random.default_rng(seed))
    fast = blocks(path, True, monkeypatch)
    assert_same(fast, blocks(path, False, monkeypatch))
    assert sum(b.rows for b in fast) == pq.ParquetFile(path).metadata.num_rows


@pytest.mark.usefixtures("small_slices")
@pytest.mark.parametrize("seed", range(15))
def test_wide_parquet_slices_read_the_short_way_give_the_reference_blocks(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, seed: int) -> None:
    path = random_wide(tmp_path / "wide.parquet", np.random.default_rng(1000 + seed))
    assert_same(blocks(path, True, monkeypatch), blocks(path, False, monkeypatch))


@pytest.mark.parametrize("distinct", [32_766, 32_767, 32_768])
def test_codes_at_the_32_bit_keys_bound_are_sorted_as_the_reference_sorts_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, distinct: int) -> None:
    # A piece's codes run up to the number of names (the code of rows not kept), each with its
    # row below it in a key of 32 bits while they fit: a piece of 70,000 rows (two slices)
    # takes 17 bits for its rows, so 32,767 names is the most such keys hold, and 32,768
    # are sorted by numpy's stable argsort instead.  Rows in a shuffled order, a few without
    # a value.
    rng = np.random.default_rng(distinct)
    n = 70_000
    names = [f"brackenfield/t{k}" for k in range(distinct)]
    picks = np.concatenate([np.arange(distinct), rng.integers(0, distinct, n - distinct)])
    rng.shuffle(picks)
    values: list[float | None] = rng.standard_normal(n).tolist()
    for i in rng.integers(0, n, 25).tolist():
        values[i] = None
    table = pa.table({
        "time": pa.array(T0_MS + 1000 * np.arange(n), pa.timestamp("ms", tz="UTC")),
        "stream": pa.DictionaryArray.from_arrays(pa.array(picks, pa.int32()), pa.array(names)),
        "value": pa.array(values, pa.float64()),
    })
    path = tmp_path / "many.parquet"
    pq.write_table(table, path)
    fast = blocks(path, True, monkeypatch)
    assert_same(fast, blocks(path, False, monkeypatch))
    with_value = {names[k] for k, v in zip(picks.tolist(), values) if v is not None}
    assert {p[0] for b in fast for p in b.parts} == with_value
    assert len(with_value) > distinct - 25


def test_a_replay_of_a_parquet_file_with_nulls_is_the_same_either_way(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # through the feeder and the engines, problems and records
    path = random_long(tmp_path / "long.parquet", np.random.default_rng(7))
    monkeypatch.setattr(sources, "PARQUET_FAST", True)
    a = replay_files([path])
    monkeypatch.setattr(sources, "PARQUET_FAST", False)
    b = replay_files([path])
    assert [r.to_dict() for r in a.records] == [r.to_dict() for r in b.records]
    assert (a.rows, a.problems, a.problem_count) == (b.rows, b.problems, b.problem_count)


def shaped_long(path: Path, rng: np.random.Generator, periods: tuple[int, int] = (1, 200)) -> int:
    """A long file in one of the orders exports come in, which the short way groups each its
    own way: time by time with the tags in a fixed order (every tag at every time, or a few
    readings missing, or a few rows without a value), sorted by tag, time by time with the
    tags in any order, or shuffled (each stream's times out of order); the shape's number is
    returned.  The stream
    column a dictionary (with names no row uses, or not), plain text (pyarrow reads a
    dictionary of its own for each batch) or integers; several row groups.  Every other tag
    steps up by 4 sigma halfway through ``periods`` (drawn from the range) readings."""
    tags = int(rng.integers(1, 30))
    periods = int(rng.integers(*periods))
    pool = [f"brackenfield/line{k % 3 + 1}/capper/head{k}" for k in range(tags)]
    perm = rng.permutation(tags)  # the fixed order the tags are written in
    code = np.tile(perm, periods)
    at = np.repeat(np.arange(periods), tags)
    shape = int(rng.integers(0, 6))
    if shape == 1:  # readings missing here and there
        keep = rng.random(code.shape[0]) > 0.01
        code, at = code[keep], at[keep]
    elif shape == 3:  # sorted by tag, then time
        order = np.lexsort((at, code))
        code, at = code[order], at[order]
    elif shape == 4:
        order = np.lexsort((rng.random(code.shape[0]), at))
        code, at = code[order], at[order]
    elif shape == 5:
        order = rng.permutation(code.shape[0])
        code, at = code[order], at[order]
    n = code.shape[0]
    step = np.where((code % 2 == 0) & (at >= periods // 2), 4.0, 0.0)
    values: list[float | None] = (100.0 + step + rng.standard_normal(n)).round(3).tolist()
    if shape == 2:  # a few rows without a value
        for i in rng.integers(0, n, 3).tolist():
            values[i] = None
    stream_kind = int(rng.integers(0, 4))
    if stream_kind == 0:
        stream = pa.DictionaryArray.from_arrays(pa.array(code, pa.int32()), pa.array(pool))
    elif stream_kind == 1:  # unused names in the dictionary, the used ones not in code order
        names = ["brackenfield/unused/a", *reversed(pool), "brackenfield/unused/b"]
        stream = pa.DictionaryArray.from_arrays(pa.array(tags - code, pa.int32()), pa.array(names))
    elif stream_kind == 2:
        stream = pa.array([pool[k] for k in code.tolist()], pa.string())
    else:
        stream = pa.array(code * 7 + 3, pa.int64())
    table = pa.table({
        "time": pa.array(T0_MS + 1000 * at, pa.timestamp("ms", tz="UTC")),
        "stream": stream,
        "value": pa.array(values, pa.float64()),
    })
    pq.write_table(table, path, row_group_size=int(rng.integers(40, 4000)))
    return shape


@pytest.mark.usefixtures("small_slices")
@pytest.mark.parametrize("seed", range(60))
def test_long_files_in_the_orders_exports_come_in_are_grouped_as_the_reference_groups_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, seed: int) -> None:
    # The short way groups a piece's rows by stream once: by their period when every tag comes
    # once in each run of rows in the same order, by slicing when they are sorted by tag, else
    # by one sort of the piece.  The reference sorts each slice (a stable argsort of 64-bit
    # codes) and copies each stream's rows out per slice.
    path = tmp_path / "shaped.parquet"
    shaped_long(path, np.random.default_rng(5000 + seed))
    fast = blocks(path, True, monkeypatch)
    assert_same(fast, blocks(path, False, monkeypatch))
    assert sum(b.rows for b in fast) == pq.ParquetFile(path).metadata.num_rows
    # Each part owns its rows: a view of the piece's arrays would hold the whole piece for as
    # long as a reader keeps the part (a rare stream's rows wait for a full batch).
    for b in fast:
        for _, *arrays in b.parts:
            assert all(x.base is None and x.flags.owndata for x in arrays)


@pytest.mark.parametrize("seed", range(16))
def test_the_records_of_a_replay_of_long_files_in_any_order_are_the_reference_s(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, seed: int) -> None:
    # Through the feeder and the engines, with the default slices and pieces, in one process
    # and in two: the records and problems of the reference way, bit for bit.
    path = tmp_path / "shaped.parquet"
    shape = shaped_long(path, np.random.default_rng(7000 + seed), (800, 2500))
    monkeypatch.setattr(sources, "PARQUET_FAST", True)
    a, a2 = replay_files([path]), replay_files([path], jobs=2)
    monkeypatch.setattr(sources, "PARQUET_FAST", False)
    b = replay_files([path])
    assert [r.to_dict() for r in a.records] == [r.to_dict() for r in a2.records] == \
        [r.to_dict() for r in b.records]
    assert (a.rows, a.problems, a.problem_count) == (a2.rows, a2.problems, a2.problem_count) == \
        (b.rows, b.problems, b.problem_count)
    # the steps were found (the records compared are not all empty), or a shuffled file's rows
    # were refused as out of order
    assert len(a.records) >= 2 if shape != 5 else a.problem_count > 0


@pytest.mark.parametrize("unit", ["s", "ms", "us", "ns"])
def test_timestamps_of_every_unit_read_as_the_cast_and_division_they_were_read_with(unit: str) -> None:
    # The time column's integers are divided in one pass (np.divide with a float64 result);
    # the reference is what it replaced: astype(float64), then a division by the units a
    # second.  Times from the year 1 to 9999 and past either end (those rows are problems),
    # counts of units beyond 2**53 (not exact as doubles), a null.
    per = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}[unit]
    rng = np.random.default_rng(per)
    lo, hi = sources.TIME_MIN, sources.TIME_MAX
    secs = np.concatenate([rng.uniform(lo, hi, 2000), [lo, hi, lo - 1, hi + 1, 0.0, 1.788e9]])
    raw = np.clip(np.round(secs * per), -9.2e18, 9.2e18).astype(np.int64)  # (ns: 1678 to 2261)
    raw[:500] += rng.integers(0, per, 500) if per > 1 else 0  # not whole seconds
    col = pa.array(raw.tolist() + [None], pa.timestamp(unit, tz="UTC"))
    problems = sources._GroupProblems(sources.Source("x.parquet", "parquet", "long", [], 0), 0)
    t, ok = sources._arrow_times(col, "time", None, 0, problems)
    want, p = raw, per
    while p > 1000 and bool((want % 1000 == 0).all()):
        want, p = want // 1000, p // 1000
    ref = want.astype(np.float64) / p if p > 1 else want.astype(np.float64)
    assert t[:-1].tobytes() == ref.tobytes()
    in_range = (ref >= lo) & (ref <= hi)
    assert ok.tolist() == in_range.tolist() + [False]
    assert problems.messages  # the null and the times past either end are named


def test_the_range_check_s_short_way_keeps_exactly_the_times_in_range() -> None:
    # _valid_range returns `valid` untouched when the smallest and largest times are in range;
    # the reference is the row-by-row test it skips (_in_range), on times at and past the
    # limits, NaN, and all-valid arrays.
    rng = np.random.default_rng(3)
    lo, hi = sources.TIME_MIN, sources.TIME_MAX
    src = sources.Source("x.parquet", "parquet", "long", [], 0)
    edges = [lo, hi, np.nextafter(lo, -np.inf), np.nextafter(hi, np.inf), np.nan, 0.0]
    for k in range(200):
        t = rng.uniform(lo, hi, int(rng.integers(0, 50)))
        if k % 2:
            t = np.concatenate([t, rng.choice(edges, int(rng.integers(1, 4)))])
        valid = rng.random(t.shape[0]) < 0.9
        problems = sources._GroupProblems(src, 0)
        got = sources._valid_range(t, valid, 0, "time", problems)
        assert got.tolist() == (valid & sources._in_range(t)).tolist()
        assert bool(problems.messages) == bool((valid & ~sources._in_range(t) & ~np.isnan(t)).any())


@pytest.mark.usefixtures("small_slices")
@pytest.mark.parametrize("seed", range(4))
def test_local_times_across_the_hour_repeated_in_autumn_group_as_the_reference_groups_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, seed: int) -> None:
    # With --timezone, a stream's second pass through the hour the clocks go back is told by
    # its own order (RepeatedHour.follow, part by part): the short way hands it one part a
    # piece where the reference hands one a slice.  Europe/Berlin went back on 2026-10-25 at
    # 03:00 local (tz database, from memory; zoneinfo gives the instants here); readings every
    # 20 s from 01:00 to 05:00 local, 6 tags time by time (or shuffled at each time), naive
    # timestamps in milliseconds as historians export them, a step after 04:00 on two tags.
    from datetime import UTC, datetime
    from zoneinfo import ZoneInfo

    zone = ZoneInfo("Europe/Berlin")
    rng = np.random.default_rng(900 + seed)
    start = datetime(2026, 10, 24, 23, 0, tzinfo=UTC).timestamp()  # 01:00 local (UTC+2)
    instants = start + 20.0 * np.arange(900)  # to 03:00 UTC, 04:00 local after the change
    wall = [datetime.fromtimestamp(x, zone).replace(tzinfo=None) for x in instants.tolist()]
    wall_ms = np.array([round((w - datetime(1970, 1, 1)).total_seconds() * 1000) for w in wall])
    assert len(set(wall_ms.tolist())) < wall_ms.shape[0]  # the repeated hour is there
    tags = 6
    code = np.tile(np.arange(tags), wall_ms.shape[0])
    at = np.repeat(np.arange(wall_ms.shape[0]), tags)
    if seed % 2:
        order = np.lexsort((rng.random(code.shape[0]), at))
        code, at = code[order], at[order]
    step = np.where((code < 2) & (at > 700), 3.0, 0.0)
    table = pa.table({
        "time": pa.array(wall_ms[at], pa.timestamp("ms")),
        "stream": pa.DictionaryArray.from_arrays(
            pa.array(code, pa.int32()), pa.array([f"brackenfield/line4/press{k}" for k in range(tags)])),
        "value": pa.array(20.0 + step + rng.standard_normal(code.shape[0]).round(3)),
    })
    path = tmp_path / "autumn.parquet"
    pq.write_table(table, path, row_group_size=2000)
    monkeypatch.setattr(sources, "PARQUET_FAST", True)
    a = replay_files([path], timezone="Europe/Berlin")
    monkeypatch.setattr(sources, "PARQUET_FAST", False)
    b = replay_files([path], timezone="Europe/Berlin")
    assert a.repeated_hour == b.repeated_hour == 180 * tags  # the second pass through 02:00-03:00
    assert [r.to_dict() for r in a.records] == [r.to_dict() for r in b.records]
    assert len(a.records) >= 2  # the steps were found
    assert (a.rows, a.problems, a.problem_count) == (b.rows, b.problems, b.problem_count)
    assert a.rows == code.shape[0]
