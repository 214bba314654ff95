"""The Dask path tried as a new engineer would, against odd datasets and odd clusters: an address
where something other than a Dask scheduler listens, a tls:// address without TLS settings, a
partition whose task kills every worker it runs on, a relative path, Parquet files numbered past 9,
a stream split over date directories, Ctrl-C.

The reference is always the replay of the same files in one process (itself held to the stdlib's
and pyarrow's readings in test_streaming.py and test_formats.py), or the records of each stream
fed to its engine in one batch (history.py).  The streams belong to the Brackenfield bottling plant,
an invented site.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import dask
import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pytest
from distributed import Client, LocalCluster

from shiftwatch.cluster import ClusterError, replay_on_dask
from shiftwatch.replay import replay_files

from .history import json_lines, one_batch_records, readings

NAMES = ["brackenfield/line2/filler/head1/fill", "brackenfield/line2/capper/torque",
         "brackenfield/line2/oven/zone3_temp"]


@pytest.fixture(scope="module")
def cluster() -> Iterator[Client]:
    # The scheduler's HTTP server on a free loopback port: on its default, 8787, clusters of
    # files run side by side by the suite's workers warned that the port was taken.
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as c, Client(c) as client:
        yield client


def _table(data: dict[str, tuple[np.ndarray, np.ndarray]]) -> pa.Table:
    """The readings as one long table, each stream's rows in time order, the streams one after another."""
    return pa.table({
        "time": pa.array(np.concatenate([(data[k][0] * 1000).astype(np.int64) for k in data]),
                         pa.timestamp("ms", tz="UTC")),
        "stream": pa.array([k for k in data for _ in range(data[k][0].shape[0])]),
        "value": np.concatenate([data[k][1] for k in data]),
    })


def _no_traceback(stderr: str) -> None:
    assert "Traceback" not in stderr and "Task exception was never retrieved" not in stderr, stderr


# ------------------------------------------------------------ something else at the address
class _Listener:
    """A TCP listener on the loopback interface that accepts connections and either says nothing
    or answers as a web server would (as Dask's own dashboard port, 8787, does)."""

    def __init__(self, answer: bytes | None) -> None:
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.port = self.sock.getsockname()[1]
        self.answer = answer
        self.held: list[socket.socket] = []
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self) -> None:
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            self.held.append(conn)
            if self.answer is not None:
                try:
                    conn.sendall(self.answer)
                except OSError:
                    pass

    def close(self) -> None:
        self.sock.close()
        for c in self.held:
            c.close()


@pytest.mark.parametrize("answer", [None, b"HTTP/1.1 400 Bad Request\r\nContent-Length: 0\r\n\r\n"],
                         ids=["silent", "web-server"])
def test_an_address_where_no_dask_scheduler_listens_exits_2_naming_it(cli, tmp_path: Path,
                                                                     answer: bytes | None) -> None:
    # Before: a silent listener held the command for ever (distributed's handshake read has no
    # deadline), and a web server's answer read as a frame count of 3 EiB ended in a traceback.
    ds.write_dataset(_table(readings(500, NAMES[:1])), tmp_path / "line2", format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    other = _Listener(answer)
    try:
        address = f"tcp://127.0.0.1:{other.port}"
        res = cli("replay", "--dask", address, "line2", timeout=240)
    finally:
        other.close()
    _no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert res.stderr.startswith(f"shiftwatch: no Dask scheduler answered at {address}"), res.stderr
    assert res.stdout == ""


def test_a_tls_address_without_tls_settings_exits_2_saying_what_is_missing(cli, tmp_path: Path) -> None:
    # Before: distributed's TypeError ("TLS expects a `ssl_context` argument") as a traceback.
    # The settings' names are Dask's (distributed's configuration reference: distributed.comm.tls).
    ds.write_dataset(_table(readings(500, NAMES[:1])), tmp_path / "line2", format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    other = _Listener(None)
    try:
        res = cli("replay", "--dask", f"tls://127.0.0.1:{other.port}", "line2", timeout=240)
    finally:
        other.close()
    _no_traceback(res.stderr)
    assert res.returncode == 2, res.stderr
    assert "distributed.comm.tls" in res.stderr and f"tls://127.0.0.1:{other.port}" in res.stderr, res.stderr


# ------------------------------------------------------------ a task that kills its workers
def _die(stream: str):  # a settings_for that ends the worker process, as the OOM killer would
    os._exit(1)


def test_a_partition_that_kills_every_worker_it_runs_on_is_named(tmp_path: Path) -> None:
    # Before: distributed.scheduler.KilledWorker came out of replay_on_dask (a traceback on the
    # command line) naming a task key, not the partition.
    root = tmp_path / "line2"
    ds.write_dataset(_table(readings(500, NAMES[:1])), root, format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}), \
            LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                         dashboard_address="127.0.0.1:0") as c, Client(c) as client, \
            pytest.raises(ClusterError) as err:
        replay_on_dask(root, client, settings_for=_die)
    msg = str(err.value)
    part = next(root.iterdir())
    assert str(part) in msg and "worker" in msg, msg


