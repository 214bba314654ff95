"""The replay report: one self-contained HTML file with a chart per stream.

``shiftwatch replay --report DIR`` hands every batch the engine processed to
a :class:`ReplayReport`, which keeps per stream

- a bounded min/max :class:`Envelope` of the samples for the overview chart,
- the stream's alert records, exactly as the engine produced them,
- the raw samples around the first few events (for the zoomed panels),
- the lone spikes the engine set aside (up to a cap).

None of these grows with the length of the replay, so a week of one-second
samples costs the report what an hour does.  When the replay is done,
:meth:`ReplayReport.write` renders each chart with matplotlib's Agg canvas
(matplotlib is imported only here, and only then) and writes
``DIR/report.html`` with the charts embedded as PNG data URIs: the file needs
no network and no other file to be read.

Examples
--------
Ten samples, one a second, in an envelope of at most four bins: the span
of 9 s fills about half of them, so each bin is 5 s wide.

>>> env = Envelope(max_bins=4)
>>> env.add(np.arange(10.0), np.arange(10.0) ** 2)
>>> env.binned, env.count, env.width
(True, 10, 5.0)
>>> x, lo, hi, mean = env.points()
>>> x.tolist(), lo.tolist(), hi.tolist(), mean.tolist()
([2.5, 7.5], [0.0, 25.0], [16.0, 81.0], [6.0, 51.0])
"""

from __future__ import annotations

import errno
import io
import math
import os
import signal
import struct
import threading
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from numpy.typing import NDArray

from shiftwatch import __version__
from shiftwatch.core.records import ADVISORY, AlertRecord, BatchResult
from shiftwatch.core.timefmt import format_duration
from shiftwatch.display import (
    NO_NOISE,
    fault_text,
    human_duration,
    human_number,
    sigmas_text,
    stamp,
    zone,
    zone_label,
)

if TYPE_CHECKING:
    from pathlib import Path

    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

FloatArray = NDArray[np.float64]

REPORT_FILE = "report.html"

#: Overview bins per chart: about one per pixel column of the PNG.
MAX_BINS = 1000
#: Raw samples kept per stream for the zoomed panels (more than an event's confirmation).
ZOOM_SAMPLES = 2400
#: Events per stream that get a zoomed panel (the first ones in time).
MAX_ZOOMS = 3
#: Spikes marked per stream; further ones are counted only.
MAX_SPIKES = 500
#: Runs of one repeated reading listed per stream.
MAX_REPEATS = 100
#: Charts drawn per report (``--report-charts``).  A chart costs about 0.1 to 0.25 s of CPU
#: and 30 to 60 kB of the file, so thousands of streams are summarised in the tables, with
#: charts for the streams with events first (see :func:`charted_streams`).
MAX_CHARTS = 200

# Colours and line styles, shared by the charts and the legend.
SAMPLE_COLOUR = "#4a7bb7"
BEFORE_COLOUR = "#1b7837"
AFTER_COLOUR = "#d95f02"
CONFIRMED_COLOUR = "#c51b7d"
DISMISSED_COLOUR = "#7f7f7f"
OPEN_COLOUR = "#6a3d9a"
SPIKE_COLOUR = "#000000"


class ReportError(RuntimeError):
    """The report cannot be written (matplotlib missing, directory not writable)."""


def require_matplotlib() -> None:
    """Raise :class:`ReportError` when matplotlib cannot be imported."""
    try:
        import matplotlib  # noqa: F401
    except ImportError as exc:
        raise ReportError(f"--report needs matplotlib ({exc}); install it with "
                          "pip install 'shiftwatch[report]'") from None


