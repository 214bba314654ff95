"""Line numbers with --jobs: the parent plans CSV chunks without counting their lines.

The processes that read the chunks count them, a clean chunk's places count from 0 until
the process that feeds it adds its first line, and a chunk read row by row counts the lines
before it from the last chunk fed whose first line is known (``sources.lines_between``).
Every check holds a replay in processes to the same replay in one process, whose planner
counts every line (the reference for the line numbers is test_streaming.py's stdlib reading).
"""

from __future__ import annotations

import itertools
import random
from pathlib import Path

import pytest

from shiftwatch import sources
from shiftwatch.replay import replay_files

from .history import json_lines, readings, write_long


def _with_troubles(path: Path, n: int, seed: int) -> Path:
    """A long CSV whose rows the engines set aside here and there (a NaN, a repeated row, a
    time going back), with chunks read row by row among them (a bad value, CRLF line ends, a
    quoted name, a blank line) at places drawn by ``seed``."""
    write_long(path, readings(n))
    lines = path.read_bytes().split(b"\n")
    rng = random.Random(seed)
    body = range(2, len(lines) - 2)
    for i in rng.sample(body, 6):  # rows the engines set aside: named by their lines
        kind = rng.randrange(3)
        if kind == 0:
            lines[i] = lines[i].rsplit(b",", 1)[0] + b",nan"
        elif kind == 1:
            lines[i] = lines[i - 1] if lines[i - 1] else lines[i]
        else:
            lines[i] = lines[max(1, i - 40)]
    for i in rng.sample(body, 2):  # a bad value: its chunk is read row by row
        lines[i] = lines[i].rsplit(b",", 1)[0] + b",n/a"
    start = rng.choice(body)
    for i in range(start, min(start + 30, len(lines) - 2)):  # CRLF: read row by row, \r counted
        lines[i] += b"\r"
    i = rng.choice(body)
    t, name, v = lines[i].split(b",")
    lines[i] = b'%s,"%s",%s' % (t, name, v)  # a quote: read row by row while planning
    lines.insert(rng.choice(body), b"")
    path.write_bytes(b"\n".join(lines))
    return path


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_processes_name_the_lines_one_process_names_in_any_chunking(tmp_path: Path, seed: int) -> None:
    paths = [_with_troubles(tmp_path / f"part{k}.csv", 2500, seed * 10 + k) for k in range(2)]
    whole = replay_files(paths, jobs=1, chunk_bytes=1 << 30)
    assert any("stream" in p for p in whole.problems)  # the engines' problems name lines too
    assert whole.read_problem_count >= 2
    for jobs, chunk in ((2, 1000), (2, 4099), (3, 2500), (2, 65536), (3, 777)):
        res = replay_files(paths, jobs=jobs, chunk_bytes=chunk)
        assert res.problems == whole.problems, (jobs, chunk)
        assert res.problem_count == whole.problem_count
        assert json_lines(res.records) == json_lines(whole.records)
        for name, out in whole.streams.items():
            assert res.streams[name].problems == out.problems


def test_a_file_of_clean_chunks_names_an_engine_s_problem_at_its_line(tmp_path: Path) -> None:
    # Only clean chunks (every place counted from 0, the first line added when fed), and a row
    # set aside late in the file: its line is named as one process names it.
    path = tmp_path / "clean.csv"
    write_long(path, readings(3000))
    lines = path.read_bytes().split(b"\n")
    lines[11001] = lines[11000]  # a repeated row
    path.write_bytes(b"\n".join(lines))
    whole = replay_files([path], jobs=1, chunk_bytes=1 << 30)
    assert [p.split(":", 2)[1] for p in whole.problems] == ["11002"]
    for jobs, chunk in ((2, 3000), (3, 5000)):
        assert replay_files([path], jobs=jobs, chunk_bytes=chunk).problems == whole.problems


@pytest.mark.parametrize("chunk", [1000, 4099])
def test_planning_without_counting_cuts_the_same_chunks(tmp_path: Path, chunk: int) -> None:
    path = _with_troubles(tmp_path / "t.csv", 2000, 7)
    srcs = sources.open_sources([path])
    counted = list(sources.tasks(srcs, None, chunk))
    lazy = list(sources.tasks(srcs, None, chunk, count=False))
    assert [t[0] for t in lazy] == [t[0] for t in counted]
    for a, b in zip(counted, lazy):
        if a[0] == "csv":
            assert a[4:] == b[4:] and a[3] == b[3]
            assert b[2] is None or b[2] == a[2]  # a line given is the counted one
        else:
            assert a[1].problems == b[1].problems and a[1].nbytes == b[1].nbytes
    # Each chunk's lines, as the process that reads it counts them, are the planner's count.
    csv = [t for t in counted if t[0] == "csv"]
    for a, b in itertools.pairwise(csv):
        if a[4] + 1 != b[4]:
            continue  # a block read while planning between them
        block = sources.parse_task(("csv", a[1], None, a[3], a[4], a[5], a[6]), srcs, None,
                                   find_line0=lambda a=a: a[2])
        assert block.lines == b[2] - a[2]


@pytest.mark.parametrize("seed", range(6))
def test_lines_between_counts_as_one_reading_of_the_bytes_does(tmp_path: Path, seed: int,
                                                              monkeypatch: pytest.MonkeyPatch) -> None:
    # Pieces of 7 bytes, so \r\n pairs fall across pieces: one line end, not two.
    rng = random.Random(seed)
    data = bytes(rng.choice(b"ab,\n\r") for _ in range(3000))
    path = tmp_path / "d.csv"
    path.write_bytes(data)
    monkeypatch.setattr(sources, "CHUNK_BYTES", 7)
    for _ in range(50):
        a, b = sorted(rng.sample(range(len(data) + 1), 2))
        assert sources.lines_between(str(path), a, b) == sources._count_lines(data[a:b], b - a)
