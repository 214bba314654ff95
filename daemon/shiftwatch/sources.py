"""Reading replay files a piece at a time: long and wide CSV, Parquet.

Layouts
-------
- **long**: columns ``time``, ``stream`` and ``value`` (others are ignored),
  one reading a row.
- **wide**: a ``time`` column and one column per tag, the column's name being
  the stream's (``time,filler_head1,filler_head2,...``); an empty cell (CSV)
  or a null (Parquet) is a missing reading, not a problem.

With ``layout="auto"`` a file is long when it has ``stream`` and ``value``
columns and wide otherwise.  Times are RFC 3339, epoch seconds, or epoch
milliseconds: a number above :data:`shiftwatch.decode.EPOCH_MS_ABOVE` (the
daemon's rule) is milliseconds.  A time without a UTC offset is refused
unless a time zone (an IANA name) is given, and then read as local time
there.

A CSV file is cut into chunks of about :data:`CHUNK_BYTES` at line ends, a
Parquet file into row groups; each becomes a :class:`Block`: per stream, its
rows in file order and where each row came from.  Memory is therefore
bounded by the chunk, not by the file.  Clean CSV chunks are read
column-wise from their bytes (see :func:`_read_fast`); a chunk with any
problem, quotes or carriage returns is read row by row with the stdlib
``csv`` module, so every problem names its ``file:line``.  Parquet problems
name the file, row group, row (counted from 0 within the row group, as
pyarrow counts) and column.
"""

from __future__ import annotations

import csv
import math
import os
import re
import stat
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta, tzinfo
from itertools import pairwise
from typing import TYPE_CHECKING, Any, BinaryIO, Self

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core import timefmt as _timefmt

if TYPE_CHECKING:
    from pathlib import Path
    from types import ModuleType

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

REQUIRED_COLUMNS = ("time", "stream", "value")
LAYOUTS = ("auto", "long", "wide")

#: Bytes of CSV read per chunk (cut at the next line end).
CHUNK_BYTES = 1 << 21
#: Parquet cells (rows times value columns) handled at once within a row group: 65,536 rows
#: of a long file, 327 of a wide one with 200 tags.
PARQUET_SLICE = 1 << 16
#: The fewest rows of a slice, however wide the file (each value column costs a few array calls
#: a slice).
PARQUET_SLICE_MIN_ROWS = 1024
#: Parquet cells of one piece (a task, and a Block): a row group with more is read in pieces of
#: this many (rounded down to whole slices), so memory grows neither with the row group
#: (pyarrow writes groups of up to 1,048,576 rows by default, Spark by bytes, often far more)
#: nor with the number of tags.
PARQUET_PIECE = 1 << 18
#: A row's place is ``file index << PLACE_BITS | line`` (CSV) or ``| row`` (Parquet).
PLACE_BITS = 40
_PLACE_MASK = (1 << PLACE_BITS) - 1


#: a file's note when some of its bytes are not UTF-8 (replaced by U+FFFD)
NOT_UTF8_NOTE = "the file is not valid UTF-8; unreadable characters were replaced"


class CsvFormatError(ValueError):
    """A file cannot be read at all (missing file, bad header, unknown time zone)."""


class TimeTextError(ValueError):
    """A time that is not RFC 3339, epoch seconds or epoch milliseconds, or lacks an offset."""


_decode_module: ModuleType | None = None


def _grammar() -> ModuleType:
    """:mod:`shiftwatch.decode`, whose number and time grammars (and epoch rule) these readers
    share with the daemon's decoders, imported on first use: the column-wise readers take
    shiftwatch's own plain forms without it, and it imports msgspec (about 13 ms of the 0.12 s
    a replay spends importing before it reads a row)."""
    global _decode_module
    if _decode_module is None:
        from shiftwatch import decode

        _decode_module = decode
    return _decode_module


def time_zone(name: str | None) -> tzinfo | None:
    """The IANA time zone of that name (None for None); :class:`CsvFormatError` when unknown."""
    if name is None:
        return None
    import zoneinfo

    try:
        return zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise CsvFormatError(f"--timezone {name}: not an IANA time zone name (e.g. Europe/Berlin, "
                             "America/Chicago, UTC)") from None


