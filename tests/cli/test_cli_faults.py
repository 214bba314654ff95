"""The real command line against faults around its input and output: a full disk, odd
addresses and numbers, pipes, unreadable files in a directory.

The README's promise: a clear error naming what was wrong and where, no Python
traceback, exit 0 ok, 1 some bad rows or values, 2 could not run.  Demo data
are set at the Brackenfield bottling plant, an invented site.
"""

from __future__ import annotations

import errno
import os
import subprocess
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shiftwatch.core.timefmt import format_time

# full(4) (Linux manual page): "Writes to the /dev/full device fail with an ENOSPC error."
# The message is the C library's for that errno (strerror(3), here os.strerror).
ENOSPC_TEXT = os.strerror(errno.ENOSPC)
STREAM = "brackenfield/filler3/fill_g"
T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()


def write_filler(path: Path, n: int = 3000) -> Path:
    """One stream of fill weights with a step of 1.2 g at sample 1,800."""
    rng = np.random.default_rng(7)
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{format_time(T0 + i)},{STREAM},{500 + 0.8 * rng.standard_normal() + 1.2 * (i >= 1800):.4f}\n"
                     for i in range(n))
    return path


@pytest.fixture
def line_csv(tmp_path: Path) -> Path:
    return write_filler(tmp_path / "filler3.csv")


@pytest.fixture
def run_to(shiftwatch_cmd: list[str]):
    """``run_to(stdout, *args)``: the real command line with its standard output on ``stdout``
    (an open file)."""

    def run(stdout, *args: str, stdin=None) -> subprocess.CompletedProcess[str]:
        return subprocess.run(shiftwatch_cmd + list(args), stdout=stdout, stderr=subprocess.PIPE, stdin=stdin,
                              check=False, text=True, timeout=300)

    return run


def no_traceback(stderr: str) -> None:
    assert "Traceback" not in stderr and "Exception ignored" not in stderr, stderr


# ------------------------------------------------------------------ a full disk
@pytest.mark.parametrize("where", ["--out", "stdout"])
def test_replay_to_a_full_disk_exits_2_naming_the_output(cli, run_to, line_csv: Path, where: str) -> None:
    if where == "--out":
        res = cli("replay", "--jobs", "1", "--out", "/dev/full", str(line_csv))
        what = "--out /dev/full"
    else:
        with open("/dev/full", "w") as full:
            res = run_to(full, "replay", "--jobs", "1", str(line_csv))
        what = "standard output"
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert f"shiftwatch: {what}: cannot write: {ENOSPC_TEXT}\n" in res.stderr


@pytest.mark.parametrize("command", [("fit", "--stream", STREAM, "FILE"), ("fit", "--json", "FILE"),
                                     ("design",), ("design", "--json"), ("design", "--from", "FILE"),
                                     ("schema",)])
def test_commands_printing_to_a_full_disk_exit_2(run_to, line_csv: Path, command: tuple[str, ...]) -> None:
    args = [str(line_csv) if a == "FILE" else a for a in command]
    with open("/dev/full", "w") as full:
        res = run_to(full, *args)
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert res.stderr.endswith(f"shiftwatch: standard output: cannot write: {ENOSPC_TEXT}\n"), res.stderr


def test_replay_writes_the_same_records_to_out_and_stdout(cli, line_csv: Path, tmp_path: Path) -> None:
    # Where the disk has room the guard around the output changes nothing: --out and standard
    # output hold the same lines, and this history has a confirmed step to write.
    out = tmp_path / "records.jsonl"
    a = cli("replay", "--jobs", "1", "--out", str(out), str(line_csv))
    b = cli("replay", "--jobs", "1", str(line_csv))
    assert a.returncode == b.returncode == 0, a.stderr + b.stderr
    assert out.read_text() == b.stdout and '"phase": "confirmed"' in b.stdout


