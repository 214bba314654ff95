"""Streaming replay: chunks, processes and memory.

Every check compares a replay with one computed here: the file read by the
stdlib ``csv`` module and each stream fed to its engine in one batch
(history.py), or the same replay in one process with one chunk.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from shiftwatch.replay import KEEP_PROBLEMS, CsvFormatError, replay_files

from .history import (
    json_lines,
    one_batch_records,
    printed_records,
    readings,
    stdlib_long,
    write_long,
)


def messy_history(path: Path, n: int = 4000) -> Path:
    """Long CSV with the troubles of real exports spread through it: a bad value, a bad time,
    a short row, a NaN, a repeated row, a quoted stream name, CRLF line ends, a blank line."""
    write_long(path, readings(n))
    lines = path.read_bytes().split(b"\n")
    lines[10] = lines[10].rsplit(b",", 1)[0] + b",n/a"
    lines[2000] = b"yesterday," + lines[2000].split(b",", 1)[1]
    lines[4001] = b"2026-03-02T06:20:00.000Z,brackenfield/line2/capper/torque"
    lines[6000] = lines[6000].rsplit(b",", 1)[0] + b",nan"
    lines[8001] = lines[8000]
    t, name, v = lines[9000].split(b",")
    lines[9000] = b'%s,"%s",%s' % (t, name, v)
    for i in range(12000, 12040):
        lines[i] += b"\r"
    lines.insert(14000, b"")
    path.write_bytes(b"\n".join(lines))
    return path


@pytest.fixture(scope="module")
def messy(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return messy_history(tmp_path_factory.mktemp("messy") / "line2.csv")


def test_one_chunk_in_one_process_gives_the_records_of_one_batch_per_stream(messy: Path) -> None:
    series, bad = stdlib_long(messy)
    res = replay_files([messy], jobs=1, chunk_bytes=1 << 30)
    assert json_lines(res.records) == one_batch_records(series)
    assert len(res.records) >= 8
    # Reference for the lines: the stdlib csv module's line numbers of the rows it could not read.
    named = [int(p.split(":")[1]) for p in res.read_problems]
    assert named == bad and res.read_problem_count == len(bad) == 3
    engine_problems = [p for p in res.problems if "stream" in p]
    assert [p.split(":", 2)[1] for p in engine_problems] == ["6001", "8002"]
    assert "value is NaN" in engine_problems[0] and "repeats one already accepted" in engine_problems[1]


@pytest.mark.parametrize("chunk_bytes", [1000, 4099, 65536])
@pytest.mark.parametrize("jobs", [1, 2, 3])
def test_any_chunking_and_any_number_of_processes_give_the_same_replay(messy: Path, chunk_bytes: int,
                                                                      jobs: int) -> None:
    whole = replay_files([messy], jobs=1, chunk_bytes=1 << 30)
    res = replay_files([messy], jobs=jobs, chunk_bytes=chunk_bytes)
    assert json_lines(res.records) == json_lines(whole.records)
    assert res.problems == whole.problems and res.problem_count == whole.problem_count
    assert res.rows == whole.rows == 4 * 4000  # the short row counts, the blank line does not
    assert {n: (o.samples_total, o.records_total, o.rejected_total) for n, o in res.streams.items()} == \
        {n: (o.samples_total, o.records_total, o.rejected_total) for n, o in whole.streams.items()}


@pytest.mark.parametrize("slot_scale", [0, 0.25])
def test_shares_that_do_not_fit_a_shared_slot_go_through_the_pipe_and_change_nothing(
        messy: Path, slot_scale: float, monkeypatch: pytest.MonkeyPatch) -> None:
    # Slots of one row (every share through the pipe), and of 42 rows with 2 processes and 28
    # with 3: a chunk of 4,099 bytes holds about 80 rows, so some shares fit and some do not
    # (about half each way in both, counted when this test was written).  The processes are
    # forked after the slots are made, so they take these sizes.
    from shiftwatch import replay

    monkeypatch.setattr(replay, "SLOT_SCALE", slot_scale)
    whole = replay_files([messy], jobs=1, chunk_bytes=1 << 30)
    for jobs in (2, 3):
        res = replay_files([messy], jobs=jobs, chunk_bytes=4099)
        assert json_lines(res.records) == json_lines(whole.records)
        assert res.problems == whole.problems and res.rows == whole.rows


def test_a_shared_slot_hands_over_copies_of_the_rows_and_is_used_in_turn() -> None:
    import numpy as np

    from shiftwatch.replay import LOOKAHEAD, _Slots

    slots = _Slots(24 * 100)  # 100 rows
    rng = np.random.default_rng(5)

    def parts(sizes: list[int]) -> list[tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
        return [(f"brackenfield/s{k}", rng.random(n), rng.random(n), rng.integers(0, 1 << 40, n))
                for k, n in enumerate(sizes)]

    used = []
    for sizes in ([30, 70], [1], [50, 50], [99], [60, 41], []):
        sent = parts(sizes)
        msg = slots.put(sent)
        fits = 0 < sum(sizes) <= 100
        assert (msg[0] == "slot") == fits, sizes
        if fits:
            used.append(msg[1])
        got = slots.take(msg)
        assert [g[0] for g in got] == [s[0] for s in sent]
        for g, s in zip(got, sent):
            for a, b in zip(g[1:], s[1:]):
                assert a.dtype == b.dtype and np.array_equal(a, b)
                assert a.flags.owndata  # a copy, not a view of the slot the next share overwrites
    assert used == [k % (LOOKAHEAD + 2) for k in range(len(used))]


def test_a_replay_whose_shared_slots_cannot_be_mapped_hands_every_share_through_the_pipe(
        messy: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # As under ``ulimit -v`` or strict overcommit: every mapping of the slots' size fails.
    import mmap

    from shiftwatch import replay

    real = mmap.mmap

    def refuse(fileno: int, length: int, *args: object, **kw: object) -> mmap.mmap:
        if length > mmap.PAGESIZE:
            raise OSError(12, "Cannot allocate memory")
        return real(fileno, length, *args, **kw)  # type: ignore[arg-type]

    monkeypatch.setattr(mmap, "mmap", refuse)
    assert replay._Slots(1 << 20).rows == 0
    whole = replay_files([messy], jobs=1, chunk_bytes=1 << 30)
    res = replay_files([messy], jobs=2, chunk_bytes=4099)
    assert json_lines(res.records) == json_lines(whole.records) and res.problems == whole.problems


def test_a_file_cut_short_while_it_is_replayed_is_named_in_one_process_as_in_several(tmp_path: Path) -> None:
    # A historian rewriting its export under the replay: the rows planned and not yet read are
    # gone.  One process read the chunks as it went and ended early without a word; several
    # read planned byte ranges and named the file.  Both name it now.
    for jobs in (1, 2):
        path = write_long(tmp_path / f"line4-{jobs}.csv", readings(3000))
        size = path.stat().st_size
        assert size > 20 * 20_000  # twenty chunks and more

        def cut(nbytes: int, path: Path = path, size: int = size) -> None:
            if path.stat().st_size == size:  # after the first chunk read
                with open(path, "r+b") as f:
                    f.truncate(size // 2)

        with pytest.raises(CsvFormatError, match=r"line4-\d\.csv: the file changed while it was read"):
            replay_files([path], jobs=jobs, chunk_bytes=20_000, progress=cut)


LOW_FILE_LIMIT = textwrap.dedent("""
    import json, resource, sys
    resource.setrlimit(resource.RLIMIT_NOFILE, (int(sys.argv[1]), int(sys.argv[2])))
    from shiftwatch.replay import replay_files
    result = replay_files([sys.argv[4]], jobs=int(sys.argv[3]))
    for r in result.records:
        print(json.dumps(r.to_dict()))
    print("limit", *resource.getrlimit(resource.RLIMIT_NOFILE), file=sys.stderr)