# --------------------------------------------------------------- envelope
class Envelope:
    """Bounded summary of one stream's samples for plotting.

    The first ``max_bins`` samples are kept as they are.  Beyond that the
    samples fall into at most ``max_bins`` equal time bins, each keeping the
    minimum, maximum, sum and count of its samples; a sample past the last bin
    merges neighbouring bins pairwise and doubles the bin width.  Memory is
    fixed by ``max_bins`` however long the replay, and the extremes of every
    bin are exact.

    Parameters
    ----------
    max_bins : most samples kept raw, and most bins (an even number, at least 2).
    """

    def __init__(self, max_bins: int = MAX_BINS) -> None:
        if max_bins < 2 or max_bins % 2:
            raise ValueError(f"max_bins must be an even number of at least 2, got {max_bins}")
        self.max_bins = max_bins
        self.count = 0
        self.first_time = math.nan
        self.last_time = math.nan
        self.origin = math.nan
        self.width = 0.0  # bin width in seconds; 0 while the samples are kept raw
        self._raw_t: list[FloatArray] = []
        self._raw_v: list[FloatArray] = []
        self._raw_n = 0
        self._lo = np.empty(0)
        self._hi = np.empty(0)
        self._sum = np.empty(0)
        self._cnt = np.empty(0, dtype=np.int64)

    @property
    def binned(self) -> bool:
        """True once the samples are summarised in bins."""
        return self.width > 0

    @property
    def interval(self) -> float:
        """Mean time between samples (NaN with fewer than two)."""
        if self.count < 2:
            return math.nan
        return (self.last_time - self.first_time) / (self.count - 1)

    def add(self, t: FloatArray, v: FloatArray) -> None:
        """Add samples (times in epoch seconds, in time order)."""
        if t.shape[0] == 0:
            return
        if self.count == 0:
            self.first_time = float(t[0])
        self.count += int(t.shape[0])
        self.last_time = float(t[-1])
        if self.binned:
            self._add_binned(t, v)
            return
        if self._raw_n + t.shape[0] <= self.max_bins:
            self._raw_t.append(t.copy())
            self._raw_v.append(v.copy())
            self._raw_n += int(t.shape[0])
            return
        rt = np.concatenate(self._raw_t + [t])
        rv = np.concatenate(self._raw_v + [v])
        self._raw_t, self._raw_v, self._raw_n = [], [], 0
        self.origin = float(rt[0])
        span = float(rt[-1]) - self.origin
        self.width = _nice(span / (self.max_bins // 2)) if span > 0 else 1.0
        self._lo = np.full(self.max_bins, np.inf)
        self._hi = np.full(self.max_bins, -np.inf)
        self._sum = np.zeros(self.max_bins)
        self._cnt = np.zeros(self.max_bins, dtype=np.int64)
        self._add_binned(rt, rv)

    def _add_binned(self, t: FloatArray, v: FloatArray) -> None:
        idx = np.maximum(np.floor((t - self.origin) / self.width), 0.0).astype(np.int64)
        top = int(idx.max())
        while top >= self.max_bins:
            self._coarsen()
            idx //= 2
            top //= 2
        np.minimum.at(self._lo, idx, v)
        np.maximum.at(self._hi, idx, v)
        np.add.at(self._sum, idx, v)
        np.add.at(self._cnt, idx, 1)

    def _coarsen(self) -> None:
        """Merge bins pairwise; the bin width doubles."""
        half = self.max_bins // 2
        for arr, merge, empty in ((self._lo, np.minimum, np.inf), (self._hi, np.maximum, -np.inf),
                                  (self._sum, np.add, 0.0), (self._cnt, np.add, 0)):
            arr[:half] = merge(arr[0::2], arr[1::2])
            arr[half:] = empty
        self.width *= 2.0

    def points(self) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        """(time, min, max, mean) to plot.  Raw samples have min = max = mean;
        bins are placed at their centres, empty ones as NaN (a gap)."""
        if not self.binned:
            t = np.concatenate(self._raw_t) if self._raw_t else np.empty(0)
            v = np.concatenate(self._raw_v) if self._raw_v else np.empty(0)
            return t, v, v, v
        used = int(np.flatnonzero(self._cnt)[-1]) + 1
        cnt = self._cnt[:used]
        empty = cnt == 0
        x: FloatArray = self.origin + (np.arange(used, dtype=np.float64) + 0.5) * self.width
        lo: FloatArray = np.where(empty, np.nan, self._lo[:used])
        hi: FloatArray = np.where(empty, np.nan, self._hi[:used])
        mean: FloatArray = np.where(empty, np.nan, self._sum[:used] / np.maximum(cnt, 1))
        return x, lo, hi, mean

    @property
    def nbytes(self) -> int:
        """Bytes held in arrays."""
        raw = sum(a.nbytes for a in self._raw_t) + sum(a.nbytes for a in self._raw_v)
        return raw + self._lo.nbytes + self._hi.nbytes + self._sum.nbytes + self._cnt.nbytes


def _nice(x: float) -> float:
    """The smallest of 1, 2 or 5 times a power of ten that is at least ``x``.

    >>> _nice(0.3), _nice(0.6), _nice(7.0), _nice(20.0)
    (0.5, 1.0, 10.0, 20.0)
    """
    p = 10.0 ** math.floor(math.log10(x))
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * p >= x * (1 - 1e-12):
            return m * p
    return 10.0 * p


# ----------------------------------------------------------------- events
@dataclass(frozen=True)
class Event:
    """One event of a stream: its records in order, and its outcome."""

    number: int  # 1, 2, ... within the stream, in order of detection
    records: tuple[AlertRecord, ...]

    @property
    def final(self) -> AlertRecord:
        """The last record: the decision, or the detection when still open."""
        return self.records[-1]

    @property
    def outcome(self) -> str:
        """The final phase (``confirmed``, ``returned``, ``dismissed``, ``undecided``), or
        ``open`` when the replay ended before the event was decided."""
        phase = self.final.phase
        return "open" if phase == "detected" else phase

    @property
    def delay(self) -> float:
        """Seconds from the (best estimate of the) shift to the detection."""
        return self.final.detected_at - self.final.shift_at


class StreamTrace:
    """What the report keeps of one stream while the replay runs.

    Parameters
    ----------
    name : the stream.
    max_bins : bins of the overview envelope.
    zoom_samples : raw samples kept back for the zoomed panels.
    max_zooms : events that get a zoomed panel.
    max_spikes : spikes marked on the chart.
    """

    def __init__(self, name: str, *, max_bins: int = MAX_BINS, zoom_samples: int = ZOOM_SAMPLES,
                 max_zooms: int = MAX_ZOOMS, max_spikes: int = MAX_SPIKES) -> None:
        self.name = name
        self.envelope = Envelope(max_bins)
        self.zoom_samples = zoom_samples
        self.max_zooms = max_zooms
        self.max_spikes = max_spikes
        self.records: list[AlertRecord] = []
        #: event id -> (times, values) of the raw samples around it
        self.zooms: dict[str, tuple[FloatArray, FloatArray]] = {}
        self.spike_times: list[float] = []
        self.spike_values: list[float] = []
        self.spikes_total = 0
        #: runs of one repeated reading the engine flagged (core/repeats.py), the first MAX_REPEATS;
        #: one still going on when the data ended has ``until`` None
        self.repeats: list[Any] = []
        self.repeats_total = 0
        self._repeating: Any = None
        self.unit: str | None = None
        self.label: str | None = None  # the operator's name, from the config's label
        self.time_zone = "UTC"  # in which the chart shows times
        self._ring_t = np.empty(0)
        self._ring_v = np.empty(0)
        self._last = (math.nan, math.nan)  # last plotted sample of the previous batch
        self._closed = False

    def add_batch(self, times: FloatArray, values: FloatArray, result: BatchResult) -> None:
        """Take in one batch the engine processed and what it made of it."""
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        keep = np.isfinite(t) & np.isfinite(v)
        for rej in result.rejected:
            if rej.reason == "spike":
                # A spike is a real reading the engine set aside: it stays in
                # the samples and is marked.  Position -1 is the sample held
                # over from the previous batch.
                if rej.position >= 0:
                    self._spike(float(t[rej.position]), float(v[rej.position]))
                elif rej.time == self._last[0]:
                    self._spike(*self._last)
            elif rej.position >= 0 and rej.reason != "warmup_shift":  # a real reading, plotted
                keep[rej.position] = False
        ts, vs = t[keep], v[keep]
        self.envelope.add(ts, vs)
        if ts.shape[0]:
            self._last = (float(ts[-1]), float(vs[-1]))
        self._ring_t = np.concatenate((self._ring_t, ts))
        self._ring_v = np.concatenate((self._ring_v, vs))
        for span in result.repeats:
            if span.until is None:
                self._repeating = span
            else:
                self._repeating = None
                self._repeat(span)
        for rec in result.records:
            self.records.append(rec)
            if rec.unit:
                self.unit = rec.unit
            if rec.phase != "detected":
                self._take_zoom(rec)
        self._ring_t = self._ring_t[-self.zoom_samples:]
        self._ring_v = self._ring_v[-self.zoom_samples:]

    def close(self) -> None:
        """The stream has ended: zoom on an event still open, drop the raw samples."""
        if self._closed:
            return
        self._closed = True
        if self._repeating is not None:
            # still repeating when the data ended (its readings as at the flag: a replay sets
            # the engine's own, StreamOutcome.repeats, in their place)
            self._repeat(self._repeating)
            self._repeating = None
        for ev in self.events():
            if ev.outcome == "open" and self._ring_t.shape[0]:
                self._take_zoom(ev.final, until=float(self._ring_t[-1]))
        self._ring_t = self._ring_v = np.empty(0)

    def _repeat(self, span: Any) -> None:
        self.repeats_total += 1
        if len(self.repeats) < MAX_REPEATS:
            self.repeats.append(span)

    def _spike(self, t: float, v: float) -> None:
        self.spikes_total += 1
        if len(self.spike_times) < self.max_spikes:
            self.spike_times.append(t)
            self.spike_values.append(v)

    def _take_zoom(self, rec: AlertRecord, until: float | None = None) -> None:
        if rec.id in self.zooms or len(self.zooms) >= self.max_zooms:
            return
        lo, hi = zoom_range(rec, until)
        sel = (self._ring_t >= lo) & (self._ring_t <= hi)
        self.zooms[rec.id] = (self._ring_t[sel].copy(), self._ring_v[sel].copy())

    def events(self) -> list[Event]:
        """The stream's events in order of detection."""
        by_id: dict[str, list[AlertRecord]] = {}
        for rec in self.records:
            by_id.setdefault(rec.id, []).append(rec)
        ordered = sorted(by_id.values(), key=lambda recs: recs[0].detected_at)
        return [Event(i + 1, tuple(recs)) for i, recs in enumerate(ordered)]

    @property
    def nbytes(self) -> int:
        """Bytes held in sample arrays (the envelope, the raw tail, the zooms, the spikes)."""
        zooms = sum(a.nbytes + b.nbytes for a, b in self.zooms.values())
        return (self.envelope.nbytes + self._ring_t.nbytes + self._ring_v.nbytes + zooms
                + 16 * len(self.spike_times))


def zoom_range(rec: AlertRecord, until: float | None = None) -> tuple[float, float]:
    """Time range of an event's zoomed panel: as much before the shift as after
    it, up to the record that decided it (or ``until`` for an open event)."""
    end = rec.as_of if until is None else until
    after = max(end - rec.shift_at, rec.shift_at_high - rec.shift_at, 1e-3)
    lo = min(rec.shift_at_low, rec.shift_at - after)
    margin = 0.04 * (end - lo)
    return lo - margin, end + margin


# ------------------------------------------------------------------ report
class ReplayReport:
    """Collects a replay for the HTML report and writes it.

    The output directory is created and a file created in it and removed at
    once, so a directory that cannot be written is reported before a long
    replay, not after.  :meth:`write` writes a temporary file and renames it to
    ``report.html`` when it is complete; however it stops (an error, Ctrl-C,
    SIGTERM or SIGHUP while drawing) it removes the temporary file first.

    Parameters
    ----------
    directory : where ``report.html`` goes (created if missing).
    max_bins, zoom_samples, max_zooms, max_spikes : see :class:`StreamTrace`.
    max_charts : most charts drawn (see :func:`charted_streams`); every stream is in the tables.
    """

    def __init__(self, directory: str | Path, *, max_bins: int = MAX_BINS, zoom_samples: int = ZOOM_SAMPLES,
                 max_zooms: int = MAX_ZOOMS, max_spikes: int = MAX_SPIKES, max_charts: int = MAX_CHARTS) -> None:
        from pathlib import Path  # here: a replay without --report does without it

        require_matplotlib()
        if max_charts < 0:
            raise ValueError(f"max_charts must be 0 or more, got {max_charts}")
        self.max_charts = max_charts
        #: (streams charted, streams) of the last report written
        self.charted: tuple[int, int] = (0, 0)
        self.directory = Path(directory)
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
            fd, tmp = _create_temporary(self.directory)
            os.close(fd)
            os.unlink(tmp)  # a probe: nothing is left behind while the replay runs
        except OSError as exc:
            if self.directory.exists() and not self.directory.is_dir():  # mkdir(2) said only EEXIST
                what = "is a file, not a directory" if self.directory.is_file() else "is not a directory"
                raise ReportError(f"--report {directory}: {what}; --report names the "
                                  f"directory that gets {REPORT_FILE}") from None
            raise ReportError(f"--report {directory}: cannot write there: {exc.strerror or exc}") from None
        if self.path.is_dir():  # the finished report could not be renamed there, after the replay
            raise ReportError(f"--report {directory}: cannot write {REPORT_FILE}: it is a directory")
        self._tmp: Path | None = None  # the unfinished report, while write() runs
        self._options = {"max_bins": max_bins, "zoom_samples": zoom_samples, "max_zooms": max_zooms,
                         "max_spikes": max_spikes}
        self.traces: dict[str, StreamTrace] = {}
        self._current: StreamTrace | None = None

    @property
    def path(self) -> Path:
        """Where the finished report is."""
        return self.directory / REPORT_FILE

    @property
    def trace_options(self) -> dict[str, int]:
        """The options of each stream's :class:`StreamTrace` (``replay_files(trace_options=...)``)."""
        return dict(self._options)

    def adopt(self, traces: dict[str, StreamTrace]) -> None:
        """Take the finished traces of a replay that built them itself (:func:`shiftwatch.replay.replay_files`)."""
        for name, trace in traces.items():
            trace.close()
            self.traces[name] = trace

    def observe(self, stream: str, times: FloatArray, values: FloatArray, result: BatchResult) -> None:
        """The hook for :func:`shiftwatch.replay.replay_series`: one processed batch."""
        trace = self.traces.get(stream)
        if trace is None:
            if self._current is not None:
                self._current.close()  # replay goes stream by stream: free its raw tail
            trace = self.traces[stream] = StreamTrace(stream, **self._options)
        self._current = trace
        trace.add_batch(times, values, result)

    def write(self, *, samples: dict[str, int], rejected: dict[str, dict[str, int]],
              sources: Sequence[str], settings_note: str, unreadable_rows: int = 0,
              unread_files: Sequence[str] = (), units: dict[str, str | None] | None = None,
              labels: dict[str, str | None] | None = None, time_zone: str = "UTC",
              progress: Callable[[int], None] | None = None, notes: Sequence[str] = ()) -> Path:
        """Render the charts and write ``report.html``; return its path.

        Parameters
        ----------
        samples : samples per stream (the engine's count: a repeated or late time is counted only
            among the rejections).
        rejected : per stream, samples set aside by reason.
        sources : the replayed files.
        settings_note : which detection settings were used, in a few words.
        unreadable_rows : rows of the files that could not be read, and unreadable cells of a wide file.
        unread_files : the files found in a directory that could not be read at all, each its problem.
        notes : what was said once about the files though nothing of them was lost (an ignored
            unnamed column, times of a repeated hour).
        units : unit per stream, when known (else the unit of its records).
        labels : the operator's name per stream (the config's ``label``), when it has one.
        time_zone : IANA zone in which times are shown (the config's ``display.time_zone``).
        progress : called with 1 after each chart (at most ``max_charts``; see :func:`charted_streams`).
        """
        for trace in self.traces.values():
            trace.close()
        names = sorted(set(samples) | set(self.traces))
        traces = [self.traces.get(n) or StreamTrace(n, **self._options) for n in names]
        for trace in traces:
            trace.unit = (units or {}).get(trace.name) or trace.unit
            trace.label = (labels or {}).get(trace.name) or trace.label
            trace.time_zone = time_zone
        with _unwinding_on_termination():
            try:
                return self._write(traces, samples=samples, rejected=rejected, sources=sources,
                                   settings_note=settings_note, unreadable_rows=unreadable_rows,
                                   unread_files=unread_files, notes=notes,
                                   time_zone=time_zone, progress=progress)
            except OSError as exc:
                raise ReportError(f"--report {self.directory}: cannot write {REPORT_FILE}: "
                                  f"{exc.strerror or exc}") from None
            finally:
                self.discard()  # the unfinished file, when the report did not complete

    def _write(self, traces: list[StreamTrace], *, samples: dict[str, int], rejected: dict[str, dict[str, int]],
               sources: Sequence[str], settings_note: str, unreadable_rows: int, time_zone: str,
               progress: Callable[[int], None] | None, unread_files: Sequence[str] = (),
               notes: Sequence[str] = ()) -> Path:
        import base64
        import html  # here: a replay without --report writes no HTML

        charted = charted_streams(traces, rejected, self.max_charts)
        self.charted = (len(charted), len(traces))
        fd, tmp = _create_temporary(self.directory)
        self._tmp = tmp
        with open(fd, "w", encoding="utf-8") as out:
            out.write(_head(sources, settings_note, time_zone, unread_files, notes))
            out.write(_summary(traces, samples, rejected, unreadable_rows, time_zone, charted))
            out.write('<h2 id="charts">Charts</h2>\n')
            out.write(_how_to_read())
            if len(charted) < len(traces):
                out.write(_charts_note(len(charted), len(traces), self.max_charts))
            for i, trace in enumerate(traces):
                if trace.name not in charted:
                    continue
                png, width, height = render_png(trace)
                data = base64.b64encode(png).decode("ascii")
                name = html.escape(trace.name)
                title = name if trace.label is None else f"{html.escape(trace.label)} ({name})"
                out.write(f'<section class="chart" id="s{i + 1}"><h3>{title}</h3>\n'
                          f'<img src="data:image/png;base64,{data}" width="{width}" height="{height}" '
                          f'alt="samples, fitted levels and events of {name}"></section>\n')
                if progress is not None:
                    progress(1)
                _check_terminated()
            out.write(f"<footer><p>{html.escape(ADVISORY)}</p>"
                      f"<p>Written by shiftwatch {__version__}.</p></footer>\n</body>\n</html>\n")
        os.replace(tmp, self.path)
        self._tmp = None
        return self.path

    def discard(self) -> None:
        """Remove the unfinished file, if there is one."""
        tmp, self._tmp = self._tmp, None
        if tmp is not None:
            try:
                tmp.unlink()
            except OSError:
                pass


def _create_temporary(directory: Path) -> tuple[int, Path]:
    """Create ``directory/.report-XXXXXXXX.html`` for writing, readable as the umask allows.

    Like :func:`tempfile.mkstemp` (a new name, never an existing file), but with
    mode 0666 less the umask rather than 0600: the file becomes ``report.html``,
    which is meant to be passed around, as any file the user writes."""
    import secrets

    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    for _ in range(100):
        path = directory / f".report-{secrets.token_hex(4)}.html"
        try:
            return os.open(path, flags, 0o666), path
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no unused temporary name", str(directory))


class _Terminated(BaseException):
    """SIGTERM or SIGHUP arrived while the report was written (see :func:`_unwinding_on_termination`)."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


#: The signal that arrived while the report was written (0: none); see _raise_terminated.
_pending_signal = 0


def _raise_terminated(signum: int, frame: object) -> None:
    # Also noted: Python runs a handler between any two bytecodes, and an exception
    # raised inside a finaliser (__del__, a weakref callback) is printed and dropped,
    # so the drawing loop checks the note after each chart too.  And an exception
    # raised in Python code that compiled code called (matplotlib's renderer) may come
    # out of it as another one ("Invalid bounding box"): the note decides then.
    global _pending_signal
    _pending_signal = signum
    raise _Terminated(signum)


def _raise_interrupted(signum: int, frame: object) -> None:
    """Ctrl-C as Python's own handler treats it (KeyboardInterrupt), and noted as above."""
    global _pending_signal
    _pending_signal = signum
    raise KeyboardInterrupt


def _check_terminated() -> None:
    """Raise what a signal that arrived should have raised, when its exception was lost."""
    if _pending_signal == signal.SIGINT:
        raise KeyboardInterrupt
    if _pending_signal:
        raise _Terminated(_pending_signal)


@contextmanager
def _unwinding_on_termination() -> Iterator[None]:
    """Let SIGTERM and SIGHUP unwind the report's writing, then end the process as they would.

    At their default disposition these signals end the process at once, and
    the ``finally`` that removes the unfinished file never runs.  While the
    block runs (in the main thread) they raise instead; once the block has
    cleaned up, the default is restored and the signal raised again, so the
    process still ends by it (exit status 128 + the signal's number).  A
    handler the program installed itself is left alone: it decides, and an
    exception it raises unwinds the block too.  Ctrl-C (SIGINT at Python's own
    handler) raises KeyboardInterrupt as always, and is noted the same way.

    Whatever exception the block ends with, once one of these signals has come
    the signal decides the outcome: an exception raised inside compiled code
    (matplotlib's renderer) can come out of it as another exception.
    """
    global _pending_signal
    installed: dict[int, Any] = {}
    _pending_signal = 0
    if threading.current_thread() is threading.main_thread():
        for name in ("SIGTERM", "SIGHUP"):
            sig = getattr(signal, name, None)
            if sig is not None and signal.getsignal(sig) == signal.SIG_DFL:
                installed[sig] = signal.signal(sig, _raise_terminated)
        if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
            installed[signal.SIGINT] = signal.signal(signal.SIGINT, _raise_interrupted)
    try:
        yield
        _check_terminated()  # finished although a signal came: it still ends the process
    except BaseException as exc:
        signum = exc.signum if isinstance(exc, _Terminated) else _pending_signal
        for sig, old in installed.items():
            signal.signal(sig, old)
        installed.clear()
        _pending_signal = 0
        if not signum:
            raise
        if signum == signal.SIGINT:
            if isinstance(exc, KeyboardInterrupt):
                raise
            raise KeyboardInterrupt from None
        signal.raise_signal(signum)
        raise  # only if the signal did not end the process
    finally:
        for sig, old in installed.items():
            signal.signal(sig, old)
        _pending_signal = 0


# ------------------------------------------------------------------ charts
#: Text properties of every text a chart draws: stream names, labels and units are
#: the user's, so they are drawn as written.  By default matplotlib parses the text
#: between two ``$`` as mathtext ("Writing mathematical expressions" in its
#: documentation), which draws ``pump A$ B$`` as math and fails on ``x $a_$`` when
#: the figure is drawn; ``parse_math=False`` (matplotlib >= 3.5) turns that off.
LITERAL: dict[str, Any] = {"parse_math": False}
#: matplotlib's warnings about characters its font cannot draw (regular expressions,
#: matched at the start of the message).
_FONT_WARNINGS = (r"Glyph \d+ \(", r"Matplotlib currently does not support .* natively")


#: The most characters of a name, label or unit a chart draws: matplotlib lays out the whole
#: text, and a name of 500,000 characters (a broken export) took 37 s and 400 MB to chart.
CHART_TEXT = 120


def _drawn(text: str) -> str:
    """``text`` as a chart draws it: whole up to :data:`CHART_TEXT` characters, else its start
    and how long it is (the tables keep it whole)."""
    if len(text) <= CHART_TEXT:
        return text
    return f"{text[:CHART_TEXT - 1]}\u2026 ({len(text):,} characters)"


def _days(t: FloatArray | float | list[float]) -> Any:
    """Epoch seconds as matplotlib date numbers (days since 1970-01-01 UTC)."""
    return np.asarray(t, dtype=np.float64) / 86400.0


def stream_figure(trace: StreamTrace) -> Figure:
    """The chart of one stream: an overview of all its samples with every
    event drawn on it, and beneath it a zoomed panel for each of its first
    events.  The figure is bound to matplotlib's Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    events = trace.events()
    zoomed = [ev for ev in events if ev.records[0].id in trace.zooms]
    # Fixed margins (in inches) rather than a layout engine: the layout of
    # every chart is the same, and a layout engine doubles the drawing time.
    height = 6.6 if zoomed else 3.9
    fig = Figure(figsize=(12.0, height), dpi=96)
    FigureCanvasAgg(fig)
    grid = fig.add_gridspec(2 if zoomed else 1, trace.max_zooms, height_ratios=(1.35, 1.0) if zoomed else None,
                            left=0.75 / 12, right=1 - 2.45 / 12, top=1 - 0.3 / height, bottom=0.55 / height,
                            hspace=0.75 / 2.5, wspace=0.25)
    main = fig.add_subplot(grid[0, :])
    panels = [fig.add_subplot(grid[1, i]) for i in range(len(zoomed))]
    unit = f" ({_drawn(trace.unit)})" if trace.unit else ""
    env = trace.envelope
    x, lo, hi, mean = env.points()
    if env.binned:
        main.fill_between(_days(x), lo, hi, color=SAMPLE_COLOUR, alpha=0.35, linewidth=0)
        main.plot(_days(x), mean, color=SAMPLE_COLOUR, linewidth=0.7)
    elif x.shape[0]:
        main.plot(_days(x), mean, color=SAMPLE_COLOUR, linewidth=0.6, marker=".", markersize=2.5)
    else:
        main.text(0.5, 0.5, "no usable samples", transform=main.transAxes, ha="center", va="center",
                  **LITERAL)
    if trace.spike_times:
        main.plot(_days(trace.spike_times), trace.spike_values, linestyle="none", marker="x",
                  markersize=5, color=SPIKE_COLOUR)
    for k, ev in enumerate(events):
        _draw_event(main, ev, env, label=True, until=_level_until(events, k, env))
    # The axis names the reading as the operator does (its label), else "reading", with its unit.
    # Names, labels and units are the user's text: drawn as written, never as mathtext (see LITERAL).
    main.set_ylabel(f"{_drawn(trace.label or 'reading')}{unit}", **LITERAL)
    main.set_title(f"{_drawn(trace.name)}: {env.count:,} samples, {len(events)} event(s)", loc="left", fontsize=10,
                   **LITERAL)
    if env.count:
        _date_axis(main, trace.time_zone)
    else:
        main.set_xticks([])
        main.set_yticks([])
    legend = fig.legend(handles=_legend(trace, events), loc="upper left",
                        bbox_to_anchor=(1 - 2.35 / 12, 1 - 0.25 / height), fontsize=8, frameon=False)
    for text in legend.get_texts():
        text.set_parse_math(False)
    spikes = np.asarray(trace.spike_times)
    for ax, ev in zip(panels, zoomed):
        zt, zv = trace.zooms[ev.records[0].id]
        ax.plot(_days(zt), zv, color=SAMPLE_COLOUR, linewidth=0.6, marker=".", markersize=2.5)
        if zt.shape[0] and spikes.shape[0]:
            near = np.isin(zt, spikes)
            ax.plot(_days(zt[near]), zv[near], linestyle="none", marker="x", markersize=5, color=SPIKE_COLOUR)
        _draw_event(ax, ev, env, label=False, until=_level_until(events, events.index(ev), env))
        until = None if ev.outcome != "open" else (float(zt[-1]) if zt.shape[0] else None)
        a, b = zoom_range(ev.final, until)
        ax.set_xlim(_days(a), _days(b))
        if zv.shape[0]:
            pad = 0.08 * (float(zv.max() - zv.min()) or 1.0)
            ax.set_ylim(float(zv.min()) - pad, float(zv.max()) + pad)
        r = ev.final
        size = fault_text(r.repeated_value, r.spread_ratio) or sigmas_text(r.delta_sigma)
        ax.set_title(f"event {ev.number}: {ev.outcome}, {r.direction} {size}",
                     loc="left", fontsize=9, **LITERAL)
        _date_axis(ax, trace.time_zone, label=False)
        ax.tick_params(labelsize=7)
    return fig


def _date_axis(ax: Axes, time_zone: str = "UTC", *, label: bool = True) -> None:
    import matplotlib.dates as mdates

    tz = zone(time_zone)
    loc = mdates.AutoDateLocator(tz=tz)  # type: ignore[no-untyped-call]  # unannotated in matplotlib
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc, tz=tz))  # type: ignore[no-untyped-call]  # as above
    if label:
        ax.set_xlabel(f"time ({zone_label(time_zone)})", fontsize=8, **LITERAL)
    ax.grid(True, linewidth=0.3, alpha=0.6)


LineStyle = Literal["-", "--", ":"]


def _style(ev: Event) -> tuple[str, LineStyle, str | None, float]:
    """(colour of the band and detection line, line style, band hatch, band alpha) of an event."""
    if ev.outcome == "dismissed":
        return DISMISSED_COLOUR, "--", "///", 0.18
    if ev.outcome == "open":
        return OPEN_COLOUR, ":", None, 0.22
    return CONFIRMED_COLOUR, "-", None, 0.22


def _level_until(events: list[Event], k: int, env: Envelope) -> float | None:
    """Where the fitted level after event ``k`` is drawn to: for a confirmed event, the
    shift of the next event that was not dismissed, or the last sample (the new level
    is the reference from then on, so on a long chart it is not a stub); for the
    others, the record's ``as_of``."""
    ev = events[k]
    if ev.outcome != "confirmed":
        return None
    later = [e.final.shift_at for e in events[k + 1:]
             if e.outcome != "dismissed" and e.final.shift_at > ev.final.shift_at]
    if later:
        return min(later)
    return env.last_time if math.isfinite(env.last_time) else None


def _draw_event(ax: Axes, ev: Event, env: Envelope, *, label: bool, until: float | None = None) -> None:
    """Band for the shift-time interval, line at the detection, the two fitted
    levels; all at the record's exact values.  The level after is drawn to
    ``until`` when given (see :func:`_level_until`), else to the record's ``as_of``."""
    r = ev.final
    colour, style, hatch, alpha = _style(ev)
    dismissed = ev.outcome == "dismissed"
    dt = env.interval if math.isfinite(env.interval) else 0.0
    low, high = band_range(r, dt)
    ax.axvspan(_days(low), _days(high), facecolor=colour, alpha=alpha,
               hatch=hatch, edgecolor=colour if hatch else "none", linewidth=0)
    ax.axvline(_days(r.detected_at), color=colour, linestyle=style, linewidth=1.2)
    start = r.shift_at - r.n_before * dt
    if math.isfinite(env.first_time):
        start = max(start, env.first_time)
    end = r.as_of if r.as_of > r.shift_at else r.detected_at
    if until is not None and until > end:
        end = until
    before = DISMISSED_COLOUR if dismissed else BEFORE_COLOUR
    after = DISMISSED_COLOUR if dismissed else AFTER_COLOUR
    ax.hlines(r.level_before, _days(start), _days(r.shift_at), colors=before, linestyles=style, linewidth=2.0)
    ax.hlines(r.level_after, _days(r.shift_at), _days(end), colors=after, linestyles=style, linewidth=2.0)
    if label:
        ax.annotate(str(ev.number), xy=(_days(r.detected_at), 1.0), xycoords=("data", "axes fraction"),
                    xytext=(2, -10), textcoords="offset points", fontsize=8, color=colour, **LITERAL)


def band_range(rec: AlertRecord, interval: float) -> tuple[float, float]:
    """Time range of the band drawn for the shift-time interval: from half a
    sampling interval before ``shift_at_low`` to half one after
    ``shift_at_high``, so that every sample the interval admits as the first
    at the new level lies inside the band (and a one-sample interval is seen)."""
    return rec.shift_at_low - interval / 2, rec.shift_at_high + interval / 2


def _legend(trace: StreamTrace, events: list[Event]) -> list[Any]:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    env = trace.envelope
    if env.binned:
        handles: list[Any] = [Patch(facecolor=SAMPLE_COLOUR, alpha=0.35,
                                    label=f"samples: min to max\nper {format_duration(env.width)}, and mean")]
    else:
        handles = [Line2D([], [], color=SAMPLE_COLOUR, marker=".", linewidth=0.6, label="samples")]
    if trace.spike_times:
        handles.append(Line2D([], [], color=SPIKE_COLOUR, marker="x", linestyle="none",
                              label=f"lone spike, set aside ({trace.spikes_total})"))
    outcomes = {ev.outcome for ev in events}
    level = events[0].final.interval_level if events else 0.9
    if outcomes - {"dismissed"}:
        handles += [Line2D([], [], color=BEFORE_COLOUR, linewidth=2, label="fitted level before"),
                    Line2D([], [], color=AFTER_COLOUR, linewidth=2, label="fitted level after")]
    if "confirmed" in outcomes:
        handles += [Patch(facecolor=CONFIRMED_COLOUR, alpha=0.22, label=f"shift-time interval ({level:.0%})"),
                    Line2D([], [], color=CONFIRMED_COLOUR, linewidth=1.2, label="detected (confirmed)")]
    if "dismissed" in outcomes:
        handles += [Patch(facecolor=DISMISSED_COLOUR, alpha=0.18, hatch="///", edgecolor=DISMISSED_COLOUR,
                          label="dismissed event: grey,\nhatched band, dashed lines"),
                    Line2D([], [], color=DISMISSED_COLOUR, linestyle="--", linewidth=1.2,
                           label="detected (dismissed)")]
    if "open" in outcomes:
        handles += [Patch(facecolor=OPEN_COLOUR, alpha=0.22, label="open when the replay ended:\n"
                                                                  "purple, dotted lines"),
                    Line2D([], [], color=OPEN_COLOUR, linestyle=":", linewidth=1.2, label="detected (open)")]
    return handles


def render_png(trace: StreamTrace) -> tuple[bytes, int, int]:
    """The stream's chart as PNG bytes, with its width and height in pixels.

    A character the font lacks (a control character in a stream's name, a script
    DejaVu Sans does not cover) is drawn as an empty box; matplotlib's warning
    about it is not shown.  Other warnings and every error pass through."""
    with warnings.catch_warnings():
        for message in _FONT_WARNINGS:
            warnings.filterwarnings("ignore", message=message, category=UserWarning)
        fig = stream_figure(trace)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=96, metadata={"Software": None})
        fig.clear()
    png = buf.getvalue()
    width, height = struct.unpack(">II", png[16:24])  # the IHDR chunk (PNG specification, section 11.2.2)
    return png, int(width), int(height)


# -------------------------------------------------------------------- HTML
_CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5rem auto; max-width: 1240px; color: #1a1a1a;
       padding: 0 1rem; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
h3 { font-size: 1rem; margin: 1.5rem 0 0.3rem; font-family: ui-monospace, monospace; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.5rem 0; }
th, td { border: 1px solid #d0d0d0; padding: 0.2rem 0.5rem; text-align: left; vertical-align: top; }
th { background: #f2f2f2; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
tbody th { font-family: ui-monospace, monospace; font-weight: normal; background: #fafafa; }
tfoot td { font-weight: bold; background: #f7f7f7; }
table.events td { white-space: nowrap; }
td.confirmed { color: #c51b7d; } td.dismissed { color: #6b6b6b; } td.open { color: #6a3d9a; }
tr.dismissed td { color: #6b6b6b; }
.caution { border-left: 4px solid #d95f02; padding: 0.3rem 0.7rem; background: #fff6ee; }
img { max-width: 100%; height: auto; border: 1px solid #e0e0e0; }
.nochart { color: #6b6b6b; font-size: 0.8rem; }
footer { margin-top: 2rem; font-size: 0.8rem; color: #555; }
"""


def _e(x: object) -> str:
    import html

    return html.escape(str(x))


def _signed_duration(seconds: float) -> str:
    return ("-" if seconds < 0 else "") + format_duration(abs(seconds))


def _interval_text(rec: AlertRecord, time_zone: str = "UTC") -> str:
    """The shift-time interval; its end without the date when that is the same; and a
    pause in the readings where it begins or inside it (``gap_from``), as the summary
    names it: the step may have come at any moment of the pause."""
    low, high = stamp(rec.shift_at_low, time_zone), stamp(rec.shift_at_high, time_zone)
    if low[:11] == high[:11]:
        high = high[11:]
    text = f"{low} to {high} ({rec.interval_level:.0%})"
    if rec.gap_from is not None and rec.gap_from < rec.shift_at_low:
        text += (f", the first reading after {human_duration(rec.shift_at_low - rec.gap_from)} without "
                 f"readings, since {stamp(rec.gap_from, time_zone)}")
    elif rec.gap_from is not None:
        text += f"; the readings paused inside it, after {stamp(rec.gap_from, time_zone)}"
    return text


def _head(sources: Sequence[str], settings_note: str, time_zone: str = "UTC", unread: Sequence[str] = (),
          notes: Sequence[str] = ()) -> str:
    files = ", ".join(f"<code>{_e(s)}</code>" for s in sources) or "none"
    skipped = "".join(f"<li>{_e(u)}</li>" for u in unread)
    if skipped:
        skipped = (f'<p class="caution" id="unread">{len(unread):,} file(s) could not be read and were '
                   f"skipped; their rows are in none of the figures below:</p>\n<ul>{skipped}</ul>\n")
    if notes:
        skipped += ('<p id="notes">Notes on the files (nothing of them was lost):</p>\n<ul>'
                    + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>\n")
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        '<link rel="icon" href="data:,">\n'
        "<title>shiftwatch replay report</title>\n"
        f"<style>{_CSS}</style>\n</head>\n<body>\n"
        "<h1>shiftwatch replay report</h1>\n"
        f"<p>Replayed {files}; {_e(settings_note)}. Times are shown in {_e(zone_label(time_zone))} "
        "(the alert records hold them in UTC).</p>\n"
        f'<p class="caution">{_e(ADVISORY)}</p>\n'
        f"{skipped}"
    )


def charted_streams(traces: Sequence[StreamTrace], rejected: dict[str, dict[str, int]],
                    max_charts: int = MAX_CHARTS) -> set[str]:
    """The streams that get a chart: at most ``max_charts``, taking first the streams
    with events (alert records), then those with samples set aside (rejected, or lone
    spikes), then the others; each group in name order.

    >>> quiet, busy = StreamTrace("b"), StreamTrace("c")
    >>> sorted(charted_streams([StreamTrace("a"), quiet, busy], {"c": {"late": 2}}, 2))
    ['a', 'c']
    """
    def rank(t: StreamTrace) -> tuple[int, str]:
        if t.records:
            return 0, t.name
        if sum(rejected.get(t.name, {}).values()) or t.spikes_total:
            return 1, t.name
        return 2, t.name

    return {t.name for t in sorted(traces, key=rank)[:max_charts]}


def _charts_note(charted: int, streams: int, max_charts: int) -> str:
    return (f'<p class="caution" id="charts-note">Charts for {charted:,} of {streams:,} streams: at most '
            f"{max_charts:,} are drawn (<code>--report-charts</code>), first the streams with events, then "
            "those with samples set aside, then the others, each in name order. Every stream is in the "
            "Streams and Events tables above; those without a chart say so there.</p>\n")


def _stream_link(i: int, name: str, charted: set[str] | None) -> str:
    if charted is None or name in charted:
        return f'<a href="#s{i + 1}">{_e(name)}</a>'
    return f'{_e(name)} <span class="nochart">(no chart)</span>'


def _summary(traces: list[StreamTrace], samples: dict[str, int], rejected: dict[str, dict[str, int]],
             unreadable_rows: int, time_zone: str = "UTC", charted: set[str] | None = None) -> str:
    zn = _e(zone_label(time_zone))
    all_events = {t.name: t.events() for t in traces}
    counts = {"confirmed": 0, "returned": 0, "dismissed": 0, "undecided": 0, "open": 0}
    for evs in all_events.values():
        for ev in evs:
            counts[ev.outcome] += 1
    total_events = sum(counts.values())
    total_samples = sum(samples.values())
    reasons: dict[str, int] = {}
    for per in rejected.values():
        for k, v in per.items():
            reasons[k] = reasons.get(k, 0) + v
    total_rejected = sum(reasons.values())
    why = ", ".join(f"{k} {v:,}" for k, v in sorted(reasons.items()))
    out = ['<h2 id="totals">Totals</h2>\n<table class="totals">\n<tbody>\n']
    for label, value, note in (
        ("streams", len(traces), ""),
        ("samples", total_samples, ""),
        ("rejected samples", total_rejected, why),
        ("unreadable rows or cells", unreadable_rows,
         "rows of the files that could not be read, and cells of a wide file"),
        ("events", total_events, ""),
        ("confirmed", counts["confirmed"], "a lasting step"),
        ("returned", counts["returned"], "a lasting step back to the level before an earlier step"),
        ("dismissed", counts["dismissed"], "no lasting step: the level stayed where it was"),
        ("undecided", counts["undecided"], "still uncertain after confirm_max_samples; watching on"),
        ("open", counts["open"], "still undecided when the replay ended"),
    ):
        out.append(f'<tr><th scope="row">{label}</th><td class="n" data-total="{label}">{value:,}</td>'
                   f"<td>{_e(note)}</td></tr>\n")
    out.append("</tbody>\n</table>\n")

    out.append('<h2 id="streams">Streams</h2>\n<table class="streams">\n<thead><tr><th>stream</th>'
               "<th>samples</th><th>rejected</th><th>events</th><th>confirmed</th><th>returned</th>"
               "<th>dismissed</th><th>undecided</th><th>open</th></tr></thead>\n<tbody>\n")
    for i, t in enumerate(traces):
        evs = all_events[t.name]
        n = {k: sum(ev.outcome == k for ev in evs) for k in counts}
        out.append(f'<tr><td>{_stream_link(i, t.name, charted)}</td><td class="n">{samples.get(t.name, 0):,}</td>'
                   f'<td class="n">{sum(rejected.get(t.name, {}).values()):,}</td><td class="n">{len(evs)}</td>'
                   + "".join(f'<td class="n">{n[k]}</td>' for k in counts) + "</tr>\n")
    out.append(f'</tbody>\n<tfoot><tr><td>total</td><td class="n">{total_samples:,}</td>'
               f'<td class="n">{total_rejected:,}</td><td class="n">{total_events}</td>'
               + "".join(f'<td class="n">{counts[k]}</td>' for k in counts) + "</tr></tfoot>\n</table>\n")

    out.append(_repeats_table(traces, time_zone, charted))
    out.append('<h2 id="events">Events</h2>\n<table class="events">\n<thead><tr><th>#</th><th>outcome</th>'
               f"<th>shift at ({zn})</th><th>shift-time interval</th><th>step</th><th>step (sigma)</th>"
               f"<th>detected at ({zn})</th><th>delay, shift to detection</th><th>p-value</th></tr></thead>\n")
    for i, t in enumerate(traces):
        evs = all_events[t.name]
        out.append(f'<tbody data-stream="{_e(t.name)}"><tr><th colspan="9" scope="rowgroup">'
                   f'{_stream_link(i, t.name, charted)}{"" if evs else ": no events"}</th></tr>\n')
        for ev in evs:
            r = ev.final
            unit = f" {r.unit}" if r.unit else ""
            out.append(
                f'<tr class="event {ev.outcome}" data-id="{_e(r.id)}"><td class="n">{ev.number}</td>'
                f'<td class="{ev.outcome}">{ev.outcome}</td><td>{stamp(r.shift_at, time_zone)}</td>'
                f"<td>{_interval_text(r, time_zone)}</td>"
                f'<td class="n">{r.delta:+.4g}{_e(unit)}</td>'
                f'<td class="n" data-sigma="{r.delta_sigma:.3f}">'
                f'{_sigma_cell(r)}</td>'
                f"<td>{stamp(r.detected_at, time_zone)}</td>"
                f'<td class="n" data-delay="{ev.delay:.3f}">{_signed_duration(ev.delay)}</td>'
                f'<td class="n">{r.p_value:.2g}</td></tr>\n')
        out.append("</tbody>\n")
    out.append("</table>\n")
    return "".join(out)


def _repeats_table(traces: list[StreamTrace], time_zone: str, charted: set[str] | None) -> str:
    """The runs of one repeated reading the engines flagged: a stuck sensor is possible.  No
    record is made of them (a record is about a step in level); the table says where to look."""
    zn = _e(zone_label(time_zone))
    rows = [(i, t, s) for i, t in enumerate(traces) for s in t.repeats]
    total = sum(t.repeats_total for t in traces)
    out = ['<h2 id="repeats">Readings that repeated one value</h2>\n']
    if not rows:
        return out[0] + "<p>No stream's readings repeated one value for longer than its own noise makes likely.</p>\n"
    out.append(f"<p>{total} time(s) in {sum(bool(t.repeats_total) for t in traces)} stream(s), the readings "
               "repeated one value for longer than the stream's own noise and resolution make likely: a "
               "stuck sensor is possible (check it by your site's procedures). A step in level cannot be "
               "seen meanwhile; no alert record is made of it.</p>\n")
    out.append(f'<table class="repeats">\n<thead><tr><th>stream</th><th>value</th><th>from ({zn})</th>'
               f"<th>to ({zn})</th><th>readings</th><th>improbable from ({zn})</th></tr></thead>\n<tbody>\n")
    for i, t, s in rows:
        unit = f" {t.unit}" if t.unit else ""
        end = "the end of the data" if s.until is None else stamp(s.until, time_zone)
        out.append(f'<tr data-stream="{_e(t.name)}"><td>{_stream_link(i, t.name, charted)}</td>'
                   f'<td class="n">{_e(human_number(s.value, 6) + unit)}</td><td>{stamp(s.since, time_zone)}</td>'
                   f'<td>{end}</td><td class="n">{s.readings:,}</td><td>{stamp(s.flagged_at, time_zone)}</td></tr>\n')
    out.append("</tbody>\n</table>\n")
    return "".join(out)


def _sigma_cell(r: AlertRecord) -> str:
    """The events table's size in sigmas, or the sensor fault the record names in its place."""
    fault = fault_text(r.repeated_value, r.spread_ratio)
    if fault is not None:
        return _e(fault)
    return f"{r.delta_sigma:+.2f}" if math.isfinite(r.delta_sigma) else NO_NOISE


def _how_to_read() -> str:
    return (
        "<p>Each chart shows a stream's samples (exact up to "
        f"{MAX_BINS:,} samples; beyond that the band spans the lowest to the highest sample of each "
        "time slice and the line is their mean). For each event: the fitted level before the shift "
        "(green) and after it (orange), the interval for the shift time as a band (reaching half a "
        "sampling interval beyond its first and last sample), and a vertical line "
        "at the moment the test tripped, numbered as in the events table. Confirmed events are drawn "
        "in solid magenta; dismissed events in grey with a hatched band and dashed lines; events still "
        "open when the replay ended in purple with dotted lines. Below the overview, the first "
        f"{MAX_ZOOMS} events of a stream are shown close up with every sample. The level before is "
        "drawn over the samples the fit used before the shift (n_before sampling intervals).</p>\n"
    )


__all__ = ["Envelope", "Event", "ReplayReport", "ReportError", "StreamTrace", "charted_streams", "render_png",
           "require_matplotlib", "stream_figure", "zoom_range"]