# A replay whose --out cannot be written found it out only after the whole replay, and a --out
# naming an input file overwrote the readings with the records (found by an outside trial: at
# historian scale, hours of work lost, or the history itself).
NO_REPLAY = """
import sys
import shiftwatch.replay
def no_replay(*args, **kwargs):
    raise SystemExit("the replay ran before --out was tried")
shiftwatch.replay.replay_files = no_replay
from shiftwatch.cli import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.parametrize("out", ["missing-dir/records.jsonl", "a-directory"])
def test_replay_tries_out_before_replaying(line_csv: Path, tmp_path: Path, out: str) -> None:
    import sys

    (tmp_path / "a-directory").mkdir()
    res = subprocess.run([sys.executable, "-c", NO_REPLAY, "replay", "--out", out, str(line_csv)],
                         capture_output=True, text=True, check=False, timeout=120, cwd=tmp_path)
    no_traceback(res.stderr)
    what = os.strerror(errno.ENOENT if out.startswith("missing") else errno.EISDIR)
    assert res.returncode == 2 and res.stderr == f"shiftwatch: --out {out}: cannot write: {what}\n", res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a-directory", "filler3.csv"]


@pytest.mark.parametrize("option", ["--out", "--report"])
def test_replay_refuses_an_empty_out_or_report_path(cli, line_csv: Path, tmp_path: Path, option: str) -> None:
    # `--out "$OUT"` with OUT unset printed the records to standard output, and `--report ""`
    # wrote report.html into the current directory (found by an outside trial).
    res = cli("replay", option, "", str(line_csv))
    no_traceback(res.stderr)
    assert res.returncode == 2 and res.stdout == "", res.stderr
    assert f"{option}: an empty path" in res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["filler3.csv"]


def test_replay_refuses_an_out_that_is_one_of_its_input_files(cli, line_csv: Path, tmp_path: Path) -> None:
    before = line_csv.read_bytes()
    (tmp_path / "data").mkdir()
    link = tmp_path / "data" / "same.csv"
    link.symlink_to(line_csv)
    # (the link's directory only: tmp_path holds the file twice, itself and the link, which is
    # refused as a file given twice before --out is looked at)
    for out, inputs in ((str(line_csv), [str(line_csv)]), (str(link), [str(tmp_path / "data")])):
        res = cli("replay", "--out", out, *inputs)
        no_traceback(res.stderr)
        assert res.returncode == 2, res.stderr
        assert res.stderr == (f"shiftwatch: --out {out}: is the input file {line_csv if out == str(line_csv) else link}"
                              "; the records would overwrite its readings\n"), res.stderr
        assert line_csv.read_bytes() == before
    fine = cli("replay", "--out", str(tmp_path / "records.jsonl"), str(line_csv))
    assert fine.returncode == 0 and '"phase": "confirmed"' in (tmp_path / "records.jsonl").read_text()


# A replay process killed (the out-of-memory killer, an operator) ended the replay with a
# Python traceback and exit status 1, the status of a replay with some bad rows (found by an
# outside trial).  Here the workers wait at their first piece, so the kill comes mid-replay.
WORKERS_WAIT = """
import os, sys, time
import shiftwatch.replay
parent = os.getpid()
real = shiftwatch.replay.parse_task
def slow(*args, **kwargs):
    if os.getpid() != parent:
        time.sleep(60)
    return real(*args, **kwargs)
