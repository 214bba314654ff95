"""Replay of historical files through the same engine the daemon uses.

The files are long or wide CSV or Parquet (see :mod:`shiftwatch.sources`).
:func:`replay_files` reads them a chunk at a time and feeds each stream's
rows, in file order, to the stream's own :class:`StreamEngine` in batches of
:data:`BATCH` samples, so memory is bounded by the streams and the engines'
windows, not by the rows.  The engine is batch-independent, so the records
are those of one batch per stream; they come out sorted by
``(as_of, stream)``, a stream's records that tie keeping the order the
engine made them in.

With ``jobs`` > 1 the streams are split over that many processes (by a hash
of the name).  Each process parses every ``jobs``-th chunk and hands the
rows of streams it does not own to their owners, which process the chunks
in file order: the records and problems are the same as in one process.
The rows handed over go through memory the processes share (a few slots
per pair of processes, mapped before they start); only their names and
counts, and shares too large for a slot, go through a pipe.

Bad rows are reported as ``file:line: problem`` (Parquet: file, row group,
row and column) and skipped; everything good is still processed.  The
problems are counted, and the first :data:`KEEP_PROBLEMS` of them kept in
the order one pass over the files meets them (the rows' problems, then the
engines' per stream in name order).
"""

from __future__ import annotations

import math
import mmap
import os
import zlib
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import tzinfo
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.engine import EVENT_OPEN, StreamEngine
from shiftwatch.core.records import AlertRecord, BatchResult
from shiftwatch.core.screen import READING_REASONS, REASONS
from shiftwatch.core.settings import DetectionSettings
from shiftwatch.sources import (
    CHUNK_BYTES,
    PLACE_BITS,
    REQUIRED_COLUMNS,
    Block,
    CsvFormatError,
    OpenFiles,
    RepeatedHour,
    Source,
    check_unchanged,
    lines_between,
    open_sources,
    parquet_pieces,
    parse_task,
    tasks,
    time_zone,
)

if TYPE_CHECKING:
    from pathlib import Path

