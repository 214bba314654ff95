"""The pipes that carry one --jobs process's messages to another (``replay._Pipe``).

A message that fits into the room the pipe has left is written at once by the sender; a
larger one goes through a thread, and the messages after it follow it there, so the order
holds and two processes writing large messages to each other do not wait for each other.
"""

from __future__ import annotations

import multiprocessing
import os
import pickle

import numpy as np
import pytest

from shiftwatch import replay
from shiftwatch.replay import _Pipe, replay_files

from .history import json_lines, readings, write_long


def _send(pipe: _Pipe, sizes: list[int]) -> None:
    for i, n in enumerate(sizes):
        pipe.put((i, b"x" * n))
    pipe.flush()


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_small_and_large_messages_arrive_whole_and_in_order(seed: int) -> None:
    ctx = multiprocessing.get_context("fork")
    pipe = _Pipe(ctx, 3)
    rng = np.random.default_rng(seed)
    # Sizes around the pipe's room (64 KiB by default): some written at once, some by the thread.
    sizes = [int(x) for x in rng.choice([10, 3000, 40_000, 70_000, 300_000], size=60)]
    proc = ctx.Process(target=_send, args=(pipe, sizes))
    proc.start()
    got = []
    for _ in sizes:
        if rng.random() < 0.3:
            proc.join(0.001)  # now and then the sender gets ahead: the pipe fills
        got.append(pipe.get())
    proc.join(10)
    assert proc.exitcode == 0
    assert [(i, len(b)) for i, b in got] == list(enumerate(sizes))
    assert not pipe.ready()


def _exchange(me: int, out: _Pipe, into: _Pipe, n: int) -> None:
    # Both processes put large messages first, then read the other's: a pipe written by the
    # caller's own thread only would block both in their first write.
    for i in range(2):
        out.put((me, i, bytes(n)))
    for i in range(2):
        who, k, data = into.get()
        assert (who, k, len(data)) == (1 - me, i, n)
    out.flush()
    os._exit(0)


def test_two_processes_writing_large_messages_to_each_other_do_not_wait_for_each_other() -> None:
    ctx = multiprocessing.get_context("fork")
    a_to_b, b_to_a = _Pipe(ctx, 2), _Pipe(ctx, 2)
    procs = [ctx.Process(target=_exchange, args=(0, a_to_b, b_to_a, 1 << 20)),
             ctx.Process(target=_exchange, args=(1, b_to_a, a_to_b, 1 << 20))]
    for p in procs:
        p.start()
    for p in procs:
        p.join(20)
    codes = [p.exitcode for p in procs]
    for p in procs:
        if p.exitcode is None:
            p.kill()
    assert codes == [0, 0]


@pytest.mark.parametrize("jobs", [2, 3])
def test_shares_pickled_larger_than_a_pipe_change_nothing(tmp_path, jobs: int,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # No slots: every share goes through the pipes, pickled; chunks of 1 MiB make shares of
    # hundreds of kilobytes, more than a pipe holds, in both directions at once.
    path = tmp_path / "big.csv"
    write_long(path, readings(12_000))
    monkeypatch.setattr(replay, "SLOT_SCALE", 0)
    whole = replay_files([path], jobs=1)
    res = replay_files([path], jobs=jobs, chunk_bytes=1 << 20)
    assert json_lines(res.records) == json_lines(whole.records)
    assert res.problems == whole.problems and res.rows == whole.rows


def _layouts(tmp_path, seed: int) -> list[list[object]]:
    """Random files of several layouts: long CSV (one file and two), wide CSV with gaps, and
    long Parquet in small row groups; streams, lengths and values drawn from ``seed``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from .history import write_wide

    rng = np.random.default_rng(seed)
    names = [f"brackenfield/line{k % 4}/cell{k:03d}/temp" for k in range(int(rng.integers(3, 40)))]
    n = int(rng.integers(800, 2500))
    data = readings(n, names, random_state=seed)
    long_csv = write_long(tmp_path / f"long{seed}.csv", data)
    later = readings(n, names, random_state=seed + 1, t0=float(data[names[0]][0][-1]) + 1.0)
    second = write_long(tmp_path / f"later{seed}.csv", later)
    wide = write_wide(tmp_path / f"wide{seed}.csv", data, missing=0.05, random_state=seed)
    t = np.concatenate([data[k][0] for k in names])
    order = np.argsort(t, kind="stable")
    table = pa.table({"time": pa.array((t[order] * 1000).round().astype(np.int64), pa.timestamp("ms", tz="UTC")),
                      "stream": pa.array(np.repeat(np.array(names, dtype=object), n)[order]),
                      "value": np.concatenate([data[k][1] for k in names])[order]})
    parquet = tmp_path / f"long{seed}.parquet"
    pq.write_table(table, parquet, row_group_size=int(rng.integers(500, 5000)))
    return [[long_csv], [long_csv, second], [wide], [parquet]]


@pytest.mark.parametrize("seed", [5, 6, 7])
def test_records_problems_and_traces_are_those_of_one_process_in_any_layout(tmp_path, seed: int) -> None:
    # Guard for the processes' hand-over: every layout replayed in 2 and 3 processes gives one
    # process's records, problems, totals and report traces (large outcomes written to the
    # parent's pipe by several processes at once), field for field.
    chunk = int(np.random.default_rng(seed).integers(3000, 40_000))
    for paths in _layouts(tmp_path, seed):
        whole = replay_files(paths, jobs=1, chunk_bytes=chunk, trace_options={})
        assert whole.records and whole.rows > 1000
        for jobs in (2, 3):
            res = replay_files(paths, jobs=jobs, chunk_bytes=chunk, trace_options={})
            assert json_lines(res.records) == json_lines(whole.records)
            assert res.problems == whole.problems and res.rows == whole.rows
            assert sorted(res.streams) == sorted(whole.streams)
            for name, one in whole.streams.items():
                other = res.streams[name]
                assert (other.samples_total, other.records_total, other.rejected_total, other.problems) == \
                    (one.samples_total, one.records_total, one.rejected_total, one.problems)
                assert pickle.dumps(other.trace) == pickle.dumps(one.trace)