shiftwatch.replay.parse_task = slow
from shiftwatch.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_a_replay_process_killed_ends_the_replay_with_one_line_and_exit_2(tmp_path: Path) -> None:
    import signal
    import sys
    import time

    big = write_filler(tmp_path / "filler3.csv", n=45_000)  # over one 2 MiB chunk: in processes
    assert big.stat().st_size > 2 << 20
    proc = subprocess.Popen([sys.executable, "-c", WORKERS_WAIT, "replay", "--jobs", "2", "--out",
                             str(tmp_path / "out.jsonl"), str(big)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        children = Path(f"/proc/{proc.pid}/task/{proc.pid}/children")
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and len(children.read_text().split()) < 2:
            time.sleep(0.05)
        kids = [int(k) for k in children.read_text().split()]
        assert len(kids) >= 2, kids
        time.sleep(0.5)  # past the fork, into the first piece
        os.kill(kids[0], signal.SIGKILL)
        out, err = proc.communicate(timeout=60)
        assert out == ""
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    no_traceback(err)
    assert proc.returncode == 2, err
    assert err.startswith("shiftwatch: replay process ") and err.count("\n") == 1, err
    assert "was killed by signal 9 (SIGKILL" in err and "nothing was written" in err, err
    assert not (tmp_path / "out.jsonl").exists()
    for k in kids:  # the other process was stopped too
        assert not Path(f"/proc/{k}").exists() or "Z" in Path(f"/proc/{k}/stat").read_text().split()[2]


# ------------------------------------------------------------ more jobs than cores
@pytest.mark.parametrize("jobs", ["1000", "99999999999999999999"])
def test_replay_takes_no_more_processes_than_cores_and_says_so(cli, line_csv: Path, jobs: str) -> None:
    # The cores this process may run on: sched_getaffinity(2) (Linux manual page), os.sched_getaffinity.
    # A number of jobs past any open-file limit used to hang while it was lowered one by one.
    cores = len(os.sched_getaffinity(0))
    one = cli("replay", "--jobs", "1", str(line_csv))
    many = cli("replay", "--jobs", jobs, str(line_csv))
    assert one.returncode == many.returncode == 0, many.stderr
    assert many.stdout == one.stdout
    if cores > 1:
        said = f"shiftwatch: --jobs {jobs}: replaying in {cores} processes, as many as the cores this process may run on\n"
    else:
        said = f"shiftwatch: --jobs {jobs}: replaying in 1 process, as many as the cores this process may run on\n"
    assert many.stderr == said + one.stderr


# ------------------------------------------------------------ a malformed --dask address
@pytest.mark.parametrize(("address", "why"), [
    ("nonsense", "missing port number in address 'nonsense'"),
    ("tcp://historian.brackenfield.example:port", "invalid literal for int() with base 10: 'port'"),
    ("ftp://historian.brackenfield.example:8786", "unknown address scheme 'ftp'"),
])
def test_dask_with_a_malformed_address_exits_2_naming_it_and_the_form(cli, tmp_path: Path, address: str,
                                                                     why: str) -> None:
    # The form is distributed's: a scheduler address is tcp://HOST:PORT (Dask's documentation of
    # distributed.Client and its address parser, distributed.comm.addressing, whose words "why" are).
    part = tmp_path / "data" / "stream=brackenfield%2Ffiller3%2Ffill_g"
    part.mkdir(parents=True)
    write_filler(part / "part-0.csv")
    res = cli("replay", "--dask", address, str(tmp_path / "data"))
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert res.stderr.startswith(f"shiftwatch: {address!r} is not a Dask scheduler address ("), res.stderr
    assert why in res.stderr and "give it as tcp://HOST:PORT" in res.stderr


# ------------------------------------------------------------ pipes and FIFOs
# A pipe (pipe(7)) and a FIFO (fifo(7)) are not regular files (inode(7): S_ISFIFO); opening a
# FIFO for reading blocks until a writer opens it (fifo(7)), and neither can be read by offset.
READERS = [("replay",), ("fit",), ("design", "--from")]


def _says_save_to_a_file(stderr: str, path: str) -> None:
    no_traceback(stderr)
    assert stderr.startswith(f"shiftwatch: {path}: a pipe, not a regular file; "), stderr
    assert "save the data to a file first" in stderr


@pytest.mark.parametrize("command", READERS)
def test_reading_a_pipe_exits_2_saying_to_save_it_to_a_file(run_to, line_csv: Path, command: tuple[str, ...]
                                                            ) -> None:
    with open(line_csv) as data:
        cat = subprocess.Popen(["cat"], stdin=data, stdout=subprocess.PIPE)  # cat(1): the file through a pipe
        res = run_to(subprocess.PIPE, *command, "/dev/stdin", stdin=cat.stdout)
        assert cat.stdout is not None
        cat.stdout.close()
        cat.wait()
    assert res.returncode == 2, res.stderr
    assert res.stdout == ""
    _says_save_to_a_file(res.stderr, "/dev/stdin")


@pytest.mark.parametrize("command", READERS)
def test_a_fifo_without_a_writer_is_refused_without_opening_it(cli, tmp_path: Path, command: tuple[str, ...]
                                                               ) -> None:
    fifo = tmp_path / "historian.csv"
    os.mkfifo(fifo)
    res = cli(*command, str(fifo), timeout=60)  # the code before waited here for a writer
    assert res.returncode == 2, res.stderr
    _says_save_to_a_file(res.stderr, str(fifo))


def test_the_same_rows_from_a_regular_file_given_as_dev_stdin_replay(run_to, line_csv: Path) -> None:
    # Standard input redirected from a regular file is a regular file (stat(2) of /dev/stdin),
    # which can be read by offset: it replays as the file named directly does.
    with open(line_csv) as data:
        via_stdin = run_to(subprocess.PIPE, "replay", "--jobs", "1", "/dev/stdin", stdin=data)
    direct = run_to(subprocess.PIPE, "replay", "--jobs", "1", str(line_csv))
    assert via_stdin.returncode == direct.returncode == 0, via_stdin.stderr
    assert via_stdin.stdout == direct.stdout and '"phase": "confirmed"' in direct.stdout


# ------------------------------------------------------------ unreadable entries of a directory
@pytest.mark.parametrize("entry", ["broken symlink", "fifo"])
@pytest.mark.parametrize("command", READERS)
def test_a_directorys_unreadable_entry_is_named_and_the_rest_read(cli, tmp_path: Path, entry: str,
                                                                  command: tuple[str, ...]) -> None:
    # README: a file named on the command line that cannot be read gives exit status 2; one
    # found in a directory is named the same way, skipped, and the other files are read (exit 1).
    data = tmp_path / "brackenfield-line3"
    data.mkdir()
    write_filler(data / "filler3.csv")
    bad = data / "filler4.csv"
    if entry == "broken symlink":
        os.symlink(tmp_path / "archive" / "filler4.csv", bad)
        # stat(2) follows the link: ENOENT, whose text is strerror(3)'s.
        why = f"cannot open: {os.strerror(errno.ENOENT)} (a symbolic link to {tmp_path / 'archive' / 'filler4.csv'})"
    else:
        os.mkfifo(bad)
        why = "a pipe, not a regular file; "
    given = cli(*command, str(bad), timeout=60)
    res = cli(*command, str(data), timeout=60)
    alone = cli(*command, str(data / "filler3.csv"), timeout=60)
    no_traceback(res.stderr)
    assert given.returncode == 2 and given.stderr.startswith(f"shiftwatch: {bad}: {why}"), given.stderr
    assert res.returncode == 1 and alone.returncode == 0, res.stderr
    assert res.stderr.startswith(f"{bad}: {why}"), res.stderr
    assert "; the file was skipped, the other files were " in res.stderr.splitlines()[0]
    assert res.stdout == alone.stdout and res.stdout


# ------------------------------------------------------------ fit on a file with no usable row
def _fit_says_why(res: subprocess.CompletedProcess[str], path: Path) -> None:
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    lines = res.stderr.splitlines()
    first, last = lines[0], lines[-1]
    # The problems are printed first; the last line names the first of them as the reason.
    assert last == f"shiftwatch: {path}: no stream could be read: no row was usable; the first problem: {first}"


@pytest.mark.parametrize("stream", [None, STREAM])
def test_fit_on_naive_times_without_a_timezone_says_why_no_stream_was_read(cli, tmp_path: Path,
                                                                           stream: str | None) -> None:
    # RFC 3339 (section 5.6) requires the offset; "2026-03-02 06:00:00" has none, and without
    # --timezone every row is refused.
    path = tmp_path / "filler3-local.csv"
    path.write_text("time,stream,value\n" + "".join(f"2026-03-02 06:00:{s:02d},{STREAM},{500 + s % 3}\n"
                                                    for s in range(40)))
    res = cli("fit", *(() if stream is None else ("--stream", stream)), str(path))
    _fit_says_why(res, path)
    assert "has no UTC offset" in res.stderr.splitlines()[-1]


@pytest.mark.parametrize("kind", ["string values", "corrupt"])
def test_fit_on_a_parquet_file_with_no_readable_row_says_why(cli, tmp_path: Path, kind: str) -> None:
    path = tmp_path / "oven2.parquet"
    times = pa.array([T0 + i for i in range(400)], type=pa.float64())
    if kind == "string values":
        values = pa.array([f"{182 + 0.1 * (i % 7):.1f} C" for i in range(400)], type=pa.string())
    else:
        values = pa.array([182 + 0.1 * (i % 7) for i in range(400)], type=pa.float64())
    pq.write_table(pa.table({"time": times, "stream": ["brackenfield/oven2/zone4_c"] * 400, "value": values}),
                   path, compression="snappy")
    if kind == "corrupt":
        data = bytearray(path.read_bytes())
        for i in range(100, 400):  # inside the first column chunk's pages, the footer kept
            data[i] ^= 0x5A
        path.write_bytes(bytes(data))
        with pytest.raises((OSError, pa.ArrowException)):  # pyarrow itself cannot read the rows either
            pq.read_table(path)
    else:
        assert pq.read_schema(path).field("value").type == pa.string()  # pyarrow's reading of the type
    _fit_says_why(cli("fit", str(path)), path)


# ------------------------------------------------------------ fit on a large file of several streams
def _peak_kib(cmd: list[str], cwd: Path) -> tuple[int, str]:
    """Run ``cmd``; its exit status, stderr and peak resident memory in KiB (getrusage(2)'s
    ru_maxrss of that one child, through wait4(2))."""
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    assert proc.stderr is not None
    err = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    assert proc.returncode == 2, err
    return usage.ru_maxrss, err


def test_fit_refusing_a_file_of_several_streams_keeps_no_rows_of_the_others(shiftwatch_cmd, tmp_path: Path) -> None:
    # fit without --stream refuses a file of more than one stream; it read every stream's whole
    # series into memory first (19 million rows of 64 streams: 620 MB, 9 s, for the refusal).
    # Here a second stream of 1.5 million rows: 36 MB of arrays (times, values, places) kept
    # before the refusal.  The reference is the same refusal's cost with --stream naming a
    # stream that is not there (nothing kept at all).
    path = tmp_path / "two.csv"
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{T0 + i:.0f},{STREAM},{500 + i % 5}\n" for i in range(100))
        f.writelines(f"{T0 + i:.0f},brackenfield/oven2/zone4_c,{182 + i % 7}\n" for i in range(1_500_000))
    refused, err = _peak_kib(shiftwatch_cmd + ["fit", str(path)], tmp_path)
    assert "holds 2 streams; choose one with --stream" in err, err
    nothing, err = _peak_kib(shiftwatch_cmd + ["fit", "--stream", "brackenfield/nowhere", str(path)], tmp_path)
    assert "no stream named 'brackenfield/nowhere'" in err, err
    assert refused <= nothing + 12 * 1024, (refused, nothing)


# ------------------------------------------------------------ the same file given twice
@pytest.mark.parametrize("twice", ["same name", "directory and file"])
def test_a_file_given_twice_is_refused_naming_both(cli, tmp_path: Path, twice: str) -> None:
    # Before: every row of the second reading was set aside as a repeated time (exit 1 and one
    # problem per row, each naming a line of "the" file), the records those of one reading.
    data = tmp_path / "line2"
    data.mkdir()
    path = write_filler(data / "filler3.csv")
    args = ["line2/filler3.csv", "line2/filler3.csv"] if twice == "same name" else ["line2", "line2/filler3.csv"]
    res = cli("replay", *args)
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert res.stderr == ("shiftwatch: line2/filler3.csv: given twice (the same file as line2/filler3.csv); "
                          "each file is read once\n"), res.stderr
    assert res.stdout == ""
    assert path.exists()


# ------------------------------------------------------------ --out filling up part way
def _many_steps(path: Path, streams: int = 200, n: int = 800) -> Path:
    """Brackenfield's filler heads, each with a step of 3 sigma half way: two records a stream."""
    rng = np.random.default_rng(11)
    with open(path, "w") as f:
        f.write("time,stream,value\n")
        for i in range(n):
            v = 500 + rng.standard_normal(streams) + (3.0 if i >= n // 2 else 0.0)
            f.writelines(f"{T0 + i:.0f},brackenfield/filler{k:03d}/fill_g,{v[k]:.4f}\n" for k in range(streams))
    return path


@pytest.mark.parametrize("existing", [False, True])
def test_out_that_fills_up_part_way_leaves_no_cut_records_file(shiftwatch_cmd, tmp_path: Path,
                                                               existing: bool) -> None:
    # A disk that fills while the records are written: RLIMIT_FSIZE (setrlimit(2): a write past it
    # fails with EFBIG; Python ignores SIGXFSZ) stands in for a small file system.  Before: exit 2
    # and the line, but a records file cut at 64 KiB was left, looking like a whole replay's (and an
    # earlier records file was already emptied).  Now the records go to a temporary file beside
    # --out, renamed when complete.
    import resource

    history = _many_steps(tmp_path / "fillers.csv")
    full = subprocess.run(shiftwatch_cmd + ["replay", str(history)], capture_output=True, text=True,
                          check=False, timeout=300)
    assert full.returncode == 0 and len(full.stdout) > 256 * 1024, full.stderr
    out = tmp_path / "records.jsonl"
    if existing:
        out.write_text("the last replay's records\n")

    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (64 * 1024, resource.RLIM_INFINITY))

    res = subprocess.run(shiftwatch_cmd + ["replay", "--out", str(out), str(history)], capture_output=True,
                         text=True, check=False, timeout=300, preexec_fn=limit)
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert res.stderr.endswith(f"shiftwatch: --out {out}: cannot write: {os.strerror(errno.EFBIG)}\n"), res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == (["fillers.csv", "records.jsonl"] if existing
                                                          else ["fillers.csv"])
    if existing:
        assert out.read_text() == "the last replay's records\n"
    # With room, the same command writes every record, as standard output holds them.
    ok = subprocess.run(shiftwatch_cmd + ["replay", "--out", str(out), str(history)], capture_output=True,
                        text=True, check=False, timeout=300)
    assert ok.returncode == 0 and out.read_text() == full.stdout
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fillers.csv", "records.jsonl"]


# ------------------------------------------------------------ fit counts every problem
def test_fit_counts_every_null_value_of_a_parquet_file(cli, tmp_path: Path) -> None:
    # The Parquet reader lists the first 20 problems of a piece and counts the rest; fit printed
    # "... and 80 more problems like these" for 100,000 null values (replay said 100,000).  The
    # reference count is pyarrow's own (the column's null_count).
    n = 9000
    rng = np.random.default_rng(5)
    values = 182 + 0.4 * rng.standard_normal(n) + 0.6 * (np.arange(n) >= n // 2)
    column = pa.array(values, mask=np.arange(n) % 3 == 0)
    path = tmp_path / "oven2.parquet"
    pq.write_table(pa.table({"time": T0 + np.arange(n, dtype=np.float64),
                             "stream": ["brackenfield/oven2/zone4_c"] * n, "value": column}), path)
    nulls = pq.read_table(path).column("value").null_count
    assert nulls == 3000
    res = cli("fit", str(path))
    no_traceback(res.stderr)
    assert res.returncode == 1, res.stderr
    lines = res.stderr.splitlines()
    assert len(lines) == 21 and lines[-1] == f"... and {nulls - 20} more problems like these", lines[-3:]
    assert "one step at" in res.stdout
    replay = cli("replay", str(path))
    assert f"; {nulls} unreadable row(s) or cell(s) skipped" in replay.stderr


# ------------------------------------------------------------ --out that is no regular file
def _read_fifo_in_a_thread(fifo: Path) -> tuple[Any, list[bytes]]:
    """A reader of ``fifo`` as ``cat FIFO > file`` is one: it opens the FIFO (which blocks until
    a writer opens it, fifo(7)) and reads until end of file, that is until every writer has
    closed it (pipe(7): read(2) returns 0)."""
    import threading

    got: list[bytes] = []

    def read() -> None:
        with open(fifo, "rb") as f:
            got.append(f.read())

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    return reader, got


def test_replay_out_to_a_fifo_hands_its_reader_every_record(cli, line_csv: Path, tmp_path: Path) -> None:
    # README: "a --out that is no regular file (/dev/stdout, a FIFO) is written directly".  Before
    # (found by an outside tester): the check that --out can be written opened and closed the
    # FIFO, its reader saw end of file and left, and the real opening then waited for a reader for
    # ever (the command was still there after 60 s).  The timeouts below only end a hang.
    fifo = tmp_path / "records.fifo"
    os.mkfifo(fifo)
    reader, got = _read_fifo_in_a_thread(fifo)
    res = cli("replay", "--jobs", "1", "--out", str(fifo), str(line_csv), timeout=120)
    reader.join(timeout=60)
    direct = cli("replay", "--jobs", "1", str(line_csv))
    no_traceback(res.stderr)
    assert res.returncode == direct.returncode == 0, res.stderr
    assert not reader.is_alive()
    assert got == [direct.stdout.encode()] and '"phase": "confirmed"' in direct.stdout
    assert sorted(p.name for p in tmp_path.iterdir()) == ["filler3.csv", "records.fifo"]


def test_replay_out_dash_writes_the_records_to_standard_output(cli, line_csv: Path, tmp_path: Path) -> None:
    # Common practice for command-line tools (POSIX.1-2017, XBD 12.2 Utility Syntax Guidelines,
    # guideline 13: "-" as an operand means standard input or standard output): `--out -` wrote a
    # file literally named "-".
    dash = cli("replay", "--jobs", "1", "--out", "-", str(line_csv))
    plain = cli("replay", "--jobs", "1", str(line_csv))
    no_traceback(dash.stderr)
    assert dash.returncode == plain.returncode == 0, dash.stderr
    assert dash.stdout == plain.stdout and '"phase": "confirmed"' in plain.stdout
    assert sorted(p.name for p in tmp_path.iterdir()) == ["filler3.csv"]


# ------------------------------------------------------------ control characters from files
# ECMA-48 (5th edition, 1991), section 5: C0 controls are 0x00-0x1F, C1 controls 0x80-0x9F (in
# Unicode U+0080-U+009F); ESC (0x1B) opens control sequences (CSI "ESC [", OSC "ESC ]", which a
# terminal emulator takes as commands: colours, its window title), BEL (0x07) ends an OSC.  Text
# taken from a file must reach a terminal with them escaped as \xNN (Python's repr, common practice).
def _no_control_characters(stderr: str) -> None:
    bad = [c for c in stderr if (ord(c) < 0x20 and c != "\n") or 0x7F <= ord(c) <= 0x9F]
    assert not bad, (bad, stderr)


def test_control_bytes_in_a_header_reach_stderr_escaped(cli, tmp_path: Path) -> None:
    # Found by an outside tester: the header's ESC sequences went to the terminal as they were.
    path = tmp_path / "esc.csv"
    path.write_bytes(b"time,stream,val\x1b[31mRED\x1b]0;title\x07\n1,2,3\n")
    res = cli("replay", str(path))
    no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    _no_control_characters(res.stderr)
    assert "val\\x1b[31mRED\\x1b]0;title\\x07" in res.stderr, res.stderr


def test_a_file_of_random_bytes_is_refused_as_not_utf8_text(cli, tmp_path: Path) -> None:
    # Was "header lacks column(s)" or "separated by tabs" with the binary echoed.  The bytes are
    # checked against Python's UTF-8 decoder (RFC 3629) first, so the file is surely no UTF-8 text.
    data = np.random.default_rng(13).integers(0, 256, 4096, dtype=np.uint8).tobytes()
    with pytest.raises(UnicodeDecodeError):
        data.split(b"\n")[0].decode("utf-8")
    path = tmp_path / "historian.csv"
    path.write_bytes(data)
    for command in READERS:
        res = cli(*command, str(path))
        no_traceback(res.stderr)
        assert res.returncode == 2, res.stderr
        _no_control_characters(res.stderr)
        assert res.stderr.startswith(f"shiftwatch: {path}:1: not a UTF-8 text file"), res.stderr


def test_stream_and_file_names_from_files_reach_stderr_escaped(cli, tmp_path: Path) -> None:
    # A stream name in a problem line (a NaN value, set aside and named with its stream) and a
    # file found in a directory (named with why it could not be read) come from the data, not
    # from the person typing the command.
    data = tmp_path / "line3"
    data.mkdir()
    name = "brackenfield/line3/\x1b]0;pwned\x07fill\x9b2J"
    with open(data / "filler.csv", "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        f.writelines(f"{format_time(T0 + i)},{name},{'nan' if i == 5 else 500 + i % 3}\n" for i in range(50))
    (data / "bad\x1b[2Jname.parquet").write_bytes(b"")
    res = cli("replay", str(data))
    no_traceback(res.stderr)
    assert res.returncode == 1, res.stderr
    _no_control_characters(res.stderr)
    assert "bad\\x1b[2Jname.parquet" in res.stderr
    assert "brackenfield/line3/\\x1b]0;pwned\\x07fill\\x9b2J" in res.stderr, res.stderr


@pytest.mark.parametrize("command", [("fit",), ("design", "--from")])
def test_fit_and_design_print_a_stream_name_from_the_file_escaped(cli, tmp_path: Path,
                                                                  command: tuple[str, ...]) -> None:
    # Their text for a person names the stream, read from the file; its ESC and BEL (ECMA-48)
    # went to the terminal as they were.  --json keeps the name whole (RFC 8259 escapes them).
    name = "brackenfield/filler3/\x1b]0;pwned\x07fill_g"
    path = write_filler(tmp_path / "filler3.csv")
    path.write_text(path.read_text().replace(STREAM, name))
    res = cli(*command, str(path))
    no_traceback(res.stderr)
    assert res.returncode == 0, res.stderr
    _no_control_characters(res.stdout)
    assert "brackenfield/filler3/\\x1b]0;pwned\\x07fill_g" in res.stdout, res.stdout
