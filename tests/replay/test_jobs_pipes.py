"""The pipes that carry one --jobs process's messages to another (``replay._Pipe``).

A message that fits into the room the pipe has left is written at once by the sender; a
larger one goes through a thread, and the messages after it follow it there, so the order
holds and two processes writing large messages to each other do not wait for each other.
"""

from __future__ import annotations

import multiprocessing
import os

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
