"""Replay of a Parquet dataset partitioned by stream on a Dask cluster.

Replay is one engine per stream, so it splits by stream: each partition of
the dataset (the files of one stream's ``stream=NAME`` directories, as
``pyarrow.dataset.write_dataset`` writes them with Hive partitioning, wherever
they lie; other files by directory) is replayed by one task on the cluster,
in one process there, and the records are gathered here.  The result is the
one :func:`shiftwatch.replay.replay_files` gives for the same files in one
process: the same records in the same order, the same problems in the same
order, the same per-stream totals.

Requirements: every stream's rows lie in one partition (a stream found in
two is refused, since two engines would each see part of it), every worker
can read the dataset's path (a shared file system; a relative path is taken
from this process's working directory) and runs the same shiftwatch.  dask
and distributed come with the ``cluster`` extra and are imported only here.

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
from shiftwatch.sources import (
    CsvFormatError,
    _partition_stream,
    _path_order,
    expand_paths,
    open_found,
)


class ClusterError(RuntimeError):
    """The dataset cannot be replayed on the cluster (dask missing, no scheduler at the address, a
    stream in two partitions, a task that failed or kept killing its workers)."""


#: Seconds to wait for a scheduler's answer (the connection and Dask's handshake).
CONNECT_TIMEOUT = 20.0


def stream_partitions(root: str | Path) -> list[list[str]]:
    """The dataset's partitions, each a list of files in the order one process reads them
    (:func:`shiftwatch.sources.expand_paths`): the files under the ``stream=NAME`` directories of
    one stream, wherever those lie (``day=1/stream=A`` and ``day=2/stream=A`` are one
    partition), and the other files by directory; partitions in the order of their first file."""
    files = expand_paths([root]) if os.path.isdir(root) else [str(root)]
    groups: dict[tuple[str, str], list[str]] = {}
    for f in files:
        stream = _partition_stream(f)
        key = ("stream", stream) if stream is not None else ("dir", str(Path(f).parent))
        groups.setdefault(key, []).append(f)
    return list(groups.values())


def _as_given(text: str, opened: list[str], given: list[str]) -> str:
    """``text`` with the paths the worker opened named as the command was given them."""
    for o, g in sorted(zip(opened, given), key=lambda p: -len(p[0])):
        if o != g:
            text = text.replace(o, g)
    return text


def _file_of(text: str, given: list[str]) -> int:
    """Which of ``given`` a problem names (it starts with the file's name), or -1."""
    best = -1
    for i, g in enumerate(given):
        if text.startswith(g + ":") and (best < 0 or len(g) > len(given[best])):
            best = i
    return best


def _replay_partition(files: list[str], cwd: str, settings_for: Callable[[str], DetectionSettings] | None,
                      unit_for: Callable[[str], str | None] | None, layout: str,
                      timezone: str | None, trace_options: dict[str, int] | None) -> tuple[ReplayResult, list[int]]:
    """One task: the files of one partition, replayed in one process on a worker.  A relative
    path is read from ``cwd``, the directory the replay was asked for in, and problems name the
    files as given.  Returns the result and, per row problem kept, the index in ``files`` of the
    file it names (so problems can be put in the order of one process)."""
    opened = [os.path.join(cwd, f) for f in files]
    try:
        # the files were found in the dataset's directory: one that cannot be read is named and
        # left out, as replay_files leaves it out in one process
        unread: list[str] = []
        sources = open_found(opened, layout, unread)
        res = replay_files(opened, settings_for, unit_for, jobs=1, layout=layout, timezone=timezone,
                           trace_options=trace_options, sources=sources, unread_files=unread)
    except CsvFormatError as exc:
        raise CsvFormatError(_as_given(str(exc), opened, files)) from None
    if opened != files:
        res.read_problems = [_as_given(p, opened, files) for p in res.read_problems]
        res.unread_files = [_as_given(p, opened, files) for p in res.unread_files]
        res.notes = [_as_given(p, opened, files) for p in res.notes]
        for outcome in res.streams.values():
            outcome.problems = [_as_given(p, opened, files) for p in outcome.problems]
    return res, [_file_of(p, files) for p in res.read_problems]


def merge_results(parts: list[ReplayResult], places: list[list[int]] | None = None) -> ReplayResult:
    """One result from the results of disjoint sets of streams.  ``places`` gives, per part, the
    position in the whole replay's file order of the file each row problem names: the problems
    are then kept in that order, as one process keeps them; without it, in the parts' order."""
    streams: dict[str, Any] = {}
    for part in parts:
        for name, outcome in part.streams.items():
            if name in streams:
                raise ClusterError(f"stream {name!r} is in more than one partition; partition the dataset "
                                   "by stream, so that one engine sees all of its rows")
            streams[name] = outcome
    records = [rec for name in sorted(streams) for rec in streams[name].records]
    records.sort(key=_record_key)
    keyed = [((places[i][j] if places is not None else 0), i, j, p)
             for i, part in enumerate(parts) for j, p in enumerate(part.read_problems)]
    keyed.sort(key=lambda x: x[:3])
    read_problems = [x[3] for x in keyed][:KEEP_PROBLEMS]
    return ReplayResult(records, streams, sum(p.rows for p in parts), read_problems,
                        sum(p.read_problem_count for p in parts), sum(p.file_notes for p in parts),
                        sum(p.repeated_hour for p in parts), [u for p in parts for u in p.unread_files],
                        sum(p.files_read for p in parts), [n for p in parts for n in p.notes])


def _check_scheduler(address: str, timeout: float) -> None:
    """Raise :class:`ClusterError` unless a Dask scheduler completes Dask's handshake at
    ``address`` within ``timeout`` seconds.  ``distributed.Client`` bounds the connection but not
    the handshake after it: something else listening there (the dashboard's web server, a
    silent port) held it for ever, or answered with bytes read as a frame count of exabytes."""
    import asyncio
    from concurrent.futures import ThreadPoolExecutor

    from distributed.comm.core import connect
    from distributed.security import Security

    async def handshake() -> None:
        args = Security().get_connection_args("client")  # type: ignore[no-untyped-call]  # distributed is unannotated
        comm = await connect(address, timeout=timeout, **args)  # type: ignore[no-untyped-call]
        await comm.close()

    def run() -> None:  # its own thread and event loop: the caller may be inside a loop of its own
        asyncio.run(asyncio.wait_for(handshake(), timeout))

    with ThreadPoolExecutor(1) as pool:
        try:
            pool.submit(run).result()
        except ValueError as exc:  # distributed's parse of the address: no port, an unknown scheme
            raise ClusterError(f"{address!r} is not a Dask scheduler address ({exc}); give it as "
                               "tcp://HOST:PORT, for example tcp://10.20.0.5:8786") from None
        except TypeError as exc:  # tls:// with no TLS context: distributed's _expect_tls_context
            raise ClusterError(f"{address}: a tls:// scheduler needs Dask's TLS settings "
                               "(distributed.comm.tls.ca-file, distributed.comm.tls.client.cert and .key, "
                               f"in Dask's configuration or DASK_DISTRIBUTED__COMM__TLS__* variables): {exc}") from None
        except TimeoutError:
            raise ClusterError(f"no Dask scheduler answered at {address} within {timeout:g} s: something "
                               "accepted the connection but did not answer as a scheduler (the dashboard's "
                               "port, 8787, or another service?)") from None
        except OSError as exc:
            if "Timed out trying to connect" in str(exc) or not str(exc):
                raise ClusterError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
            raise ClusterError(f"no Dask scheduler answered at {address}: {exc}") from None
        except Exception as exc:  # noqa: BLE001 - bytes that are no Dask message (a web server's answer)
            raise ClusterError(f"no Dask scheduler answered at {address}: what answered is not one "
                               f"({type(exc).__name__}: {exc})") from None


#: Seconds between looks at the tasks and the scheduler's workers while waiting.
WAIT_STEP = 1.0


def _gather(client: Any, futures: list[Any], partitions: list[list[str]]) -> list[Any]:
    """The tasks' results in order; the first task that failed stops the others and is named by
    its partition's directory.  With no worker at the scheduler for :data:`CONNECT_TIMEOUT`
    seconds (none started, or all gone) the tasks would wait for one for ever: that stops the
    replay too."""
    import time

    from distributed import wait

    index = {f.key: i for i, f in enumerate(futures)}
    out: list[Any] = [None] * len(futures)
    pending = list(futures)
    seen_worker = time.monotonic()
    while pending:
        try:
            wait(pending, timeout=WAIT_STEP, return_when="FIRST_COMPLETED")  # type: ignore[no-untyped-call]
        except TimeoutError:
            if client.scheduler_info().get("workers"):
                seen_worker = time.monotonic()
            elif time.monotonic() - seen_worker > CONNECT_TIMEOUT:
                client.cancel(futures)
                raise ClusterError(f"the Dask scheduler at {client.scheduler.address} has no workers (none for "
                                   f"{CONNECT_TIMEOUT:g} s): start some with dask worker "
                                   f"{client.scheduler.address}") from None
            continue
        done = [f for f in pending if f.done()]
        pending = [f for f in pending if not f.done()]
        for fut in done:
            _take(client, fut, index[fut.key], futures, partitions, out)
    return out


def _take(client: Any, fut: Any, i: int, futures: list[Any], partitions: list[list[str]], out: list[Any]) -> None:
    """Put a finished task's result in ``out[i]``, or stop every task and raise what it failed of."""
    if fut.status != "finished":
        exc = fut.exception()
        client.cancel(futures)
        if isinstance(exc, CsvFormatError):
            raise CsvFormatError(str(exc)) from None
        where = os.path.dirname(partitions[i][0]) or "."
        if type(exc).__name__ == "KilledWorker":
            raise ClusterError(f"{where}: the replay of this partition ended every worker it ran on "
                               "(out of memory, or killed); look at the workers' logs") from None
        raise ClusterError(f"{where}: the replay of this partition failed on the cluster: "
                           f"{type(exc).__name__}: {exc}") from None
    out[i] = fut.result()


def replay_on_dask(root: str | Path, client: Any, settings_for: Callable[[str], DetectionSettings] | None = None,
                   unit_for: Callable[[str], str | None] | None = None, *, layout: str = "auto",
                   timezone: str | None = None, trace_options: dict[str, int] | None = None) -> ReplayResult:
    """Replay a dataset partitioned by stream on a Dask cluster; one task per partition.

    Parameters
    ----------
    root : the dataset's directory (Parquet or CSV files, see :func:`stream_partitions`); a
        relative path is read by the workers from this process's working directory.
    client : a ``distributed.Client``, or the scheduler's address.
    settings_for, unit_for, layout, timezone, trace_options : as for :func:`shiftwatch.replay.replay_files`
        (the functions are sent to the workers, so they must pickle with cloudpickle).

    Returns the :class:`~shiftwatch.replay.ReplayResult` of
    ``replay_files(files)`` in one process: a file that cannot be read is named in its
    ``unread_files`` and the others are replayed.  Raises
    :class:`~shiftwatch.sources.CsvFormatError` when no file can be read (checked on the
    workers) and :class:`ClusterError` when dask is
    missing, the address is malformed or no scheduler answers there, a stream is in two
    partitions, or a task failed (named by its partition).
    """
    try:
        from distributed import Client
    except ImportError as exc:
        raise ClusterError(f"replay on a cluster needs dask.distributed ({exc}); install it with "
                           "pip install 'shiftwatch[cluster]'") from None
    partitions = stream_partitions(root)
    if not partitions:
        raise CsvFormatError(f"{root}: no files to replay")
    # each file's place in one process's order (a task's files are those of one stream, taken
    # from several directories: day=1/stream=A, day=2/stream=A)
    order = {f: i for i, f in enumerate(sorted((f for part in partitions for f in part), key=_path_order))}
    own = isinstance(client, str)
    if own:
        _check_scheduler(client, CONNECT_TIMEOUT)
        try:
            client = Client(client, timeout=f"{CONNECT_TIMEOUT:g}s")  # type: ignore[no-untyped-call]  # distributed's Client() is unannotated
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"cannot reach the Dask scheduler at {client}: {exc}") from None
        except ValueError as exc:  # distributed's parse of the address: no port, an unknown scheme
            raise ClusterError(f"{client!r} is not a Dask scheduler address ({exc}); give it as "
                               "tcp://HOST:PORT, for example tcp://10.20.0.5:8786") from None
    futures: list[Any] = []
    try:
        futures = client.map(_replay_partition, partitions, cwd=os.getcwd(), settings_for=settings_for,
                             unit_for=unit_for, layout=layout, timezone=timezone, trace_options=trace_options,
                             pure=False)
        done = _gather(client, futures, partitions)
        merged = merge_results([r for r, _ in done],
                               [[order[part[k]] if k >= 0 else -1 for k in keys]
                                for part, (_, keys) in zip(partitions, done)])
        # the files not read in the order one process names them
        merged.unread_files = [u for _, u in sorted(
            (order.get(part[k], -1) if k >= 0 else -1, u)
            for part, (r, _) in zip(partitions, done) for u in r.unread_files for k in [_file_of(u, part)])]
        if not merged.files_read:  # as open_sources refuses in one process
            unread = merged.unread_files
            raise CsvFormatError(unread[0] if len(unread) == 1 else
                                 f"none of the {len(unread)} files could be read; the first: {unread[0]}")
        return merged
    except BaseException:
        if futures:
            client.cancel(futures)  # nothing left running for a replay that stopped
        raise
    finally:
        if own:
            client.close()
