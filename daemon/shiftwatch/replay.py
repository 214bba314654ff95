"""Replay of historical CSV files through the same engine the daemon uses.

The file format is "long" CSV with a header naming at least the columns
``time``, ``stream`` and ``value`` (other columns are ignored).  ``time`` is
RFC 3339 or epoch seconds.  Bad rows are reported as ``file:line: problem``
and skipped; everything good is still processed.
"""

from __future__ import annotations

import csv
import math
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from shiftwatch.core.engine import AlertRecord, StreamEngine
from shiftwatch.core.screen import REASONS
from shiftwatch.core.settings import DetectionSettings

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
    where: list[tuple[str, int]] = field(default_factory=list)  # (file, line)


@dataclass
class ReadResult:
    streams: dict[str, StreamSeries]
    problems: list[str]
    rows: int


def _parse_time(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        s = text.strip()
        dt = datetime.fromisoformat(s)
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=timezone.utc)
        return dt.timestamp()
    if not math.isfinite(v):
        raise ValueError("not finite")
    return v


def read_long_csv(paths: Iterable[str | Path]) -> ReadResult:
    """Read one or more long CSV files into per-stream series.

    Raises :class:`CsvFormatError` when a file is missing or its header lacks
    a required column; rows with bad values are reported in ``problems``.
    """
    streams: dict[str, StreamSeries] = {}
    problems: list[str] = []
    rows = 0
    for path in paths:
        name = str(path)
        try:
            fh = open(path, newline="", encoding="utf-8")
        except OSError as exc:
            raise CsvFormatError(f"{name}: cannot open: {exc.strerror or exc}") from None
        with fh:
            reader = csv.reader(fh)
            try:
                header = next(reader)
            except StopIteration:
                raise CsvFormatError(f"{name}:1: the file is empty; expected a header time,stream,value") from None
            except (csv.Error, UnicodeDecodeError) as exc:
                raise CsvFormatError(f"{name}:1: unreadable header: {exc}") from None
            cols = [c.strip().lower().lstrip("\ufeff") for c in header]
            missing = [c for c in REQUIRED_COLUMNS if c not in cols]
            if missing:
                raise CsvFormatError(
                    f"{name}:1: header lacks column(s) {', '.join(missing)}; "
                    f"expected time,stream,value, got {','.join(header)}")
            ti, si, vi = (cols.index(c) for c in REQUIRED_COLUMNS)
            width = max(ti, si, vi) + 1
            line = 1
            try:
                for row in reader:
                    line = reader.line_num
                    if not row or (len(row) == 1 and not row[0].strip()):
                        continue
                    rows += 1
                    if len(row) < width:
                        problems.append(f"{name}:{line}: expected {len(cols)} columns, got {len(row)}")
                        continue
                    stream = row[si].strip()
                    if not stream:
                        problems.append(f"{name}:{line}: empty stream name")
                        continue
                    try:
                        t = _parse_time(row[ti])
                    except (ValueError, OverflowError):
                        problems.append(f"{name}:{line}: time {row[ti]!r} is not RFC 3339 or epoch seconds")
                        continue
                    try:
                        v = float(row[vi])
                    except ValueError:
                        problems.append(f"{name}:{line}: value {row[vi]!r} is not a number")
                        continue
                    s = streams.get(stream)
                    if s is None:
                        s = streams[stream] = StreamSeries()
                    s.times.append(t)
                    s.values.append(v)
                    s.where.append((name, line))
            except (csv.Error, UnicodeDecodeError) as exc:
                problems.append(f"{name}:{line + 1}: unreadable row: {exc}")
    return ReadResult(streams=streams, problems=problems, rows=rows)


@dataclass
class ReplayResult:
    records: list[AlertRecord]
    problems: list[str]
    engines: dict[str, StreamEngine]
    rows: int

    @property
    def rejected(self) -> Counter[str]:
        total: Counter[str] = Counter()
        for e in self.engines.values():
            total.update(e.rejected_total)
        return total


def replay_series(series: dict[str, StreamSeries], settings_for: Callable[[str], DetectionSettings],
                  unit_for: Callable[[str], str | None] = lambda s: None,
                  progress: Callable[[int], None] | None = None) -> tuple[list[AlertRecord], list[str], dict[str, StreamEngine]]:
    """Run every stream through its own engine; return records sorted by time."""
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
            records.extend(res.records)
            for rej in res.rejected:
                if rej.reason == "spike":
                    continue
                file, line = s.where[a + rej.position] if rej.position >= 0 else ("?", 0)
                problems.append(f"{file}:{line}: stream {name}: {REASONS[rej.reason]}")
            if progress is not None:
                progress(min(BATCH, t.shape[0] - a))
    records.sort(key=lambda r: (r.as_of, r.stream, r.phase != "detected"))
    return records, problems, engines


def replay_files(paths: Iterable[str | Path], settings_for: Callable[[str], DetectionSettings],
                 unit_for: Callable[[str], str | None] = lambda s: None) -> ReplayResult:
    """Read the files and replay them (see :func:`read_long_csv`, :func:`replay_series`)."""
    read = read_long_csv(paths)
    records, problems, engines = replay_series(read.streams, settings_for, unit_for)
    return ReplayResult(records=records, problems=read.problems + problems, engines=engines, rows=read.rows)
