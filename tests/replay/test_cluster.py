"""Replay of a dataset partitioned by stream on a Dask cluster: a LocalCluster of two
worker processes on the loopback interface, against the replay in one process."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pytest
from distributed import Client, LocalCluster

from shiftwatch.cluster import ClusterError, merge_results, replay_on_dask, stream_partitions
from shiftwatch.replay import replay_files

from .history import json_lines, readings


def write_dataset(root: Path, n: int = 6000) -> list[str]:
    """Six streams written by pyarrow with Hive partitioning on the stream (stream=NAME directories,
    the name percent-encoded), several files and row groups per stream."""
    names = [f"brackenfield/line2/filler/head{k}/fill" for k in range(1, 5)] + \
        ["brackenfield/line2/capper/torque", "brackenfield/line2/oven/zone3_temp"]
    data = readings(n, names, random_state=31)
    t = data[names[0]][0]
    table = pa.table({
        "time": pa.array((np.repeat(t, len(names)) * 1000).astype(np.int64), pa.timestamp("ms", tz="UTC")),
        "stream": pa.array(names * n),
        "value": np.stack([data[k][1] for k in names], axis=1).ravel(),
    })
    ds.write_dataset(table, root, format="parquet", partitioning=["stream"], partitioning_flavor="hive",
                     max_rows_per_group=2000, max_rows_per_file=4000, min_rows_per_group=0)
    return names


@pytest.fixture(scope="module")
def cluster():
    # The scheduler's HTTP server on a free loopback port: on its default, 8787, clusters of
    # files run side by side by the suite's workers warned that the port was taken.
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as c, Client(c) as client:
        yield client


def test_a_local_cluster_gives_the_records_of_one_process(cluster, cli, tmp_path: Path) -> None:
    root = tmp_path / "line2"
    names = write_dataset(root)
    parts = stream_partitions(root)
    assert len(parts) == 6 and all(len(p) == 2 for p in parts)  # a directory per stream, two files each
    one = replay_files([root], jobs=1)
    assert sorted(one.streams) == sorted(names) and one.rows == 36_000
    got = replay_on_dask(root, cluster)
    assert json_lines(got.records) == json_lines(one.records) and len(one.records) >= 12
    assert {n: (o.samples_total, o.records_total, o.rejected_total) for n, o in got.streams.items()} == \
        {n: (o.samples_total, o.records_total, o.rejected_total) for n, o in one.streams.items()}
    assert got.rows == one.rows and got.problem_count == one.problem_count
    # The command line on the same cluster, by the scheduler's address.
    res = cli("replay", "--dask", cluster.scheduler.address, str(root))
    assert res.returncode == 0, res.stderr
    assert res.stdout == cli("replay", str(root)).stdout
    # The command line adds each record's summary, as the daemon publishes it.
    printed = [json.loads(line) for line in res.stdout.splitlines()]
    assert all(p.pop("summary") for p in printed)
    assert [json.dumps(p) for p in printed] == json_lines(one.records)


def test_a_stream_in_two_partitions_is_refused(tmp_path: Path) -> None:
    a = replay_files([_csv(tmp_path / "a.csv", 0)])
    b = replay_files([_csv(tmp_path / "b.csv", 1)])
    with pytest.raises(ClusterError, match="is in more than one partition"):
        merge_results([a, b])


def _csv(path: Path, k: int) -> Path:
    path.write_text("time,stream,value\n" + "".join(f"{1.8e9 + i + 1000 * k},oven,{i % 7}\n" for i in range(50)))
    return path


def test_a_damaged_file_of_the_dataset_is_named_and_the_rest_replayed_on_the_cluster(cluster, cli,
                                                                                     tmp_path: Path) -> None:
    # Before (2026-12-04) a task whose partition held a damaged file failed, and that stopped the
    # whole replay with exit status 2.  Now the cluster names it as one process does, skips it,
    # and replays the rest: the same records, the same lines on stderr, exit status 1.
    root = tmp_path / "line2"
    write_dataset(root)
    parts = stream_partitions(root)
    cut = Path(parts[0][1])
    cut.write_bytes(cut.read_bytes()[:-9])  # its footer cut off
    (Path(parts[1][0]).parent / "part-9.parquet").write_bytes(b"")
    lone = root / "stream=brackenfield%2Fline2%2Fmixer%2Fspeed"  # a partition of one damaged file
    lone.mkdir()
    (lone / "part-0.parquet").write_bytes(b"PAR1 cut short")
    one = replay_files([root], jobs=1)
    assert len(one.unread_files) == 3 and one.files_read == 11
    got = replay_on_dask(root, cluster)
    assert got.unread_files == one.unread_files and got.files_read == one.files_read
    assert json_lines(got.records) == json_lines(one.records) and len(one.records) >= 10
    assert got.rows == one.rows and got.problem_count == one.problem_count
    res = cli("replay", "--dask", cluster.scheduler.address, str(root))
    alone = cli("replay", "--jobs", "1", str(root))
    assert res.returncode == alone.returncode == 1, res.stderr
    assert (res.stdout, res.stderr) == (alone.stdout, alone.stderr)
    assert res.stderr.splitlines()[-1].endswith("; 3 file(s) could not be read and were skipped")


def test_jobs_with_dask_is_refused_naming_the_conflict(cluster, cli, tmp_path: Path) -> None:
    # Before (2026-12-04) --jobs was silently ignored with --dask: each task runs in one process
    # on a worker, however many --jobs asked for.
    root = tmp_path / "line2"
    write_dataset(root, n=200)
    res = cli("replay", "--jobs", "2", "--dask", cluster.scheduler.address, str(root))
    assert res.returncode == 2 and res.stdout == "", res.stderr
    assert res.stderr == (f"shiftwatch: --jobs 2 and --dask {cluster.scheduler.address}: --jobs splits the "
                          "streams over processes on this machine, --dask over the cluster's workers (a "
                          "process per partition); give one of them\n")