def _refuse(stream: str):
    raise ValueError(f"no settings for {stream}")


def test_a_task_that_fails_on_a_worker_is_named_with_its_partition(cluster: Client, tmp_path: Path) -> None:
    root = tmp_path / "line2"
    ds.write_dataset(_table(readings(500, NAMES[:1])), root, format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    with pytest.raises(ClusterError) as err:
        replay_on_dask(root, cluster, settings_for=_refuse)
    msg = str(err.value)
    assert str(next(root.iterdir())) in msg and "ValueError: no settings for" in msg, msg


# ------------------------------------------------------------ a relative path
def test_a_relative_path_is_read_by_the_workers_where_the_command_was_given(cluster: Client, cli,
                                                                          tmp_path: Path) -> None:
    # The command runs in tmp_path, the workers elsewhere (the test's own directory).  Before:
    # the workers looked for "line2" in their own directory and the replay exited 2, "cannot open".
    assert Path.cwd() != tmp_path
    ds.write_dataset(_table(readings(3000, NAMES)), tmp_path / "line2", format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    one = cli("replay", "line2")
    res = cli("replay", "--dask", cluster.scheduler.address, "line2")
    assert res.returncode == one.returncode == 0, res.stderr
    assert res.stdout == one.stdout and res.stdout.count("\n") >= 4
    assert res.stderr == one.stderr


def test_problems_name_the_files_as_given_in_the_order_of_one_process(cluster: Client, cli,
                                                                      tmp_path: Path) -> None:
    # Bad rows in two partitions: the problems name the files by the relative path given and
    # come in the files' order, as in one process.
    data = readings(3000, NAMES)
    for k, name in enumerate(NAMES):
        v = data[name][1].copy()
        v[[5 + k, 900 + k]] = np.nan
        data[name] = (data[name][0], v)
    ds.write_dataset(_table(data), tmp_path / "line2", format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    one = cli("replay", "line2")
    res = cli("replay", "--dask", cluster.scheduler.address, "line2")
    assert one.returncode == res.returncode == 1
    assert res.stdout == one.stdout
    assert res.stderr == one.stderr and "line2/stream=" in one.stderr


# ------------------------------------------------------------ file names numbered past 9
def test_a_stream_written_in_more_than_ten_files_is_read_in_their_number_order(cluster: Client,
                                                                             tmp_path: Path) -> None:
    # pyarrow.dataset.write_dataset names a partition's files part-0 ... part-11 (its
    # basename_template, "part-{i}"); read in plain text order part-10 and part-11 came before
    # part-2 and every row of part-2 to part-9 was set aside as out of order (16,000 of 24,000).
    data = readings(24_000, NAMES[2:])
    root = tmp_path / "line2"
    ds.write_dataset(_table(data), root, format="parquet", partitioning=["stream"],
                     partitioning_flavor="hive", max_rows_per_file=2000, max_rows_per_group=2000,
                     min_rows_per_group=0, preserve_order=True)
    files = sorted(p.name for p in next(root.iterdir()).iterdir())
    assert "part-11.parquet" in files and files.index("part-10.parquet") < files.index("part-2.parquet")
    one = replay_files([root])
    assert one.problem_count == 0 and one.rows == 24_000
    assert json_lines(one.records) == one_batch_records(data) and len(one.records) >= 2
    got = replay_on_dask(root, cluster)
    assert json_lines(got.records) == json_lines(one.records)


# ------------------------------------------------------------ a stream split over date directories
def test_a_stream_split_over_date_directories_is_one_task(cluster: Client, cli, tmp_path: Path) -> None:
    # day=1/stream=NAME, day=2/stream=NAME: a dataset partitioned by day, then by stream (Hive
    # partitioning on two keys, pyarrow.dataset.partitioning).  Before: the cluster replayed every
    # directory and then refused the result, "stream ... is in more than one partition".
    data = readings(6000, NAMES)
    first = {k: (t[:2500], v[:2500]) for k, (t, v) in data.items()}
    second = {k: (t[2500:], v[2500:]) for k, (t, v) in data.items()}
    root = tmp_path / "line2"
    for day, part in (("day=1", first), ("day=2", second)):
        ds.write_dataset(_table(part), root / day, format="parquet", partitioning=["stream"],
                         partitioning_flavor="hive")
    one = replay_files([root])
    assert one.problem_count == 0
    assert json_lines(one.records) == one_batch_records(data) and len(one.records) >= 4
    got = replay_on_dask(root, cluster)
    assert json_lines(got.records) == json_lines(one.records)
    res = cli("replay", "--dask", cluster.scheduler.address, str(root))
    assert res.returncode == 0, res.stderr
    assert res.stdout == cli("replay", str(root)).stdout


# ------------------------------------------------------------ Ctrl-C
def test_ctrl_c_during_a_dask_replay_exits_130_with_no_traceback(cluster: Client, shiftwatch_cmd,
                                                                 tmp_path: Path) -> None:
    # Before: the interrupted gather left a page of distributed's "Task exception was never
    # retrieved ... AllExit" on stderr.  Exit status 130 is the shells' 128 + SIGINT (signal(7)).
    names = [f"brackenfield/line{k % 4}/cell{k:03d}/weight" for k in range(24)]
    ds.write_dataset(_table(readings(60_000, names)), tmp_path / "line2", format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    proc = subprocess.Popen(shiftwatch_cmd + ["replay", "--dask", cluster.scheduler.address,
                                              "--out", str(tmp_path / "out.jsonl"), str(tmp_path / "line2")],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and proc.poll() is None and not any(
                cluster.processing().values()):
            time.sleep(0.05)
        assert proc.poll() is None, "the replay ended before it could be interrupted"
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    _no_traceback(err)
    assert proc.returncode == 130, err
    assert not (tmp_path / "out.jsonl").exists()



# ------------------------------------------------------------ rows with no stream
@pytest.mark.parametrize("kind", ["parquet", "csv"])
def test_rows_of_a_null_stream_partition_are_problems_as_in_a_long_file(cluster: Client, tmp_path: Path,
                                                                        kind: str) -> None:
    # pyarrow writes the rows of a null stream to stream=__HIVE_DEFAULT_PARTITION__ (the default
    # null_fallback of pyarrow.dataset.HivePartitioning, Hive's own name for it); an empty
    # stream= directory names no stream either.  Before: their rows were replayed as streams
    # named "__HIVE_DEFAULT_PARTITION__" and "", where a long file's row with no stream name is a
    # problem ("empty stream name") and is skipped.
    data = readings(3000, NAMES[:1])
    table = _table(data)
    nulls = table.set_column(1, "stream", pa.array([None] * table.num_rows, pa.string()))
    root = tmp_path / "line2"
    ds.write_dataset(pa.concat_tables([table, nulls]), root, format="parquet", partitioning=["stream"],
                     partitioning_flavor="hive")
    assert (root / "stream=__HIVE_DEFAULT_PARTITION__").is_dir()
    empty = root / "stream="
    empty.mkdir()
    if kind == "csv":
        (empty / "part-0.csv").write_text("time,value\n" + "".join(f"{1.8e9 + i:.0f},{i % 5}\n" for i in range(50)))
    else:
        ds.write_dataset(table.drop_columns(["stream"]).slice(0, 50), empty, format="parquet")
    res = replay_files([root])
    assert sorted(res.streams) == NAMES[:1]
    assert json_lines(res.records) == one_batch_records(data)
    assert res.read_problem_count == 3000 + 50
    assert all("no stream" in p for p in res.read_problems), res.read_problems
    got = replay_on_dask(root, cluster)
    assert json_lines(got.records) == json_lines(res.records) and got.problems == res.problems


# ------------------------------------------------------------ a scheduler with no workers
def test_a_scheduler_with_no_workers_is_told_not_waited_on_for_ever(tmp_path: Path, monkeypatch) -> None:
    # A scheduler started without workers (or whose workers all went away) takes the tasks and
    # holds them until a worker comes: before, the replay waited for ever without a word.  Now,
    # with no worker for CONNECT_TIMEOUT seconds (shortened here), it stops naming the scheduler.
    import shiftwatch.cluster as cluster_module

    monkeypatch.setattr(cluster_module, "CONNECT_TIMEOUT", 3.0, raising=False)
    root = tmp_path / "line2"
    ds.write_dataset(_table(readings(500, NAMES[:1])), root, format="parquet",
                     partitioning=["stream"], partitioning_flavor="hive")
    with LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0") as c, \
            Client(c) as client:
        with pytest.raises(ClusterError) as err:
            replay_on_dask(root, client)
        assert not any(client.processing().values())  # the tasks were cancelled, not left waiting
    msg = str(err.value)
    assert "has no workers" in msg and c.scheduler_address in msg, msg


def test_problems_of_date_directories_come_in_the_files_order(cluster: Client, cli, tmp_path: Path) -> None:
    # day=1/stream=A, day=1/stream=B, day=2/stream=A, day=2/stream=B: one process reads the files
    # in that order and lists their unreadable rows so; the cluster's tasks are per stream (A's two
    # directories, then B's), and their problems must still come in the files' order.
    data = readings(4000, NAMES[:2])
    root = tmp_path / "line2"
    for day, (a, b) in (("day=1", (0, 2000)), ("day=2", (2000, 4000))):
        part = _table({k: (t[a:b], v[a:b]) for k, (t, v) in data.items()})
        values = part.column("value").to_numpy()
        nulls = np.zeros(part.num_rows, dtype=bool)
        nulls[[7, 2000 + 9]] = True  # a row of each stream
        part = part.set_column(2, "value", pa.array(values, mask=nulls))
        ds.write_dataset(part, root / day, format="parquet", partitioning=["stream"], partitioning_flavor="hive")
    one = cli("replay", "line2")
    assert one.returncode == 1
    listed = [line for line in one.stderr.splitlines() if "no value (null)" in line]
    assert len(listed) == 4 and [line.split("/")[1] for line in listed] == ["day=1", "day=1", "day=2", "day=2"]
    res = cli("replay", "--dask", cluster.scheduler.address, "line2")
    assert res.returncode == 1 and res.stdout == one.stdout
    assert res.stderr == one.stderr


# ------------------------------------------------------------ a worker killed mid-run
def test_a_worker_killed_mid_run_is_replaced_and_the_records_are_those_of_one_process(tmp_path: Path) -> None:
    # The README's promise: a worker that dies once (SIGKILL, as the out-of-memory killer sends;
    # signal(7)) is replaced by its nanny and the task is run again, with the same records.
    names = [f"brackenfield/line{k % 4}/cell{k:03d}/weight" for k in range(8)]
    root = tmp_path / "line2"
    ds.write_dataset(_table(readings(60_000, names)), root, format="parquet", partitioning=["stream"],
                     partitioning_flavor="hive")
    one = replay_files([root])
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as c, Client(c) as client:
        pids = client.run(os.getpid)
        got: list = []
        thread = threading.Thread(target=lambda: got.append(replay_on_dask(root, client)))
        thread.start()
        deadline = time.monotonic() + 120
        busy: list[str] = []
        while not busy and time.monotonic() < deadline and thread.is_alive():
            busy = [w for w, tasks in client.processing().items() if tasks]
            time.sleep(0.02)
        assert busy, "no task was seen running"
        os.kill(pids[busy[0]], signal.SIGKILL)
        thread.join(timeout=300)
        assert not thread.is_alive()
        assert pids[busy[0]] not in client.run(os.getpid).values()  # that worker was replaced
    assert len(got) == 1
    assert json_lines(got[0].records) == json_lines(one.records) and len(one.records) >= 8
    assert {n: o.samples_total for n, o in got[0].streams.items()} == {n: o.samples_total for n, o in one.streams.items()}