""")


def test_more_processes_than_the_open_file_limit_holds_replay_in_as_many_as_it_does(cli, tmp_path: Path) -> None:
    # N processes keep 2 (N^2 + 1) pipe ends open in each (getrlimit(2): RLIMIT_NOFILE); with a
    # hard limit of 200, 12 processes would need 290 and failed with "Too many open files".
    # replay_files is asked for them: the command line takes no more processes than cores.
    path = write_long(tmp_path / "line3.csv", readings(30_000))
    one = cli("replay", "--jobs", "1", str(path))
    assert one.returncode == 0, one.stderr
    for soft, hard in ((200, 200), (64, 4096)):
        res = subprocess.run([sys.executable, "-c", LOW_FILE_LIMIT, str(soft), str(hard), "12", str(path)],
                             check=False, capture_output=True, text=True, timeout=300)
        assert res.returncode == 0, res.stderr[-2000:]
        assert res.stdout.splitlines() == printed_records(one.stdout)
        # A soft limit below the hard one is raised as far as the processes need (2 x 145 + 64).
        assert f"limit {min(hard, 354)} {hard}" in res.stderr


def test_problems_are_counted_all_and_kept_first(tmp_path: Path) -> None:
    # Sixty unreadable rows in three files: the first KEEP_PROBLEMS in file order, all counted.
    paths = []
    for k in range(3):
        p = write_long(tmp_path / f"part{k}.csv", readings(300, random_state=k, t0=1.8e9 + 300 * k))
        lines = p.read_text().splitlines()
        for i in range(1, 21):
            lines[i * 50] = lines[i * 50].rsplit(",", 1)[0] + ",--"
        p.write_text("\n".join(lines) + "\n")
        paths.append(p)
    whole = [f"{p}:{i * 50 + 1}: value '--' is not a number" for p in paths for i in range(1, 21)]
    for jobs, chunk in ((1, 1 << 30), (2, 2000), (3, 777)):
        res = replay_files(paths, jobs=jobs, chunk_bytes=chunk)
        assert res.read_problems == whole[:KEEP_PROBLEMS] and res.read_problem_count == 60


def test_cli_jobs_2_prints_what_jobs_1_prints_and_the_reference_records(cli, tmp_path: Path) -> None:
    # Above two chunks of the real command line (5.6 MB), so both processes parse and replay.
    path = write_long(tmp_path / "line2.csv", readings(30_000))
    assert path.stat().st_size > 4 * 2**20
    one = cli("replay", "--jobs", "1", str(path))
    two = cli("replay", "--jobs", "2", str(path))
    default = cli("replay", str(path))
    assert one.returncode == two.returncode == default.returncode == 0, one.stderr + two.stderr
    assert two.stdout == one.stdout == default.stdout and two.stderr == one.stderr
    assert printed_records(one.stdout) == one_batch_records(stdlib_long(path)[0])
    assert "replayed 120000 rows in 4 stream(s)" in one.stderr
    res = cli("replay", "--jobs", "0", str(path))
    assert res.returncode == 2 and "--jobs must be at least 1" in res.stderr


MEMORY_PROBE = textwrap.dedent("""
    import sys, tracemalloc
    from shiftwatch.replay import replay_files
    tracemalloc.start()
    res = replay_files([sys.argv[1]], jobs=1)
    print(tracemalloc.get_traced_memory()[1], len(res.records), res.rows)
