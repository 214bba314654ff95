"""Replay of a Parquet dataset partitioned by stream on a Dask cluster.

Replay is one engine per stream, so it splits by stream: each partition of
the dataset (a directory of files, such as the ``stream=NAME`` directories
that ``pyarrow.dataset.write_dataset`` writes with Hive partitioning) is
replayed by one task on the cluster, in one process there, and the records
are gathered here.  The result is the one :func:`shiftwatch.replay.replay_files`
gives for the same files in one process: the same records in the same
order, the same per-stream totals.

Requirements: every stream's rows lie in one partition (a stream found in
two is refused, since two engines would each see part of it), and every
worker can read the dataset's path (a shared file system).  dask and
distributed come with the ``cluster`` extra and are imported only here.

Example, with a scheduler already running::

    from distributed import Client
    from shiftwatch.cluster import replay_on_dask

    result = replay_on_dask("history/line2", Client("tcp://scheduler:8786"))
    for rec in result.records:
        print(rec.to_dict())
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

from shiftwatch.core.settings import DetectionSettings
from shiftwatch.replay import KEEP_PROBLEMS, ReplayResult, _record_key, replay_files
from shiftwatch.sources import CsvFormatError, expand_paths


class ClusterError(RuntimeError):
    """The dataset cannot be replayed on the cluster (dask missing, a stream in two partitions)."""


def stream_partitions(root: str | Path) -> list[list[str]]:
    """The dataset's partitions: the files of each directory under ``root`` (and of ``root``
    itself), in path order, directories in path order."""
    files = expand_paths([root]) if os.path.isdir(root) else [str(root)]
    groups: dict[str, list[str]] = {}
    for f in files:
        groups.setdefault(str(Path(f).parent), []).append(f)
    return [groups[d] for d in sorted(groups)]


def _replay_partition(files: list[str], settings_for: Callable[[str], DetectionSettings] | None,
                      unit_for: Callable[[str], str | None] | None, layout: str,
                      timezone: str | None, trace_options: dict[str, int] | None) -> ReplayResult:
    """One task: the files of one partition, replayed in one process on a worker."""
    return replay_files(files, settings_for, unit_for, jobs=1, layout=layout, timezone=timezone,
                        trace_options=trace_options)


def merge_results(parts: list[ReplayResult]) -> ReplayResult:
    """One result from the results of disjoint sets of streams, taken in file order."""
    streams: dict[str, Any] = {}
    for part in parts:
        for name, outcome in part.streams.items():
            if name in streams:
                raise ClusterError(f"stream {name!r} is in more than one partition; partition the dataset "
                                   "by stream, so that one engine sees all of its rows")
            streams[name] = outcome
    records = [rec for name in sorted(streams) for rec in streams[name].records]
    records.sort(key=_record_key)
    read_problems = [p for part in parts for p in part.read_problems][:KEEP_PROBLEMS]
    return ReplayResult(records, streams, sum(p.rows for p in parts), read_problems,
                        sum(p.read_problem_count for p in parts), sum(p.file_notes for p in parts),
                        sum(p.repeated_hour for p in parts))


def replay_on_dask(root: str | Path, client: Any, settings_for: Callable[[str], DetectionSettings] | None = None,
                   unit_for: Callable[[str], str | None] | None = None, *, layout: str = "auto",
                   timezone: str | None = None, trace_options: dict[str, int] | None = None) -> ReplayResult:
    """Replay a dataset partitioned by stream on a Dask cluster; one task per partition.

    Parameters
    ----------
    root : the dataset's directory (Parquet or CSV files, see :func:`stream_partitions`).
    client : a ``distributed.Client``, or the scheduler's address.
    settings_for, unit_for, layout, timezone, trace_options : as for :func:`shiftwatch.replay.replay_files`
        (the functions are sent to the workers, so they must pickle with cloudpickle).

    Returns the :class:`~shiftwatch.replay.ReplayResult` of
    ``replay_files(files)`` in one process.  Raises
    :class:`~shiftwatch.sources.CsvFormatError` for a file that cannot be
    read (checked on the workers) and :class:`ClusterError` when dask is
    missing, the address is malformed or unreachable, or a stream is in two
    partitions.
    """
    try:
        from distributed import Client
    except ImportError as exc:
        raise ClusterError(f"replay on a cluster needs dask.distributed ({exc}); install it with "
                           "pip install 'shiftwatch[cluster]'") from None
    partitions = stream_partitions(root)
    if not partitions:
        raise CsvFormatError(f"{root}: no files to replay")
    own = isinstance(client, str)
    if own:
        try:
            client = Client(client, timeout="20s")  # type: ignore[no-untyped-call]  # distributed's Client() is unannotated
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"cannot reach the Dask scheduler at {client}: {exc}") from None
        except ValueError as exc:  # distributed's parse of the address: no port, an unknown scheme
            raise ClusterError(f"{client!r} is not a Dask scheduler address ({exc}); give it as "
                               "tcp://HOST:PORT, for example tcp://10.20.0.5:8786") from None
    try:
        futures = client.map(_replay_partition, partitions, settings_for=settings_for, unit_for=unit_for,
                             layout=layout, timezone=timezone, trace_options=trace_options, pure=False)
        return merge_results(client.gather(futures))
    finally:
        if own:
            client.close()