class RepeatedHour:
    """Tells the second occurrence of a local time from the first, by a stream's own times.

    When the clocks go back (the end of summer time) an hour of local time happens
    twice; a time written without its offset reads as the first occurrence (PEP 495's
    ``fold=0``), so the second hour's readings would stand an hour early, before those
    they follow.  A reading is taken as the second occurrence when its first-occurrence
    time lies in such an hour and goes back from the stream's previous time (in the
    file's order, as read here) by more than half the hour: the first time of the
    second hour, after the last of the first, and every one after it, since each goes
    back from the one before once that was moved.  A reading merely late within the hour
    (by less than half of it) stays where it is, and is set aside as out of order as
    before; readings half an hour or more apart cannot be told from repeats this way.

    Pure: epoch seconds in, epoch seconds out; the zone's transitions are found with
    :mod:`zoneinfo` (by the offsets at each day's start, then to the second).

    Examples
    --------
    >>> from zoneinfo import ZoneInfo
    >>> rh = RepeatedHour(ZoneInfo("Europe/Berlin"))
    >>> first = parse_time("2026-10-25T02:59:00", rh.tz)  # 00:59Z
    >>> second = parse_time("2026-10-25T02:00:00", rh.tz)  # read as 00:00Z, the first 02:00
    >>> t = rh.follow("oven", np.array([first, second, second + 60.0]))
    >>> [round(x - first) for x in t], rh.moved
    ([0, 60, 120], 2)
    """

    __slots__ = ("_hours", "_last", "_years", "moved", "tz")

    def __init__(self, tz: tzinfo) -> None:
        self.tz = tz
        self._years: set[int] = set()
        #: Each repeated hour as (start, end, length): its first-occurrence times, epoch seconds.
        self._hours: list[tuple[float, float, float]] = []
        #: Each stream's last time as :meth:`follow` gave it.
        self._last: dict[str, float] = {}
        #: Readings moved to their second occurrence so far.
        self.moved = 0

    #: Years looked at: those datetime can hold a whole of (times past them are never moved).
    FIRST_YEAR, LAST_YEAR = 1970, 9998

    def _offset(self, t: float) -> float:
        off = datetime.fromtimestamp(t, self.tz).utcoffset()
        return 0.0 if off is None else off.total_seconds()

    @classmethod
    def _year(cls, t: float) -> int:
        """The year of ``t`` near enough (no clock goes back around the new year), clamped."""
        return int(min(max(1970.0 + t // 31_556_952.0, cls.FIRST_YEAR), cls.LAST_YEAR))

    def _cover(self, lo: float, hi: float) -> None:
        """Find the clocks' going back in the years from ``lo`` to ``hi`` (once a year)."""
        for year in range(self._year(lo), self._year(hi) + 1):
            if year in self._years:
                continue
            self._years.add(year)
            start = datetime(year, 1, 1, tzinfo=UTC).timestamp()
            days = [start + 86400.0 * d for d in range(367)]
            offs = [self._offset(d) for d in days]
            for a, b, oa, ob in zip(days, days[1:], offs, offs[1:]):
                if ob >= oa:
                    continue
                while b - a > 1.0:  # the instant the offset drops, to the second
                    m = math.floor((a + b) / 2.0)
                    if self._offset(m) == oa:
                        a = m
                    else:
                        b = m
                shift = oa - ob
                self._hours.append((b - shift, b, shift))
        self._hours.sort()

    def follow(self, stream: str, t: FloatArray) -> FloatArray:
        """The next times of ``stream`` in file order, its second occurrences moved (``t``
        itself when none is, a copy otherwise: the caller's arrays may be shared)."""
        if t.shape[0] == 0:
            return t
        t, moved = self.adjust(t, self._last.get(stream, -np.inf))
        self._last[stream] = float(t[-1])
        self.moved += moved
        return t

    def adjust(self, t: FloatArray, prev: float) -> tuple[FloatArray, int]:
        """Times ``t`` (one stream's, in file order, after ``prev``) with the second
        occurrences moved to their true times, and how many were moved: ``t`` itself when
        none is, else a copy."""
        n = t.shape[0]
        if n == 0 or not np.isfinite(t).all():
            finite = t[np.isfinite(t)]
            if finite.shape[0] == 0:
                return t, 0
            lo, hi = float(finite.min()), float(finite.max())
        else:
            lo, hi = float(t.min()), float(t.max())
        self._cover(lo, hi)
        moved = 0
        for start, end, shift in self._hours:
            if end <= lo or start > hi:
                continue
            inside = np.flatnonzero((t >= start) & (t < end))
            if inside.shape[0] == 0:
                continue
            # Nothing moves unless a reading goes back by more than half the hour from the
            # one before it as read (the second hour's first; or, after a moved one, the
            # next piece's first): the loop starts there.
            back = np.concatenate(([prev], t[:-1]))[inside] - t[inside] > shift / 2.0
            if not bool(back.any()):
                continue
            if not moved:
                t = t.copy()
            for i in inside[int(np.argmax(back)):].tolist():
                before = float(t[i - 1]) if i else prev
                if before - t[i] > shift / 2.0 and t[i] + shift > before:
                    t[i] += shift
                    moved += 1
        return t, moved


#: Times a record can be written at: core.timefmt's TIME_MIN and TIME_MAX, the year 1 to the last
#: millisecond of the year 9999, as the daemon reads them.  Epoch microseconds or nanoseconds,
#: read as milliseconds by the daemon's rule, fall far past it.
TIME_MIN, TIME_MAX = _timefmt.TIME_MIN, _timefmt.TIME_MAX
_EPOCH_HINT = ("(shiftwatch reads epoch seconds, and epoch milliseconds above 100,000,000,000: divide epoch "
               "microseconds or nanoseconds first)")


def number(text: str) -> float:
    """The number a CSV value or epoch time is written as; ValueError for text that is none.

    A number is what the daemon's ``number`` decoder takes as one (the grammar of
    :data:`shiftwatch.decode._NUMBER`: ``[+-]digits[.digits][e[+-]digits]``, ASCII digits, and
    ``nan``, ``inf``, ``infinity`` in any case, which the engine then sets aside), with
    whitespace around it.  ``float()`` takes more: digit separators (``1_000``, PEP 515) and
    digits of other scripts, which pandas and pyarrow refuse in a CSV as the daemon does in a
    payload; replay read them as numbers.

    >>> number(" 499.5 "), number("1e3"), number("-Infinity")
    (499.5, 1000.0, -inf)
    >>> number("1_000")
    Traceback (most recent call last):
    ...
    ValueError: not a number: '1_000'
    """
    s = text.strip()
    grammar = _grammar()
    if grammar._NUMBER.fullmatch(s) is None and grammar._NONFINITE.fullmatch(s) is None:
        raise ValueError(f"not a number: {text!r}")
    return float(s)


def _out_of_range(t: float) -> str | None:
    """What is wrong with a time no record can be written at, or None for a time in range."""
    if t > TIME_MAX:
        return f"is past the year 9999 {_EPOCH_HINT}"
    if t < TIME_MIN:
        return "is before the year 1"
    return None


def _in_range(t: FloatArray) -> NDArray[np.bool_]:
    """Which times a record can be written at (see :data:`TIME_MAX`)."""
    ok: NDArray[np.bool_] = (t >= TIME_MIN) & (t <= TIME_MAX)
    return ok


def _epoch_rule(t: FloatArray) -> FloatArray:
    """Epoch seconds from numeric times, epoch milliseconds above the daemon's bound."""
    big = t > _grammar().EPOCH_MS_ABOVE
    if bool(big.any()):
        t = np.where(big, t / 1000.0, t)
    return t


#: What a time that is none of the forms read is told, with the form wanted.
NOT_A_TIME = ("is not RFC 3339, epoch seconds or epoch milliseconds (an RFC 3339 time has a date, a time "
              "of day to the second and a UTC offset, as in 2026-03-02T06:00:00Z or 2026-03-02 07:00:00.5+01:00)")


def parse_time(text: str, tz: tzinfo | None = None) -> float:
    """RFC 3339 text, epoch seconds or epoch milliseconds as epoch seconds.

    Text is RFC 3339's date-time (section 5.6) and no other ISO 8601 form: the
    grammar of the daemon's decoder (:data:`shiftwatch.decode._RFC3339`), with a
    ``T``, ``t`` or space between date and time, ``Z`` or ``z``, second 60 (a
    leap second, read as the next second as POSIX counts it).  A date alone, the
    basic form, week dates, hours or minutes alone, a decimal comma, an offset
    without its colon, all of which ``datetime.fromisoformat`` takes, are
    refused.  Text without a UTC offset is read in ``tz``, and refused without
    one.

    Examples
    --------
    >>> parse_time("2026-03-02T06:00:00.250Z"), parse_time("1772431200.5"), parse_time("1772431200250")
    (1772431200.25, 1772431200.5, 1772431200.25)
    >>> parse_time("2026-03-02T07:00:00", time_zone("Europe/Berlin"))
    1772431200.0
    >>> parse_time("1990-12-31t23:59:60.25z")
    662688000.25
    >>> parse_time("2026-03-02T07:00:00")
    Traceback (most recent call last):
    ...
    shiftwatch.sources.TimeTextError: has no UTC offset; say which time zone the file is in with --timezone (an IANA name such as Europe/Berlin)
    >>> parse_time("2026-03-02", time_zone("Europe/Berlin"))
    Traceback (most recent call last):
    ...
    shiftwatch.sources.TimeTextError: is not RFC 3339, epoch seconds or epoch milliseconds (an RFC 3339 time has a date, a time of day to the second and a UTC offset, as in 2026-03-02T06:00:00Z or 2026-03-02 07:00:00.5+01:00)
    """
    s = text.strip()
    grammar = _grammar()
    m = grammar._RFC3339.fullmatch(s)
    if m is not None:
        # Within this grammar fromisoformat reads the text as RFC 3339 does, but for 'z' and second 60.
        leap = 0.0
        if s[17:19] == "60" or s[-1] == "z":
            date, clock, offset = m.groups()
            if clock[6:8] == "60":  # a leap second (RFC 3339 section 5.6): the next second, as POSIX counts it
                clock, leap = clock[:6] + "59" + clock[8:], 1.0
            s = f"{date}T{clock}{'Z' if offset in ('Z', 'z') else offset or ''}"
        dt = datetime.fromisoformat(s)
        if dt.tzinfo is None:
            if tz is None:
                raise TimeTextError("has no UTC offset; say which time zone the file is in with --timezone "
                                    "(an IANA name such as Europe/Berlin)")
            t = dt.replace(tzinfo=tz).timestamp()
            if _out_of_range(t) is None and datetime.fromtimestamp(t, tz).replace(tzinfo=None) != dt:
                # Far from 1970 a double holds no microseconds, so the second decides (a gap in a
                # zone's clock is whole seconds).
                whole = dt.replace(microsecond=0)
                if datetime.fromtimestamp(whole.replace(tzinfo=tz).timestamp(), tz).replace(tzinfo=None) != whole:
                    raise TimeTextError(f"does not exist in {tz} (the clocks were put forward)")
        else:
            t = dt.timestamp()
        t += leap
    else:
        try:
            v = number(s)
        except ValueError:
            raise TimeTextError(NOT_A_TIME) from None
        if not math.isfinite(v):
            raise ValueError("not finite")
        t = v / 1000.0 if v > grammar.EPOCH_MS_ABOVE else v
    wrong = _out_of_range(t)
    if wrong is not None:
        raise TimeTextError(wrong)
    return t


#: Lines of RFC 3339 times in UTC with an upper-case 'T' and 'Z', the texts numpy's parser reads
#: as :func:`parse_time` does (numpy also takes hours or minutes alone and a space before the 'Z').
#: The repetition is possessive (``*+``): with ``*`` the match kept its place at every line, 27 MB
#: for 60,000 lines.
_RFC3339_Z_LINES = re.compile(r"(?:\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:\.\d+)?Z\n)*+", re.ASCII)
#: Lines of RFC 3339 times with a 'Z' or a numeric offset, no leap second and no lower-case 'z': the
#: texts ``datetime.fromisoformat`` reads as :func:`parse_time` does, checked all in one match.
_RFC3339_AWARE_LINES = re.compile(
    r"(?:\d{4}-\d\d-\d\d[Tt ]\d\d:\d\d:[0-5]\d(?:\.\d+)?(?:Z|[+-](?:[01]\d|2[0-3]):[0-5]\d)\n)*+", re.ASCII)


def _parse_times(texts: list[str], tz: tzinfo | None, z_form: bool = False) -> list[float]:
    """Parse time texts (distinct ones, usually).  When every text is RFC 3339
    in UTC with a ``Z`` (``z_form``: the caller has checked it), numpy's C parser
    does them all at once; when every one has its offset, ``fromisoformat`` reads
    them after one match of them all; otherwise each goes through :func:`parse_time`."""
    if not texts:
        return []
    joined = None if z_form else "\n".join(texts) + "\n"
    if joined is not None and _RFC3339_Z_LINES.fullmatch(joined) is None:
        if _RFC3339_AWARE_LINES.fullmatch(joined) is not None:
            # each with its offset, no leap second or 'z': fromisoformat reads it as parse_time does
            read = [datetime.fromisoformat(x).timestamp() for x in texts]
            if all(TIME_MIN <= x <= TIME_MAX for x in read):
                return read
    else:
        try:
            stamps = np.array([x[:-1] for x in texts], dtype="datetime64[us]")
        except ValueError:
            pass
        else:
            us = stamps.astype(np.int64)
            # A whole number of microseconds up to 2**53 is a double exactly, and the one division is
            # correctly rounded, as datetime.timestamp() is; further from 1970 (before 1685, after
            # 2255) the conversion would round first.  numpy reads the year 0000 too: parse_time
            # names it.
            if bool((np.abs(us) <= 2**53).all()):
                secs: list[float] = (us / 1e6).tolist()
                return secs
    return [parse_time(x, tz) for x in texts]


# ---------------------------------------------------------------------------
# Sources: one input file each, its header read and its layout known.

@dataclass
class Source:
    """One replay file: where it is, its kind and layout, and its columns.

    ``tags`` are ``(column, stream)`` pairs: the value column and the stream
    name of a long file's single value column is ``(value, "")``; a wide
    file has one pair per tag.
    """

    path: str
    kind: str  # "csv" or "parquet"
    layout: str  # "long" or "wide"
    header: list[str]
    time_col: int
    stream_col: int = -1
    value_col: int = -1
    tags: list[tuple[int, str]] = field(default_factory=list)
    #: CSV: byte offset and line number of the first row after the header
    body_start: int = 0
    body_line: int = 2
    #: Parquet: the first row of each row group, and the file's row count at the end
    group_rows: list[int] = field(default_factory=list)
    #: the stream of every row, when a partition directory (``stream=NAME``) says it
    stream: str | None = None
    #: Parquet: the columns pyarrow is to read as dictionaries (a long file's stream column of
    #: plain text, so that its names are read once a page's dictionary, not once a row)
    read_dictionary: list[str] = field(default_factory=list)
    #: CSV, wide: the unnamed columns at the end of the header (it ends with a comma), whose cells
    #: must be empty: a cell there that holds something is a problem, and the rest of its row is read
    unnamed: list[int] = field(default_factory=list)
    #: CSV: a problem of the whole file found reading its header (not valid UTF-8), given with
    #: each of its blocks as the one found in its rows is (a wide file's tag names are there)
    note: str | None = None
    #: the file's stat(2) before its header was read: device, inode, size, modification time
    #: (:func:`check_unchanged` compares it with the file's once everything is read)
    stamp: tuple[int, int, int, int] | None = None

    def remark(self) -> str | None:
        """What the summary says once about this file though it loses nothing, or None."""
        if not self.unnamed:
            return None
        first, last = self.unnamed[0] + 1, self.unnamed[-1] + 1
        which = f"column {first} has no name (the header ends with a comma)" if first == last else \
            f"columns {first} to {last} have no name (the header ends with commas)"
        return f"{self.path}: the header's {which}; its empty cells were ignored"

    def where(self, row: int) -> str:
        """The place of a row in this file, as problems name it."""
        if self.kind == "csv":
            return f"{self.path}:{row}"
        g = int(np.searchsorted(self.group_rows, row, side="right")) - 1
        return f"{self.path}: row group {g}, row {row - self.group_rows[g]}"


def expand_paths(paths: Sequence[str | Path]) -> list[str]:
    """The files to read: each path, a directory standing for its ``.parquet`` and ``.csv``
    files (all levels below it, in path order, numbers in names by their value:
    :func:`_path_order`).  An entry of a directory that is named as
    such a file but is none (a broken symlink, a pipe) is kept, so that opening it names it
    as opening a path given directly does, instead of leaving its rows out without a word."""
    return [f for f, _ in expand_paths_found(paths)]


def expand_paths_found(paths: Sequence[str | Path]) -> list[tuple[str, bool]]:
    """:func:`expand_paths`, each file with whether it was found in a directory (True) or
    named itself (False)."""
    out: list[tuple[str, bool]] = []
    for p in paths:
        if os.path.isdir(p):
            from pathlib import Path  # here: a replay of files never imports it

            found = sorted((str(f) for f in Path(p).rglob("*")
                            if not f.is_dir() and f.suffix.lower() in (".parquet", ".pq", ".csv")
                            and not any(part.startswith((".", "_")) for part in f.relative_to(p).parts)),
                           key=_path_order)
            if not found:
                raise CsvFormatError(f"{p}: the directory holds no .parquet or .csv file")
            out.extend((f, True) for f in found)
        else:
            out.append((str(p), False))
    return out


def _path_order(path: str) -> tuple[list[Any], str]:
    """A directory's files in path order, each run of digits taken as its number: writers number
    a partition's files ``part-0``, ``part-1``, ... (pyarrow's ``write_dataset``), and in plain text
    order ``part-10`` came before ``part-2``, so the rows of ``part-2`` on read as out of order.
    Zero-padded numbers (Spark's ``part-00000``) keep their text order; ties keep it too."""
    return [int(x) if i % 2 else x for i, x in enumerate(_DIGITS.split(path))], path


_DIGITS = re.compile(r"(\d+)")


#: The directory name pyarrow (``HivePartitioning``'s default ``null_fallback``), Hive and Spark
#: give the rows of a null partition value.
NULL_PARTITION = "__HIVE_DEFAULT_PARTITION__"


def _partition_stream(path: str) -> str | None:
    """The stream named by the nearest ``stream=NAME`` directory of a path (percent-decoded);
    ``""`` for a directory that names none (``stream=``, or a null stream's
    :data:`NULL_PARTITION`), whose rows are problems as a long file's row without a name is."""
    if "stream=" not in path:
        return None  # without importing pathlib, which a replay of plain files does not need
    from pathlib import Path
    from urllib.parse import unquote

    for part in reversed(Path(path).parent.parts):
        if part.startswith("stream="):
            name = unquote(part[len("stream="):])
            return "" if name == NULL_PARTITION or not name.strip() else name
    return None


def _no_stream(src: Source) -> str:
    """Why a row of a file in a ``stream=`` directory that names no stream has none."""
    from pathlib import Path

    return f"no stream: its directory {Path(src.path).parent.name} names none (a null or empty stream)"


def _once_each(cols: list[str], names: tuple[str, ...], where: str) -> None:
    """Refuse a header that names one of ``names`` twice (in any case): it was read with the
    first of them without a word, while a wide file's repeated tag was refused."""
    for name in names:
        if cols.count(name) > 1:
            first, second = [i + 1 for i, c in enumerate(cols) if c == name][:2]
            raise CsvFormatError(f"{where}: the header names {name} twice (columns {first} and {second}); "
                                 f"a file has one {name} column (a long file: time, stream and value; a "
                                 "wide file: time, then one column per tag)")


def _pick_layout(name: str, header: list[str], layout: str, where: str) -> tuple[str, int, int, int,
                                                                                 list[tuple[int, str]]]:
    cols = [c.strip().lower().lstrip("\ufeff") for c in header]
    _once_each(cols, ("time",), where)  # in any layout: which of two would be the time?
    long_ok = all(c in cols for c in REQUIRED_COLUMNS)
    # A `stream` or `value` column says the file is long (README: say --layout wide for a tag so named)
    if layout == "long" or (layout == "auto" and (long_ok or "time" not in cols or "stream" in cols
                                                   or "value" in cols)):
        missing = [c for c in REQUIRED_COLUMNS if c not in cols]
        if missing:
            wide = ("; a wide file with a tag called stream or value is read with --layout wide"
                    if layout == "auto" and "time" in cols else "")
            raise CsvFormatError(
                f"{where}: header lacks column(s) {', '.join(missing)}; expected time,stream,value "
                f"(long) or time followed by one column per tag (wide), got {','.join(header)}{wide}")
        _once_each(cols, REQUIRED_COLUMNS, where)
        ti, si, vi = (cols.index(c) for c in REQUIRED_COLUMNS)
        return "long", ti, si, vi, [(vi, "")]
    if "time" not in cols:
        raise CsvFormatError(f"{where}: header lacks a time column; a wide file is time followed by one "
                             f"column per tag, got {','.join(header)}")
    ti = cols.index("time")
    tags: list[tuple[int, str]] = []
    seen: set[str] = set()
    names = [h.lstrip("\ufeff").strip() for h in header]
    # Unnamed columns at the end (a header ending in a comma, as spreadsheets write one) name no
    # tag; their cells must be empty (see Source.unnamed).
    last = max(i for i, n in enumerate(names) if n or i == ti)
    for i, tag in enumerate(names[:last + 1]):
        if i == ti:
            continue
        if not tag:
            raise CsvFormatError(f"{where}: column {i + 1} of the header has no name; in a wide file "
                                 "each column after time names a tag")
        if tag in seen:
            raise CsvFormatError(f"{where}: the header names tag {tag!r} twice")
        seen.add(tag)
        tags.append((i, tag))
    if not tags:
        raise CsvFormatError(f"{where}: no tag columns after time")
    return "wide", ti, -1, -1, tags


#: What a path that is no regular file is, by its type (stat(2)'s st_mode).
_NOT_FILES = ((stat.S_ISFIFO, "a pipe"), (stat.S_ISCHR, "a character device"), (stat.S_ISSOCK, "a socket"),
              (stat.S_ISBLK, "a block device"), (stat.S_ISDIR, "a directory"))


def _check_regular(path: str) -> None:
    """Raise :class:`CsvFormatError` unless ``path`` is a regular file (or a link to one).

    A file is read in pieces by their place in it, and opened more than once, which a pipe
    (``cat FILE | shiftwatch replay /dev/stdin``, a FIFO) cannot give: its second opening sees
    rows from the middle, or waits for ever for a writer.  Told from os.stat, before opening.
    """
    try:
        mode = os.stat(path).st_mode
    except OSError as exc:
        link = f" (a symbolic link to {os.readlink(path)})" if os.path.islink(path) else ""
        raise CsvFormatError(f"{path}: cannot open: {exc.strerror or exc}{link}") from None
    if stat.S_ISREG(mode):
        return
    kind = next((what for test, what in _NOT_FILES if test(mode)), "not a file")
    raise CsvFormatError(f"{path}: {kind}, not a regular file; shiftwatch reads a file in pieces by their "
                         "place in it, so save the data to a file first (for example: cat > history.csv) "
                         "and give that file")


def _without_bom(lines: Iterator[str]) -> Iterator[str]:
    """The lines, the first without a UTF-8 byte order mark: before a quote (Windows
    PowerShell's Export-Csv writes '\ufeff"time","stream","value"') the csv module took it
    for a character of the field and its quotes for text."""
    for i, text in enumerate(lines):
        yield text[1:] if i == 0 and text.startswith("\ufeff") else text


#: Names of Parquet files (in a directory, the files read besides ``.csv``).
PARQUET_SUFFIXES = (".parquet", ".pq")


def _path_suffix(path: str) -> str:
    from pathlib import Path

    return Path(path).suffix


def _is_parquet(path: str) -> bool:
    """Whether the file is Parquet (it begins with PAR1); :class:`CsvFormatError` for a file
    named as Parquet that does not (empty, damaged, or something else): read as CSV, its bytes
    were taken for a header."""
    with open(path, "rb") as fb:
        head = fb.read(4)
    if head == b"PAR1":
        return True
    # (the path's end first: pathlib only for a name that may have such a suffix)
    if path.lower().endswith(PARQUET_SUFFIXES) and _path_suffix(path).lower() in PARQUET_SUFFIXES:
        if not head:
            raise CsvFormatError(f"{path}: the file is empty (0 bytes); a Parquet file begins and ends with PAR1")
        raise CsvFormatError(f"{path}: not a readable Parquet file: it does not begin with PAR1 (damaged, or "
                             "not Parquet)")
    return False


def _stamp(path: str) -> tuple[int, int, int, int]:
    st = os.stat(path)
    return st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns


def check_unchanged(sources: Sequence[Source]) -> None:
    """Raise :class:`CsvFormatError` naming the first file written to since it was opened.

    A file is read in pieces, by more than one process and opened more than once: one rewritten
    in place (the same length), appended to or replaced meanwhile was read as a mixture of its
    two contents without a word.  stat(2) tells: a write sets the modification time, a
    replacement (rename) brings another inode; a file found shorter than planned is named
    while it is read (:func:`_changed`)."""
    for src in sources:
        if src.stamp is None:
            continue
        try:
            now = _stamp(src.path)
        except OSError as exc:
            raise CsvFormatError(f"{src.path}: the file changed while it was read (it is gone: "
                                 f"{exc.strerror or exc})") from None
        if now == src.stamp:
            continue
        if now[:2] != src.stamp[:2]:
            how = "another file was put in its place"
        elif now[2] != src.stamp[2]:
            how = f"its size went from {src.stamp[2]:,} to {now[2]:,} bytes"
        else:
            how = "it was written to, its size unchanged"
        raise CsvFormatError(f"{src.path}: the file changed while it was read ({how}); nothing was written: "
                             "give a copy of it that nothing writes to")


def open_source(path: str, layout: str = "auto") -> Source:
    """Read a file's header (or Parquet schema) and decide its layout.

    Raises :class:`CsvFormatError` when the file cannot be opened or its
    columns fit no layout.
    """
    _check_regular(path)
    try:
        stamp = _stamp(path)
    except OSError as exc:
        raise CsvFormatError(f"{path}: cannot open: {exc.strerror or exc}") from None
    src = _open_source(path, layout)
    src.stamp = stamp
    return src


def _open_source(path: str, layout: str) -> Source:
    try:
        parquet = _is_parquet(path)
    except OSError as exc:
        raise CsvFormatError(f"{path}: cannot open: {exc.strerror or exc}") from None
    if parquet:
        return _open_parquet(path, layout)
    try:
        fb = open(path, "rb")  # noqa: SIM115  opened apart to report its error; the with below closes it
    except OSError as exc:
        raise CsvFormatError(f"{path}: cannot open: {exc.strerror or exc}") from None
    with fb:
        if fb.read(2) in (b"\xff\xfe", b"\xfe\xff"):  # Excel's "Unicode Text", for one
            raise CsvFormatError(f"{path}:1: the file is UTF-16 (it starts with a UTF-16 byte order mark); "
                                 "save it as UTF-8 CSV")
        fb.seek(0)
        lines = _Lines(bytearray(), 0, 0, fb)
        reader = csv.reader(_without_bom(lines))
        try:
            header = next(reader)
        except StopIteration:
            raise CsvFormatError(f"{path}:1: the file is empty; expected a header time,stream,value") from None
        except csv.Error as exc:
            raise CsvFormatError(f"{path}:1: unreadable header: {exc}") from None
        start, line = lines.consumed, reader.line_num + 1
        stream = _partition_stream(path)
        cols = [c.strip().lower().lstrip("\ufeff") for c in header]
        if stream is not None and layout != "wide" and "stream" not in cols and "time" in cols and "value" in cols:
            # a long file whose stream is its partition's (stream=NAME directories), as for Parquet
            _once_each(cols, ("time", "value"), f"{path}:1")
            ti, vi = cols.index("time"), cols.index("value")
            return Source(path, "csv", "long", header, ti, -1, vi, [(vi, "")], stream=stream, body_start=start,
                          body_line=line)
        try:
            lay, ti, si, vi, tags = _pick_layout(path, header, layout, f"{path}:1")
        except CsvFormatError:
            if lines.bad_utf8:  # a binary file (or another encoding) whose first line fits no layout
                fb.seek(0)
                head = fb.read(start)
                try:
                    head.decode("utf-8")
                    at = ""
                except UnicodeDecodeError as exc:
                    at = f": byte {exc.start + 1:,} of its first line is {head[exc.start]:#04x}"
                raise CsvFormatError(f"{path}:1: not a UTF-8 text file{at}, which UTF-8 does not allow (RFC "
                                     "3629); shiftwatch reads comma-separated UTF-8 text (save it as UTF-8 "
                                     "CSV)") from None
            for sep, name in ((";", "semicolons"), ("\t", "tabs")):
                if len(header) == 1 and sep in header[0]:
                    raise CsvFormatError(f"{path}:1: the header is separated by {name}; shiftwatch reads "
                                         f"comma-separated files (got {header[0]!r})") from None
            raise
        named = {ti, *(c for c, _ in tags)}
        unnamed = [i for i in range(len(header)) if i not in named] if lay == "wide" else []
        # A header not in UTF-8 that fits a layout (a tag name in Windows-1252) is read with its
        # bytes replaced, as a row's are, and said so: a wide file's were replaced without a word.
        note = f"{path}: {NOT_UTF8_NOTE}" if lines.bad_utf8 else None
        return Source(path, "csv", lay, header, ti, si, vi, tags, body_start=start, body_line=line,
                      unnamed=unnamed, note=note)


def open_sources(paths: list[str | Path], layout: str = "auto", unread: list[str] | None = None) -> list[Source]:
    """:func:`open_source` for every file (directories expanded), so a bad header stops
    the replay before it starts.

    With ``unread`` (a list), a file found in a directory that cannot be read (a damaged
    Parquet footer, an empty file, a header that fits no layout, a broken link) is left out
    and its problem appended there, so the other files of a dataset are still read; a file
    named in ``paths`` itself is refused all the same, and so are files of which none can be
    read.
    """
    if layout not in LAYOUTS:
        raise CsvFormatError(f"--layout {layout}: choose one of {', '.join(LAYOUTS)}")
    found = expand_paths_found(paths)
    if unread is None:
        sources = [open_source(p, layout) for p, _ in found]
    else:
        sources = open_found([p for p, _ in found], layout, unread,
                             named={p for p, in_dir in found if not in_dir})
        if not sources:
            raise CsvFormatError(unread[0] if len(unread) == 1 else
                                 f"none of the {len(unread)} files could be read; the first: {unread[0]}")
    seen: dict[tuple[int, int], int] = {}
    for i, src in enumerate(sources):
        # A file given twice (by name, through its directory, by a link) had every row of its
        # second reading set aside as a repeated time, one problem per row.
        try:
            st = os.stat(src.path)
        except OSError:
            continue
        first = seen.setdefault((st.st_dev, st.st_ino), i)
        if first != i:
            raise CsvFormatError(f"{src.path}: given twice (the same file as {sources[first].path}); "
                                 "each file is read once")
    return sources


def open_found(files: list[str], layout: str, unread: list[str], named: set[str] | None = None) -> list[Source]:
    """The sources of ``files`` in order, those that cannot be opened left out and their
    problems appended to ``unread``; a file in ``named`` (given by name, not found in a
    directory) is refused instead (:class:`CsvFormatError`).  ``files`` may include the named
    ones: the order of ``files`` is kept."""
    out: list[Source] = []
    for p in files:
        try:
            out.append(open_source(p, layout))
        except CsvFormatError as exc:
            if named and p in named:
                raise
            unread.append(str(exc))
    return out


# ---------------------------------------------------------------------------
# Blocks: what a chunk or row group holds, per stream.

@dataclass
class Block:
    """The rows of one chunk of a file, per stream, in file order.

    ``parts`` holds ``(stream, times, values, places)``; ``problems`` the
    chunk's unreadable rows as messages, in file order; ``note`` a problem
    of the whole file (not valid UTF-8), or None; ``remark`` what is said
    once about the whole file though nothing of it was lost (an unnamed
    empty column ignored: :meth:`Source.remark`), or None.
    """

    index: int
    file: int
    parts: list[tuple[str, FloatArray, FloatArray, IntArray]]
    problems: list[str]
    rows: int
    nbytes: int
    note: str | None = None
    #: problems counted beyond those in ``problems``
    unlisted: int = 0
    remark: str | None = None
    #: Lines of the chunk (a CSV chunk read with ``--jobs``; -1: not counted)
    lines: int = -1
    #: True when the places count lines from the chunk's first (its line number not known
    #: when it was read): the reader that learns it adds it (:func:`parse_csv_chunk`)
    relative: bool = False


class _Lines:
    """The lines of CSV bytes as text, split as a text file opened with ``newline=""``
    splits them (at ``\\n``, ``\\r\\n`` and a lone ``\\r``), invalid UTF-8 replaced.

    Reads ``buf[pos:end]``, then more from ``more`` (a binary file) when given.
    ``consumed`` counts the bytes handed out from the start of the data and
    ``count`` the lines, so a reader can stop at a row boundary and say
    where it is.
    """

    def __init__(self, buf: bytearray, pos: int, end: int, more: BinaryIO | None) -> None:
        self.buf = buf
        self.pos = pos
        self.end = end
        self.more = more
        self.consumed = 0
        self.count = 0
        self.bad_utf8 = False
        #: Per line end (\n, \r): where the last search found it (-1: nowhere) and where it
        #: stopped, so no byte is searched twice: a file whose lines end in a lone \r was searched
        #: to its end for a \n at every line, which took minutes for a few megabytes.
        self._seen = [(-1, pos), (-1, pos)]

    def __iter__(self) -> _Lines:
        return self

    def _fill(self) -> bool:
        if self.more is None:
            return False
        data = self.more.read(1 << 16)
        if not data:
            self.more = None
            return False
        if self.pos > (1 << 20):
            del self.buf[:self.pos]
            self.end -= self.pos
            self._seen = [(f - self.pos if f >= 0 else -1, max(u - self.pos, 0)) for f, u in self._seen]
            self.pos = 0
        self.buf[self.end:self.end] = data
        self.end += len(data)
        return True

    def _find(self, k: int, char: bytes) -> int:
        """The first ``char`` in ``buf[pos:end]``, or -1; each byte searched once."""
        found, until = self._seen[k]
        if found >= self.pos:
            return found
        if found < 0 and self.pos <= until >= self.end:
            return -1
        found = self.buf.find(char, self.pos if found >= 0 else max(self.pos, until), self.end)
        self._seen[k] = (found, self.end)
        return found

    def __next__(self) -> str:
        b = self.buf
        while True:
            nl = self._find(0, b"\n")
            if nl >= 0:
                stop = nl + 1
                break
            cr = self._find(1, b"\r")
            if 0 <= cr < self.end - 1:  # no \n follows it: a lone \r ends the line
                stop = cr + 1
                break
            if not self._fill():
                stop = self.end
                break
        if stop == self.pos:
            raise StopIteration
        cr = self._find(1, b"\r")
        while 0 <= cr < stop - 1:
            if b[cr + 1] != 10:  # a lone \r ends the line
                stop = cr + 1
                break
            cr = b.find(b"\r", cr + 2, stop)
        raw = bytes(b[self.pos:stop])
        self.consumed += stop - self.pos
        self.pos = stop
        self.count += 1
        try:
            return raw.decode("utf-8")
        except UnicodeDecodeError:
            self.bad_utf8 = True
            return raw.decode("utf-8", errors="replace")

    def rest(self) -> bytes:
        """The bytes not handed out yet (without reading more)."""
        return bytes(self.buf[self.pos:self.end])


class _RowLines:
    """The lines of :class:`_Lines` for the csv module, with their numbers: ``taken`` holds
    the (number, text) of the lines of the row being read, and :meth:`open_quote` hands all but
    the first of them out again, for a row that a quote left open ran on from."""

    def __init__(self, lines: _Lines, first: int) -> None:
        self.lines = lines
        self.next_number = first
        self.pending: deque[tuple[int, str]] = deque()
        self.taken: list[tuple[int, str]] = []

    def __iter__(self) -> _RowLines:
        return self

    def __next__(self) -> str:
        if self.pending:
            item = self.pending.popleft()
        else:
            item = (self.next_number, next(self.lines))
            self.next_number += 1
        self.taken.append(item)
        return item[1]

    @property
    def last_line(self) -> int:
        """The number of the row's last line (of the last line read, after a blank row)."""
        return self.taken[-1][0] if self.taken else self.next_number - 1

    def open_quote(self, path: str) -> str:
        """Skip the row's first line, read the others again; the problem that names it."""
        first = self.taken[0][0]
        self.pending.extendleft(reversed(self.taken[1:]))
        self.taken.clear()
        return (f"{path}:{first}: a quote opens a field here that is not closed on its line; the line was "
                "skipped and the lines after it read as rows")


def _count_lines(data: bytes | bytearray, end: int) -> int:
    """Lines as :class:`_Lines` counts them in ``data[:end]``, which ends with a line end."""
    # numpy counts the newlines of a 2 MiB chunk about five times faster than bytes.count
    n = int(np.count_nonzero(np.frombuffer(data, dtype=np.uint8, count=end) == 10))
    if data.find(b"\r", 0, end) >= 0:
        n += data.count(b"\r", 0, end) - data.count(b"\r\n", 0, end)
    return n


def lines_between(path: str, start: int, stop: int, opened: dict[str, Any] | None = None) -> int:
    """Lines as :class:`_Lines` counts them in the file's bytes ``start:stop`` (a line end at
    ``stop - 1``), read in pieces: a ``\r`` that ends a piece and a ``\n`` that begins the next
    are one line end."""
    f = _kept_open(opened, path, lambda: open(path, "rb"))  # noqa: SIM115  kept open across chunks
    n = 0
    cr = False  # the piece before ended in \r
    at = start
    while at < stop:
        piece = os.pread(f.fileno(), min(CHUNK_BYTES, stop - at), at)
        if not piece:
            raise _changed(path, at, stop)
        n += _count_lines(piece, len(piece)) - (1 if cr and piece[0] == 10 else 0)
        cr = piece[-1] == 13
        at += len(piece)
    if opened is None:
        f.close()
    return n


def _slow_rows(src: Source, fidx: int, lines: _Lines, line0: int, tz: tzinfo | None, index: int,
               nbytes: int, stop_at: int | None = None) -> Block:
    """Row-by-row reading with the stdlib ``csv`` module; every problem names its line.

    ``line0`` is the line number of the first line; with ``stop_at`` reading
    ends at the first row boundary at or after that many bytes.
    """
    name = src.path
    source = _RowLines(lines, line0)
    reader = csv.reader(source)
    ti = src.time_col
    long = src.layout == "long"
    si = src.stream_col
    width = (max(ti, si, src.value_col) if long else max(ti, max(c for c, _ in src.tags))) + 1
    ncols = len(src.header)
    fbits = fidx << PLACE_BITS
    problems: list[str] = []
    rows = 0
    last_text: str | None = None
    last_t = 0.0
    collected: dict[str, tuple[list[float], list[float], list[int]]] = {}
    appenders: dict[str, tuple[Any, Any, Any]] = {}

    def lists_for(key: str) -> tuple[Any, Any, Any]:
        lists = collected.setdefault(key, ([], [], []))
        return lists[0].append, lists[1].append, lists[2].append

    if not long:
        tag_apps = [(c, tag, lists_for(tag)) for c, tag in src.tags]
    used = sorted({ti, si, src.value_col} - {-1} if long else {ti, *(c for c, _ in src.tags)})
    while True:
        source.taken.clear()
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            if len(source.taken) > 1:  # a quote left open ran on to the field size limit
                problems.append(source.open_quote(name))
                rows += 1
                continue
            problems.append(f"{name}:{source.last_line}: unreadable row: {exc}")
            if stop_at is not None and lines.consumed >= stop_at and not source.pending:
                break
            continue
        line = source.last_line
        if len(source.taken) > 1 and (len(row) < width or any(
                "\n" in row[c] or "\r" in row[c] for c in used)):
            # A field that runs over a line end where a time, a stream or a value should be: a
            # quote left open (an export that cut a quoted name) would take every line up to the
            # next quote, or the end of the file, as one field.  The line with the quote is
            # skipped and the lines after it are read again as rows.
            problems.append(source.open_quote(name))
            rows += 1
            continue
        # A row longer than the header, past it something not empty: a value with a decimal comma
        # and no quotes ("499,97"), whose integer part would be read and the rest dropped.
        # A wide row that stops short after its time (an export that leaves out the empty cells
        # at the end of a row) keeps the cells it has: the others are read as empty, and it is
        # counted as a problem.
        # A line of spaces or tabs only is blank in either layout (pandas' read_csv skips it too);
        # a wide file took it for a short row with a bad time, two problems for no reading lost.
        blank = not row or (len(row) == 1 and not row[0].strip())
        short = not long and ti < len(row) < width and not blank
        if blank:
            pass
        elif (len(row) < width and not short) or (len(row) > ncols and any(c.strip() for c in row[ncols:])):
            rows += 1
            problems.append(f"{name}:{line}: expected {ncols} columns, got {len(row)}")
        else:
            rows += 1
            if short:
                problems.append(f"{name}:{line}: expected {ncols} columns, got {len(row)}; the "
                                f"{ncols - len(row)} missing at the end are read as empty cells")
            text = row[ti]
            ok = True
            if text != last_text:
                try:
                    last_t = parse_time(text, tz)
                except TimeTextError as exc:
                    problems.append(f"{name}:{line}: time {text!r} {exc}")
                    last_text = None
                    ok = False
                except (ValueError, OverflowError):
                    problems.append(f"{name}:{line}: time {text!r} {NOT_A_TIME}")
                    last_text = None
                    ok = False
                else:
                    last_text = text
            if ok and long:
                try:
                    v = number(row[src.value_col])
                except ValueError:
                    problems.append(f"{name}:{line}: value {row[src.value_col]!r} is not a number")
                else:
                    stream = row[si] if src.stream is None or si >= 0 else src.stream
                    app = appenders.get(stream)
                    if app is None:
                        key = stream.strip()
                        if not key:
                            problems.append(f"{name}:{line}: " + ("empty stream name" if si >= 0 or src.stream is None
                                                                 else _no_stream(src)))
                            app = None
                        else:
                            app = appenders[stream] = lists_for(key)
                    if app is not None:
                        app[0](last_t)
                        app[1](v)
                        app[2](fbits | line)
            elif ok:
                have = len(row)
                for c in src.unnamed:
                    if c < have and row[c].strip():
                        problems.append(f"{name}:{line}: column {c + 1} has no name in the header but holds "
                                        f"{row[c]!r}; the cell was skipped (in a wide file each column after "
                                        "time names a tag)")
                for c, tag, app in tag_apps:
                    if c >= have:
                        continue  # a short row's missing cells (counted above)
                    cell = row[c]
                    if not cell or not cell.strip():
                        continue
                    try:
                        v = number(cell)
                    except ValueError:
                        problems.append(f"{name}:{line}: {tag}: value {cell!r} is not a number")
                        continue
                    app[0](last_t)
                    app[1](v)
                    app[2](fbits | line)
        if stop_at is not None and lines.consumed >= stop_at and not source.pending:
            break
    parts = [(key, np.array(ts, dtype=np.float64), np.array(vs, dtype=np.float64), np.array(ps, dtype=np.int64))
             for key, (ts, vs, ps) in collected.items() if ts]
    note = f"{name}: {NOT_UTF8_NOTE}" if lines.bad_utf8 else src.note
    return Block(index, fidx, parts, problems, rows, nbytes, note, remark=src.remark())


# ---------------------------------------------------------------------------
# Column-wise reading of clean CSV chunks.  The chunk is one buffer of bytes;
# fields are found from the positions of commas and newlines and read eight
# bytes at a time as little-endian words (byte i of a word is bits 8i to 8i+7).

#: Zero bytes after the chunk's bytes, so a word can be read at any field; as many before it.
_PAD = 16
_ONES = np.uint64(0x0101010101010101)
_ZEROS = np.uint64(0x3030303030303030)  # eight '0' characters
#: _LOW_BYTES[r]: a word with its r low bytes set.
_LOW_BYTES = np.array([(1 << (8 * r)) - 1 for r in range(8)] + [2**64 - 1], dtype=np.uint64)
_POW10_FLOAT = 10.0 ** np.arange(17)
_POW10_INT = 10 ** np.arange(18, dtype=np.int64)
#: Stream names are hashed a word at a time up to this many bytes; longer ones are also compared whole.
_HASHED_BYTES = 1024


def _eight_digits(x: NDArray[np.uint64]) -> NDArray[np.uint64]:
    """The number written by eight digit bytes (0..9 each, the first in the low byte).

    Examples
    --------
    >>> w = np.frombuffer(bytes([1, 2, 3, 4, 5, 6, 7, 8]), dtype="<u8")
    >>> _eight_digits(w.copy()).tolist()
    [12345678]
    """
    x = (x * np.uint64(10) + (x >> np.uint64(8))) & np.uint64(0x00FF00FF00FF00FF)
    x = (x * np.uint64(100) + (x >> np.uint64(16))) & np.uint64(0x0000FFFF0000FFFF)
    return (x * np.uint64(10000) + (x >> np.uint64(32))) & np.uint64(0xFFFFFFFF)


class _Body:
    """The rows held in ``buf[begin:end]`` (each line ending in a newline),
    with the byte offsets of every field.

    ``starts`` and ``ends`` are ``(rows, columns)`` arrays of offsets into
    ``buf``; ``buf`` has at least :data:`_PAD` bytes after ``end`` and
    before ``begin``.
    """

    def __init__(self, buf: bytearray, begin: int, end: int, starts: IntArray, ends: IntArray) -> None:
        self.buf = buf
        self.begin = begin
        self.end = end
        self.starts = starts
        self.ends = ends
        self._words = np.ndarray((len(buf) - 7,), dtype="<u8", buffer=buf, strides=(1,))

    @classmethod
    def split(cls, buf: bytearray, begin: int, end: int, ncols: int) -> _Body | None:
        """Find the fields; None unless every line holds exactly ``ncols`` of them."""
        raw = np.frombuffer(buf, dtype=np.uint8, count=end - begin, offset=begin)
        newline = raw == 10
        is_delim = raw == 44
        is_delim |= newline
        delims = np.flatnonzero(is_delim)
        n = int(np.count_nonzero(newline))
        if n == 0 or delims.shape[0] != n * ncols:
            return None
        ends = delims.reshape(n, ncols)
        # n newlines, each the last delimiter of its line: the others are commas.
        if not bool(newline[ends[:, -1]].all()):
            return None
        ends += begin
        starts = np.empty_like(ends)
        starts[0, 0] = begin
        starts[1:, 0] = ends[:-1, -1] + 1
        starts[:, 1:] = ends[:, :-1] + 1
        return cls(buf, begin, end, starts, ends)

    def words(self, at: IntArray) -> NDArray[np.uint64]:
        """The 8 bytes at each offset (offsets past the end read padding)."""
        return self._words[np.minimum(at, self.end)]

    def text(self, row: int, col: int) -> str:
        return self.buf[int(self.starts[row, col]):int(self.ends[row, col])].decode()

    def texts(self, col: int) -> list[str]:
        b = self.buf
        return [b[s:e].decode() for s, e in zip(self.starts[:, col].tolist(), self.ends[:, col].tolist())]


def _parse_decimal_column(body: _Body, col: int) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Values of the fields of a column that are plain decimals; see :func:`_parse_decimals`.

    Examples
    --------
    >>> data = b"time,stream,value\\nx,-0.50\\nx,+12\\nx,7.\\nx,1e3\\nx,.25\\nx,-\\n"
    >>> body = _Body.split(bytearray(data + bytes(_PAD)), 18, len(data), 2)
    >>> v, ok = _parse_decimal_column(body, 1)
    >>> v[ok].tolist(), ok.tolist()
    ([-0.5, 12.0, 7.0, 0.25], [True, True, True, False, True, False])
    """
    return _parse_decimals(body, body.starts[:, col], body.ends[:, col])


def _parse_decimals(body: _Body, s: IntArray, e: IntArray) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Values of the fields ``buf[s:e]`` that are plain decimals (``[+-]digits[.digits]``,
    at most 16 characters); the mask says which fields are.

    Each value is its digits as an integer M divided by 10**d (d digits after
    the point).  With M <= 2**53 and d <= 16 both are exact doubles, so the
    one correctly rounded division gives exactly what ``float(text)`` gives
    (the exact case of W. D. Clinger, "How to read floating point numbers
    accurately", PLDI 1990).  Other fields are left to the caller.
    """
    lens = e - s
    width = 8 if int(lens.max(initial=0)) <= 8 else 16
    n = lens.shape[0]
    # The field's last `width` bytes, right-aligned: column c of the window is
    # byte e - width + c.  Bytes before the field become '0' (leading zeros).
    parts = []
    for k in range(width // 8):
        keep = ~_LOW_BYTES[np.clip(width - lens - 8 * k, 0, 8)]
        parts.append((body.words(e - width + 8 * k) & keep) | (_ZEROS & ~keep))
    # A sign in the field's first byte becomes a leading zero too.
    first_col = np.clip(width - lens, 0, width - 1)
    head = parts[0] if width == 8 else np.where(first_col < 8, parts[0], parts[1])
    shift = ((first_col % 8) * 8).astype(np.uint64)
    first = (head >> shift) & np.uint64(0xFF)
    neg = first == 45
    signed = neg | (first == 43)
    fix = np.where(signed, (first ^ np.uint64(0x30)) << shift, np.uint64(0))
    if width == 8:
        parts[0] ^= fix
    else:
        parts[0] ^= np.where(first_col < 8, fix, np.uint64(0))
        parts[1] ^= np.where(first_col < 8, np.uint64(0), fix)
    x = np.stack(parts, axis=1) ^ _ZEROS  # digits become 0..9, '.' becomes 0x1e
    c = x.view(np.uint8).reshape(n, width)
    dot = c == 0x1E
    bad = ((c > 9) & ~dot).view(np.uint64).any(axis=1)
    c[dot] = 0
    dots = dot.view(np.uint64)  # 0x01 in each byte that held a point
    n_dots = np.bitwise_count(dots).sum(axis=1, dtype=np.int64)
    ok = ~bad & (n_dots <= 1) & (lens - signed - n_dots >= 1) & (lens <= width)
    digits = _eight_digits(x[:, 0])
    if width == 16:
        digits = digits * np.uint64(10**8) + _eight_digits(x[:, 1])
    a = digits.astype(np.int64)
    # The column of the point (where there is one): 8 j + (set bits below its byte) / 8.
    col_at = np.zeros(n, dtype=np.int64)
    for j in range(width // 8):
        wj = dots[:, j]
        col_at += np.where(wj != 0, 8 * j + np.bitwise_count(wj - np.uint64(1)).astype(np.int64) // 8, 0)
    p = np.where(n_dots == 1, width - 1 - col_at, 0)  # digits after the point
    scale = _POW10_INT[p]
    m = np.where(n_dots == 1, (a // (scale * 10)) * scale + a % scale, a)
    ok &= m <= 2**53
    v = m.astype(np.float64) / _POW10_FLOAT[p]
    np.negative(v, out=v, where=neg)
    return v, ok


#: Columns of "YYYY-MM-DDTHH:MM:SS.fffZ" that hold fixed characters, and those that hold digits.
_ISO_MS_FIXED = {4: "-", 7: "-", 10: "T", 13: ":", 16: ":", 19: ".", 23: "Z"}
_ISO_MS_DIGITS = [0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15, 17, 18, 20, 21, 22]
_DAYS_IN_MONTH = np.array([0, 31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])


def _parse_iso_ms_column(c: NDArray[np.uint8]) -> FloatArray | None:
    """Parse RFC 3339 times written as ``YYYY-MM-DDTHH:MM:SS.fffZ`` (the form
    shiftwatch writes) with array arithmetic; None if any row differs or is
    not a valid date and time.

    ``c`` holds the 24 bytes of one time per row.  The result equals
    ``datetime.fromisoformat(text).timestamp()`` bit for bit: both are the
    whole number of milliseconds divided by 1000, correctly rounded.

    Examples
    --------
    >>> rows = lambda *ts: np.frombuffer("".join(ts).encode(), dtype=np.uint8).reshape(-1, 24)
    >>> _parse_iso_ms_column(rows("1970-01-01T00:00:01.500Z", "2026-03-02T06:00:00.000Z")).tolist()
    [1.5, 1772431200.0]
    >>> _parse_iso_ms_column(rows("2026-02-29T06:00:00.000Z")) is None   # not a leap year
    True
    """
    fixed = np.frombuffer("".join(_ISO_MS_FIXED.values()).encode(), dtype=np.uint8)
    if not bool((c[:, list(_ISO_MS_FIXED)] == fixed).all()):
        return None
    d = c[:, _ISO_MS_DIGITS] - np.uint8(48)
    if bool((d > 9).any()):  # not a digit (below '0' wraps around)
        return None
    d = d.astype(np.int32)
    y = d[:, 0] * 1000 + d[:, 1] * 100 + d[:, 2] * 10 + d[:, 3]
    mo = d[:, 4] * 10 + d[:, 5]
    day = d[:, 6] * 10 + d[:, 7]
    hh, mi, ss = d[:, 8] * 10 + d[:, 9], d[:, 10] * 10 + d[:, 11], d[:, 12] * 10 + d[:, 13]
    ms = d[:, 14] * 100 + d[:, 15] * 10 + d[:, 16]
    if bool(((mo < 1) | (mo > 12) | (day < 1) | (hh > 23) | (mi > 59) | (ss > 59) | (y < 1)).any()):
        return None
    leap = ((y % 4 == 0) & (y % 100 != 0)) | (y % 400 == 0)
    if bool((day > _DAYS_IN_MONTH[mo] + (leap & (mo == 2))).any()):
        return None
    # Days from the civil date (H. Hinnant's algorithm, common practice).
    yy = y - (mo <= 2)
    era = yy // 400
    yoe = yy - era * 400
    doy = (153 * ((mo + 9) % 12) + 2) // 5 + day - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    days = (era * 146097 + doe - 719468).astype(np.int64)
    total_ms = ((days * 24 + hh) * 60 + mi) * 60_000 + ss * 1000 + ms
    out: FloatArray = total_ms.astype(np.float64) / 1000.0
    return out


def _iso_ms_times(body: _Body, col: int) -> FloatArray | None:
    """The time column when every field is in shiftwatch's own form, else None.

    Rows that repeat the time text of the row before (several streams
    sampled at once) are parsed once.
    """
    s, e = body.starts[:, col], body.ends[:, col]
    if not bool((e - s == 24).all()):
        return None
    words = [body.words(s + 8 * k) for k in range(3)]
    new = np.zeros(s.shape[0], dtype=bool)
    new[0] = True
    changed = new[1:]  # a view: a row is new when any of its words differs from the row before
    for w in words:
        changed |= w[1:] != w[:-1]
    firsts = np.flatnonzero(new)
    parsed = _parse_iso_ms_column(np.stack([w[firsts] for w in words], axis=1).view(np.uint8).reshape(-1, 24))
    if parsed is None:
        return None
    return parsed if firsts.shape[0] == s.shape[0] else parsed[np.cumsum(new) - 1]


def _z_form_column(body: _Body, col: int) -> bool:
    """Whether every field of the column is ``YYYY-MM-DDTHH:MM:SS[.digits]Z`` of one width, its
    bytes checked at once (what :data:`_RFC3339_Z_LINES` checks texts of any widths for).

    >>> body = _Body.split(bytearray(b"2026-03-02T06:00:00.5Z,1\\n2026-03-02T06:00:01.5Z,2\\n" + bytes(16)), 0, 50, 2)
    >>> _z_form_column(body, 0), _z_form_column(body, 1)
    (True, False)
    """
    s, e = body.starts[:, col], body.ends[:, col]
    width = int(e[0] - s[0])
    if width < 20 or width == 21 or not bool((e - s == width).all()):
        return False
    raw = np.frombuffer(body.buf, dtype=np.uint8)
    fixed = {width - 1: ord("Z"), 10: ord("T"), 4: ord("-"), 7: ord("-"), 13: ord(":"), 16: ord(":")}
    if width > 20:
        fixed[19] = ord(".")
    # A byte position at a time (the fixed characters first): no array of the column's bytes.
    for k, char in fixed.items():
        if not bool((raw[s + k] == char).all()):
            return False
    for k in range(width):
        if k not in fixed and not bool((raw[s + k] - np.uint8(48) <= 9).all()):  # below '0' wraps around
            return False
    return True


def _fast_times(body: _Body, col: int, tz: tzinfo | None) -> FloatArray:
    """The time column as epoch seconds; ValueError (or OverflowError) at the first doubt."""
    times = _iso_ms_times(body, col)
    if times is not None:
        return times
    times, plain = _parse_decimals(body, body.starts[:, col], body.ends[:, col])  # epoch numbers
    if bool(plain.all()):
        times = _epoch_rule(times)
    else:
        tcol = body.texts(col)
        distinct = list(set(tcol))
        parsed = dict(zip(distinct, _parse_times(distinct, tz, _z_form_column(body, col))))
        times = np.fromiter(map(parsed.__getitem__, tcol), dtype=np.float64, count=len(tcol))
    if not bool(_in_range(times).all()):
        raise ValueError("a time out of range: the rows are read one by one, which names them")
    return times


def _groups(order: IntArray, codes: IntArray, count: int) -> list[IntArray]:
    """The rows of each code, ``order`` being the rows sorted by code (as ``np.split`` at the
    codes' bounds gives them, without its Python loop of several calls per piece)."""
    bounds = np.cumsum(np.bincount(codes, minlength=count)).tolist()
    return [order[a:b] for a, b in zip([0, *bounds[:-1]], bounds)]


def _distinct(sorted_values: NDArray[Any]) -> NDArray[Any]:
    """The distinct values of a sorted array."""
    keep = np.ones(sorted_values.shape[0], dtype=bool)
    keep[1:] = sorted_values[1:] != sorted_values[:-1]
    return sorted_values[keep]


def _stream_codes(body: _Body, col: int) -> tuple[IntArray, list[bytes]] | None:
    """A code per row for the bytes of its field, and the distinct fields by code.

    Fields are hashed eight bytes at a time and every field is compared with
    the first one of its code, so equal codes mean equal bytes (None on a
    hash collision, which the caller takes as a doubt).  Each step of eight
    bytes works on the rows whose field is still that long, so the work and
    memory follow the bytes of the column, not the rows times the longest
    name; fields longer than :data:`_HASHED_BYTES` are also compared whole.
    """
    s, e = body.starts[:, col], body.ends[:, col]
    lens = e - s
    n = lens.shape[0]
    h = lens.astype(np.uint64)
    steps: list[tuple[IntArray | None, NDArray[np.uint64]]] = []
    active: IntArray | None = None  # rows still longer than 8 k bytes; None: every row
    for k in range((min(int(lens.max(initial=0)), _HASHED_BYTES) + 7) // 8):
        la = lens if active is None else lens[active]
        if k:
            longer = la > 8 * k
            if not bool(longer.all()):
                active = np.flatnonzero(longer) if active is None else active[longer]
                la = la[longer]
        sa = s if active is None else s[active]
        wk = body.words(sa + 8 * k)
        if int(la.min(initial=8 * k + 8)) < 8 * k + 8:  # some fields end within this word
            wk &= _LOW_BYTES[np.clip(la - 8 * k, 0, 8)]
        steps.append((active, wk))
        ha = h if active is None else h[active]
        ha = (ha ^ wk) * np.uint64(0x100000001B3)
        ha ^= ha >> np.uint64(29)
        if active is None:
            h = ha
        else:
            h[active] = ha
    # Most files hold few streams: look them up among those of the first rows,
    # and sort all hashes only when that does not cover every row.
    # (Sorting, not np.unique: that would import numpy.ma on its first call.)
    distinct = _distinct(np.sort(h[:4096]))
    codes = np.searchsorted(distinct, h)
    if not bool((distinct[np.minimum(codes, distinct.shape[0] - 1)] == h).all()):
        distinct = _distinct(np.sort(h))
        codes = np.searchsorted(distinct, h)
    first = np.full(distinct.shape[0], n, dtype=np.int64)
    np.minimum.at(first, codes, np.arange(n))
    rep = first[codes]
    if not bool((lens[rep] == lens).all()):
        return None
    for active, wk in steps:
        if active is None:
            same = wk[rep] == wk
        else:  # a row's representative has its length, so it is among the active rows too
            same = wk[np.searchsorted(active, rep[active])] == wk
        if not bool(same.all()):
            return None
    b = body.buf
    for i in np.flatnonzero(lens > _HASHED_BYTES).tolist():
        r = int(rep[i])
        if r != i and b[int(s[i]):int(e[i])] != b[int(s[r]):int(e[r])]:
            return None
    return codes.astype(np.int64), [bytes(b[int(s[i]):int(e[i])]) for i in first.tolist()]


def _read_fast(src: Source, buf: bytearray, begin: int, end: int, line0: int, fbits: int,
               tz: tzinfo | None) -> tuple[list[tuple[str, FloatArray, FloatArray, IntArray]], int] | None:
    """Column-wise reading of a clean chunk ``buf[begin:end]``; returns the parts
    per stream and the row count, or None at the first doubt.

    A clean chunk has no quotes or carriage returns, exactly the header's
    number of fields on every line, readable times, numbers for values (or,
    in a wide file, empty cells) and non-empty stream names.  Then
    everything runs in array operations: fields are found from the positions
    of commas and newlines, shiftwatch's own time form and plain decimals
    are parsed with integer arithmetic (other forms go through the parsers
    of the row-by-row reader), and stream names are grouped by a hash of
    their bytes.  ``buf`` has :data:`_PAD` spare bytes before ``begin`` and
    after ``end``.
    """
    if buf.find(b'"', begin, end) >= 0 or buf.find(b"\r", begin, end) >= 0:
        return None
    if end - begin <= 1 and buf.count(b"\n", begin, end) == end - begin:
        return [], 0  # no rows (blank lines only are refused below: no line has the header's fields)
    if buf[end - 1] != 10:
        buf[end] = 10  # a newline after the last line, in the padding
        end += 1
    body = _Body.split(buf, begin, end, len(src.header))
    if body is None:
        return None
    n = int(body.starts.shape[0])
    places = np.arange(line0, line0 + n, dtype=np.int64) | fbits
    try:
        times = _fast_times(body, src.time_col, tz)
        if src.layout == "wide":
            for c in src.unnamed:  # a cell under no tag: the row reader names it
                if not bool((body.ends[:, c] == body.starts[:, c]).all()):
                    return None
            return _wide_parts(src, body, times, places), n
        vi = src.value_col
        values, plain = _parse_decimal_column(body, vi)
        if not bool(plain.all()):
            values[~plain] = [number(body.text(i, vi)) for i in np.flatnonzero(~plain).tolist()]
    except (ValueError, OverflowError, UnicodeDecodeError):
        return None
    if src.stream is not None:
        if not src.stream:
            return None  # no stream: the row reader names each row
        return [(src.stream, times, values, places)], n
    got = _stream_codes(body, src.stream_col)
    if got is None:
        return None
    codes, names = got
    keys: dict[str, int] = {}
    try:
        key_of = np.array([keys.setdefault(raw.decode().strip(), len(keys)) for raw in names], dtype=np.int64)
    except UnicodeDecodeError:
        return None
    if "" in keys:
        return None
    if len(keys) < len(names):
        codes = key_of[codes]
    if len(keys) == 1:
        return [(next(iter(keys)), times, values, places)], n
    # Stable: each stream's rows stay in file order.
    order = np.argsort(codes.astype(np.int16) if len(keys) < 2**15 else codes, kind="stable")
    return [(key, times[sel], values[sel], places[sel])
            for key, sel in zip(keys, _groups(order, codes, len(keys)))], n


def _wide_parts(src: Source, body: _Body, times: FloatArray,
                places: IntArray) -> list[tuple[str, FloatArray, FloatArray, IntArray]]:
    """A wide chunk's cells per tag, empty cells left out; ValueError for a cell that is
    neither empty nor a number."""
    cols = [c for c, _ in src.tags]
    s = body.starts[:, cols].ravel()
    e = body.ends[:, cols].ravel()
    values, plain = _parse_decimals(body, s, e)
    empty = e == s
    other = ~plain & ~empty
    if bool(other.any()):
        b = body.buf
        values[other] = [number(b[s[i]:e[i]].decode()) for i in np.flatnonzero(other).tolist()]
    m = len(cols)
    v = values.reshape(-1, m)
    present = ~empty.reshape(-1, m)
    every = bool(present.all())
    parts = []
    for j, (_, tag) in enumerate(src.tags):
        if every:
            parts.append((tag, times, v[:, j].copy(), places))
            continue
        sel = present[:, j]
        if bool(sel.any()):
            parts.append((tag, times[sel], v[sel, j], places[sel]))
    return parts


# ---------------------------------------------------------------------------
# Tasks: the pieces of the files in order.  A task is read where it is
# parsed (a CSV chunk's bytes travel with it); a chunk with quotes is read
# row by row while planning, since only that finds where its rows end.

def _last_line_end(data: bytes) -> int:
    """The place of the last line end of ``data`` that is surely one: its last ``\n``, or a lone
    ``\r`` after it (not the last byte, which a ``\n`` may follow); -1 when there is none.  A
    file whose lines end in a lone ``\r`` (Excel's "CSV (Macintosh)") is cut in chunks too,
    instead of being read whole, in one piece and in memory."""
    nl = data.rfind(b"\n")
    cr = data.rfind(b"\r", nl + 1, len(data) - 1)
    return max(nl, cr)


def csv_tasks(src: Source, fidx: int, tz: tzinfo | None, chunk_bytes: int = CHUNK_BYTES,
              first_index: int = 0, count: bool = True) -> Iterator[tuple[Any, ...]]:
    """The chunks of a CSV file: ``("csv", file, line, bytes, index, offset, size)`` or
    ``("block", Block)`` for a chunk with quotes, read here.  Another process may be handed the
    task without its bytes (None), and read them from the file at the offset.

    With ``count`` False (``--jobs``: the processes that read the chunks count their lines)
    the lines are not counted here: a chunk's line is None unless it is known (a file's first
    chunk, the one after a chunk with quotes), and only a chunk with quotes, which is read
    here, has the chunks since the last known line counted first (read again)."""
    index = first_index
    with open(src.path, "rb") as fb:
        offset = src.body_start  # of the chunk's first byte in the file
        line0: int | None = src.body_line
        # Without count: where the line was last known, and the chunks cut since (offset, cut).
        known: tuple[int, list[tuple[int, int]]] = (src.body_line, [])
        size = os.fstat(fb.fileno()).st_size  # a file cut short meanwhile is named, not read in part

        def whole(at: int) -> None:
            if at < size:
                raise _changed(src.path, at, size)

        while True:
            fb.seek(offset)
            data = fb.read(chunk_bytes)
            if not data:
                whole(offset)
                return
            eof = len(data) < chunk_bytes
            if eof:
                whole(offset + len(data))
            if data.find(b'"') >= 0:
                if line0 is None:
                    line0 = known[0]
                    for at, cut in known[1]:  # the chunks cut since, read again and counted
                        fb.seek(at)
                        again = fb.read(cut)
                        if len(again) != cut:
                            raise _changed(src.path, at + len(again), at + cut)
                        line0 += _count_lines(again, cut)
                    fb.seek(offset + len(data))
                # Only reading the rows finds where they end: read them here, up to the
                # first row that ends at or past the chunk's size.
                lines = _Lines(bytearray(data), 0, len(data), None if eof else fb)
                block = _slow_rows(src, fidx, lines, line0, tz, index, 0, stop_at=len(data))
                block.nbytes = lines.consumed
                line0 += lines.count
                offset += lines.consumed
                known = (line0, [])
                yield ("block", block)
                index += 1
                if lines.more is None and not lines.rest():
                    whole(offset)  # the row read on past the chunk may have met a cut, not the end
                    return
                continue
            nl = _last_line_end(data)
            while nl < 0 and not eof:  # a line longer than a chunk: read on to its end
                more = fb.read(chunk_bytes)
                eof = len(more) < chunk_bytes
                data += more
                if eof:
                    whole(offset + len(data))
                nl = _last_line_end(data)
            cut = len(data) if eof else nl + 1
            # The next chunk starts after the last newline: it is read again from there, so
            # no bytes are carried over (or copied) from one chunk to the next.
            yield ("csv", fidx, line0, data, index, offset, cut)
            index += 1
            if cut == len(data) and eof:
                return
            if count:
                assert line0 is not None
                line0 += _count_lines(data, cut)
            else:
                if line0 is not None:
                    known = (line0, [])
                line0 = None
                known[1].append((offset, cut))
            offset += cut


def parse_csv_chunk(src: Source, fidx: int, line0: int | None, chunk: bytes, index: int,
                    tz: tzinfo | None, size: int | None = None,
                    find_line0: Callable[[], int] | None = None) -> Block:
    """The rows of ``chunk[:size]``: column-wise when it is clean, else row by row.

    ``line0`` None (a chunk planned without counting lines, ``--jobs``): a clean chunk's
    places count its lines from 0 (``Block.relative``), and a chunk read row by row asks
    ``find_line0`` for its first line; either way ``Block.lines`` is the chunk's lines."""
    size = len(chunk) if size is None else size
    buf = bytearray(size + 2 * _PAD)
    buf[_PAD:_PAD + size] = memoryview(chunk)[:size]
    return _parse_padded(src, fidx, line0, buf, index, tz, size, find_line0)


def _parse_padded(src: Source, fidx: int, line0: int | None, buf: bytearray, index: int,
                  tz: tzinfo | None, size: int, find_line0: Callable[[], int] | None) -> Block:
    """:func:`parse_csv_chunk` of a chunk already in ``buf[_PAD:_PAD + size]``, with :data:`_PAD`
    zero bytes on each side."""
    begin, end = _PAD, _PAD + size
    utf8 = buf.isascii()  # the padding is zeros: ASCII
    if not utf8:
        try:
            buf.decode("utf-8")
            utf8 = True
        except UnicodeDecodeError:
            pass
    if utf8:
        ends_line = size > 0 and buf[end - 1] == 10
        got = _read_fast(src, buf, begin, end, 0 if line0 is None else line0, fidx << PLACE_BITS, tz)
        if got is not None:
            block = Block(index, fidx, got[0], [], got[1], size, src.note, remark=src.remark(),
                          relative=line0 is None)
            if find_line0 is not None:
                # A clean chunk has no \r: its lines are its newlines (a last line without
                # one, at the file's end, is a row but not a line end).
                n = got[1]
                block.lines = buf.count(b"\n", begin, end) if n == 0 else n - (0 if ends_line else 1)
            return block
    lines = -1
    if find_line0 is not None:
        lines = _count_lines(buf[begin:end], size)
        if line0 is None:
            line0 = find_line0()
    elif line0 is None:
        raise ValueError("a chunk planned without its line number needs find_line0")
    block = _slow_rows(src, fidx, _Lines(buf, begin, end, None), line0, tz, index, size)
    block.lines = lines
    return block


# ---------------------------------------------------------------------------
# Parquet (pyarrow, imported only when a Parquet file is read).

def _pyarrow() -> Any:
    try:
        import pyarrow.parquet as pq
    except ImportError as exc:
        raise CsvFormatError(f"reading Parquet needs pyarrow ({exc}); install it with "
                             "pip install 'shiftwatch[parquet]'") from None
    return pq


def _open_parquet(path: str, layout: str) -> Source:
    pq = _pyarrow()
    try:
        meta = pq.ParquetFile(path).metadata
        schema = meta.schema.to_arrow_schema()
        header = list(schema.names)
    except Exception as exc:  # noqa: BLE001  pyarrow raises ArrowInvalid, OSError, ... for a damaged file
        raise CsvFormatError(f"{path}: not a readable Parquet file: {exc}") from None
    offsets = [0]
    for g in range(meta.num_row_groups):
        offsets.append(offsets[-1] + meta.row_group(g).num_rows)
    stream = _partition_stream(path)
    cols = [c.strip().lower() for c in header]
    if stream is not None and layout != "wide" and "stream" not in cols and "time" in cols and "value" in cols:
        # a long file whose stream is its partition's (stream=NAME directories)
        ti, vi = cols.index("time"), cols.index("value")
        return Source(path, "parquet", "long", header, ti, -1, vi, [(vi, "")], group_rows=offsets, stream=stream)
    lay, ti, si, vi, tags = _pick_layout(path, header, layout, path)
    src = Source(path, "parquet", lay, header, ti, si, vi, tags, group_rows=offsets)
    if lay == "long" and si >= 0:
        import pyarrow as pa

        typ = schema.field(si).type
        if pa.types.is_string(typ) or pa.types.is_large_string(typ):
            # Read as a dictionary, it needs no dictionary_encode (a hash of every row, and the
            # import of pyarrow.compute, 0.1 s, on its first call).  Not binary: a column of bytes
            # is refused by name, as before, not read as their repr.
            src.read_dictionary = [header[si]]
    return src


def parquet_slice_rows(src: Source) -> int:
    """Rows of a slice of this Parquet file: :data:`PARQUET_SLICE` cells of its value columns."""
    return max(PARQUET_SLICE_MIN_ROWS, PARQUET_SLICE // max(1, len(src.tags)))


def parquet_pieces(src: Source, rows: int) -> list[tuple[int, int]]:
    """The pieces of a row group of ``rows`` rows: ``(first row, stop)`` of at most
    :data:`PARQUET_PIECE` cells each, whole slices (an empty group is one empty piece)."""
    piece = parquet_slice_rows(src) * max(1, PARQUET_PIECE // PARQUET_SLICE)
    return [(a, min(rows, a + piece)) for a in range(0, max(rows, 1), piece)]


def parquet_tasks(src: Source, fidx: int, first_index: int = 0) -> Iterator[tuple[Any, ...]]:
    """The pieces of a Parquet file's row groups: ``("parquet", file, row group, index, first
    row, stop)``, rows counted within the group."""
    index = first_index
    for g in range(len(src.group_rows) - 1):
        for a, b in parquet_pieces(src, src.group_rows[g + 1] - src.group_rows[g]):
            yield ("parquet", fidx, g, index, a, b)
            index += 1


class _GroupProblems:
    """Problems of one row group: a message for the first rows of each kind, the rest counted."""

    SHOWN = 20

    def __init__(self, src: Source, g: int) -> None:
        self.where = f"{src.path}: row group {g}"
        self.messages: list[str] = []
        self.unlisted = 0

    def rows(self, bad: NDArray[np.bool_], first: int, column: str, what: str) -> None:
        idx = np.flatnonzero(bad)
        for i in idx[:self.SHOWN].tolist():
            self.messages.append(f"{self.where}, row {first + i}, column {column}: {what}")
        self.unlisted += max(0, idx.shape[0] - self.SHOWN)

    def whole(self, column: str, what: str, rows: int) -> None:
        self.messages.append(f"{self.where}, column {column}: {what}")
        self.unlisted += rows - 1


def _naive_wall_to_utc(wall: FloatArray, tz: tzinfo) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Epoch seconds of local wall-clock times (given as if they were UTC) in ``tz``, and which exist.

    Offsets change on whole minutes, so each distinct minute is looked up once.
    """
    minutes = np.floor(wall / 60.0).astype(np.int64)
    distinct = _distinct(np.sort(minutes))
    offsets = np.zeros(distinct.shape[0])
    exists = np.ones(distinct.shape[0], dtype=bool)
    epoch = datetime(1970, 1, 1)
    for i, m in enumerate(distinct.tolist()):
        try:
            local = epoch + timedelta(minutes=m)
            ts = local.replace(tzinfo=tz).timestamp()
            offsets[i] = m * 60.0 - ts
            exists[i] = datetime.fromtimestamp(ts, tz).replace(tzinfo=None) == local
        except (OverflowError, ValueError):
            pass  # at the end of the year 9999: the caller's range check names it
    at = np.searchsorted(distinct, minutes)
    return wall - offsets[at], exists[at]


#: Take the short ways through a Parquet slice (True): no search for nulls in a column that has
#: none (pyarrow counts them), a stream column's dictionary used as the codes when its names are
#: distinct and not empty, a long file's piece grouped by stream once (:class:`_PieceStreams`).
#: False: every check on every slice, each slice sorted by stream (a stable sort of 64-bit
#: codes) and its streams' rows copied out, the reference the short ways are held to bit for
#: bit (tests/replay/test_parquet_fast.py).
PARQUET_FAST = True

#: numpy types of the fixed-width arrow columns read straight from their buffers.
_ARROW_PLAIN = {"double": np.float64, "int64": np.int64, "int32": np.int32, "int16": np.int16, "int8": np.int8,
                "uint32": np.uint32, "uint16": np.uint16, "uint8": np.uint8}


def _arrow_valid(col: Any) -> NDArray[np.bool_]:
    """Which rows of an arrow array are not null, from its validity bitmap.

    Reads the buffers, as :func:`_arrow_plain` does: ``is_valid()`` (and
    ``cast``, ``fill_null``, ``to_numpy``) import ``pyarrow.compute``, which
    costs about 0.15 s of CPU on its first use.
    """
    n = len(col)
    if col.null_count == 0:
        return np.ones(n, dtype=bool)
    bitmap = col.buffers()[0]
    if bitmap is None:  # nulls without a bitmap: an array of type null
        return np.zeros(n, dtype=bool)
    bits = np.unpackbits(np.frombuffer(bitmap, dtype=np.uint8), bitorder="little")
    return bits[col.offset:col.offset + n].astype(bool)


def _arrow_plain(col: Any, valid: NDArray[np.bool_], fill: float) -> NDArray[Any] | None:
    """A fixed-width array's values (timestamps as their integers) with ``fill`` in its null
    rows, read from its data buffer; None for other types (the caller casts those)."""
    import pyarrow as pa

    typ = col.type
    name = "int64" if pa.types.is_timestamp(typ) else str(typ)
    dtype = _ARROW_PLAIN.get(name)
    if dtype is None:
        return None
    data = np.frombuffer(col.buffers()[1], dtype=dtype, count=col.offset + len(col))[col.offset:]
    if bool(valid.all()):
        return data
    return np.where(valid, data, np.array(fill).astype(dtype))


def _valid_range(t: FloatArray, valid: NDArray[np.bool_], first: int, column: str,
                 problems: _GroupProblems) -> NDArray[np.bool_]:
    """``valid`` less the times no record can be written at, each a problem."""
    if t.shape[0] == 0 or (float(t.min()) >= TIME_MIN and float(t.max()) <= TIME_MAX):  # (NaN: not so)
        return valid
    ok = _in_range(t)
    if bool(ok.all()):
        return valid
    problems.rows(valid & (t > TIME_MAX), first, column, f"the time is past the year 9999 {_EPOCH_HINT}")
    problems.rows(valid & (t < TIME_MIN), first, column, "the time is before the year 1")
    out: NDArray[np.bool_] = valid & ok
    return out


def _arrow_times(col: Any, column: str, tz: tzinfo | None, first: int,
                 problems: _GroupProblems) -> tuple[FloatArray, NDArray[np.bool_]]:
    """A time column as epoch seconds, and which rows have a usable time (the others are problems)."""
    import pyarrow as pa

    n = len(col)
    valid = _arrow_valid(col)
    if col.null_count or not PARQUET_FAST:
        problems.rows(~valid, first, column, "no time (null)")
    if pa.types.is_timestamp(col.type):
        raw = _arrow_plain(col, valid, 0)
        if raw is None:
            raw = np.asarray(col.cast(pa.int64()).fill_null(0), dtype=np.int64)
        per_second = {"s": 1, "ms": 1000, "us": 10**6, "ns": 10**9}[col.type.unit]
        # The coarsest exact unit, so that a time reads as the same double whatever its unit.
        while per_second > 1000 and bool((raw % 1000 == 0).all()):
            raw, per_second = raw // 1000, per_second // 1000
        # (one pass: the division casts each integer to a double as astype does, then divides)
        t = np.divide(raw, float(per_second), dtype=np.float64) if per_second > 1 else raw.astype(np.float64)
        valid = _valid_range(t, valid, first, column, problems)
        if col.type.tz is None:
            if tz is None:
                problems.rows(valid, first, column, "the time has no UTC offset; say which time zone the "
                              "file is in with --timezone (an IANA name such as Europe/Berlin)")
                return t, np.zeros(n, dtype=bool)
            t, exists = _naive_wall_to_utc(np.where(valid, t, 0.0), tz)
            problems.rows(valid & ~exists, first, column, f"the time does not exist in {tz} "
                          "(the clocks were put forward)")
            valid = _valid_range(t, valid & exists, first, column, problems)
        return t, valid
    if pa.types.is_integer(col.type) or pa.types.is_floating(col.type):
        t = np.asarray(_arrow_doubles(col).fill_null(0.0), dtype=np.float64)
        finite = np.isfinite(t)
        problems.rows(valid & ~finite, first, column, "the time is not finite")
        t = _epoch_rule(np.where(finite, t, 0.0))
        return t, _valid_range(t, valid & finite, first, column, problems)
    if _is_text_type(col.type) or pa.types.is_dictionary(col.type):
        texts = col.cast(pa.string()).to_pylist()
        out = np.zeros(n)
        cache: dict[str, float | str] = {}
        for i, x in enumerate(texts):
            if x is None:
                continue
            got = cache.get(x)
            if got is None:
                try:
                    got = parse_time(x, tz)
                except TimeTextError as exc:
                    got = f"time {x!r} {exc}"
                except (ValueError, OverflowError):
                    got = f"time {x!r} {NOT_A_TIME}"
                cache[x] = got
            if isinstance(got, str):
                valid[i] = False
                if len(problems.messages) < problems.SHOWN:
                    problems.messages.append(f"{problems.where}, row {first + i}, column {column}: {got}")
                else:
                    problems.unlisted += 1
            else:
                out[i] = got
        return out, valid
    problems.whole(column, f"holds {col.type}, not times; the rows were skipped", n)
    return np.zeros(n), np.zeros(n, dtype=bool)


def _arrow_doubles(col: Any) -> Any:
    """A number column (integers, floats, decimals) as doubles, each the double nearest to its
    value, as the same number written as text in a CSV reads.

    pyarrow's default cast refuses an integer beyond 2**53 (an epoch in nanoseconds, a
    counter) with ``ArrowInvalid``, and its cast of a decimal is not correctly rounded
    (``-123.4567`` gave ``-123.45670000000001``); the unchecked cast of an integer is the
    conversion C does (to nearest), and a decimal is read through its exact text.
    """
    import pyarrow as pa

    if pa.types.is_decimal(col.type):
        col = col.cast(pa.string())
    return col.cast(pa.float64(), safe=False)


def _is_text_type(t: Any) -> bool:
    """Arrow's text types: string, large_string and string_view (its view type, which a file
    keeps in its Arrow schema when the writer held it so; it was refused before 2026-12-05)."""
    import pyarrow as pa

    return bool(pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t))


def _is_number_type(t: Any) -> bool:
    import pyarrow as pa

    return bool(pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t))


def _parquet_buffer(columns: int) -> int:
    """Bytes of pyarrow's read buffer per column: 1 MiB for a long file's three columns, down to
    64 KiB for many (a buffer per column: 200 tags with 1 MiB each held 200 MB)."""
    return max(1 << 16, min(1 << 20, (1 << 23) // max(1, columns)))


class _GroupCursor:
    """Where the reading of a row group stands, kept (in ``opened``) from one piece to the
    next, so that a process reading a group's pieces in turn decodes each row once."""

    def __init__(self, g: int, size: int, batches: Any) -> None:
        self.g = g
        self.size = size  # rows of its batches
        self.batches = batches
        self.row = 0  # of the group, the first not yet taken
        self.rest: Any = None  # rows of a batch read past a piece's end

    def take(self) -> Any:
        """The next rows (a record batch), or None at the group's end; pyarrow's errors pass."""
        if self.rest is not None:
            part, self.rest = self.rest, None
        else:
            part = next(self.batches, None)
        if part is not None:
            self.row += part.num_rows
        return part

    def give_back(self, part: Any) -> None:
        self.rest = part
        self.row -= part.num_rows

    def close(self) -> None:  # _kept_open closes what it drops
        self.batches = iter(())


def _group_cursor(opened: dict[str, Any] | None, pf: Any, path: str, g: int, first: int,
                  want: list[str], size: int) -> _GroupCursor:
    """A cursor at row ``first`` of row group ``g``: the one kept from the piece before when it
    is not past that row, else a new one that reads its way there."""
    key = path + "\0rows"
    cur = None if opened is None else opened.get(key)
    if not (isinstance(cur, _GroupCursor) and cur.g == g and cur.size == size and cur.row <= first):
        cur = _GroupCursor(g, size, pf.iter_batches(batch_size=size, row_groups=[g], columns=want,
                                                    use_threads=False))
        if opened is not None:
            opened[key] = cur
    while cur.row < first:
        part = cur.take()
        if part is None:
            break
        if cur.row > first:  # a batch across the piece's first row: keep its part from there
            cur.give_back(part.slice(part.num_rows - (cur.row - first)))
    return cur


def parse_parquet_group(src: Source, fidx: int, g: int, index: int, tz: tzinfo | None,
                        opened: dict[str, Any] | None = None, first: int = 0, stop: int | None = None) -> Block:
    """Rows ``first`` to ``stop`` of a row group (all of it by default) per stream,
    :data:`PARQUET_SLICE` cells at a time.

    Null or unreadable times, null values and null or empty stream names are
    problems named by file, row group, row and column; a null cell of a wide
    file is a missing reading.
    """
    import pyarrow as pa

    pq = _pyarrow()
    tname = src.header[src.time_col]
    if src.layout == "long":
        value_cols = [(src.header[src.value_col], "")]
        want = [tname, value_cols[0][0]] + ([src.header[src.stream_col]] if src.stream_col >= 0 else [])
    else:
        value_cols = [(src.header[c], tag) for c, tag in src.tags]
        want = [tname] + [c for c, _ in value_cols]
    pf = _kept_open(opened, src.path, lambda: pq.ParquetFile(src.path, pre_buffer=False,
                                                             buffer_size=_parquet_buffer(len(want)),
                                                             read_dictionary=src.read_dictionary or None))
    group = src.group_rows[g + 1] - src.group_rows[g]
    stop = group if stop is None else stop
    n = first  # rows of the group taken so far
    base = src.group_rows[g]
    fbits = fidx << PLACE_BITS
    problems = _GroupProblems(src, g)
    collected: dict[str, list[tuple[FloatArray, FloatArray, IntArray]]] = {}
    # A long file's rows grouped by stream once for the piece (see _PieceStreams).
    split = _PieceStreams(stop - first, fbits | (base + first)) \
        if src.layout == "long" and src.stream_col >= 0 and PARQUET_FAST else None
    cursor = None
    while n < stop:
        try:
            if cursor is None:
                cursor = _group_cursor(opened, pf, src.path, g, n, want, parquet_slice_rows(src))
            # (a cursor short of row n: the group ended early, its metadata counting more rows)
            part = cursor.take() if cursor.row >= n else None
        except Exception as exc:  # noqa: BLE001 - pyarrow's errors for damaged pages are of many kinds
            if opened is not None:
                opened.pop(src.path + "\0rows", None)  # the next piece tries afresh
            lost = stop - n
            skipped = (f"its last {lost} rows were skipped" if stop == group else
                       f"rows {n} to {stop - 1} ({lost}) were skipped")
            problems.messages.append(f"{problems.where}: unreadable from row {n} on ({' '.join(str(exc).split())}); "
                                     f"{skipped}")
            problems.unlisted += lost - 1
            n += lost
            break
        if part is None:
            break
        if n + part.num_rows > stop:  # past the piece: the rest is the next piece's
            cursor.give_back(part.slice(stop - n))
            part = part.slice(0, stop - n)
        a = n
        m = part.num_rows
        n += m
        times, tok = _arrow_times(part.column(0), tname, tz, a, problems)
        places = np.arange(base + a, base + a + m, dtype=np.int64) | fbits if split is None else None
        for j, (cname, tag) in enumerate(value_cols):
            col = part.column(1 + j)
            if not _is_number_type(col.type):
                problems.whole(cname, f"holds {col.type}, not numbers; its values were skipped", m)
                if split is not None:
                    split.skip(m)
                continue
            valid = _arrow_valid(col)
            v = _arrow_plain(col, valid, math.nan) if pa.types.is_float64(col.type) else None
            if v is None:
                v = np.asarray(_arrow_doubles(col).fill_null(np.nan), dtype=np.float64)
            nulls = col.null_count or not PARQUET_FAST  # (read only below: tok itself when none)
            if src.layout == "wide":
                keep = tok & valid if nulls else tok
            else:
                if nulls:
                    problems.rows(tok & ~valid, a, cname, "no value (null)")
                keep = tok & valid if nulls else tok
                if split is not None:
                    split.add(part.column(2), times, v, keep, problems, a, src.header[src.stream_col])
                    continue
                assert places is not None  # (made whenever split is None)
                if src.stream_col >= 0:
                    _long_parquet_parts(part.column(2), times, v, places, keep, collected,
                                        problems, a, src.header[src.stream_col])
                    continue
                tag = src.stream or ""
                if src.stream == "":  # a stream= directory that names none
                    problems.rows(keep, a, "stream", _no_stream(src))
                    continue
            assert places is not None
            if bool(keep.all()):
                collected.setdefault(tag, []).append((times, v, places))
            elif bool(keep.any()):
                collected.setdefault(tag, []).append((times[keep], v[keep], places[keep]))
    # A stream's pieces stay apart (in order): joining them would hold the row group twice.
    parts = [(key, *piece) for key, pieces in collected.items() for piece in pieces]
    if split is not None:
        split.parts(parts)
    size = _file_size(src.path)
    nbytes = size * (n - first) // max(1, src.group_rows[-1])  # for progress: the piece's share of the file
    return Block(index, fidx, parts, problems.messages, n - first, nbytes, unlisted=problems.unlisted)


def _file_size(path: str) -> int:
    try:
        return os.path.getsize(path)
    except OSError:
        return 0


def _slice_codes(scol: Any, keep: NDArray[np.bool_], problems: _GroupProblems, first: int,
                 cname: str, cache: list[Any] | None = None) -> tuple[dict[str, int], IntArray] | None:
    """A slice's stream column as codes: the distinct names (stripped, not empty) by code, in
    the order of the column's dictionary, and each row's code, ``len(names)`` for a row not
    kept (no time, no value, no name, an empty name).  None when the column holds no names (a
    problem of the whole column).  A dictionary-encoded column (as pyarrow keeps strings)
    gives its indices; a column of integers (tags exported by number) names each stream by
    its decimal text, as a CSV of the same numbers does.  ``cache``: the last slice's
    dictionary and what was made of it, kept there and used again while the dictionary is
    the same (the slices of a row group share their page's dictionary)."""
    import pyarrow as pa

    if not pa.types.is_dictionary(scol.type):
        if not (_is_text_type(scol.type) or pa.types.is_integer(scol.type)):
            problems.whole(cname, f"holds {scol.type}, not stream names; the rows were skipped", len(scol))
            return None
        scol = scol.dictionary_encode()
    valid = _arrow_valid(scol.indices)
    nulls = scol.indices.null_count or not PARQUET_FAST
    if nulls:
        problems.rows(keep & ~valid, first, cname, "no stream name (null)")
    if cache and cache[0].equals(scol.dictionary):
        names, key_of, remap = cache[1:]
    else:
        names = [str(x).strip() for x in scol.dictionary.to_pylist()]
        # The same name may stand under several codes (spaces around it): one code per name.
        key_of = {}
        remap = np.array([key_of.setdefault(x, len(key_of)) if x else -1 for x in names] + [-1], dtype=np.int64)
        if cache is not None:
            cache[:] = [scol.dictionary, names, key_of, remap]
    indices = _arrow_plain(scol.indices, valid, 0)
    if indices is None:  # unsigned 64-bit indices
        indices = np.asarray(scol.indices.fill_null(0), dtype=np.int64)
    # Names distinct and not empty: remap is the identity on them, and no row's code is below 0.
    plain = len(key_of) == len(names) and "" not in key_of and PARQUET_FAST
    if plain and not nulls:
        codes = indices.astype(np.int64, copy=False)
    else:
        codes = remap[np.where(valid, indices.astype(np.int64, copy=False), len(names))]
    if not plain:
        problems.rows(keep & valid & (codes < 0), first, cname, "empty stream name")
    if not (plain and not nulls and bool(keep.all())):
        codes = np.where(keep & (codes >= 0), codes, len(key_of))
    return key_of, codes


def _long_parquet_parts(scol: Any, times: FloatArray, v: FloatArray, places: IntArray, keep: NDArray[np.bool_],
                        collected: dict[str, list[tuple[FloatArray, FloatArray, IntArray]]],
                        problems: _GroupProblems, first: int, cname: str) -> None:
    """Split a slice of a long file by its stream column (see :func:`_slice_codes`): the
    reference way (``PARQUET_FAST = False``), a sort and a copy per stream and slice, which
    :class:`_PieceStreams` is held to bit for bit (tests/replay/test_parquet_fast.py)."""
    got = _slice_codes(scol, keep, problems, first, cname)
    if got is None:
        return
    key_of, codes = got
    order = np.argsort(codes, kind="stable")  # each stream's rows stay in file order
    for key, sel in zip(key_of, _groups(order, codes, len(key_of) + 1)):
        if sel.shape[0]:
            collected.setdefault(key, []).append((times[sel], v[sel], places[sel]))


class _PieceStreams:
    """The rows of a piece of a long file with a stream column, grouped by stream once for the
    whole piece (``PARQUET_FAST``): each slice's codes, times and values are copied into arrays
    of the piece's length as the slices are read (their problems named slice by slice, as
    before), and :meth:`parts` groups the piece's rows by stream once (by their period, by
    slicing rows sorted by stream, or by one sort) and copies each stream's rows out once.  The slice-by-slice way (:func:`_long_parquet_parts`) sorted every slice and
    made a part per stream and slice: 22,200 small copies and 7,400 parts for the bench's 2.4
    million rows of 200 streams, against 6,000 and 2,000 here.  The parts are those of the
    slice-by-slice way joined: the same rows per stream in file order, the streams in the same
    order (that of the first slice a stream has rows in, and of that slice's dictionary)."""

    def __init__(self, rows: int, place0: int) -> None:
        self.place0 = place0  # the place of the piece's first row
        self.t = np.empty(rows)
        self.v = np.empty(rows)
        self.c = np.empty(rows, dtype=np.int32)  # piece codes; -1 for a row not kept
        self.n = 0  # rows taken so far
        self.key_of: dict[str, int] = {}  # piece codes by name
        self.starts: list[int] = []  # each slice's first row (of the piece)
        self.local: list[NDArray[np.int32]] = []  # each slice's piece code of its own codes
        self.dropped = False  # a row not kept
        self.cache: list[Any] = []  # the last slice's dictionary, its names (_slice_codes)
        self.last: tuple[dict[str, int], NDArray[np.int32]] | None = None  # its piece codes

    def skip(self, m: int) -> None:
        """A slice none of whose rows is kept (a problem of a whole column)."""
        self.starts.append(self.n)
        self.local.append(np.zeros(0, dtype=np.int32))
        self.c[self.n:self.n + m] = -1
        self.n += m
        self.dropped = True

    def add(self, scol: Any, times: FloatArray, v: FloatArray, keep: NDArray[np.bool_],
            problems: _GroupProblems, first: int, cname: str) -> None:
        m = times.shape[0]
        got = _slice_codes(scol, keep, problems, first, cname, self.cache)
        if got is None:
            self.skip(m)
            return
        key_of, codes = got
        a, b = self.n, self.n + m
        self.starts.append(a)
        self.n = b
        if self.last is not None and self.last[0] is key_of:
            local = self.last[1]
        else:
            local = np.array([self.key_of.setdefault(x, len(self.key_of)) for x in key_of] + [-1], dtype=np.int32)
            self.last = key_of, local
        self.local.append(local)
        self.t[a:b] = times
        self.v[a:b] = v
        if bool((local[:-1] == np.arange(len(key_of), dtype=np.int32)).all()):
            # the slice's codes are the piece's (the first slice's, or a dictionary kept)
            self.c[a:b] = codes
            dropped = codes == len(key_of)
            if bool(dropped.any()):
                self.c[a:b][dropped] = -1
                self.dropped = True
        else:
            np.take(local, codes, out=self.c[a:b])
            self.dropped = self.dropped or bool((codes == len(key_of)).any())

    def parts(self, out: list[tuple[str, FloatArray, FloatArray, IntArray]]) -> None:
        """Append each stream's rows to ``out`` as ``(stream, times, values, places)``, each in
        arrays of its own (a view would hold the whole piece for as long as a reader keeps it)."""
        n = self.n
        count = len(self.key_of)
        if n == 0 or count == 0:
            return
        c = self.c[:n]
        if self.dropped:
            c[c < 0] = count  # rows not kept sort last
        place0 = self.place0
        t, v = self.t, self.v
        names = list(self.key_of)
        # Each stream's first row, and its rows: (start, stop, step) or the rows sorted by code.
        rows: list[tuple[int, tuple[int, int, int] | NDArray[np.intp]]] = []
        if not self.dropped and n > count and self._periodic(c, count):
            # Every stream once in each run of `count` rows, in the same order (a file written
            # time by time, its tags in a fixed order): stream c[j]'s rows are j, j + count, ...
            rows = [(j, (j, n, count)) for j in np.argsort(c[:count]).tolist()]
        elif bool((c[1:] >= c[:-1]).all()):  # already in order (a file sorted by stream)
            bounds = np.searchsorted(c, np.arange(count + 1, dtype=c.dtype)).tolist()
            rows = [(lo, (lo, hi, 1)) for lo, hi in pairwise(bounds) if hi > lo]
        else:
            order, bounds = self._sorted(c, count)
            rows = [(int(order[lo]), order[lo:hi]) for lo, hi in pairwise(bounds) if hi > lo]
        # The streams in the order the slice-by-slice way meets them: the first slice a stream
        # has rows in, then that slice's order of codes.
        first = np.array([r for r, _ in rows], dtype=np.int64)
        codes = c[first].astype(np.int64)
        in_slice = np.searchsorted(np.array(self.starts), first, side="right") - 1
        rank = np.empty(first.shape[0], dtype=np.int64)
        for s in sorted(set(in_slice.tolist())):  # (not np.unique: it imports numpy.ma, 10 ms or more)
            at = np.flatnonzero(in_slice == s)
            local = self.local[s][:-1]
            inverse = np.empty(count, dtype=np.int64)
            inverse[local] = np.arange(local.shape[0])
            rank[at] = inverse[codes[at]]
        for j in np.lexsort((rank, in_slice)).tolist():
            which = rows[j][1]
            if isinstance(which, tuple):
                lo, hi, step = which
                out.append((names[int(codes[j])], t[lo:hi:step].copy(), v[lo:hi:step].copy(),
                            np.arange(lo + place0, hi + place0, step, dtype=np.int64)))
            else:
                out.append((names[int(codes[j])], t.take(which), v.take(which), which + np.int64(place0)))

    @staticmethod
    def _periodic(c: NDArray[np.int32], count: int) -> bool:
        """Whether the codes ``c`` repeat with period ``count``, each code once a period."""
        return bool((np.bincount(c[:count], minlength=count) == 1).all()) and bool((c[count:] == c[:-count]).all())

    @staticmethod
    def _sorted(c: NDArray[np.int32], count: int) -> tuple[NDArray[np.intp], list[int]]:
        """The rows in the order of a stable sort by code, and where each code's rows begin
        (``count + 1`` bounds)."""
        n = c.shape[0]
        bits = max(1, (n - 1).bit_length())
        if count < (1 << (32 - bits)):
            # Each code with its row below it: the keys are distinct, so sorting them (numpy's
            # quicksort, vectorised) gives the rows of a stable sort by code, each stream's rows
            # in file order.
            keys = (c.astype(np.uint32) << np.uint32(bits)) | np.arange(n, dtype=np.uint32)
            keys.sort()
            order = (keys & np.uint32((1 << bits) - 1)).astype(np.intp)
            sorted_codes = keys >> np.uint32(bits)
        else:
            order = np.argsort(c, kind="stable")
            sorted_codes = c[order].astype(np.uint32)
        bounds = np.searchsorted(sorted_codes, np.arange(count + 1, dtype=np.uint32)).tolist()
        return order, bounds


def tasks(sources: list[Source], tz: tzinfo | None, chunk_bytes: int = CHUNK_BYTES,
          count: bool = True) -> Iterator[tuple[Any, ...]]:
    """Every piece of every file, in order; pieces are numbered from 0 across the files.
    ``count``: see :func:`csv_tasks`."""
    index = 0
    for fidx, src in enumerate(sources):
        it = (csv_tasks(src, fidx, tz, chunk_bytes, index, count) if src.kind == "csv"
              else parquet_tasks(src, fidx, index))
        for task in it:
            yield task
            index += 1


class OpenFiles(dict[str, Any]):
    """The file being read (and where it stands in a Parquet row group), kept from one
    piece of it to the next by :func:`parse_task` and closed when the reading ends: a
    context manager (``with OpenFiles() as opened:``)."""

    def close(self) -> None:
        for f in self.values():
            f.close()
        self.clear()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _kept_open(opened: dict[str, Any] | None, path: str, make: Any) -> Any:
    """The file last opened, while the pieces are of the same file (``opened`` keeps it)."""
    f = None if opened is None else opened.get(path)
    if f is None:
        f = make()
        if opened is not None:
            for old in opened.values():
                old.close()
            opened.clear()
            opened[path] = f
    return f


def _changed(path: str, at: int, expected: int) -> CsvFormatError:
    """A file that ends (at byte ``at``) before the bytes planned from it (``expected``).

    ``at`` is where a read found no more bytes; when that read began past the file's new end
    (a chunk planned before the cut), the file's length now (stat(2)) is where it ends."""
    try:
        at = min(at, os.stat(path).st_size)
    except OSError:
        pass
    return CsvFormatError(f"{path}: the file changed while it was read (it ends at byte {at:,}, "
                          f"not {expected:,})")


def parse_task(task: tuple[Any, ...], sources: list[Source], tz: tzinfo | None,
               opened: dict[str, Any] | None = None, find_line0: Callable[[], int] | None = None) -> Block:
    """The :class:`Block` of one task of :func:`tasks`; ``find_line0`` for a CSV chunk
    planned without counting lines (:func:`parse_csv_chunk`)."""
    kind = task[0]
    if kind == "block":
        block: Block = task[1]
        return block
    if kind == "csv":
        _, fidx, line0, chunk, index, offset, size = task
        if chunk is None:
            # Read straight into the padded buffer the reader takes (not into bytes copied there).
            path = sources[fidx].path
            f = _kept_open(opened, path, lambda: open(path, "rb"))  # noqa: SIM115  kept open across chunks
            buf = bytearray(size + 2 * _PAD)
            got = os.preadv(f.fileno(), [memoryview(buf)[_PAD:_PAD + size]], offset)
            if opened is None:
                f.close()
            if got != size:
                raise _changed(path, offset + got, offset + size)
            return _parse_padded(sources[fidx], fidx, line0, buf, index, tz, size, find_line0)
        return parse_csv_chunk(sources[fidx], fidx, line0, chunk, index, tz, size, find_line0)
    _, fidx, g, index, first, stop = task
    return parse_parquet_group(sources[fidx], fidx, g, index, tz, opened, first, stop)