""")


def traced_peak(path: Path) -> tuple[int, int, int]:
    """Peak of memory traced by tracemalloc (numpy's arrays included) while replaying, in a
    fresh process; records and rows."""
    out = subprocess.run([sys.executable, "-c", MEMORY_PROBE, str(path)], capture_output=True, text=True,
                         timeout=600, check=True).stdout.split()
    return int(out[0]), int(out[1]), int(out[2])


def test_memory_follows_the_streams_not_the_rows(tmp_path: Path) -> None:
    # The same 10 streams over 12,000 and 48,000 seconds: four times the rows, the same peak
    # (a stream holds back less than a batch of 4,096 samples: both files are well past that).
    names = [f"brackenfield/line{k % 4}/sensor{k}" for k in range(10)]
    small = write_long(tmp_path / "small.csv", readings(12_000, names))
    big = write_long(tmp_path / "big.csv", readings(48_000, names))
    (ps, rs, ns), (pb, rb, nb) = traced_peak(small), traced_peak(big)
    assert (ns, nb) == (120_000, 480_000) and rs > 0 and rb > 0
    assert pb <= 1.10 * ps, (ps, pb)


def test_a_long_stream_name_costs_its_bytes_not_the_rows_times_its_length(tmp_path: Path) -> None:
    # One 50,000-character name among 20,000 rows cost 1 GB when every row was hashed over the
    # longest name's length.
    data = readings(5000)
    plain = write_long(tmp_path / "plain.csv", data)
    lines = plain.read_text().splitlines()
    t, _, v = lines[100].split(",")
    lines[100] = f"{t},brackenfield/{'x' * 50_000},{v}"
    long = tmp_path / "long.csv"
    long.write_text("\n".join(lines) + "\n")
    (pp, _, _), (pl, _, rows) = traced_peak(plain), traced_peak(long)
    assert rows == 20_000
    assert pl <= pp + 2_000_000, (pp, pl)


def test_a_stream_whose_rows_are_out_of_order_is_told_so_by_line(cli, tmp_path: Path) -> None:
    # Rows are fed in file order, as before: a row earlier than its predecessor is set aside.
    path = write_long(tmp_path / "line2.csv", readings(2000))
    lines = path.read_text().splitlines()
    lines[4001], lines[4005] = lines[4005], lines[4001]  # one stream's rows swapped
    path.write_text("\n".join(lines) + "\n")
    res = cli("replay", str(path))
    assert res.returncode == 1
    assert f"{path}:4006: stream brackenfield/line2/filler/head1/fill: " in res.stderr
    assert [json.loads(x)["stream"] for x in res.stdout.splitlines()]


# A Parquet file written as one row group (Spark and some historians write row groups of
# hundreds of megabytes) was read a row group at a time, so memory grew with the group: a
# 10-million-row group took a replay to 387 MB (measured 2026-12-04).  The probe reads pieces
# of 2 slices; a group of 20 slices then costs what a group of 5 costs (each stream past a
# batch of 4,096 samples in both, as in the CSV test above).
PIECE_PROBE = textwrap.dedent("""
    import sys, tracemalloc
    from shiftwatch import sources
    from shiftwatch.replay import replay_files
    sources.PARQUET_SLICE = 10_000
    sources.PARQUET_SLICE_MIN_ROWS = 1
    sources.PARQUET_PIECE = 20_000
    tracemalloc.start()
    res = replay_files([sys.argv[1]], jobs=1)
    print(tracemalloc.get_traced_memory()[1], len(res.records), res.rows)
""")


def one_group_parquet(path: Path, data: dict) -> Path:
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    names = list(data)
    t = data[names[0]][0]
    table = pa.table({
        "time": pa.array((np.repeat(t, len(names)) * 1e3).round().astype(np.int64), pa.timestamp("ms", tz="UTC")),
        "stream": pa.array(names * t.shape[0]).dictionary_encode(),
        "value": pa.array(np.stack([data[k][1] for k in names], axis=1).ravel()),
    })
    pq.write_table(table, path, row_group_size=table.num_rows)
    assert pq.ParquetFile(path).metadata.num_row_groups == 1
    return path


WIDE_PIECE_PROBE = PIECE_PROBE.replace("sources.PARQUET_PIECE = 20_000", "sources.PARQUET_PIECE = 40_000")


def one_group_wide_parquet(path: Path, data: dict) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    names = list(data)
    t = data[names[0]][0]
    table = pa.table({"time": pa.array((t * 1e3).round().astype("int64"), pa.timestamp("ms", tz="UTC")),
                      **{k: pa.array(data[k][1]) for k in names}})
    pq.write_table(table, path, row_group_size=table.num_rows)
    return path


def test_a_wide_parquet_row_group_is_read_in_pieces_of_cells_not_rows(tmp_path: Path) -> None:
    # 120,000 rows of 200 tags in one row group (a wide historian export) took a replay to
    # 499 MB (measured 2026-12-04): slices and pieces counted rows, whatever their width.
    # Here 40 tags: a slice of 10,000 cells is 250 rows, a piece of 40,000 cells 1,000 rows.
    names = [f"brackenfield/line3/tag{k:02d}" for k in range(40)]
    small = one_group_wide_parquet(tmp_path / "small.parquet", readings(5_000, names))
    big = one_group_wide_parquet(tmp_path / "big.parquet", readings(20_000, names))

    def peak(path: Path) -> tuple[int, int, int]:
        out = subprocess.run([sys.executable, "-c", WIDE_PIECE_PROBE, str(path)], capture_output=True,
                             text=True, timeout=600, check=True).stdout.split()
        return int(out[0]), int(out[1]), int(out[2])

    (ps, _, ns), (pb, rb, nb) = peak(small), peak(big)
    assert (ns, nb) == (5_000, 20_000) and rb > 0
    assert pb <= 1.10 * ps, (ps, pb)


def test_a_parquet_row_group_is_read_in_pieces_so_memory_follows_the_streams(tmp_path: Path) -> None:
    names = [f"brackenfield/line{k % 4}/sensor{k}" for k in range(10)]
    small = one_group_parquet(tmp_path / "small.parquet", readings(5_000, names))
    big = one_group_parquet(tmp_path / "big.parquet", readings(20_000, names))

    def peak(path: Path) -> tuple[int, int, int]:
        out = subprocess.run([sys.executable, "-c", PIECE_PROBE, str(path)], capture_output=True, text=True,
                             timeout=600, check=True).stdout.split()
        return int(out[0]), int(out[1]), int(out[2])

    (ps, _, ns), (pb, rb, nb) = peak(small), peak(big)
    assert (ns, nb) == (50_000, 200_000) and rb > 0
    assert pb <= 1.10 * ps, (ps, pb)


@pytest.mark.parametrize("jobs", [1, 2, 3])
def test_the_pieces_of_a_parquet_row_group_give_the_records_of_the_csv(tmp_path: Path, monkeypatch,
                                                                        jobs: int) -> None:
    from shiftwatch import sources

    data = readings(6_000)
    csv_path = write_long(tmp_path / "line2.csv", data)
    pq_path = one_group_parquet(tmp_path / "line2.parquet", data)
    whole = replay_files([pq_path], jobs=1)
    monkeypatch.setattr(sources, "PARQUET_SLICE", 1_000)
    monkeypatch.setattr(sources, "PARQUET_SLICE_MIN_ROWS", 1)
    monkeypatch.setattr(sources, "PARQUET_PIECE", 3_500)  # not a whole number of slices: 3 of them
    blocks = [sources.parse_task(t, sources.open_sources([str(pq_path)], "auto"), None)
              for t in sources.tasks(sources.open_sources([str(pq_path)], "auto"), None)]
    assert [b.rows for b in blocks] == [3_000] * 8  # 24,000 rows in pieces of 3 slices
    res = replay_files([pq_path], jobs=jobs)
    # Reference: the stdlib csv reader's rows, each stream fed to its engine in one batch.
    assert json_lines(res.records) == json_lines(whole.records) == one_batch_records(stdlib_long(csv_path)[0])
    assert res.rows == 24_000 and res.problem_count == whole.problem_count
    # fit's reader, which keeps whole series, reads the pieces as the stdlib csv reader reads the CSV
    from shiftwatch.replay import read_long_csv

    series = read_long_csv([pq_path]).streams
    for name, (t, v) in stdlib_long(csv_path)[0].items():
        assert series[name].times.tolist() == list(t) and series[name].values.tolist() == list(v)


def test_a_damaged_page_in_a_row_group_read_in_pieces_costs_the_rows_from_it_on(tmp_path: Path, monkeypatch) -> None:
    # Reference for the layout: the file's own metadata (pyarrow's ParquetFile.metadata) gives
    # where the value column's data pages start; pages of 4 KB hold about 500 doubles.
    import pyarrow.parquet as pq

    from shiftwatch import sources

    data = readings(6_000)
    path = one_group_parquet(tmp_path / "line2.parquet", data)
    table = pq.read_table(path)
    pq.write_table(table, path, row_group_size=table.num_rows, data_page_size=4096, use_dictionary=["stream"])
    col = pq.ParquetFile(path).metadata.row_group(0).column(2)
    raw = bytearray(path.read_bytes())
    end = col.data_page_offset + col.total_compressed_size
    middle = col.data_page_offset + (col.total_compressed_size * 5) // 8  # about row 15,000 on
    raw[middle:end] = b"\xab" * (end - middle)  # page headers included: pyarrow cannot read on
    path.write_bytes(raw)
    monkeypatch.setattr(sources, "PARQUET_SLICE", 1_000)
    monkeypatch.setattr(sources, "PARQUET_SLICE_MIN_ROWS", 1)
    monkeypatch.setattr(sources, "PARQUET_PIECE", 3_000)
    one = replay_files([path], jobs=1)
    two = replay_files([path], jobs=2)
    assert one.read_problems == two.read_problems and one.read_problem_count == two.read_problem_count
    assert json_lines(one.records) == json_lines(two.records)
    assert one.rows == two.rows == 24_000
    read = 24_000 - one.read_problem_count
    # Every slice before the damaged page is read, none from it on; each piece from it on says so.
    assert 12_000 <= read < 16_000 and read % 1_000 == 0, read
    stop = (read // 3_000 + 1) * 3_000
    first = one.read_problems[0]
    assert f"{path}: row group 0: unreadable from row {read} on (" in first
    assert first.endswith(f"rows {read} to {stop - 1} ({stop - read}) were skipped"), first
    assert one.read_problems[-1].endswith("its last 3000 rows were skipped")
    assert len(one.read_problems) == 8 - read // 3_000
    kept = sum(o.samples_total for o in one.streams.values())
    assert read - 30 <= kept <= read  # a few set aside as spikes (history.py puts some in)


def _children(pid: int) -> list[int]:
    """The process's children (proc(5): /proc/PID/task/TID/children)."""
    out: list[int] = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            out += [int(x) for x in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.parametrize("signum", ["SIGTERM", "SIGKILL"])
def test_a_replay_stopped_by_a_signal_leaves_no_process_behind(tmp_path: Path, shiftwatch_cmd, signum: str) -> None:
    # SIGTERM (what timeout(1), systemd and schedulers send) ended the parent of a --jobs 2
    # replay and left both workers blocked on their pipes for ever, holding the caller's
    # stdout and stderr; SIGKILL likewise.  Reference for the signals: signal(7).
    import signal
    import time

    names = [f"brackenfield/line{k % 5}/cell{k:03d}/weight" for k in range(200)]
    path = write_long(tmp_path / "line2.csv", readings(6_000, names))  # 1.2 M rows: seconds of work
    proc = subprocess.Popen(shiftwatch_cmd + ["replay", "--jobs", "2", "--out", str(tmp_path / "out.jsonl"),
                                              str(path)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    workers: list[int] = []
    deadline = time.monotonic() + 60
    while len(workers) < 2 and time.monotonic() < deadline and proc.poll() is None:
        workers = _children(proc.pid)
        time.sleep(0.02)
    assert len(workers) >= 2, "the replay never started its workers"
    time.sleep(0.5)  # into the work, with chunks in the queues
    assert proc.poll() is None
    try:
        proc.send_signal(getattr(signal, signum))
        _, err = proc.communicate(timeout=30)  # hung for ever while a worker held stderr
        assert proc.returncode in (143, -15, -9), proc.returncode
        assert "Traceback" not in err.decode()
        gone = time.monotonic() + 30
        while any(_alive(w) for w in workers) and time.monotonic() < gone:
            time.sleep(0.05)
        assert not any(_alive(w) for w in workers)
        assert not (tmp_path / "out.jsonl").exists() or signum == "SIGKILL"
    finally:  # a failure leaves nothing behind either
        for w in [proc.pid, *workers]:
            if _alive(w):
                os.kill(w, signal.SIGKILL)
        proc.wait(timeout=30)


def test_a_quoted_file_cut_in_the_row_that_ends_a_chunk_is_named(tmp_path: Path) -> None:
    # A file whose stream names are quoted is read row by row while planning; the row that runs
    # past a chunk's end is read on from the file.  When the file had been cut inside that row,
    # the replay took the cut row as a short row and ended there, with exit 1 and a replay of
    # the first part (found by an outside trial).
    path = write_long(tmp_path / "line4.csv", readings(3000))
    lines = path.read_text().splitlines(keepends=True)
    quoted = [lines[0]] + [f'{t},"{n}",{v}' for t, n, v in (ln.split(",") for ln in lines[1:])]
    path.write_text("".join(quoted))
    size = path.stat().st_size
    header = len(quoted[0])
    chunk = 20_011  # rows are 72 and 73 bytes: not a row's end
    read = [header]

    content = path.read_bytes()

    def cut(nbytes: int) -> None:
        read[0] += nbytes
        if len(read) == 1:  # after the first chunk: cut inside the row that runs past the next one's end
            read.append(0)
            end = content.index(b"\n", read[0] + chunk)  # that row's newline, past the chunk's last byte
            start = content.rindex(b"\n", 0, end) + 1
            assert start < read[0] + chunk < end  # the row runs past the chunk's end
            with open(path, "r+b") as f:  # past the chunk's end, inside that row
                f.truncate(read[0] + chunk + 2)

    assert size > read[0] + 3 * chunk
    with pytest.raises(CsvFormatError, match=r"line4\.csv: the file changed while it was read"):
        replay_files([path], jobs=1, chunk_bytes=chunk, progress=cut)


CUT_WHILE_PLANNING = textwrap.dedent("""
    import sys
    from pathlib import Path
    from shiftwatch.replay import CsvFormatError, replay_files
    path = Path(sys.argv[1])
    size = path.stat().st_size
    def cut(nbytes):
        if path.stat().st_size == size:
            with open(path, "r+b") as f:
                f.truncate(size // 2 + 7)
    try:
        replay_files([path], jobs=2, progress=cut)
    except CsvFormatError as exc:
        print(exc)
""")


def test_a_file_cut_while_several_processes_replay_it_ends_the_command(tmp_path: Path) -> None:
    # Quoted chunks are parsed by the parent and handed over whole (megabytes each, far more
    # than a pipe holds).  When the cut stopped the replay, the parent named the file and then
    # never exited: the queue's feeder thread still wrote a chunk to a stopped worker's pipe,
    # and the interpreter waits for that thread at exit (found by an outside trial, 3 runs of 7).
    names = [f"brackenfield/line{k % 5}/cell{k:03d}/weight" for k in range(50)]
    path = write_long(tmp_path / "line4.csv", readings(4_000, names))
    lines = path.read_text().splitlines(keepends=True)
    path.write_text(lines[0] + "".join(f'{t},"{n}",{v}' for t, n, v in (ln.split(",") for ln in lines[1:])))
    assert path.stat().st_size > 6 * 2**20  # three chunks and more
    for _ in range(3):
        cut = tmp_path / "cut.csv"
        cut.write_bytes(path.read_bytes())
        res = subprocess.run([sys.executable, "-c", CUT_WHILE_PLANNING, str(cut)], capture_output=True, text=True,
                             timeout=60, check=False)
        assert res.returncode == 0, res.stderr
        assert "cut.csv: the file changed while it was read" in res.stdout


def test_a_file_whose_lines_end_in_a_lone_carriage_return_replays_in_linear_time(tmp_path: Path) -> None:
    # Excel's "CSV (Macintosh)" ends lines with a lone \r. Each line was found by searching the
    # rest of the buffer for a \n that never came: a 13 MB file took 110 s of CPU against 0.5 s
    # with \n line ends (found by an outside trial). Reference: the same rows with \n.
    lf = write_long(tmp_path / "lf.csv", readings(40_000))  # 160,000 rows, 11 MB: 32 s before, 0.4 s after
    cr = tmp_path / "cr.csv"
    cr.write_bytes(lf.read_bytes().replace(b"\n", b"\r"))
    assert cr.stat().st_size > 10_000_000
    want = replay_files([lf], jobs=1)
    got = replay_files([cr], jobs=1)
    assert json_lines(got.records) == json_lines(want.records) and len(want.records) >= 8
    assert got.rows == want.rows == 160_000 and got.problems == want.problems == []
    # Linear, counted rather than timed: the bytes the line splitter searches, through a
    # buffer that tallies each find(), stay within a few times the file (before: each line
    # searched the rest of its megabyte buffer for a \n, about 10,000 times the file).
    from shiftwatch.sources import _Lines

    class Tally(bytearray):
        searched = 0

        def find(self, sub, start=0, end=None):  # type: ignore[no-untyped-def,override]
            at = super().find(sub, start, end)  # the bytes a search reads: up to its match, or all
            Tally.searched += (at + 1 if at >= 0 else (len(self) if end is None else end)) - start
            return at

    with open(cr, "rb") as f:
        lines = _Lines(Tally(), 0, 0, f)
        assert sum(1 for _ in lines) == 160_001 and isinstance(lines.buf, Tally)
    assert 0 < Tally.searched <= 4 * cr.stat().st_size, f"{Tally.searched:,} bytes searched"


@pytest.mark.parametrize("jobs,chunk_bytes", [(1, 65_536), (2, 65_536), (2, 1 << 20)])
def test_a_file_whose_lines_end_in_a_lone_carriage_return_is_cut_in_chunks(tmp_path: Path, jobs: int,
                                                                            chunk_bytes: int) -> None:
    # Without a \n to cut at, the whole file was one chunk: read whole into memory and in one
    # process, whatever --jobs said (found by an outside trial). Some lines end in \n\r (a \n,
    # then an empty line); reference: the same rows with \n.
    from shiftwatch.sources import open_sources, tasks

    lf = write_long(tmp_path / "lf.csv", readings(3000))
    raw = lf.read_bytes().replace(b"\n", b"\r")
    lines = raw.split(b"\r")
    for i in range(500, 520):
        lines[i] += b"\n"
    cr = tmp_path / "cr.csv"
    cr.write_bytes(b"\r".join(lines))
    pieces = list(tasks(open_sources([cr]), None, chunk_bytes))
    assert len(pieces) >= cr.stat().st_size // chunk_bytes
    want = replay_files([lf], jobs=1)
    got = replay_files([cr], jobs=jobs, chunk_bytes=chunk_bytes)
    assert json_lines(got.records) == json_lines(want.records) and len(want.records) >= 4
    assert got.rows == want.rows == 12_000 and got.problems == want.problems == []


@pytest.mark.parametrize("jobs", [1, 2])
@pytest.mark.parametrize("share", [2, 5])
def test_a_file_cut_short_while_it_is_replayed_is_named_with_the_byte_it_ends_at(tmp_path: Path, jobs: int,
                                                                                 share: int) -> None:
    # Found by an outside tester: a 23 MB CSV cut to 1,000,000 bytes while replayed was said to end
    # "at byte 10,485,716", the start of the next chunk planned, not where it ends.  The file's
    # length after truncate(2) is what stat(2) gives (st_size), the reference here.
    path = write_long(tmp_path / "line4.csv", readings(3000))
    size = path.stat().st_size
    to = size // share + 3
    assert to > 2 * 20_000  # the cut lies chunks behind the place the reading has reached

    def cut(nbytes: int) -> None:
        if path.stat().st_size == size:  # after the first chunk read
            with open(path, "r+b") as f:
                f.truncate(to)

    with pytest.raises(CsvFormatError) as caught:
        replay_files([path], jobs=jobs, chunk_bytes=20_000, progress=cut)
    assert path.stat().st_size == to
    assert str(caught.value) == f"{path}: the file changed while it was read (it ends at byte {to:,}, not {size:,})"