__all__ = ["BATCH", "KEEP_PROBLEMS", "REQUIRED_COLUMNS", "CsvFormatError", "ReadResult", "ReplayResult",
           "StreamOutcome", "StreamSeries", "affinity_cores", "cgroup_cpu_limit", "default_jobs",
           "own_cgroup_paths", "read_long_csv", "replay_files", "replay_series"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

#: Samples handed to the engine per call (keeps the vectorised batches in cache).
BATCH = 4096
#: Problems kept (in order) besides their count; the command line prints this many.
KEEP_PROBLEMS = 20
#: Runs of one repeated reading kept per stream for the summary and the report (all are counted).
KEEP_REPEATS = 100
#: Samples a process holds back in its streams' batches before it feeds them all early.
HELD_SAMPLES = 1 << 20


#: Where the kernel's control groups are mounted, and where a process reads its own.
CGROUP_ROOT = "/sys/fs/cgroup"
PROC_SELF_CGROUP = "/proc/self/cgroup"


def affinity_cores() -> int:
    """The cores this process may run on (its CPU affinity)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def default_jobs(cgroup_root: str | os.PathLike[str] = CGROUP_ROOT,
                 proc_cgroup: str | os.PathLike[str] = PROC_SELF_CGROUP) -> int:
    """The processes ``replay`` runs by default: the cores this process may run on, and no
    more than its control group's CPU quota allows (a container's ``--cpus 1.5``), rounded up,
    at least 1.  More processes than that only take turns, throttled by the kernel."""
    cores = affinity_cores()
    try:
        with open(proc_cgroup, encoding="utf-8", errors="replace") as f:
            text = f.read()
    except OSError:
        text = ""
    quota = cgroup_cpu_limit(cgroup_root, *own_cgroup_paths(text))
    return cores if quota is None else min(cores, max(1, math.ceil(quota)))


def own_cgroup_paths(text: str) -> tuple[str, str]:
    r"""This process's cgroup paths from the text of ``/proc/self/cgroup`` (lines
    ``hierarchy-ID:controllers:path``, cgroups(7)): the v2 one (``0::path``) and the v1 one of
    the ``cpu`` controller; ``/`` for either that is not there.

    >>> own_cgroup_paths("2:cpu,cpuacct:/batch\n0::/line4.slice\n")
    ('/line4.slice', '/batch')
    """
    v2 = v1 = "/"
    for line in text.splitlines():
        parts = line.split(":", 2)
        if len(parts) != 3 or not parts[2].startswith("/"):
            continue
        if parts[0] == "0" and parts[1] == "":
            v2 = parts[2]
        elif "cpu" in parts[1].split(","):
            v1 = parts[2]
    return v2, v1


def cgroup_cpu_limit(root: str | os.PathLike[str], v2_path: str = "/", v1_path: str | None = None) -> float | None:
    """The CPUs a control group's quota allows (quota over period), the tightest of the group at
    ``v2_path`` (cgroup v2, ``cpu.max``; also under ``root/unified``, systemd's hybrid layout)
    or ``v1_path`` (cgroup v1, ``cpu.cfs_quota_us`` and ``cpu.cfs_period_us`` under ``root/cpu``
    or ``root/cpu,cpuacct``; ``v2_path`` when not given) and of every group above it up to
    ``root``; None when no level sets one.  A missing or unreadable file, or one that holds no
    quota, sets none.

    >>> cgroup_cpu_limit("/nonexistent") is None
    True
    """
    base = os.fspath(root)
    found: list[float] = []
    for path, files in ((v2_path, _v2_files), (v2_path if v1_path is None else v1_path, _v1_files)):
        parts = [p for p in path.split("/") if p and p not in (".", "..")]
        for depth in range(len(parts), -1, -1):
            for limit in files(base, parts[:depth]):
                if limit is not None:
                    found.append(limit)
    return min(found) if found else None


def _read_words(path: str) -> list[str] | None:
    try:
        with open(path, encoding="ascii", errors="replace") as f:
            return f.read().split()
    except OSError:
        return None


def _quota(quota: str, period: str) -> float | None:
    """CPUs of a quota and period in microseconds; None for no limit or text that is none."""
    if not (quota.isdigit() and period.isdigit()):
        return None  # "max" (v2), "-1" (v1): no limit; anything else is no quota either
    q, p = int(quota), int(period)
    return q / p if q > 0 and p > 0 else None


def _v2_files(base: str, rel: list[str]) -> list[float | None]:
    out: list[float | None] = []
    for tree in (base, os.path.join(base, "unified")):
        words = _read_words(os.path.join(tree, *rel, "cpu.max"))
        out.append(_quota(words[0], words[1]) if words is not None and len(words) == 2 else None)
    return out


def _v1_files(base: str, rel: list[str]) -> list[float | None]:
    out: list[float | None] = []
    for controller in ("cpu", "cpu,cpuacct", "cpuacct,cpu"):
        quota = _read_words(os.path.join(base, controller, *rel, "cpu.cfs_quota_us"))
        period = _read_words(os.path.join(base, controller, *rel, "cpu.cfs_period_us"))
        ok = quota is not None and period is not None and len(quota) == 1 and len(period) == 1
        out.append(_quota(quota[0], period[0]) if ok and quota and period else None)
    return out


def _record_key(r: AlertRecord) -> tuple[float, str]:
    # A stream's records that tie keep the engine's order (the sorts are stable): an
    # event's final record before the detection of the event that replaces it on
    # the same sample.  (Before, a tie put `detected` first, between the other
    # event's `detected` and final records.)
    return (r.as_of, r.stream)


# ---------------------------------------------------------------------------
# What one stream's replay leaves, and the replay's result.

@dataclass
class StreamOutcome:
    """One stream's replay: its records in the order the engine made them, its first
    problems with their count, and the engine's totals."""

    records: list[AlertRecord]
    problems: list[str]
    problem_count: int
    samples_total: int
    records_total: dict[str, int]
    rejected_total: dict[str, int]
    trace: Any = None  # the report's StreamTrace, when a report was asked for
    #: 1 when the stream's engine still had an event open (detected, no final record) at the end
    open_events: int = 0
    #: the runs of one repeated reading the engine flagged (core/repeats.py; the last one with
    #: ``until`` None when the readings still repeated at the end), the first KEEP_REPEATS
    repeats: list[Any] = field(default_factory=list)
    #: how many there were in all
    repeat_count: int = 0


@dataclass
class ReplayResult:
    """Records sorted by time, per-stream outcomes, and what could not be read."""

    records: list[AlertRecord]
    streams: dict[str, StreamOutcome]
    rows: int
    read_problems: list[str]
    read_problem_count: int
    #: Of read_problem_count, the notes about whole files (not valid UTF-8), not rows.
    file_notes: int = 0
    #: Times without an offset read as the second occurrence of the hour repeated when the
    #: clocks went back (:class:`shiftwatch.sources.RepeatedHour`).
    repeated_hour: int = 0
    #: Files found in a directory that could not be read, each its problem (in file order);
    #: the others were replayed.
    unread_files: list[str] = field(default_factory=list)
    #: Files replayed.
    files_read: int = 0
    #: What the summary says once about a file though nothing of it was lost (an unnamed empty
    #: column ignored), in file order; not problems.
    notes: list[str] = field(default_factory=list)

    @property
    def problems(self) -> list[str]:
        """The first :data:`KEEP_PROBLEMS` problems: unreadable rows, then each stream's in name order."""
        out = list(self.read_problems)
        for name in sorted(self.streams):
            if len(out) >= KEEP_PROBLEMS:
                break
            out += self.streams[name].problems
        return out[:KEEP_PROBLEMS]

    @property
    def problem_count(self) -> int:
        return self.read_problem_count + sum(s.problem_count for s in self.streams.values())


# ---------------------------------------------------------------------------
# One process's share: its streams' engines and the problems of its chunks.

class _Feeder:
    """Feeds the rows of its streams to their engines, :data:`BATCH` at a time.

    A stream's rows wait until a full batch is there, so the batches are
    those of one pass over the stream; when more than :data:`HELD_SAMPLES`
    wait in all, every stream is fed what it has.
    """

    def __init__(self, sources: list[Source], settings_for: Callable[[str], DetectionSettings],
                 unit_for: Callable[[str], str | None], trace_options: dict[str, int] | None,
                 tz: tzinfo | None = None) -> None:
        self.sources = sources
        # With --timezone: the hour repeated when the clocks go back, told apart by each
        # stream's own order.
        self.repeated = RepeatedHour(tz) if tz is not None else None
        self.settings_for = settings_for
        self.unit_for = unit_for
        self.trace_options = trace_options
        self.engines: dict[str, StreamEngine] = {}
        self.held: dict[str, list[tuple[FloatArray, FloatArray, IntArray]]] = {}
        self.held_count: dict[str, int] = {}
        self.held_total = 0
        self.records: dict[str, list[AlertRecord]] = {}
        self.problems: dict[str, list[str]] = {}
        self.problem_count: dict[str, int] = {}
        self.traces: dict[str, Any] = {}
        self.repeats: dict[str, list[Any]] = {}  # flagged runs of one repeated reading that ended
        self.repeat_count: dict[str, int] = {}
        # rows and their problems
        self.rows = 0
        self.read_problems: list[tuple[int, int, int, int, str]] = []  # (file, 1, chunk, order, message)
        self.read_kept = 0
        self.read_count = 0
        self.notes: dict[int, str] = {}
        self.remarks: dict[int, str] = {}

    def take_block(self, block: Block) -> None:
        """Count a block's rows and keep its problems (all but the parts)."""
        self.rows += block.rows
        self.read_count += len(block.problems) + block.unlisted
        if block.note is not None and block.file not in self.notes:
            self.notes[block.file] = block.note
            self.read_count += 1
        if block.remark is not None:
            self.remarks.setdefault(block.file, block.remark)
        if self.read_kept < KEEP_PROBLEMS:
            # Later chunks come after these in the files: once KEEP_PROBLEMS are
            # kept here, no later one can be among the first.
            for i, msg in enumerate(block.problems[:KEEP_PROBLEMS - self.read_kept]):
                self.read_problems.append((block.file, 1, block.index, i, msg))
            self.read_kept = len(self.read_problems)

    def add(self, parts: Iterable[tuple[str, FloatArray, FloatArray, IntArray]]) -> None:
        for name, t, v, p in parts:
            if self.repeated is not None:
                t = self.repeated.follow(name, t)
            held = self.held.get(name)
            if held is None:
                held = self.held[name] = []
                self.held_count[name] = 0
                self._start(name)
            held.append((t, v, p))
            self.held_count[name] += t.shape[0]
            self.held_total += t.shape[0]
            if self.held_count[name] >= BATCH:
                self._feed(name, final=False)
        if self.held_total > HELD_SAMPLES:
            for name in list(self.held):
                self._feed(name, final=True)

    def _start(self, name: str) -> None:
        self.engines[name] = StreamEngine(name, self.settings_for(name), unit=self.unit_for(name))
        self.records[name] = []
        self.problems[name] = []
        self.problem_count[name] = 0
        if self.trace_options is not None:
            from shiftwatch.report import StreamTrace

            self.traces[name] = StreamTrace(name, **self.trace_options)

    def _feed(self, name: str, final: bool) -> None:
        held = self.held[name]
        if not held:
            return
        if len(held) == 1:
            t, v, p = held[0]
        else:
            t = np.concatenate([h[0] for h in held])
            v = np.concatenate([h[1] for h in held])
            p = np.concatenate([h[2] for h in held])
        n = t.shape[0]
        upto = n if final else n - n % BATCH
        eng = self.engines[name]
        trace = self.traces.get(name)
        records = self.records[name]
        for a in range(0, upto, BATCH):
            tb, vb = t[a:a + BATCH], v[a:a + BATCH]
            res = eng.process(tb, vb)
            if trace is not None:
                trace.add_batch(tb, vb, res)
            records.extend(res.records)
            if res.repeats:
                self._repeats(name, res.repeats)
            for rej in res.rejected:
                if rej.reason in READING_REASONS:
                    continue
                self._problem(name, rej.reason, int(p[a + rej.position]) if rej.position >= 0 else -1)
        self.held_total -= upto
        if upto == n:
            held.clear()
            self.held_count[name] = 0
        else:
            held[:] = [(t[upto:].copy(), v[upto:].copy(), p[upto:].copy())]  # not views of the whole
            self.held_count[name] = n - upto

    def _repeats(self, name: str, spans: Any) -> None:
        ended = [s for s in spans if s.until is not None]
        if ended:
            kept = self.repeats.setdefault(name, [])
            kept += ended[:KEEP_REPEATS - len(kept)]
            self.repeat_count[name] = self.repeat_count.get(name, 0) + len(ended)

    def _problem(self, name: str, reason: str, place: int) -> None:
        self.problem_count[name] += 1
        kept = self.problems[name]
        if len(kept) < KEEP_PROBLEMS:
            where = "?:0" if place < 0 else self.sources[place >> PLACE_BITS].where(place & ((1 << PLACE_BITS) - 1))
            kept.append(f"{where}: stream {name}: {REASONS[reason]}")

    def finish(self) -> dict[str, StreamOutcome]:
        for name in list(self.held):
            self._feed(name, final=True)
        out = {}
        for name, eng in self.engines.items():
            trace = self.traces.get(name)
            if trace is not None:
                trace.close()
            reps, count = self.repeats.get(name, []), self.repeat_count.get(name, 0)
            if eng.repeating is not None:  # the readings still repeated at the end
                reps, count = [*reps, eng.repeating][:KEEP_REPEATS], count + 1
            out[name] = StreamOutcome(self.records[name], self.problems[name], self.problem_count[name],
                                      eng.samples_total, dict(eng.records_total), dict(eng.rejected_total), trace,
                                      int(eng.state == EVENT_OPEN), reps, count)
        return out

    def read_summary(self) -> tuple[int, list[tuple[int, int, int, int, str]], int, dict[int, str], int,
                                    dict[int, str]]:
        return (self.rows, self.read_problems, self.read_count, self.notes,
                0 if self.repeated is None else self.repeated.moved, self.remarks)


def _merge(parts: list[tuple[dict[str, StreamOutcome], tuple[Any, ...]]]) -> ReplayResult:
    """One result from the processes' shares: rows' problems in file order (a file's note
    first), records sorted as one pass over the streams in name order leaves them."""
    streams: dict[str, StreamOutcome] = {}
    rows = 0
    kept: list[tuple[int, int, int, int, str]] = []
    count = 0
    notes: dict[int, str] = {}
    remarks: dict[int, str] = {}
    repeated = 0
    for outcome, (r, k, c, n, h, m) in parts:
        streams.update(outcome)
        rows += r
        kept += k
        count += c
        notes.update(n)
        repeated += h
        remarks.update(m)
    kept += [(f, 0, 0, 0, note) for f, note in notes.items()]
    kept.sort(key=lambda x: x[:4])
    records: list[AlertRecord] = []
    for name in sorted(streams):
        records += streams[name].records
    records.sort(key=_record_key)
    return ReplayResult(records, streams, rows, [x[4] for x in kept[:KEEP_PROBLEMS]], count, len(notes),
                        repeated, notes=[remarks[f] for f in sorted(remarks)])


# ---------------------------------------------------------------------------
# The replay, in one process or several.

def replay_files(paths: Iterable[str | Path], settings_for: Callable[[str], DetectionSettings] | None = None,
                 unit_for: Callable[[str], str | None] | None = None, *, jobs: int = 1,
                 layout: str = "auto", timezone: str | tzinfo | None = None,
                 trace_options: dict[str, int] | None = None,
                 progress: Callable[[int], None] | None = None,
                 chunk_bytes: int = CHUNK_BYTES, sources: list[Source] | None = None,
                 unread_files: Iterable[str] = ()) -> ReplayResult:
    """Replay files (long or wide CSV, Parquet, directories of them) through one engine per stream.

    Parameters
    ----------
    paths : the files, read in this order; a directory stands for its files.
    settings_for, unit_for : detection settings and unit per stream (defaults without).
    jobs : processes to split the streams over (1: this process); fewer when the open-file
        limit cannot hold their queues (see :func:`_jobs_the_files_allow`).
    layout : ``auto``, ``long`` or ``wide``.
    timezone : IANA name (or tzinfo) for times without a UTC offset; they are refused without it.
    trace_options : when given, each stream's :class:`shiftwatch.report.StreamTrace` is built
        with these options and returned in its outcome.
    progress : called with the input bytes of each piece once it is read.
    chunk_bytes : bytes of CSV per chunk.
    sources : the files already opened (:func:`shiftwatch.sources.open_sources`).
    unread_files : with ``sources``, the problems of the files left out (the result's
        ``unread_files``).

    A file found in a directory that cannot be opened (a damaged Parquet footer, an empty
    file, a header that fits no layout) is left out, named in the result's ``unread_files``,
    and the other files are replayed.  Raises :class:`CsvFormatError` before replaying
    anything when a file named in ``paths`` itself cannot be opened or its columns fit no
    layout, when no file can be, or when the time zone is unknown.
    """
    tz = timezone if timezone is None or isinstance(timezone, tzinfo) else time_zone(timezone)
    unread = list(unread_files)
    if sources is None:
        sources = open_sources(list(paths), layout, unread)
    result = _replay_sources(sources, settings_for, unit_for, jobs, tz, trace_options, progress, chunk_bytes)
    check_unchanged(sources)
    result.unread_files = unread
    result.files_read = len(sources)
    return result


def _replay_sources(sources: list[Source], settings_for: Callable[[str], DetectionSettings] | None,
                    unit_for: Callable[[str], str | None] | None, jobs: int, tz: tzinfo | None,
                    trace_options: dict[str, int] | None, progress: Callable[[int], None] | None,
                    chunk_bytes: int) -> ReplayResult:
    if settings_for is None:
        defaults = DetectionSettings()
        settings_for = lambda stream: defaults
    if unit_for is None:
        unit_for = lambda stream: None
    jobs = _jobs_the_files_allow(jobs)
    if jobs <= 1 or _small(sources, chunk_bytes):
        feeder = _Feeder(sources, settings_for, unit_for, trace_options, tz)
        with OpenFiles() as opened:
            for task in tasks(sources, tz, chunk_bytes):
                block = parse_task(task, sources, tz, opened)
                feeder.take_block(block)
                feeder.add(block.parts)
                if progress is not None:
                    progress(block.nbytes)
        return _merge([(feeder.finish(), feeder.read_summary())])
    return _replay_in_processes(sources, settings_for, unit_for, trace_options, tz, jobs, progress, chunk_bytes)


#: Open files the parent keeps besides its queues' pipes (the files read, standard streams,
#: the interpreter's own), and the open files each queue takes (the two ends of its pipe).
SPARE_FILES = 64
FILES_PER_QUEUE = 2


def _jobs_the_files_allow(jobs: int) -> int:
    """``jobs``, or fewer when the open-file limit cannot hold their queues.

    N processes take a queue for each ordered pair of them, N for the plans and one for the
    results: 2 (N^2 + 1) open files in every process.  With 1,024 (a common soft limit) that
    stops at 22 processes; the soft limit is raised towards the hard one as far as needed,
    and where the hard limit is lower still the replay runs in as many processes as it
    allows (the records do not depend on their number).
    """
    if jobs <= 1:
        return jobs
    try:
        import resource
    except ImportError:  # not on a Unix
        return jobs

    def need(n: int) -> int:
        return FILES_PER_QUEUE * (n * n + 1) + SPARE_FILES

    def most(files: int) -> int:  # the largest N with need(N) <= files, solved for N
        return max(1, math.isqrt(max(0, (files - SPARE_FILES) // FILES_PER_QUEUE - 1)))

    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft != resource.RLIM_INFINITY and soft < need(jobs):
        want = need(jobs) if hard == resource.RLIM_INFINITY else min(hard, need(jobs))
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE, (want, hard))
            soft = want
        except (ValueError, OSError, OverflowError):  # OverflowError: more than an rlim_t holds
            pass
    if soft == resource.RLIM_INFINITY:
        return jobs
    return min(jobs, most(soft))


def _small(sources: list[Source], chunk_bytes: int) -> bool:
    """True when the files make one piece: nothing to share."""
    if len(sources) != 1:
        return False
    src = sources[0]
    if src.kind == "parquet":
        return len(src.group_rows) <= 2 and len(parquet_pieces(src, src.group_rows[-1])) == 1
    try:
        return os.path.getsize(src.path) - src.body_start <= chunk_bytes
    except OSError:
        return False


def _owner(name: str, jobs: int) -> int:
    return zlib.crc32(name.encode("utf-8", "surrogatepass")) % jobs


_END = "end"


#: Chunks a process parses ahead of what it feeds, while it waits for another's chunk.
LOOKAHEAD = 2
#: A shared slot holds this many times an even share (1 / jobs) of a chunk of CSV lines of
#: 12 bytes (a row handed over takes 24 bytes: time, value, place).  With 2 processes a slot
#: takes any share of a chunk of lines of 12 bytes or more; with more processes, the shares
#: of up to SLOT_SCALE times the even share, so the mapping stays (jobs - 1) x 16 chunks in all.
#: A share that does not fit (short lines, rows grouped by stream, a Parquet row group) goes
#: through the pipe instead.
SLOT_SCALE = 2


class _Slots:
    """Shared memory in which one process hands chunk shares to another: LOOKAHEAD + 2 slots,
    used in turn.  The sender fills a slot before its message waits for room in the queue,
    which holds at most LOOKAHEAD messages: then the receiver may still be copying out the
    message before those, and has copied out every earlier one (it copies a share out before
    it asks for the next message).  So the slot filled is never one still being read."""

    def __init__(self, slot_bytes: int) -> None:
        self.count = LOOKAHEAD + 2
        self.rows = max(1, slot_bytes // 24)
        self.mem: mmap.mmap | None
        try:
            self.mem = mmap.mmap(-1, self.count * self.rows * 24)  # anonymous and shared: kept across fork
        except OSError:  # no address space or commit left for it (ulimit -v, strict overcommit)
            self.rows = 0  # every share goes through the pipe
            self.mem = None
        self.next = 0

    def view(self, slot: int, rows: int) -> tuple[FloatArray, FloatArray, IntArray]:
        assert self.mem is not None  # a share is put in a slot only when there are slots
        base = slot * self.rows * 24
        t = np.frombuffer(self.mem, np.float64, rows, base)
        v = np.frombuffer(self.mem, np.float64, rows, base + 8 * self.rows)
        p = np.frombuffer(self.mem, np.int64, rows, base + 16 * self.rows)
        return t, v, p

    def put(self, parts: list[tuple[str, FloatArray, FloatArray, IntArray]]) -> tuple[Any, ...]:
        """The message that hands ``parts`` over: written into the next slot, or packed whole
        (:func:`_pack`) when they do not fit."""
        rows = sum(p[1].shape[0] for p in parts)
        if not parts or rows > self.rows:
            return _pack(parts)
        slot = self.next
        self.next = (slot + 1) % self.count
        t, v, p = self.view(slot, rows)
        np.concatenate([q[1] for q in parts], out=t)
        np.concatenate([q[2] for q in parts], out=v)
        np.concatenate([q[3] for q in parts], out=p)
        return ("slot", slot, tuple(q[0] for q in parts), tuple(q[1].shape[0] for q in parts))

    def take(self, msg: tuple[Any, ...], line0: int = 0) -> list[tuple[str, FloatArray, FloatArray, IntArray]]:
        """The parts a message hands over, each in arrays of its own (``line0``: see
        :func:`_unpack`)."""
        if msg[0] != "slot":
            return _unpack(msg, line0)
        _, slot, names, counts = msg
        t, v, p = self.view(slot, sum(counts))
        return _unpack((names, counts, t, v, p), line0)


class _FirstLine:
    """The first line of a CSV chunk, for a chunk read row by row (:meth:`_LineCount.finder`):
    the task's when known, else counted from the last chunk of its file fed whose first line
    is known (kept in ``found``)."""

    def __init__(self, count: _LineCount, task: tuple[Any, ...]) -> None:
        self.count = count
        self.task = task
        self.found: int | None = None

    def __call__(self) -> int:
        _, fidx, line0, _, _, offset, _ = self.task
        if line0 is not None:
            return int(line0)
        if self.found is None:
            src = self.count.sources[fidx]
            at, line = self.count.known.get(fidx, (src.body_start, src.body_line))
            self.found = line + lines_between(src.path, at, offset, self.count.opened)
        return self.found


class _Pipe:
    """The messages of one process to another (a pipe; ``put`` and ``get`` as a bounded
    ``multiprocessing.Queue`` has them), written by the sender's own thread.

    A queue's writes are made by a thread of its own, which waits for the interpreter's lock
    (up to the 5 ms switch interval, while the sender parses or feeds) before a message
    leaves; the receiver meanwhile waited for the chunk.  Here a message that fits into the
    room the pipe has left is written at once (it cannot block), and one that does not (a
    share pickled whole: a Parquet row group, short lines) goes to a thread, as in a queue,
    so two processes writing large messages to each other never wait for each other's read;
    the messages after it follow it through the thread, in order.  At most ``maxsize``
    messages are put and not yet taken (a semaphore, as a queue's)."""

    def __init__(self, ctx: Any, maxsize: int) -> None:
        self.r, self.w = os.pipe()
        self.sem = ctx.BoundedSemaphore(maxsize)
        self.size: int | None = None  # the pipe's capacity, asked for by the sender
        self.lock: Any = None  # the sender's, made after the fork
        self.queued: deque[bytes] = deque()  # written by the thread, in order
        self.thread: Any = None

    def put(self, obj: Any) -> None:
        import pickle
        import threading

        self.sem.acquire()
        data = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
        frame = len(data).to_bytes(8, "little") + data
        if self.lock is None:
            self.lock = threading.Condition(threading.Lock())
        with self.lock:
            if not self.queued and len(frame) <= self._room():
                _write_all(self.w, frame)
                return
            self.queued.append(frame)
            if self.thread is None:
                self.thread = threading.Thread(target=self._write_queued, daemon=True)
                self.thread.start()
            self.lock.notify()

    def _room(self) -> int:
        import fcntl
        import termios

        try:
            if self.size is None:
                self.size = fcntl.fcntl(self.w, 1032)  # F_GETPIPE_SZ (Linux)
            waiting = bytearray(4)
            fcntl.ioctl(self.w, termios.FIONREAD, waiting)  # bytes written and not yet read
        except OSError:
            self.size = 0  # every message through the thread
            return 0
        return self.size - int.from_bytes(waiting, "little")

    def _write_queued(self) -> None:
        while True:
            with self.lock:
                while not self.queued:
                    self.lock.wait()
                frame = self.queued[0]  # left in place while written: later messages wait for it
            _write_all(self.w, frame)
            with self.lock:
                self.queued.popleft()
                self.lock.notify_all()

    def flush(self) -> None:
        """Wait until the thread has written every message (before the process ends: a
        daemon thread would be stopped in the middle of one)."""
        if self.lock is None:
            return
        with self.lock:
            while self.queued:
                self.lock.wait()

    def ready(self) -> bool:
        """Whether a message has begun to arrive (``get`` then waits at most for its rest)."""
        import fcntl
        import termios

        waiting = bytearray(4)
        fcntl.ioctl(self.r, termios.FIONREAD, waiting)  # not select(): descriptors past 1,023
        return int.from_bytes(waiting, "little") > 0

    def get(self) -> Any:
        import pickle

        size = int.from_bytes(_read_all(self.r, 8), "little")
        obj = pickle.loads(_read_all(self.r, size))
        self.sem.release()
        return obj


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _read_all(fd: int, size: int) -> bytearray:
    buf = bytearray(size)
    view = memoryview(buf)
    while view:
        got = os.readv(fd, [view])
        if got == 0:
            raise EOFError("a replay process's pipe closed")
        view = view[got:]
    return buf


def _end_with_parent(parent: int) -> None:
    """Have the kernel kill this process when its parent ends, however it ends (prctl(2),
    PR_SET_PDEATHSIG): a worker left behind blocks on its pipes for ever, holding the
    caller's standard output and error.  Also ends it now if the parent is gone already."""
    import ctypes
    import signal

    try:
        ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):  # not Linux: the parent's own stop still ends its workers
        pass
    if os.getppid() != parent:
        os._exit(1)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # not the parent's _stop_on_sigterm: _stop ends it


class _Stopped(SystemExit):
    """SIGTERM while processes replay: the parent stops them, then exits as SIGTERM would (143)."""


def _stop_on_sigterm(signum: int, frame: Any) -> None:
    raise _Stopped(128 + signum)


def _worker(me: int, jobs: int, sources: list[Source], settings_for: Any, unit_for: Any,
            trace_options: dict[str, int] | None, tz: tzinfo | None, plan: Any, pairs: dict[tuple[int, int], Any],
            slots: dict[tuple[int, int], _Slots], results: Any, done: Any, parent: int) -> None:
    """Process ``me`` of ``jobs``: parse chunks ``me``, ``me + jobs``, ... and pass their rows on to
    the streams' owners; feed its own streams every chunk's rows in chunk order.

    While the chunk to feed next is another's and has not come yet, it parses up to
    :data:`LOOKAHEAD` of its own ahead, so the processes parse at the same time.
    """
    import traceback

    try:
        _end_with_parent(parent)
        feeder = _Feeder(sources, settings_for, unit_for, trace_options, tz)
        opened = OpenFiles()
        own: deque[tuple[int, list[Any], tuple[Any, ...]]] = deque()
        owners: dict[str, int] = {}
        next_own = me
        total: int | None = None
        lines = _LineCount(sources, opened)

        def parse_next() -> None:
            nonlocal next_own, total
            task = plan.get()
            if task == _END:
                total = next_own  # at most; a chunk another lacks ends the loop sooner
                for j in range(jobs):
                    if j != me:
                        pairs[me, j].put(_END)
                return
            finder = lines.finder(task)
            block = parse_task(task, sources, tz, opened, finder)
            info = lines.info(task, block, finder)
            feeder.take_block(block)
            split: list[list[Any]] = [[] for _ in range(jobs)]
            for part in block.parts:
                to = owners.get(part[0])
                if to is None:  # a CRC-32 once per stream, not once per stream and piece
                    to = owners[part[0]] = _owner(part[0], jobs)
                split[to].append(part)
            for j in range(jobs):
                if j != me:
                    pairs[me, j].put((info, slots[me, j].put(split[j])))
            own.append((block.index, split[me], info))
            next_own += jobs
            with done.get_lock():
                done.value += block.nbytes

        k = 0
        while total is None or k < total:
            owner = k % jobs
            if owner == me:
                while not own and total is None:
                    parse_next()
                if not own:
                    break
                _, parts, info = own.popleft()
                first = lines.first(info)
                if info[2]:  # places counted from the chunk's first line
                    for part in parts:
                        places = part[3]
                        places += first
                feeder.add(parts)
            else:
                if not pairs[owner, me].ready() and total is None and len(own) < LOOKAHEAD:
                    parse_next()
                    continue
                got = pairs[owner, me].get()
                if isinstance(got, str):  # _END: the owner had no chunk k, there are k chunks
                    break
                info, msg = got
                first = lines.first(info)
                feeder.add(slots[owner, me].take(msg, first if info[2] else 0))
            k += 1
        outcome = feeder.finish()
        for j in range(jobs):
            if j != me:
                pairs[me, j].flush()
        results.put(("ok", me, outcome, feeder.read_summary()))
        opened.close()
    except CsvFormatError as exc:
        results.put(("format", me, str(exc), None))
    except BaseException:  # noqa: BLE001 - reported to the parent, which stops the others
        results.put(("error", me, traceback.format_exc(), None))


def _pack(parts: list[tuple[str, FloatArray, FloatArray, IntArray]]) -> tuple[Any, ...]:
    """A chunk's rows for another process: the streams' names and row counts, and three arrays
    (times, values, places) of all of them in turn.  Three arrays pickle in a fraction of the
    time of three per stream (a chunk holds a few hundred streams' rows)."""
    if not parts:
        return ((), (), None, None, None)
    return (tuple(p[0] for p in parts), tuple(p[1].shape[0] for p in parts),
            np.concatenate([p[1] for p in parts]), np.concatenate([p[2] for p in parts]),
            np.concatenate([p[3] for p in parts]))


def _unpack(packed: tuple[Any, ...], line0: int = 0) -> list[tuple[str, FloatArray, FloatArray, IntArray]]:
    """:func:`_pack`'s parts again, each in arrays of its own (not views that would keep the
    whole chunk's arrays alive while a stream holds its rows); ``line0`` added to the places
    (those of a chunk whose first line was not known when it was read)."""
    names, counts, t, v, p = packed
    out = []
    a = 0
    for name, n in zip(names, counts):
        b = a + n
        out.append((name, t[a:b].copy(), v[a:b].copy(), p[a:b] + line0 if line0 else p[a:b].copy()))
        a = b
    return out


class _LineCount:
    """A process's count of the lines of the CSV chunks it feeds, when the parent plans them
    without counting (it would read and count every chunk of every file again, while the
    processes that read the chunks count their lines as they read them).

    Each chunk is handed on with :meth:`info` ``(first, lines, relative, file, offset)``: its
    first line when known (a file's first chunk, one after a chunk with quotes, one read row by
    row), its lines, whether its places count from 0, and where it is.  Fed in order, the
    chunks give each other their first lines (:meth:`first`).  A chunk read row by row needs
    its first line before that (its problems name their lines): :meth:`finder` counts the
    lines from the last chunk of the file fed whose first line is known (read again)."""

    def __init__(self, sources: list[Source], opened: dict[str, Any]) -> None:
        self.sources = sources
        self.opened = opened
        self.next: int | None = None  # the first line of the chunk after the last fed
        self.known: dict[int, tuple[int, int]] = {}  # file -> (offset, line) of a chunk fed

    def finder(self, task: tuple[Any, ...]) -> _FirstLine | None:
        return _FirstLine(self, task) if task[0] == "csv" else None

    @staticmethod
    def info(task: tuple[Any, ...], block: Block, finder: _FirstLine | None) -> tuple[Any, ...]:
        if task[0] != "csv":
            return (None, -1, False, block.file, -1)
        first = task[2] if finder is None or finder.found is None else finder.found
        return (first, block.lines, block.relative, task[1], task[5])

    def first(self, info: tuple[Any, ...]) -> int:
        """The first line of the chunk fed now (0 where none is known: not a CSV chunk)."""
        first, lines, relative, fidx, offset = info
        if first is None:
            first = self.next
        if first is None:
            if relative:
                raise RuntimeError("a chunk's first line is not known")
            first = 0
        elif offset >= 0:
            self.known[fidx] = (offset, first)
        self.next = None if lines < 0 else first + lines
        return int(first)


def _replay_in_processes(sources: list[Source], settings_for: Any, unit_for: Any,
                         trace_options: dict[str, int] | None, tz: tzinfo | None, jobs: int,
                         progress: Callable[[int], None] | None, chunk_bytes: int) -> ReplayResult:
    import multiprocessing  # here: one process never pays for it

    ctx = multiprocessing.get_context("fork")  # the workers inherit the settings and the opened files
    plans = [ctx.Queue(maxsize=4) for _ in range(jobs)]
    pairs = {(a, b): _Pipe(ctx, LOOKAHEAD) for a in range(jobs) for b in range(jobs) if a != b}
    slots = {pair: _Slots(int(SLOT_SCALE * 2 * chunk_bytes / jobs)) for pair in pairs}
    results = ctx.Queue()
    done = ctx.Value("q", 0)
    procs = [ctx.Process(target=_worker, args=(i, jobs, sources, settings_for, unit_for, trace_options, tz,
                                                plans[i], pairs, slots, results, done, os.getpid()), daemon=True)
             for i in range(jobs)]
    import signal
    import threading

    main_thread = threading.current_thread() is threading.main_thread()
    old_term = signal.getsignal(signal.SIGTERM)
    if main_thread:
        signal.signal(signal.SIGTERM, _stop_on_sigterm)
    try:
        return _run_processes(procs, plans, results, done, sources, tz, jobs, progress, chunk_bytes)
    finally:
        if main_thread and old_term is not None:
            signal.signal(signal.SIGTERM, old_term)


def _run_processes(procs: list[Any], plans: list[Any], results: Any, done: Any, sources: list[Source],
                   tz: tzinfo | None, jobs: int, progress: Callable[[int], None] | None,
                   chunk_bytes: int) -> ReplayResult:
    """Start the workers, hand them the pieces, gather what they return; any failure or
    signal stops them all."""
    import queue  # here: one process never pays for it

    for p in procs:
        p.start()
    reported = 0
    finished: dict[int, tuple[Any, ...]] = {}

    def report_progress() -> None:
        nonlocal reported
        if progress is not None:
            now = done.value
            if now > reported:
                progress(now - reported)
                reported = now

    def check() -> None:
        """Take any result; stop everything when a worker failed or died."""
        while True:
            try:
                msg = results.get_nowait()
            except queue.Empty:
                break
            _failed(msg, procs)
            finished[msg[1]] = msg
        for i, p in enumerate(procs):
            if i not in finished and p.exitcode is not None:
                _stop(procs)
                raise ReplayProcessError(i, p.exitcode)

    try:
        def hand(i: int, task: Any) -> None:
            while True:
                try:
                    plans[i].put(task, timeout=0.2)
                    return
                except queue.Full:
                    check()
                    report_progress()

        k = 0
        for task in tasks(sources, tz, chunk_bytes, count=False):  # the workers count the lines
            if task[0] == "csv":
                task = task[:3] + (None,) + task[4:]  # the worker reads the bytes itself
            hand(k % jobs, task)
            k += 1
            report_progress()
        for i in range(jobs):  # each learns the end when it asks for a chunk past it
            hand((k + i) % jobs, _END)
        while len(finished) < jobs:
            try:
                msg = results.get(timeout=0.2)
            except queue.Empty:
                check()
                report_progress()
                continue
            _failed(msg, procs)
            finished[msg[1]] = msg
        report_progress()
    except BaseException:
        _stop(procs)
        for q in plans:  # a piece on its way to a stopped worker would hold the exit for ever
            q.cancel_join_thread()
        raise
    for p in procs:
        p.join()
    return _merge([(msg[2], msg[3]) for _, msg in sorted(finished.items())])


class ReplayProcessError(RuntimeError):
    """A replay process ended before its work was done (killed: the out-of-memory killer, an
    operator); the others are stopped and nothing is returned."""

    def __init__(self, process: int, exitcode: int) -> None:
        import signal

        if exitcode < 0:
            try:
                name = signal.Signals(-exitcode).name
            except ValueError:
                name = "an unknown signal"
            how = f"was killed by signal {-exitcode} ({name}"
            how += "; the out-of-memory killer sends it when memory runs out)" if name == "SIGKILL" else ")"
        else:
            how = f"ended with exit status {exitcode}"
        super().__init__(f"replay process {process} {how} before its work was done; the replay stopped "
                         "and nothing was written")


def _failed(msg: tuple[Any, ...], procs: list[Any]) -> None:
    """Stop every process and raise what one of them reported, if it failed."""
    if msg[0] == "format":
        _stop(procs)
        raise CsvFormatError(msg[2])
    if msg[0] == "error":
        _stop(procs)
        raise RuntimeError(f"replay process {msg[1]} failed:\n{msg[2]}")


def _stop(procs: list[Any]) -> None:
    for p in procs:
        if p.exitcode is None:
            p.terminate()
    for p in procs:
        p.join(timeout=5)


# ---------------------------------------------------------------------------
# Whole series in memory, for commands that need every sample of a stream
# (fit, design --from) and for replay_series.

class StreamSeries:
    """All rows of one stream, in file order: times, values and where each row came from.

    Rows are added in parts (one per chunk) and joined into arrays when first read.
    """

    __slots__ = ("_joined", "_parts", "sources")

    def __init__(self, sources: list[Source]) -> None:
        #: the files that ``places`` refer to (shared by every series of one read)
        self.sources = sources
        self._parts: list[tuple[FloatArray, FloatArray, IntArray]] = []
        self._joined: tuple[FloatArray, FloatArray, IntArray] | None = None

    def add(self, times: FloatArray, values: FloatArray, places: IntArray) -> None:
        """Append rows; ``places`` holds ``file index << PLACE_BITS | line (or row)`` per row."""
        self._parts.append((times, values, places))
        self._joined = None

    def _arrays(self) -> tuple[FloatArray, FloatArray, IntArray]:
        if self._joined is None:
            if len(self._parts) == 1:
                self._joined = self._parts[0]
            elif not self._parts:
                self._joined = (np.empty(0), np.empty(0), np.empty(0, dtype=np.int64))
            else:
                # One column at a time, its parts let go once joined: the parts and the whole
                # series are held together for one column, not for all three.
                columns = [list(col) for col in zip(*self._parts)]
                self._parts = []
                whole = []
                for col in columns:
                    whole.append(np.concatenate(col))
                    col.clear()
                self._joined = (whole[0], whole[1], whole[2])
            self._parts = [self._joined]
        return self._joined

    @property
    def times(self) -> FloatArray:
        """Epoch seconds of the rows."""
        return self._arrays()[0]

    @property
    def values(self) -> FloatArray:
        return self._arrays()[1]

    @property
    def places(self) -> IntArray:
        return self._arrays()[2]

    def where(self, i: int) -> str:
        """Where the i-th row came from (``file:line``, or file, row group and row)."""
        p = int(self.places[i])
        return self.sources[p >> PLACE_BITS].where(p & ((1 << PLACE_BITS) - 1))


@dataclass
class ReadResult:
    streams: dict[str, StreamSeries]
    problems: list[str] = field(default_factory=list)
    rows: int = 0
    #: problems in all: those listed, and those a piece counted without a message (Parquet lists
    #: the first 20 of a kind in a piece)
    problem_count: int = 0
    #: what is said once about a file though nothing of it was lost (``ReplayResult.notes``)
    notes: list[str] = field(default_factory=list)


def read_long_csv(paths: Iterable[str | Path], *, layout: str = "auto", timezone: str | tzinfo | None = None,
                  only: str | None = None, first_only: bool = False) -> ReadResult:
    """Read files (any layout :func:`replay_files` reads) into whole per-stream series.

    Raises :class:`CsvFormatError` when a file named in ``paths`` is missing or its header
    fits no layout, or when no file can be read; a file of a directory that cannot be read
    and rows with bad values are reported in ``problems``.  With
    ``only`` just that stream's rows are kept; with ``first_only`` just those of the first
    stream met (``fit`` without ``--stream``, which refuses a file of more than one stream:
    it read every stream's whole series first, 620 MB for 19 million rows, only to refuse).
    The other streams are in ``streams`` with no rows, so their names are known.
    """
    tz = timezone if timezone is None or isinstance(timezone, tzinfo) else time_zone(timezone)
    unread: list[str] = []  # files of a directory that cannot be read: named first, the rest read
    sources = open_sources(list(paths), layout, unread)
    streams: dict[str, StreamSeries] = {}
    problems: list[str] = [f"{u}; the file was skipped, the other files were read" for u in unread]
    rows = 0
    noted: set[int] = set()
    remarks: dict[int, str] = {}
    by_file: dict[int, list[str]] = {}
    repeated = RepeatedHour(tz) if tz is not None else None  # as replay_files reads that hour
    unlisted = 0
    with OpenFiles() as opened:  # as in replay_files: a Parquet group's pieces read in turn
        for task in tasks(sources, tz):
            block = parse_task(task, sources, tz, opened)
            rows += block.rows
            unlisted += block.unlisted
            if block.note is not None and block.file not in noted:
                noted.add(block.file)
            if block.remark is not None:
                remarks.setdefault(block.file, block.remark)
            by_file.setdefault(block.file, []).extend(block.problems)
            for name, t, v, p in block.parts:
                if only is None and first_only and streams and name not in streams:
                    only = next(iter(streams))  # the first stream met: keep only its rows
                if only is not None and name != only:
                    streams.setdefault(name, StreamSeries(sources))
                    continue
                if repeated is not None:
                    t = repeated.follow(name, t)
                ser = streams.get(name)
                if ser is None:
                    ser = streams[name] = StreamSeries(sources)
                ser.add(t, v, p)
    check_unchanged(sources)
    for f in sorted(set(by_file) | noted):
        if f in noted:
            problems.append(f"{sources[f].path}: the file is not valid UTF-8; unreadable characters were replaced")
        problems += by_file.get(f, [])
    return ReadResult(streams=streams, problems=problems, rows=rows, problem_count=len(problems) + unlisted,
                      notes=[remarks[f] for f in sorted(remarks)])


def replay_series(series: dict[str, StreamSeries], settings_for: Callable[[str], DetectionSettings],
                  unit_for: Callable[[str], str | None] = lambda s: None,
                  progress: Callable[[int], None] | None = None,
                  observe: Callable[[str, FloatArray, FloatArray, BatchResult], None] | None = None,
                  ) -> tuple[list[AlertRecord], list[str], dict[str, StreamEngine]]:
    """Run every stream of series held in memory through its own engine; return records sorted by time.

    Streams are replayed one after the other, in name order.  ``progress`` is
    called with the number of samples of each batch; ``observe`` with the
    stream, the batch's times and values and what the engine made of them.
    """
    records: list[AlertRecord] = []
    problems: list[str] = []
    engines: dict[str, StreamEngine] = {}
    for name in sorted(series):
        s = series[name]
        eng = engines[name] = StreamEngine(name, settings_for(name), unit=unit_for(name))
        t = np.asarray(s.times, dtype=np.float64)
        v = np.asarray(s.values, dtype=np.float64)
        for a in range(0, t.shape[0], BATCH):
            res = eng.process(t[a:a + BATCH], v[a:a + BATCH])
            if observe is not None:
                observe(name, t[a:a + BATCH], v[a:a + BATCH], res)
            records.extend(res.records)
            for rej in res.rejected:
                if rej.reason in READING_REASONS:
                    continue
                where = s.where(a + rej.position) if rej.position >= 0 else "?:0"
                problems.append(f"{where}: stream {name}: {REASONS[rej.reason]}")
            if progress is not None:
                progress(min(BATCH, t.shape[0] - a))
    records.sort(key=_record_key)
    return records, problems, engines
