"""Replay of historical CSV files through the same engine the daemon uses.

The file format is "long" CSV with a header naming at least the columns
``time``, ``stream`` and ``value`` (other columns are ignored).  ``time`` is
RFC 3339 or epoch seconds.  Bad rows are reported as ``file:line: problem``
and skipped; everything good is still processed.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.engine import AlertRecord, BatchResult, StreamEngine
from shiftwatch.core.screen import REASONS
from shiftwatch.core.settings import DetectionSettings

FloatArray = NDArray[np.float64]

REQUIRED_COLUMNS = ("time", "stream", "value")

#: Samples handed to the engine per call (keeps the vectorised batches in cache).
BATCH = 4096


class CsvFormatError(ValueError):
    """The file cannot be read as long CSV at all (missing file, bad header)."""


@dataclass
class StreamSeries:
    """All rows of one stream, in file order."""

    times: list[float] = field(default_factory=list)
    values: list[float] = field(default_factory=list)
    #: file index << 32 | line number, for each row (see :meth:`where`)
    places: list[int] = field(default_factory=list)
    files: list[str] = field(default_factory=list)

    def where(self, i: int) -> tuple[str, int]:
        """(file, line) of the i-th row."""
        p = self.places[i]
        return self.files[p >> 32], p & 0xFFFFFFFF


@dataclass
class ReadResult:
    streams: dict[str, StreamSeries]
    problems: list[str]
    rows: int


def _parse_time(text: str) -> float:
    """RFC 3339 or epoch seconds; raises ValueError."""
    s = text.strip()
    if "T" in s or "t" in s or ":" in s or "-" in s[1:]:
        dt = datetime.fromisoformat(s)
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=timezone.utc)
        return dt.timestamp()
    v = float(s)
    if not math.isfinite(v):
        raise ValueError("not finite")
    return v


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


#: Positions of the fixed characters of "YYYY-MM-DDTHH:MM:SS.fffZ".
_ISO_MS_FIXED = {4: "-", 7: "-", 10: "T", 13: ":", 16: ":", 19: ".", 23: "Z"}


def _parse_iso_ms_column(texts: list[str]) -> FloatArray | None:
    """Parse a column of RFC 3339 times all written as ``YYYY-MM-DDTHH:MM:SS.fffZ``
    (the form shiftwatch writes) with array arithmetic; None if any differs.

    Examples
    --------
    >>> _parse_iso_ms_column(["1970-01-01T00:00:01.500Z", "2026-03-02T06:00:00.000Z"]).tolist()
    [1.5, 1772431200.0]
    >>> _parse_iso_ms_column(["2026-03-02T06:00:00Z"]) is None
    True
    """
    try:
        arr = np.array(texts, dtype="U24")
    except (ValueError, TypeError):
        return None
    if arr.shape[0] == 0 or any(len(texts[i]) != 24 for i in (0, -1)):
        return None
    c = arr.view(np.uint32).reshape(arr.shape[0], 24)
    fixed = np.array([ord(ch) for ch in _ISO_MS_FIXED.values()], dtype=np.uint32)
    if not bool((c[:, list(_ISO_MS_FIXED)] == fixed).all()):
        return None
    d = c[:, [0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15, 17, 18, 20, 21, 22]] - np.uint32(48)
    if bool((d > 9).any()):  # not a digit (below '0' wraps around)
        return None
    d = d.astype(np.int64)
    y = d[:, 0:4] @ np.array([1000, 100, 10, 1])
    mo = d[:, 4:6] @ np.array([10, 1])
    day = d[:, 6:8] @ np.array([10, 1])
    clock = d[:, 8:14] @ np.array([36000, 3600, 600, 60, 10, 1])
    ms = d[:, 14:17] @ np.array([100, 10, 1])
    hh, mi, ss = d[:, 8] * 10 + d[:, 9], d[:, 10] * 10 + d[:, 11], d[:, 12] * 10 + d[:, 13]
    if bool(((mo < 1) | (mo > 12) | (day < 1) | (day > 31) | (hh > 23) | (mi > 59) | (ss > 60)).any()):
        return None
    # Days from the civil date (H. Hinnant's algorithm, common practice).
    yy = y - (mo <= 2)
    era = np.floor_divide(yy, 400)
    yoe = yy - era * 400
    mp = (mo + 9) % 12
    doy = (153 * mp + 2) // 5 + day - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    days = era * 146097 + doe - 719468
    out: FloatArray = (days * 86400 + clock).astype(np.float64) + ms / 1000.0
    return out


def _parse_times(texts: list[str]) -> list[float]:
    """Parse time texts (distinct ones, usually).  When every text is RFC 3339
    in UTC with a ``Z``, numpy's C parser does them all at once; otherwise each
    goes through :func:`_parse_time`."""
    if texts and all(x.endswith("Z") and "T" in x for x in texts):
        try:
            stamps = np.array([x[:-1] for x in texts], dtype="datetime64[us]")
        except ValueError:
            pass
        else:
            secs: list[float] = (stamps.astype(np.int64) / 1e6).tolist()
            return secs
    return [_parse_time(x) for x in texts]


def _read_fast(text: str, ncols: int, ti: int, si: int, vi: int, fbits: int,
               streams: dict[str, StreamSeries], files: list[str]) -> int | None:
    """Column-wise reading of a clean file body; returns the row count, or None
    (adding nothing) at the first doubt.

    A clean body has no quotes, the same number of commas on every line,
    readable times, numbers for values and non-empty stream names.  Parsing
    then runs in C loops (str.split, numpy's converters) and each distinct
    time text is parsed once.
    """
    if '"' in text or "\r" in text:
        return None
    body = text[:-1] if text.endswith("\n") else text
    if not body:
        return 0
    n = body.count("\n") + 1
    flat = body.replace("\n", ",").split(",")
    if len(flat) != n * ncols:
        return None
    tcol, scol, vcol = flat[ti::ncols], flat[si::ncols], flat[vi::ncols]
    try:
        values = np.array(vcol, dtype=np.float64)
        times = _parse_iso_ms_column(tcol)
        if times is None:
            distinct = list(set(tcol))
            parsed = dict(zip(distinct, _parse_times(distinct)))
            times = np.fromiter(map(parsed.__getitem__, tcol), dtype=np.float64, count=n)
    except (ValueError, OverflowError):
        return None
    index: dict[str, int] = {}
    codes = np.fromiter((index.setdefault(x, len(index)) for x in scol), dtype=np.int64, count=n)
    if any(not name.strip() for name in index):
        return None
    # The field count matched, but a line with a field too many and a later
    # one with a field too few would shift the fields between them.  With
    # three columns such a shift puts a stream name in the value column or a
    # time text in the stream column, and one of the checks above fails --
    # unless names look like numbers.  Then, and for wider files, count the
    # commas of every line.
    if ncols != 3 or any(_is_number(name) for name in index):
        if any(c != ncols - 1 for c in map(str.count, body.split("\n"), [","] * n)):
            return None
    places = np.arange(2, n + 2, dtype=np.int64) | fbits
    for name, k in index.items():
        sel = np.flatnonzero(codes == k) if len(index) > 1 else slice(None)
        key = name.strip()
        ser = streams.get(key)
        if ser is None:
            ser = streams[key] = StreamSeries(files=files)
        ser.times.extend(times[sel].tolist())
        ser.values.extend(values[sel].tolist())
        ser.places.extend(places[sel].tolist())
    return n


def _columns(name: str, header: list[str]) -> tuple[list[str], int, int, int]:
    """The header's column names and the positions of time, stream and value."""
    cols = [c.strip().lower().lstrip("\ufeff") for c in header]
    missing = [c for c in REQUIRED_COLUMNS if c not in cols]
    if missing:
        raise CsvFormatError(
            f"{name}:1: header lacks column(s) {', '.join(missing)}; "
            f"expected time,stream,value, got {','.join(header)}")
    ti, si, vi = (cols.index(c) for c in REQUIRED_COLUMNS)
    return cols, ti, si, vi


def read_long_csv(paths: Iterable[str | Path]) -> ReadResult:
    """Read one or more long CSV files into per-stream series.

    Raises :class:`CsvFormatError` when a file is missing or its header lacks
    a required column; rows with bad values are reported in ``problems``.
    Clean files are read column-wise (see :func:`_read_fast`); a file with
    any problem is read again row by row so each problem names its line.
    """
    streams: dict[str, StreamSeries] = {}
    problems: list[str] = []
    rows = 0
    files: list[str] = []
    for path in paths:
        name = str(path)
        files.append(name)
        fbits = (len(files) - 1) << 32
        try:
            fh = open(path, newline="", encoding="utf-8")
        except OSError as exc:
            raise CsvFormatError(f"{name}: cannot open: {exc.strerror or exc}") from None
        with fh:
            try:
                text = fh.read()
            except UnicodeDecodeError:
                text = None
        first, _, body = (text or "").partition("\n")
        try:
            header = next(csv.reader([first])) if text else None
        except csv.Error as exc:
            raise CsvFormatError(f"{name}:1: unreadable header: {exc}") from None
        if header is None and text is not None:
            raise CsvFormatError(f"{name}:1: the file is empty; expected a header time,stream,value")
        if header is not None:
            cols, ti, si, vi = _columns(name, header)
            width = max(ti, si, vi) + 1
            got = _read_fast(body, len(cols), ti, si, vi, fbits, streams, files)
            if got is not None:
                rows += got
                continue
        # Slow path: the file has problems; go row by row and name each line.
        with open(path, newline="", encoding="utf-8", errors="replace") as fh:
            reader = csv.reader(fh)
            try:
                header = next(reader)
            except (StopIteration, csv.Error):
                raise CsvFormatError(f"{name}:1: unreadable header") from None
            cols, ti, si, vi = _columns(name, header)
            width = max(ti, si, vi) + 1
            if text is None:
                problems.append(f"{name}: the file is not valid UTF-8; unreadable characters were replaced")
            last_text: str | None = None
            last_t = 0.0
            appenders: dict[str, tuple[Any, Any, Any]] = {}
            try:
                for row in reader:
                    if len(row) < width:
                        if not row or (len(row) == 1 and not row[0].strip()):
                            continue
                        rows += 1
                        problems.append(f"{name}:{reader.line_num}: expected {len(cols)} columns, got {len(row)}")
                        continue
                    rows += 1
                    text = row[ti]
                    if text != last_text:
                        try:
                            last_t = _parse_time(text)
                        except (ValueError, OverflowError):
                            problems.append(f"{name}:{reader.line_num}: time {text!r} is not RFC 3339 or epoch seconds")
                            last_text = None
                            continue
                        last_text = text
                    try:
                        v = float(row[vi])
                    except ValueError:
                        problems.append(f"{name}:{reader.line_num}: value {row[vi]!r} is not a number")
                        continue
                    stream = row[si]
                    app = appenders.get(stream)
                    if app is None:
                        key = stream.strip()
                        if not key:
                            problems.append(f"{name}:{reader.line_num}: empty stream name")
                            continue
                        ser = streams.get(key)
                        if ser is None:
                            ser = streams[key] = StreamSeries(files=files)
                        app = appenders[stream] = (ser.times.append, ser.values.append, ser.places.append)
                    app[0](last_t)
                    app[1](v)
                    app[2](fbits | reader.line_num)
            except (csv.Error, UnicodeDecodeError) as exc:
                problems.append(f"{name}:{reader.line_num + 1}: unreadable row: {exc}")
    return ReadResult(streams=streams, problems=problems, rows=rows)


def replay_series(series: dict[str, StreamSeries], settings_for: Callable[[str], DetectionSettings],
                  unit_for: Callable[[str], str | None] = lambda s: None,
                  progress: Callable[[int], None] | None = None,
                  observe: Callable[[str, FloatArray, FloatArray, BatchResult], None] | None = None,
                  ) -> tuple[list[AlertRecord], list[str], dict[str, StreamEngine]]:
    """Run every stream through its own engine; return records sorted by time.

    Streams are replayed one after the other, in name order.  ``progress`` is
    called with the number of samples of each batch; ``observe`` with the
    stream, the batch's times and values and what the engine made of them
    (the replay report collects its charts this way).
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
                if rej.reason == "spike":
                    continue
                file, line = s.where(a + rej.position) if rej.position >= 0 else ("?", 0)
                problems.append(f"{file}:{line}: stream {name}: {REASONS[rej.reason]}")
            if progress is not None:
                progress(min(BATCH, t.shape[0] - a))
    records.sort(key=lambda r: (r.as_of, r.stream, r.phase != "detected"))
    return records, problems, engines
