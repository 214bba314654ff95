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


def assert_same(a: list[sources.Block], b: list[sources.Block]) -> None:
    assert len(a) == len(b)
    for x, y in zip(a, b):
        assert (x.index, x.file, x.rows, x.nbytes, x.unlisted, x.note, x.remark) == \
            (y.index, y.file, y.rows, y.nbytes, y.unlisted, y.note, y.remark)
        assert x.problems == y.problems
        assert [p[0] for p in x.parts] == [p[0] for p in y.parts]
        for p, q in zip(x.parts, y.parts):
            for u, w in zip(p[1:], q[1:]):
                assert u.dtype == w.dtype
                assert u.tobytes() == w.tobytes()


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
def test_codes_at_the_16_bit_sort_s_bound_are_sorted_as_the_reference_sorts_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, distinct: int) -> None:
    # A slice's codes run up to the number of names (the code of rows not kept): 32,767 names
    # is the most a 16-bit sort takes.  Rows in a shuffled order, a few without a value.
    rng = np.random.default_rng(distinct)
    n = 40_000
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
