"""The ``shiftwatch`` command line.

Offline commands (``replay``, ``fit``, ``design``) and the daemon commands
(``run``, ``check``, ``demo``) share one entry point.  Heavy modules are
imported inside the command that needs them, so ``shiftwatch --help`` and the
daemon start quickly.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys
import time
from collections.abc import Callable, Sequence
from typing import Any

from shiftwatch import __version__

# numpy's OpenBLAS starts a worker thread a core when numpy is loaded, and reads this
# once, then.  The commands' vectors (a few thousand samples at most) never reach the
# sizes it splits between threads, so the workers cost only their start: about 70 ms of
# CPU a command on two cores.  A user's own setting is kept (tests/cli/test_threads.py).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

EXIT_OK = 0
EXIT_BAD_DATA = 1  # some rows or values were bad; the good ones were processed
EXIT_USAGE = 2  # the command could not run at all (bad file, header, config)


def _whole_at_least(least: int) -> Callable[[str], int]:
    """An argparse type: a whole number of ``least`` or more."""

    def parse(text: str) -> int:
        try:
            n = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if n < least:
            raise argparse.ArgumentTypeError(f"expected {least} or more, got {n}")
        return n

    return parse


_count = _whole_at_least(0)
_rows = _whole_at_least(1)  # ``status --limit 0`` showed one row


def _shown(text: str) -> str:
    """Lines for a person on a terminal, the control characters of names from files escaped."""
    from shiftwatch.termtext import printable

    return printable(text, keep="\n")


def _path(text: str) -> str:
    """A path that is not empty (an argparse type): ``--out "$OUT"`` with OUT unset printed the
    records to standard output, and ``--report ""`` wrote into the current directory."""
    if not text:
        raise argparse.ArgumentTypeError("an empty path (an unset shell variable?)")
    return text


def _err(msg: str) -> None:
    _say(f"shiftwatch: {msg}", keep="\n")


def _say(line: str, keep: str = "") -> None:
    """A line on stderr, its control characters escaped: names and texts in it may come from a
    file (a header, a stream name), and a terminal obeys the escape sequences they hold."""
    from shiftwatch.termtext import printable

    print(printable(line, keep), file=sys.stderr)


class OutputError(Exception):
    """Writing a command's output failed (a full disk, a quota, an I/O error): the command
    stops with exit status 2 and one line naming the output and the error."""

    def __init__(self, what: str, exc: OSError) -> None:
        super().__init__(f"{what}: cannot write: {exc.strerror or exc}")
        self.what = what


class _Output:
    """A text stream whose write errors are :class:`OutputError` naming it (``what``).

    A broken pipe stays a ``BrokenPipeError``: the reader went away, which is no fault.
    """

    def __init__(self, stream: Any, what: str) -> None:
        self._stream = stream
        self.what = what

    def _guarded(self, call: Any, *args: Any) -> Any:
        try:
            return call(*args)
        except BrokenPipeError:
            raise
        except OSError as exc:
            raise OutputError(self.what, exc) from None

    def write(self, text: str) -> int:
        return int(self._guarded(self._stream.write, text))

    def flush(self) -> None:
        self._guarded(self._stream.flush)

    def close(self) -> None:
        self._guarded(self._stream.close)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


def _close_quietly(stream: Any) -> None:
    """Close a file whose writing already failed: its buffer cannot be written either, and
    the first error is the one to report."""
    try:
        stream.close()
    except OSError:
        pass


def _stdout_to_null(stream: Any) -> None:
    """Point standard output at /dev/null, so the interpreter's last flush of what could not be
    written fails no more (the recipe of the Python manual's signal module notes on SIGPIPE)."""
    try:
        fd = stream.fileno()
        if fd >= 0:
            null = os.open(os.devnull, os.O_WRONLY)
            os.dup2(null, fd)
            os.close(null)
    except (OSError, ValueError):
        pass


def _load_config(path: str | None) -> Any:
    from shiftwatch.config import load_config

    return None if path is None else load_config(path)


def _optional_config(path: str | None) -> tuple[Any, bool]:
    """The configuration named by ``--config``, or None without one; True when it was refused
    (the error, with its file, line and key path, is already printed)."""
    if path is None:  # replay without a config imports neither yaml nor the schema
        return None, False
    from shiftwatch.config import ConfigError

    try:
        return _load_config(path), False
    except ConfigError as exc:
        _err(str(exc))
        return None, True


def _print_problems(problems: list[str], limit: int = 20, total: int | None = None) -> None:
    """The first ``limit`` problems on stderr, and how many more there were (``total`` in all)."""
    total = len(problems) if total is None else total
    for p in problems[:limit]:
        _say(p)
    shown = min(limit, len(problems))
    if total > shown:
        _say(f"... and {total - shown} more problems like these")


def _values_set_aside(name: str, series: Any, values: Any, counts: dict[str, int],
                      limit: int = 20) -> list[str]:
    """The samples of a series read from files that replay's engine would set aside for their value
    (NaN; infinite or beyond ``MAX_ABS_VALUE``, whose squares overflow a fit), as ``fit`` and
    ``design --from`` leave them out: the problem line of each of the first ``limit``, named as
    replay names them, and every one counted by reason into ``counts``."""
    import numpy as np

    from shiftwatch.core.screen import MAX_ABS_VALUE, REASONS

    within = values <= MAX_ABS_VALUE  # NaN compares false; no copy of the values' magnitudes
    within &= values >= -MAX_ABS_VALUE
    bad = np.flatnonzero(~within)
    del within
    if bad.shape[0] == 0:
        return []
    nan = np.isnan(values[bad])
    for reason, n in (("nan", int(nan.sum())), ("infinite", int((~nan).sum()))):
        if n:
            counts[reason] = counts.get(reason, 0) + n
    return [f"{series.where(i)}: stream {name}: {REASONS['nan' if is_nan else 'infinite']}"
            for i, is_nan in zip(bad[:limit].tolist(), nan[:limit].tolist())]


def _set_aside_text(counts: dict[str, int]) -> str:
    """``samples set aside: infinite 1, nan 2``, as replay's summary counts them."""
    return "samples set aside: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))


# ----------------------------------------------------------------- replay
#: Replays of fewer samples finish too soon for a progress bar to help.
PROGRESS_MIN_SAMPLES = 100_000
#: Replays of fewer input bytes (about 100,000 rows of long CSV) finish too soon for one.
PROGRESS_MIN_BYTES = 4_000_000


def progress_bar(total: int, desc: str, unit: str, *, minimum: int = PROGRESS_MIN_SAMPLES) -> Any:
    """A tqdm bar on stderr when stderr is a terminal and the work is long; else None.

    Without tqdm installed (it comes with the ``report`` extra) there is no bar.
    """
    if total < minimum or not sys.stderr.isatty():
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    return tqdm(total=total, desc=desc, unit=unit, unit_scale=total >= 10_000, leave=False, file=sys.stderr)


def _input_bytes(sources: list[Any]) -> int:
    """Bytes of the files to replay (those skipped as unreadable left out, so the bar ends full)."""
    import os

    try:
        return sum(os.path.getsize(s.path) for s in sources)
    except (OSError, ValueError):
        return 0


def cmd_replay(args: argparse.Namespace) -> int:
    cfg, failed = _optional_config(args.config)
    if failed:
        return EXIT_USAGE
    if args.out == "-":
        args.out = None  # standard output, as "-" means to command-line tools (POSIX.1, XBD 12.2)
    if args.report is None:
        if args.report_charts is not None:
            _err("--report-charts needs --report DIR: it sets how many charts the report holds")
            return EXIT_USAGE
        return _replay(args, cfg, None)
    from shiftwatch.report import MAX_CHARTS, ReplayReport, ReportError

    try:
        report = ReplayReport(args.report, max_charts=MAX_CHARTS if args.report_charts is None
                              else args.report_charts)  # fails now, not after a long replay
    except ReportError as exc:
        _err(str(exc))
        return EXIT_USAGE
    try:
        return _replay(args, cfg, report)
    finally:
        report.discard()  # the unfinished file, when writing did not complete


def _replay(args: argparse.Namespace, cfg: Any, report: Any) -> int:
    from shiftwatch import heap
    from shiftwatch.replay import (
        CsvFormatError,
        ReplayProcessError,
        affinity_cores,
        default_jobs,
        replay_files,
    )
    from shiftwatch.sources import open_sources, time_zone

    jobs = default_jobs() if args.jobs is None else args.jobs
    if jobs < 1:
        _err(f"--jobs must be at least 1, got {jobs}")
        return EXIT_USAGE
    if args.jobs is not None and args.dask is not None:
        # A task runs in one process on its worker: --jobs would be ignored without a word.
        _err(f"--jobs {args.jobs} and --dask {args.dask}: --jobs splits the streams over processes on this "
             "machine, --dask over the cluster's workers (a process per partition); give one of them")
        return EXIT_USAGE
    try:
        in_tz = time_zone(args.timezone)  # the zone of input times without an offset
        # A file of a directory that cannot be read is named and left out; one named itself is refused.
        unread: list[str] = []
        sources = open_sources(args.csv, args.layout, unread)
    except CsvFormatError as exc:
        _err(str(exc))
        return EXIT_USAGE

    if cfg is None:
        settings_for = None

        def unit_for(stream: str) -> str | None:
            return None

        def label_for(stream: str) -> str | None:
            return None
        show_tz = "UTC"
    else:
        settings_for = cfg.settings_for
        label_for = cfg.label_for
        show_tz = cfg.display.time_zone  # the zone summaries and the report show times in

        def unit_for(stream: str) -> str | None:
            sc = cfg.stream_for(stream)
            return None if sc is None else sc.unit

    shown = (label_for, show_tz)
    if args.out and not _out_writable(args.out, sources):
        return EXIT_USAGE
    if args.dask is not None:
        return _replay_on_dask(args, cfg, report, settings_for, unit_for, sources, shown)
    cores = default_jobs()  # the cores it may run on, within its cgroup's CPU quota
    if jobs > cores:
        # More processes than cores only take turns on them, and pay for it: --jobs 1000 on two
        # cores took 67 s against 3 s, 27 s of it system time.
        why = ("as many as the cores this process may run on" if cores == affinity_cores() else
               "as many as its control group's CPU quota allows (cgroup cpu.max or cpu.cfs_quota_us)")
        _err(f"--jobs {jobs}: replaying in {cores} process{'es' if cores > 1 else ''}, {why}")
        jobs = cores
    heap.keep_freed_memory()  # a chunk's arrays reuse the last one's pages (see shiftwatch.heap)
    bar = progress_bar(_input_bytes(sources), "replay", "B", minimum=PROGRESS_MIN_BYTES)
    try:
        result = replay_files(args.csv, settings_for, unit_for, jobs=jobs, timezone=in_tz, sources=sources,
                              trace_options=None if report is None else report.trace_options,
                              progress=bar and bar.update, unread_files=unread)
    except (CsvFormatError, ReplayProcessError) as exc:
        if bar is not None:
            bar.close()
            bar = None
        _err(str(exc))
        return EXIT_USAGE
    finally:
        if bar is not None:
            bar.close()
    _note_unmatched(cfg, result.streams)
    code = _replay_output(args, report, result, unit_for, sources, shown)
    _no_collections_at_exit()
    return code


_EXIT_FREEZE: list[bool] = []


def _no_collections_at_exit() -> None:
    """Have the interpreter's exit skip its garbage collections (``gc.freeze`` in an exit
    handler, registered once): they walk every object a replay leaves (numpy's, the engines'
    modules), serial work in every replay, one process or several (about 16 ms of the 23 ms
    the exit took after a replay, 2026-12-05).  By then the command has written and closed
    what it writes; the objects are still freed as their counts fall, and only ones in
    reference cycles are left to the process's end."""
    if not _EXIT_FREEZE:
        import atexit
        import gc

        atexit.register(gc.freeze)
        _EXIT_FREEZE.append(True)


def _note_unmatched(cfg: Any, streams: Any) -> None:
    """Say how many replayed streams no stream entry of the configuration matched (historian
    tags are not MQTT topics): they got the detection section's settings, which is easy to miss."""
    if cfg is None or not cfg.streams:
        return
    missed = sorted(name for name in streams if cfg.stream_for(name) is None)
    if missed:
        shown = ", ".join(missed[:3]) + (", ..." if len(missed) > 3 else "")
        _err(f"note: {len(missed)} of {len(streams)} stream{'s' if len(streams) != 1 else ''} matched no "
             f"stream entry of {cfg.source} ({shown}): the settings of its detection section applied "
             "to them")


def _replay_on_dask(args: argparse.Namespace, cfg: Any, report: Any, settings_for: Any, unit_for: Any,
                    sources: list[Any], shown: tuple[Any, str]) -> int:
    import os

    from shiftwatch.cluster import ClusterError, replay_on_dask
    from shiftwatch.replay import CsvFormatError

    if len(args.csv) != 1 or not os.path.isdir(args.csv[0]):
        _err("--dask replays one dataset: give the directory that holds it, partitioned by stream")
        return EXIT_USAGE
    try:
        result = replay_on_dask(args.csv[0], args.dask, settings_for, unit_for, layout=args.layout,
                                timezone=args.timezone,
                                trace_options=None if report is None else report.trace_options)
    except (ClusterError, CsvFormatError) as exc:
        _err(str(exc))
        return EXIT_USAGE
    _note_unmatched(cfg, result.streams)
    return _replay_output(args, report, result, unit_for, sources, shown)


def _out_writable(out: str, sources: list[Any]) -> bool:
    """Whether ``--out`` can be written, told before the replay (which may take hours) and not
    after it; an input file given as ``--out`` is refused, since writing would overwrite it."""
    import errno
    import os

    for src in sources:
        try:
            same = os.path.samefile(out, src.path)
        except OSError:
            same = False
        if same:
            _err(f"--out {out}: is the input file {src.path}; the records would overwrite its readings")
            return False
    import stat

    try:
        mode = os.stat(out).st_mode
    except OSError:
        mode = None
    if mode is not None and not stat.S_ISREG(mode) and not stat.S_ISDIR(mode):
        # A FIFO or a device is written directly and opened once, after the replay: opening and
        # closing a FIFO here handed its reader an end of file, and the real opening then waited
        # for a reader for ever.  access(2) tells the permission without opening it.
        if not os.access(out, os.W_OK):
            _err(f"--out {out}: cannot write: {os.strerror(errno.EACCES)}")
            return False
        return True
    existed = os.path.lexists(out)
    try:
        open(out, "a", encoding="utf-8").close()  # made to try it; written after the replay
    except OSError as exc:
        _err(f"--out {out}: cannot write: {exc.strerror or exc}")
        return False
    if not existed:
        try:
            os.unlink(out)  # made only to try it: a replay that fails leaves nothing
        except OSError:
            pass
    return True


def _replay_output(args: argparse.Namespace, report: Any, result: Any, unit_for: Any, sources: list[Any],
                   shown: tuple[Any, str]) -> int:
    """Write the records, the problems, the summary and the report of a replay."""
    label_for, tz = shown

    out: Any
    partial: str | None = None  # the temporary file beside --out, renamed to it when complete
    if args.out:
        try:
            partial = _partial_out(args.out)
            handle = open(partial or args.out, "w", encoding="utf-8")  # noqa: SIM115  closed below
            out = _Output(handle, f"--out {args.out}")
        except OSError as exc:
            _drop(partial)
            _err(f"--out {args.out}: cannot write: {exc.strerror or exc}")
            return EXIT_USAGE
    else:
        out = sys.stdout
    written = time.time()  # the summaries give the date of a time not on this day
    labels = {name: label_for(name) for name in result.streams}
    # SIGTERM and SIGHUP unwind the writing, so the partial file is removed
    from shiftwatch.report import _unwinding_on_termination

    try:
        with _unwinding_on_termination():
            _write_records(out, result, labels, tz, written)
            if args.out:
                out.close()
                if partial is not None:
                    _put_in_place(partial, args.out)
                    partial = None
            else:
                out.flush()  # a full disk is told here, before the summary, and not at exit
    except OutputError as exc:
        if not args.out:
            raise  # standard output: main() tells it
        _close_quietly(out)
        _err(str(exc))
        return EXIT_USAGE
    except OSError as exc:  # the rename
        _err(f"--out {args.out}: cannot write: {exc.strerror or exc}")
        return EXIT_USAGE
    except BaseException:
        if args.out:
            _close_quietly(out)
        raise
    finally:
        _drop(partial)
    return _replay_summary(args, report, result, unit_for, sources, labels, tz)


def _partial_out(out: str) -> str | None:
    """A new temporary file beside ``--out`` for the records, or None where ``--out`` is not a
    regular file (a device such as /dev/stdout, a FIFO) and is written directly.  A records file
    cut short by a full disk looked like a whole replay's, and an earlier one was emptied first."""
    import os
    import stat

    target = os.path.realpath(out)  # a symbolic link: the file it points to is replaced
    try:
        if not stat.S_ISREG(os.stat(target).st_mode):
            return None
    except FileNotFoundError:
        pass
    head, tail = os.path.split(target)
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    for k in range(100):
        path = os.path.join(head, f".{tail}.{os.getpid()}-{k}.part")
        try:
            os.close(os.open(path, flags, 0o666))
            return path
        except FileExistsError:
            continue
        except OSError:  # a directory that takes no new file: --out itself was found writable
            return None
    return None


def _put_in_place(partial: str, out: str) -> None:
    """Rename the complete records file to ``--out`` (keeping an earlier file's mode)."""
    import os
    import shutil

    target = os.path.realpath(out)
    if os.path.exists(target):
        try:
            shutil.copymode(target, partial)
        except OSError:
            pass
    os.replace(partial, target)


def _drop(path: str | None) -> None:
    import os

    if path is not None:
        try:
            os.unlink(path)
        except OSError:
            pass


def _write_records(out: Any, result: Any, labels: dict[str, Any], tz: str, written: float) -> None:
    from shiftwatch.display import alert_summary

    for rec in result.records:
            # The same record the daemon publishes: the label when the config gives one, the summary.
            d = rec.to_dict()
            label = labels.get(rec.stream)
            if label is not None:
                d["label"] = label
            d["summary"] = alert_summary(rec, label, tz, today=written)
            out.write(json.dumps(d) + "\n")


#: Runs of one repeated reading a replay names one by one (the summary line counts them all).
SAY_FROZEN = 20


def _say_frozen(streams: dict[str, Any], frozen: list[str], labels: dict[str, Any], unit_for: Any,
                tz: str) -> None:
    """One line per run of one repeated reading the engines flagged, up to SAY_FROZEN."""
    from shiftwatch.display import frozen_text

    said = total = 0
    for name in frozen:
        o = streams[name]
        total += o.repeat_count
        who = labels.get(name) or name
        for span in o.repeats:
            if said < SAY_FROZEN:
                _say(frozen_text(span, who if who == name else f"{who} ({name})", unit_for(name), tz))
                said += 1
    if total > said:
        _say(f"... and {total - said} more run(s) of one repeated value (the report lists up to 100 a stream)")


def _replay_summary(args: argparse.Namespace, report: Any, result: Any, unit_for: Any, sources: list[Any],
                    labels: dict[str, Any], tz: str) -> int:
    """The problems, the summary line and the report, once the records are written."""
    from shiftwatch.replay import KEEP_PROBLEMS

    problem_count = result.problem_count
    for msg in result.unread_files:  # every one: a whole file's rows were left out
        _say(f"{msg}; the file was skipped, the other files were replayed")
    _print_problems(result.problems, KEEP_PROBLEMS, problem_count)
    streams = result.streams
    phases: dict[str, int] = {}
    rejected: dict[str, int] = {}
    still_open = 0  # events detected with no final record when the files ended
    for o in streams.values():
        still_open += o.open_events
        for k, v in o.records_total.items():
            phases[k] = phases.get(k, 0) + v
        for k, v in o.rejected_total.items():
            rejected[k] = rejected.get(k, 0) + v
    summary = (f"replayed {result.rows} rows in {len(streams)} stream(s): "
               f"{phases.get('confirmed', 0)} shift(s) confirmed, {phases.get('returned', 0)} returned, "
               f"{phases.get('dismissed', 0)} dismissed, {phases.get('undecided', 0)} undecided, "
               f"{still_open} still open")
    if rejected:
        summary += "; samples set aside: " + ", ".join(f"{k} {v}" for k, v in sorted(rejected.items()))
    frozen = sorted(n for n, o in streams.items() if o.repeat_count)
    if frozen:
        summary += (f"; {len(frozen)} stream(s) whose readings repeated one value improbably long "
                    f"({sum(streams[n].repeat_count for n in frozen)} time(s); a stuck sensor is possible, "
                    "no record is made of it)")
    skipped = result.read_problem_count - result.file_notes
    if skipped:
        # a bad cell of a wide file is counted, its row is not skipped
        summary += f"; {skipped} unreadable row(s) or cell(s) skipped"
    if result.file_notes:
        summary += f"; {result.file_notes} file(s) not valid UTF-8 (characters replaced)"
    if result.unread_files:
        summary += f"; {len(result.unread_files)} file(s) could not be read and were skipped"
    notes = list(result.notes)  # nothing of the file was lost: not counted among the problems
    if result.repeated_hour:
        notes.append(f"{result.repeated_hour} time(s) in the hour repeated when the clocks went back "
                     f"in {args.timezone} read as its second occurrence (their stream's times went back "
                     "there)")
    for note in result.notes:
        summary += f"; note: {note}"
    if result.repeated_hour:
        summary += f"; {notes[-1]}"
    _say(summary)
    _say_frozen(streams, frozen, labels, unit_for, tz)
    if not streams and skipped > 0:
        # Rows, and not one of them read (times without an offset and no --timezone, a value
        # column of text): no records, which status 1 ("the good rows were replayed") would hide.
        first = (result.problems or result.unread_files or [""])[0]
        _err(f"no row could be read, so nothing was replayed ({skipped:,} unreadable row(s) or cell(s)); "
             f"the first problem: {first}")
        return EXIT_USAGE
    if report is not None:
        from shiftwatch.report import ReportError

        report.adopt({name: o.trace for name, o in streams.items()})
        for o in streams.values():
            if o.trace is not None:  # the engine's own count of a run still going on at the end
                o.trace.repeats, o.trace.repeats_total = list(o.repeats), o.repeat_count
        bar = progress_bar(min(len(streams), report.max_charts), "charts", "chart", minimum=2)
        try:
            path = report.write(
                samples={name: o.samples_total for name, o in streams.items()},
                rejected={name: dict(o.rejected_total) for name, o in streams.items()},
                units={name: unit_for(name) for name in streams}, labels=labels, time_zone=tz,
                sources=[s.path for s in sources], unreadable_rows=skipped, unread_files=result.unread_files,
                notes=notes,
                settings_note=("default detection settings" if args.config is None
                               else f"detection settings from {args.config}"),
                progress=bar and bar.update)
        except ReportError as exc:
            _err(str(exc))
            return EXIT_USAGE
        finally:
            if bar is not None:
                bar.close()
        charted, total = report.charted
        if charted < total:
            _say(f"report: charts for {charted:,} of {total:,} streams (those with events first; "
                 f"--report-charts N to change); every stream is in its tables")
        _say(f"report written to {path}")
    return EXIT_BAD_DATA if problem_count or result.unread_files else EXIT_OK


# -------------------------------------------------------------------- fit
def cmd_fit(args: argparse.Namespace) -> int:
    import numpy as np

    from shiftwatch.core.engine import pause_before
    from shiftwatch.core.screen import REASONS, screen_series
    from shiftwatch.core.settings import DetectionSettings
    from shiftwatch.core.stepfit import fit_step
    from shiftwatch.core.timefmt import format_time
    from shiftwatch.replay import BATCH as REPLAY_BATCH
    from shiftwatch.replay import CsvFormatError, read_long_csv

    try:
        # Without --stream only the first stream's rows are kept: a file of more than one is refused.
        read = read_long_csv([args.csv], layout=args.layout, timezone=args.timezone, only=args.stream,
                             first_only=args.stream is None)
    except CsvFormatError as exc:
        _err(str(exc))
        return EXIT_USAGE
    _print_problems(read.problems, total=read.problem_count)
    for note in read.notes:
        _say(f"note: {note}")
    names = sorted(read.streams)
    if not names:  # say why, not "holds 0 streams" or "no stream named 'a' (streams: )"
        if read.problems:
            _err(f"{args.csv}: no stream could be read: no row was usable; the first problem: {read.problems[0]}")
        else:
            _err(f"{args.csv}: holds no rows, so no stream to fit")
        return EXIT_USAGE
    if args.stream is None:
        if len(names) != 1:
            _err(f"{args.csv}: holds {len(names)} streams; choose one with --stream "
                 f"({', '.join(names[:10])}{', ...' if len(names) > 10 else ''})")
            return EXIT_USAGE
        name = names[0]
    else:
        name = args.stream
        if name not in read.streams:
            _err(f"{args.csv}: no stream named {name!r} (streams: {', '.join(names[:10])})")
            return EXIT_USAGE
    s = read.streams[name]
    t = np.asarray(s.times, dtype=np.float64)
    v = np.asarray(s.values, dtype=np.float64)
    # The samples replay's engine sets aside, by its screening in file order (a value NaN,
    # infinite or beyond 1e150; a time repeated or earlier than one accepted), with its reasons.
    kept, rejected = screen_series(t, v, DetectionSettings().window_samples, REPLAY_BATCH)
    set_aside: dict[str, int] = {}
    for _, reason in rejected:
        set_aside[reason] = set_aside.get(reason, 0) + 1
    _print_problems([f"{s.where(i)}: stream {name}: {REASONS[r]}" for i, r in rejected[:20]],
                    total=len(rejected))
    problems = bool(read.problems) or bool(set_aside)
    del read, s, rejected  # the rows' places go: an array of the series' length less at the fit
    usable = kept.shape[0]
    if set_aside:
        _say(f"{_set_aside_text(set_aside)}; the fit used the other {usable}")
    if usable < 5:
        _err(f"{args.csv}: stream {name!r} has {usable} usable samples; a step fit needs at least 5")
        return EXIT_USAGE
    if set_aside:
        t, v = t[kept], v[kept]
    del kept
    try:
        fit = fit_step(v, t, level=args.level, min_segment=args.min_segment)
    except ValueError as exc:
        _err(f"fit: {exc}")
        return EXIT_USAGE
    d = {
        "stream": name,
        "shift_at": format_time(fit.shift_at),
        "shift_at_low": format_time(fit.shift_at_low),
        "shift_at_high": format_time(fit.shift_at_high),
        "level_before": fit.level_before,
        "level_after": fit.level_after,
        "delta": fit.delta,
        "delta_sigma": fit.delta_sigma,
        "sigma": fit.sigma,
        "n_before": fit.n_before,
        "n_after": fit.n_after,
        "interval_level": fit.interval_level,
        "level_before_se": fit.level_before_se,
        "level_after_se": fit.level_after_se,
        "f_stat": fit.f_stat,
        "p_value": fit.p_value,
    }
    # A pause in the readings (a line stopped) where the interval begins, or inside it: the
    # step may have come at any moment of it, as replay's records say (gap_from).
    gap_from = pause_before(t, fit.shift_at_low, fit.shift_at_high) if t.shape[0] >= 3 else None
    if gap_from is not None:
        d["gap_from"] = format_time(gap_from)
    if args.json:
        # JSON carries no infinity or NaN (RFC 8259, section 6): a reading with no noise at all
        # has an infinite delta_sigma and F statistic, written as null.
        print(json.dumps({k: None if isinstance(v, float) and not math.isfinite(v) else v
                          for k, v in d.items()}))
    else:
        print(_shown(_fit_text(d, fit, gap_from)))  # a stream name from the file, escaped for the terminal
    return EXIT_BAD_DATA if problems else EXIT_OK


def _fit_text(d: dict[str, Any], fit: Any, gap_from: float | None = None) -> str:
    """The fitted step for a person: five significant figures (``--json`` keeps them all)."""
    from shiftwatch.display import human_duration
    from shiftwatch.display import human_number as num

    low, high = d["shift_at_low"], d["shift_at_high"]
    if low[:11] == high[:11]:
        high = high[11:]
    pause = ""
    if gap_from is not None and gap_from < fit.shift_at_low:
        pause = (f"  the first reading after {human_duration(fit.shift_at_low - gap_from)} "
                 f"without readings, since {d['gap_from']}: the step may have come at any moment of the pause\n")
    elif gap_from is not None:
        pause = (f"  the readings paused after {d['gap_from']}, inside the interval: the step may lie "
                 "anywhere in it\n")
    if fit.p_value < 1.0 - fit.interval_level:
        head = f"{d['stream']}: one step at {d['shift_at']}"
    else:  # chance alone offers a split this good: say so before its figures
        head = (f"{d['stream']}: no step at the {fit.interval_level:.0%} level (p-value {fit.p_value:.2g}); "
                f"the best single split is at {d['shift_at']}")
    return (f"{head}\n"
            f"  shift-time interval ({fit.interval_level:.0%}): {low} to {high}\n"
            f"{pause}"
            f"  level before {num(fit.level_before)} (standard error {num(fit.level_before_se, 2)}, "
            f"{fit.n_before} samples)\n"
            f"  level after  {num(fit.level_after)} (standard error {num(fit.level_after_se, 2)}, "
            f"{fit.n_after} samples)\n"
            f"  step {'+' if fit.delta >= 0 else ''}{num(fit.delta)} ({num(fit.delta_sigma, 3)} sigma; "
            f"sigma {num(fit.sigma, 3)})\n"
            f"  one step against none: F {num(fit.f_stat, 4)}, p-value "
            # a p-value is never 0: one that underflowed the double is below its range ("p-value 0" before)
            f"{'below 1e-300' if fit.p_value < 1e-300 else format(fit.p_value, '.2g')}\n"
            "(rounded for reading; --json gives every figure in full)")


# ----------------------------------------------------------------- design
def _duration_option(option: str, text: str) -> float:
    """A duration given on the command line; the error names the option."""
    from shiftwatch.core.timefmt import parse_duration

    try:
        return parse_duration(text)
    except ValueError as exc:
        raise ValueError(f"{option}: {exc}") from None


def cmd_design(args: argparse.Namespace) -> int:
    from shiftwatch.core.design import design

    if args.from_csv:
        return _design_from(args)
    try:
        every = _duration_option("--false-alarm-every", args.false_alarm_every or "7d")
        interval = _duration_option("--interval", args.interval)
    except ValueError as exc:
        _err(str(exc))
        return EXIT_USAGE
    if not 0 < args.min_shift <= 4:
        _err(f"--min-shift must be above 0 and at most 4 sigma, got {args.min_shift}")
        return EXIT_USAGE
    if args.chart:
        from pathlib import Path

        parent = Path(args.chart).resolve().parent
        if not parent.is_dir():
            _err(f"--chart {args.chart}: cannot write the chart: no directory {parent}")
            return EXIT_USAGE
    try:
        d = design(args.min_shift, every, interval)
    except ValueError as exc:  # charts too long for the run-length figures (check_tabulable)
        _err(str(exc))
        return EXIT_USAGE
    curves = None
    if args.chart:
        from shiftwatch.core.design import sensitivity
        from shiftwatch.design_chart import ChartError, draw_sensitivity

        try:
            curves = sensitivity(args.min_shift, every, interval)
        except ValueError as exc:
            _err(str(exc))
            return EXIT_USAGE
        try:
            draw_sensitivity(curves, interval, args.chart)
        except ChartError as exc:
            _err(str(exc))
            return EXIT_USAGE
    if args.json:
        out: dict[str, Any] = {
            "min_shift_sigma": d.min_shift_sigma, "false_alarm_every_s": d.false_alarm_every,
            "interval_s": d.interval, "arl0": d.arl0, "arl0_asked": d.arl0_asked,
            "cusum": {"k": d.k, "h": d.h},
            "glr": {"threshold": d.glr_threshold, "window": d.glr_window},
            "multi_cusum": {"ks": list(d.bank_ks), "hs": list(d.bank_hs)},
            "rows": [{"shift_sigma": r.shift, "cusum_arl": r.cusum_arl,
                      "cusum_median_delay": r.cusum_median, "glr_median_delay": r.glr_median,
                      "multi_cusum_arl_at_most": r.bank_arl,
                      "multi_cusum_median_delay_at_most": None if r.shift == 0 else r.bank_median}
                     for r in d.rows],
        }
        if curves is not None:
            out["chart"] = {"file": args.chart, "curves": [
                {"label": c.label, "min_shift_sigma": c.min_shift_sigma,
                 "false_alarm_every_s": c.false_alarm_every, "arl0": c.arl0,
                 "shift_sigma": list(c.shifts), "arl": list(c.arl),
                 "median_delay": [None if s == 0 else m for s, m in zip(c.shifts, c.median)]}
                for c in curves]}
        print(json.dumps(out))
        return EXIT_OK
    from shiftwatch.display import human_duration as hd

    w = sys.stdout.write
    w(f"Design for a stream sampled every {hd(interval)}, "
      f"at most one false alarm every {hd(every)} on average\n")
    w(f"  in-control average run length (ARL): {d.arl0:,.0f} samples\n")
    if d.held:
        from shiftwatch.core.settings import ARL_RANGE

        asked = f"{d.arl0_asked:,.0f}" if d.arl0_asked >= 1 else f"{d.arl0_asked:.3g}"
        w(f"  (false_alarm_every / interval asks for an ARL of {asked} "
          f"samples; the daemon designs its tests\n   for {ARL_RANGE[0]:,.0f} to {ARL_RANGE[1]:,.0f} samples, "
          f"the range they are calibrated for, so it runs with {d.arl0:,.0f}:\n   the figures below are for that)\n")
    w(f"  CUSUM for a smallest shift of {d.min_shift_sigma:g} sigma: k = {d.k:.3f}, h = {d.h:.2f}\n")
    w(f"  multi-chart CUSUM (the default test): k = {', '.join(f'{k:.3g}' for k in d.bank_ks)}; "
      f"h's = {', '.join(f'{h:.2f}' for h in d.bank_hs)}\n")
    w(f"  GLR (any shift size): threshold = {d.glr_threshold:.2f}, segments up to {d.glr_window} samples\n\n")
    w("  shift    multi-CUSUM median     CUSUM ARL   CUSUM median delay     GLR median delay\n")
    w("  (sigma)  delay, at most         (samples)   (samples / time)       (samples / time)\n")
    for r in d.rows:
        if r.shift == 0:
            w(f"  {r.shift:5.2f}   {'':22s}{r.cusum_arl:11,.0f}   in control: a false alarm every "
              f"{hd(r.cusum_arl * interval)} on average\n")
            continue
        g = "" if r.glr_median is None else f"{r.glr_median:6.0f} / {hd(r.glr_median * interval)}"
        b = f"{r.bank_median:6.0f} / {hd(r.bank_median * interval)}"
        w(f"  {r.shift:5.2f}   {b:22s}{r.cusum_arl:11.1f}   {r.cusum_median:6.0f} / "
          f"{hd(r.cusum_median * interval):12s} {g}\n")
    w("\nDelays are median run lengths: the samples from the first one at the new level to\n"
      "the one that trips the test, both counted (1: tripped on the first), rounded for\n"
      "reading (--json gives every figure in full). They are the test's alone, started\n"
      "from zero at the shift, on independent readings whose level and sigma are known.\n"
      "CUSUM figures come from the Brook & Evans Markov chain; the multi-chart CUSUM trips\n"
      "no later than its fastest chart, so its run length is at most that chart's; GLR\n"
      "delays come from a simulation with a fixed random state. shiftwatch itself\n"
      "estimates the level and sigma: a step early in a stream's life is found later\n"
      "than this (see the README, \"Why the multi-chart CUSUM is the default\").\n")
    if args.chart:
        w(f"\nChart written to {args.chart}: the chosen settings next to false_alarm_every / 4 "
          "(more sensitive) and x 4 (less sensitive).\n")
    return EXIT_OK


def _design_from(args: argparse.Namespace) -> int:
    """``design --from CSV``: suggested settings for every stream of a replay file."""
    import numpy as np

    from shiftwatch.core.screen import MAX_ABS_VALUE
    from shiftwatch.core.suggest import measure_noise, suggest
    from shiftwatch.replay import CsvFormatError, read_long_csv

    if args.chart:
        _err("--chart draws one choice of settings; use it without --from")
        return EXIT_USAGE
    if args.min_shift_given:
        _err("--from suggests min_shift_sigma for each stream; leave out --min-shift")
        return EXIT_USAGE
    try:
        within = _duration_option("--within", args.within)
        every = None if args.false_alarm_every is None else _duration_option("--false-alarm-every",
                                                                             args.false_alarm_every)
    except ValueError as exc:
        _err(str(exc))
        return EXIT_USAGE
    if args.plant_false_alarms_per_day is not None and not args.plant_false_alarms_per_day > 0:
        _err(f"--plant-false-alarms-per-day must be positive, got {args.plant_false_alarms_per_day}")
        return EXIT_USAGE
    if args.streams_in_plant is not None and args.streams_in_plant < 1:
        _err(f"--streams-in-plant must be at least 1, got {args.streams_in_plant}")
        return EXIT_USAGE
    cfg, failed = _optional_config(args.config)
    if failed:
        return EXIT_USAGE
    try:
        read = read_long_csv(args.from_csv, layout=args.layout, timezone=args.timezone)
    except CsvFormatError as exc:
        _err(str(exc))
        return EXIT_USAGE
    _print_problems(read.problems)
    for note in read.notes:
        _say(f"note: {note}")
    names = sorted(read.streams)
    if not names:
        _err(f"{', '.join(args.from_csv)}: no readable rows, so nothing to suggest")
        return EXIT_USAGE
    plant = args.streams_in_plant or len(names)
    per_day = args.plant_false_alarms_per_day or 1.0
    results: list[dict[str, Any]] = []
    unmeasured = []
    set_aside: dict[str, int] = {}
    aside_lines: list[str] = []
    for name in names:
        s = read.streams[name]
        aside_lines += _values_set_aside(name, s, np.asarray(s.values, dtype=np.float64), set_aside,
                                         limit=20 - len(aside_lines))
        unit = label = None
        if cfg is not None:
            sc = cfg.stream_for(name)
            unit = None if sc is None else sc.unit
            label = cfg.label_for(name)
        t, v = np.asarray(s.times, dtype=np.float64), np.asarray(s.values, dtype=np.float64)
        keep = np.abs(v) <= MAX_ABS_VALUE
        try:
            noise = measure_noise(t[keep], v[keep])
        except ValueError as exc:
            unmeasured.append(f"{name}: no suggestion: {exc}")
            results.append({"stream": name, "problem": str(exc)})
            continue
        sug = suggest(noise, within=within, false_alarm_every=every, streams_in_plant=plant,
                      plant_false_alarms_per_day=per_day)
        results.append({"stream": name, **({"label": label} if label else {}),
                        **({"unit": unit} if unit else {}), **sug.to_dict(),
                        "explanation": sug.explain(label or name, unit)})
    if args.json:
        print(json.dumps({"within_s": within, "streams_in_plant": plant,
                          "plant_false_alarms_per_day": None if every is not None else per_day,
                          "streams": results}))
    else:
        for r in results:
            if "explanation" in r:
                print(_shown(r["explanation"]))
        for u in unmeasured:
            print(_shown(u))
    if set_aside:  # left out of the noise as replay's engine leaves them out
        _print_problems(aside_lines, total=sum(set_aside.values()))
        _say(f"{_set_aside_text(set_aside)}; the suggestions use the other samples")
    return EXIT_BAD_DATA if read.problems or unmeasured or set_aside else EXIT_OK


# ---------------------------------------------------------------- daemon
#: Fields a log line may carry besides its message (``extra=`` of the logging call), in this order.
LOG_FIELDS = ("stream", "event_id", "phase")


class _JsonFormatter(logging.Formatter):
    """One JSON object per line: ``time`` (RFC 3339 in the display time zone), ``level``,
    ``logger``, ``message``, and ``stream``, ``event_id``, ``phase`` where the line concerns one."""

    def __init__(self, tz: str = "UTC") -> None:
        super().__init__()
        self.tz = tz

    def format(self, record: logging.LogRecord) -> str:
        from shiftwatch.display import stamp

        d: dict[str, Any] = {"time": stamp(record.created, self.tz), "level": record.levelname.lower(),
                             "logger": record.name, "message": record.getMessage()}
        for key in LOG_FIELDS:
            value = getattr(record, key, None)
            if value is not None:
                d[key] = value
        if record.exc_info:
            d["exception"] = self.formatException(record.exc_info)
        return json.dumps(d)


def setup_logging(fmt: str, level: int = logging.INFO, tz: str = "UTC") -> logging.Logger:
    """One line per event on stderr.  Text lines carry no time stamp of their own (journald
    adds one); JSON lines carry ``time`` in the display time zone ``tz``."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_JsonFormatter(tz) if fmt == "json" else logging.Formatter("%(levelname)s %(message)s"))
    log = logging.getLogger("shiftwatch")
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    return log


def cmd_run(args: argparse.Namespace) -> int:
    from shiftwatch.config import NO_STREAMS, ConfigError, for_shard, load_config

    log = setup_logging(args.log_format)
    try:
        cfg = for_shard(load_config(args.config), args.shard)
    except ConfigError as exc:
        log.error("%s", exc)
        return EXIT_USAGE
    if not cfg.streams:  # refused as a reload refuses it: a daemon that would watch nothing
        log.error("%s %s", args.config, NO_STREAMS)
        return EXIT_USAGE
    log = setup_logging(args.log_format, tz=cfg.display.time_zone)
    from shiftwatch.fsutil import StateDirInUse, StateDirLock

    # Taken before anything in the directory is read or written: a second daemon
    # on the same state would truncate the first one's journal in its restore().
    try:
        lock = StateDirLock(cfg.state.dir)
    except StateDirInUse as exc:
        log.error("cannot start: %s", exc)
        return EXIT_USAGE
    except OSError as exc:
        log.error("cannot start: state.dir %s cannot be used: %s", cfg.state.dir, exc.strerror or exc)
        return EXIT_USAGE
    if lock.problem is not None:
        log.warning("%s; not locked against a second daemon", lock.problem)
    from shiftwatch.daemon import Daemon

    try:
        for warning in config_warnings(args.config, cfg):
            log.warning("%s", warning)
        return Daemon(cfg, config_path=args.config, logger=log).run()
    finally:
        lock.release()


def config_warnings(path: str, cfg: Any) -> list[str]:
    """Warnings about a configuration that is valid but risky.

    A file that holds a secret (the broker password file, a private key) and
    the configuration file that names one should be readable by their owner
    only; a metrics endpoint reachable from other hosts should use TLS.
    """
    import os
    import stat

    from shiftwatch.metrics import parse_listen
    from shiftwatch.preflight import CREDENTIALS_DIR

    b, m = cfg.broker, cfg.metrics
    secrets = [("broker.password_file", b.password_file),
               ("broker.tls.key_file", b.tls.key_file if b.tls else None),
               ("metrics.tls.key_file", m.tls.key_file if m.tls else None)]
    files = [(label, fpath, "") for label, fpath in secrets if fpath]
    # A systemd credential (LoadCredential=) is readable by the service alone: a configuration
    # that leads only to such files need not be hidden.
    exposed = [f for _, f, _ in files if not f.startswith(CREDENTIALS_DIR)]
    if exposed or b.password_env:
        files.insert(0, ("configuration file", path, " and it leads to a secret"))
    out = []
    for label, fpath, why in files:
        try:
            mode = os.stat(fpath).st_mode
        except OSError:
            continue  # a missing file is reported where it is used
        if mode & (stat.S_IRWXG | stat.S_IRWXO):
            out.append(f"{label} {fpath} is readable by other users "
                       f"(mode {stat.S_IMODE(mode):04o}){why}; chmod 600 it")
    from shiftwatch.config import _ordinal, shadowed_entries

    for j, i in shadowed_entries(cfg):
        out.append(f"the {_ordinal(j + 1)} stream (streams[{j}], topic {cfg.streams[j].topic!r}) can never "
                   f"apply: the {_ordinal(i + 1)} stream's filter {cfg.streams[i].topic!r} matches every "
                   "topic it matches, and the first entry that matches a topic decides")
    host = parse_listen(m.listen)[0]
    if m.tls is None and host not in ("127.0.0.1", "::1", "localhost"):
        out.append(f"metrics.listen {m.listen} is reachable from other hosts and metrics.tls "
                   "is not set: the metrics are served in the clear")
    return out


#: Resolved settings that are durations: ``check`` prints them as the file would hold them.
_DURATION_KEYS = frozenset(("session_expiry", "snapshot_every", "false_alarm_every", "max_time_ahead",
                            "max_time_behind"))


def _durations_as_text(d: Any) -> Any:
    """The resolved settings with every duration in seconds written back as text (``7d``)."""
    from shiftwatch.core.timefmt import duration_text

    if isinstance(d, dict):
        return {k: (duration_text(v) if k in _DURATION_KEYS and isinstance(v, float)
                    else _durations_as_text(v)) for k, v in d.items()}
    if isinstance(d, (list, tuple)):
        return [_durations_as_text(v) for v in d]
    return d


def cmd_check(args: argparse.Namespace) -> int:
    import dataclasses

    import yaml

    from shiftwatch.config import NO_STREAMS, ConfigError, load_config
    from shiftwatch.preflight import run_probes

    try:
        cfg = load_config(args.config)
    except ConfigError as exc:
        _err(str(exc))
        return EXIT_USAGE
    if not cfg.streams:  # as run and a reload refuse it
        _err(f"{args.config} {NO_STREAMS}")
        return EXIT_USAGE
    d = dataclasses.asdict(cfg)
    d.pop("source", None)
    print(f"# {args.config}: valid. Resolved settings (defaults filled in):")
    print(yaml.safe_dump(_durations_as_text(d), sort_keys=False), end="")
    for w in config_warnings(args.config, cfg):
        _err("warning: " + w)
    probes = run_probes(cfg, network=not args.no_network)
    print("# Tried without side effects (nothing created, nothing published):")
    for p in probes:
        if p.ok:
            print(f"#   ok: {p.what}: {p.note}")
        else:
            print(f"#   PROBLEM: {p.what}: {p.problem}")
            _err(f"{p.what}: {p.problem}")
    failed = sum(not p.ok for p in probes)
    if failed:
        _err(f"{args.config} is valid, but {failed} problem(s) would stop or hamper the daemon "
             "at start (above)")
        return EXIT_BAD_DATA
    return EXIT_OK


def cmd_status(args: argparse.Namespace) -> int:
    from shiftwatch.config import ConfigError, load_config
    from shiftwatch.status import fetch_overview, format_table, status_url

    try:
        cfg = load_config(args.config)
    except ConfigError as exc:
        _err(str(exc))
        return EXIT_USAGE
    tls = cfg.metrics.tls
    url = args.url or status_url(cfg.metrics.listen, tls is not None)
    try:
        doc = fetch_overview(url, query=args.filter or "", limit=args.limit,
                             ca_file=args.ca_file or (tls.cert_file if tls else None),
                             cert_file=args.cert_file, key_file=args.key_file)
    except OSError as exc:
        _err(f"cannot read the status: {exc}")
        return EXIT_USAGE
    if args.json:
        print(json.dumps(doc, indent=2))
    else:
        print(format_table(doc))
    return EXIT_OK


def cmd_schema(args: argparse.Namespace) -> int:
    from shiftwatch.config import json_schema

    print(json.dumps(json_schema(), indent=2))
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from shiftwatch.config import DISPLAY_KEYS

    try:
        duration = _duration_option("--duration", args.duration)
        tz = DISPLAY_KEYS["time_zone"].check(args.time_zone)
    except ValueError as exc:
        _err(str(exc) if str(exc).startswith("--") else f"--time-zone: {exc}")
        return EXIT_USAGE
    from shiftwatch.demo import DemoError, run_demo

    try:
        return run_demo(duration, metrics_listen=args.metrics_listen, use_embedded=args.embedded_broker,
                        time_zone=tz)
    except DemoError as exc:
        _err(str(exc))
        return EXIT_USAGE


# ------------------------------------------------------------------- main
def _add_reading_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--layout", choices=("auto", "long", "wide"), default="auto",
                   help="long: time,stream,value; wide: time then one column per tag; "
                   "auto (default): long when the file has stream and value columns")
    p.add_argument("--timezone", metavar="ZONE",
                   help="IANA time zone (e.g. Europe/Berlin) of times written without a UTC offset; "
                   "such times are refused without it. The hour repeated when the clocks go back is "
                   "told apart by each stream's own order")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="shiftwatch",
        description="Detect level shifts in production-line sensor streams (advisory monitoring).",
    )
    p.add_argument("--version", action="version", version=f"shiftwatch {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    r = sub.add_parser("replay", help="run CSV or Parquet files (or directories of them) through the detection "
                                      "engine and print alert records")
    r.add_argument("--config", help="YAML configuration (detection settings); defaults without it")
    r.add_argument("--out", type=_path, help="write JSON lines here instead of stdout ('-': stdout)")
    r.add_argument("--report", type=_path, metavar="DIR",
                   help="also write DIR/report.html: a chart per stream and a summary table")
    r.add_argument("--report-charts", type=_count, default=None, metavar="N",
                   help="most charts in the report (default 200): streams with events first, then "
                   "those with samples set aside, then the others; every stream is in its tables")
    r.add_argument("--jobs", type=int, default=None, metavar="N",
                   help="processes to split the streams over (default, and at most: the cores this process "
                   "may run on, within its cgroup's CPU quota); not with --dask")
    r.add_argument("--dask", metavar="ADDRESS",
                   help="replay one dataset directory partitioned by stream on this Dask scheduler "
                   "(tcp://HOST:PORT); needs the cluster extra")
    _add_reading_options(r)
    r.add_argument("csv", nargs="+", metavar="FILE",
                   help="CSV or Parquet files, long (time,stream,value) or wide (time,TAG,...); "
                   "a directory stands for its .parquet and .csv files")
    r.set_defaults(func=cmd_replay)

    f = sub.add_parser("fit", help="fit one step to a whole series and print it (--json: as JSON)")
    f.add_argument("csv", metavar="FILE", help="CSV or Parquet file, long or wide, as replay reads them")
    f.add_argument("--stream", help="stream to fit (needed when the file holds several)")
    f.add_argument("--level", type=float, default=0.9, help="confidence level of the shift-time interval (default 0.9)")
    f.add_argument("--min-segment", type=int, default=2, help="fewest samples on each side of the shift (default 2)")
    f.add_argument("--json", action="store_true", help="print JSON, every figure in full, instead of text")
    _add_reading_options(f)
    f.set_defaults(func=cmd_fit)

    d = sub.add_parser("design", help="turn plant terms into test parameters and show the run lengths, "
                       "or suggest settings from a replay file")
    d.add_argument("--min-shift", type=float, default=None, help="smallest shift of interest, in sigmas (default 1)")
    d.add_argument("--false-alarm-every", default=None,
                   help="mean time between false alarms (default 7d; with --from, from the plant budget)")
    d.add_argument("--interval", default="1s",
                   help="sampling interval (default 1s; with --from, measured per stream)")
    d.add_argument("--json", action="store_true", help="print JSON instead of a table")
    d.add_argument("--chart", metavar="FILE.png",
                   help="also draw ARL and delay against shift size, next to false_alarm_every / 4 and x 4")
    d.add_argument("--from", dest="from_csv", metavar="CSV", action="append",
                   help="suggest min_shift_sigma and false_alarm_every for every stream of this long CSV "
                   "file (repeatable)")
    d.add_argument("--within", default="1min", metavar="DURATION",
                   help="with --from: the median detection delay the smallest step must meet (default 1min)")
    d.add_argument("--streams-in-plant", type=int, default=None, metavar="N",
                   help="with --from: streams in the whole plant, for the false-alarm budget "
                   "(default: the streams in the file)")
    d.add_argument("--plant-false-alarms-per-day", type=float, default=None, metavar="X",
                   help="with --from: false detections a day the whole plant accepts (default 1)")
    d.add_argument("--config", metavar="FILE",
                   help="with --from: configuration whose units and labels name the streams")
    _add_reading_options(d)
    d.set_defaults(func=cmd_design)

    rn = sub.add_parser("run", help="run the daemon (MQTT in, alerts and metrics out)")
    rn.add_argument("--config", required=True, help="YAML configuration file")
    rn.add_argument("--log-format", choices=("text", "json"), default="text", help="log line format (default text)")
    rn.add_argument("--shard", type=int, metavar="N", default=None,
                    help="run partition N of the configuration's shard section (in place of "
                    "shard.number; the systemd template passes its instance)")
    rn.set_defaults(func=cmd_run)

    ck = sub.add_parser("check", help="validate a configuration file, print the resolved settings, and try "
                        "what can be tried without side effects (state directory, metrics port, "
                        "files, broker)")
    ck.add_argument("--config", required=True, help="YAML configuration file")
    ck.add_argument("--no-network", action="store_true",
                    help="do not try to connect to the broker (the other probes still run)")
    ck.set_defaults(func=cmd_check)

    st = sub.add_parser("status", help="print every stream's status from the running daemon "
                        "(the status page's figures) as a table")
    st.add_argument("--config", required=True, help="YAML configuration file of the running daemon "
                    "(its metrics.listen and metrics.tls say where to ask)")
    st.add_argument("--filter", metavar="TEXT", help="only streams whose name or label holds TEXT")
    st.add_argument("--limit", type=_rows, default=500, help="rows at most (default 500)")
    st.add_argument("--json", action="store_true", help="print the JSON as the daemon gives it")
    st.add_argument("--url", help="ask here instead (e.g. https://edge7.example:9650/status.json)")
    st.add_argument("--ca-file", help="CA that signed the endpoint's certificate (default: "
                    "metrics.tls.cert_file, which serves for a self-signed one)")
    st.add_argument("--cert-file", help="client certificate, when the endpoint asks for one")
    st.add_argument("--key-file", help="its private key")
    st.set_defaults(func=cmd_status)

    sc = sub.add_parser("schema", help="print the JSON Schema of the configuration file (for editors)")
    sc.set_defaults(func=cmd_schema)

    dm = sub.add_parser("demo", help="run a private broker, an invented line of sensors and the daemon")
    dm.add_argument("--duration", default="75s", metavar="DURATION",
                    help="how long to run, with a unit (default 75s; Ctrl-C stops early)")
    dm.add_argument("--time-zone", default="UTC", metavar="IANA_NAME",
                    help="time zone of the times shown, e.g. Europe/Berlin (default UTC)")
    dm.add_argument("--metrics-listen", default="127.0.0.1:9650", help="metrics endpoint (default 127.0.0.1:9650)")
    dm.add_argument("--embedded-broker", action="store_true",
                    help="use the embedded broker even when mosquitto is installed")
    dm.set_defaults(func=cmd_demo)
    _add_floor_commands(sub)
    return p


def _add_floor_commands(sub: Any) -> None:
    """plan, hold, end, ack: commands published to the running daemon through the broker."""

    def common(c: argparse.ArgumentParser) -> None:
        c.add_argument("--config", required=True, help="the daemon's YAML configuration (broker, topic prefix)")
        c.add_argument("--note", default="", help="a short note kept with it (at most 200 characters)")
        c.add_argument("--by", default="", help="who says so (a name or a role, at most 64 characters)")
        c.add_argument("--user", help="broker user name (default: broker.username of the configuration); "
                       "operators should use their own, which the broker's ACL lets send commands only")
        c.add_argument("--password-file", help="file whose first line is that user's password")
        c.add_argument("--wait", default="10s", metavar="DURATION", help="how long to wait for the reply (default 10s)")
        c.add_argument("--json", action="store_true", help="print the daemon's reply as JSON")
        c.set_defaults(func=cmd_floor)

    def window(c: argparse.ArgumentParser, kind: str) -> None:
        c.add_argument("target", help="a stream name or an MQTT topic filter (+ one level, # the rest)")
        c.add_argument("--start", help="RFC 3339 time, 'now' (the default) or a signed duration from now "
                       "(--start=-5min for one that began 5 minutes ago)")
        ends = c.add_mutually_exclusive_group(required=kind == "plan")
        ends.add_argument("--for", dest="for_", metavar="DURATION", help="how long, from the start (20min)")
        ends.add_argument("--until", metavar="TIME", help="RFC 3339 time, or a signed duration from now (+20min)")

    pl = sub.add_parser("plan", help="announce a planned change (changeover, recipe change, recalibration): "
                        "a step inside the window is recorded as planned and raises no alarm")
    window(pl, "plan")
    common(pl)
    hd = sub.add_parser("hold", help="hold streams (machine stopped, cleaned, in maintenance): their samples "
                        "are not watched and kept out of the baseline until the hold ends")
    window(hd, "hold")
    common(hd)
    en = sub.add_parser("end", help="end a planned window or a hold now (or withdraw one not begun)")
    which = en.add_mutually_exclusive_group(required=True)
    which.add_argument("--id", help="the window's id (from the reply that accepted it)")
    which.add_argument("--target", help="every window announced for exactly this target")
    common(en)
    ak = sub.add_parser("ack", help="mark an event as seen, with an optional note")
    ak.add_argument("event", help="the event's id (the alert record's id)")
    common(ak)


def cmd_floor(args: argparse.Namespace) -> int:
    from shiftwatch.config import ConfigError, load_config
    from shiftwatch.core.timefmt import parse_duration
    from shiftwatch.mqtt import BrokerError, read_password, send_command

    try:
        cfg = load_config(args.config)
        wait = parse_duration(args.wait)
    except ConfigError as exc:
        _err(str(exc))
        return EXIT_USAGE
    except ValueError as exc:
        _err(f"--wait: {exc}")
        return EXIT_USAGE
    verb = args.command
    body: dict[str, Any] = {}
    if verb in ("plan", "hold"):
        body["target"] = args.target
        for key, v in (("start", args.start), ("for", args.for_), ("end", args.until)):
            if v is not None:
                body[key] = v
    elif verb == "end":
        body["id" if args.id is not None else "target"] = args.id if args.id is not None else args.target
    else:
        body["event"] = args.event
    if args.note:
        body["note"] = args.note
    if args.by:
        body["by"] = args.by
    user = args.user if args.user is not None else cfg.broker.username
    try:
        if args.password_file is not None:
            with open(args.password_file, encoding="utf-8") as fh:
                password: str | None = fh.readline().rstrip("\r\n")
        elif args.user is not None:
            password = None
        else:
            password = read_password(cfg.broker)
    except (OSError, ValueError) as exc:
        _err(f"password: {exc}")
        return EXIT_USAGE
    prefix = cfg.alerts.topic_prefix
    try:
        reply = send_command(cfg.broker, prefix, verb, body, username=user, password=password, timeout=wait)
    except BrokerError as exc:
        _err(str(exc))
        return EXIT_USAGE
    if reply is None:
        _err(f"no reply within {args.wait} on {prefix}/replies: is shiftwatch running with this "
             f"configuration, and does the broker let user {user or '(none)'} publish on "
             f"{prefix}/commands/{verb}? (a broker drops a publication its ACL refuses without a word)")
        return EXIT_USAGE
    if args.json:
        print(json.dumps(reply, indent=1))
    elif not reply.get("accepted"):
        print(f"REFUSED ({reply.get('reason')}): {reply.get('message')}")
    else:
        print(_floor_text(verb, reply))
        if reply.get("warning"):
            print(f"warning: {reply['warning']}")
        print(reply.get("advisory", ""))
    return EXIT_OK if reply.get("accepted") else EXIT_BAD_DATA


def _floor_text(verb: str, reply: dict[str, Any]) -> str:
    """One line for an accepted command's reply."""
    if verb in ("plan", "hold"):
        w = reply["window"]
        what = "planned window" if verb == "plan" else "hold"
        until = w["end"] or "ended by command (shiftwatch end --id ...)"
        extra = ""
        if reply.get("open_events_planned"):
            extra = f"; open event(s) {', '.join(reply['open_events_planned'])} ended as planned"
        return (f"ACCEPTED {what} {w['id']} for {w['target']} ({reply['streams_now']} stream(s) now), "
                f"from {w['start']} until {until}{extra}")
    if verb == "end":
        return "ACCEPTED " + "; ".join(
            f"{'planned window' if w['kind'] == 'plan' else 'hold'} {w['id']} "
            + ("withdrawn" if w.get("withdrawn") else f"ended at {w['end']}") for w in reply["ended"])
    ev = reply["event"]
    return f"ACCEPTED acknowledgement of event {ev['id']} ({ev['phase']}) on {reply['stream']}"


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is cmd_design:
        args.min_shift_given = args.min_shift is not None
        if args.min_shift is None:
            args.min_shift = 1.0
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    stdout = sys.stdout
    sys.stdout = _Output(stdout, "standard output")
    try:
        code = int(args.func(args))
        sys.stdout.flush()  # what is still buffered, so that a full disk is told now
        return code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        _stdout_to_null(stdout)
        return EXIT_OK
    except OutputError as exc:
        _err(str(exc))
        if exc.what == "standard output":
            _stdout_to_null(stdout)
        return EXIT_USAGE
    finally:
        sys.stdout = stdout


if __name__ == "__main__":
    sys.exit(main())
