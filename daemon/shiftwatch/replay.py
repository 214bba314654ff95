"""Replay of historical CSV files through the same engine the daemon uses.

The file format is "long" CSV with a header naming at least the columns
``time``, ``stream`` and ``value`` (other columns are ignored).  ``time`` is
RFC 3339 or epoch seconds.  Bad rows are reported as ``file:line: problem``
and skipped; everything good is still processed.
"""

from __future__ import annotations

import csv
import math
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any, Callable, Iterable

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.engine import AlertRecord, BatchResult, StreamEngine
from shiftwatch.core.screen import REASONS
from shiftwatch.core.settings import DetectionSettings

if TYPE_CHECKING:
    from pathlib import Path

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

REQUIRED_COLUMNS = ("time", "stream", "value")

#: Samples handed to the engine per call (keeps the vectorised batches in cache).
BATCH = 4096


class CsvFormatError(ValueError):
    """The file cannot be read as long CSV at all (missing file, bad header)."""


class StreamSeries:
    """All rows of one stream, in file order: times, values and where each row came from.

    Rows are added in parts (one per file, or per pass of the row-by-row
    reader) and joined into arrays when first read.
    """

    __slots__ = ("files", "_parts", "_joined")

    def __init__(self, files: list[str]) -> None:
        #: the file names that ``places`` refer to (shared by every series of one read)
        self.files = files
        self._parts: list[tuple[FloatArray, FloatArray, IntArray]] = []
        self._joined: tuple[FloatArray, FloatArray, IntArray] | None = None

    def add(self, times: FloatArray, values: FloatArray, places: IntArray) -> None:
        """Append rows; ``places`` holds ``file index << 32 | line number`` per row."""
        self._parts.append((times, values, places))
        self._joined = None

    def _arrays(self) -> tuple[FloatArray, FloatArray, IntArray]:
        if self._joined is None:
            if len(self._parts) == 1:
                self._joined = self._parts[0]
            else:
                t, v, p = zip(*self._parts) if self._parts else ((), (), ())
                self._joined = (np.concatenate(t) if t else np.empty(0), np.concatenate(v) if v else np.empty(0),
                                np.concatenate(p) if p else np.empty(0, dtype=np.int64))
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

    def where(self, i: int) -> tuple[str, int]:
        """(file, line) of the i-th row."""
        p = int(self.places[i])
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


# ---------------------------------------------------------------------------
# Column-wise reading of clean files.  The file is one buffer of bytes; fields
# are found from the positions of commas and newlines and read eight bytes at
# a time as little-endian words (byte i of a word is bits 8i to 8i+7).

#: Zero bytes after the file's bytes, so a word can be read at any field.
_PAD = 16
_ONES = np.uint64(0x0101010101010101)
_ZEROS = np.uint64(0x3030303030303030)  # eight '0' characters
#: _LOW_BYTES[r]: a word with its r low bytes set.
_LOW_BYTES = np.array([(1 << (8 * r)) - 1 for r in range(8)] + [2**64 - 1], dtype=np.uint64)
_POW10_FLOAT = 10.0 ** np.arange(17)
_POW10_INT = 10 ** np.arange(18, dtype=np.int64)


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
    """The rows of a file held in ``buf[begin:end]`` (each line ending in a newline),
    with the byte offsets of every field.

    ``starts`` and ``ends`` are ``(rows, columns)`` arrays of offsets into
    ``buf``; ``buf`` has at least :data:`_PAD` bytes after ``end`` and at
    least 16 before ``begin`` (the header line).
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
    """Values of the fields that are plain decimals (``[+-]digits[.digits]``, at
    most 16 characters); the mask says which rows are.

    Each value is its digits as an integer M divided by 10**d (d digits after
    the point).  With M <= 2**53 and d <= 16 both are exact doubles, so the
    one correctly rounded division gives exactly what ``float(text)`` gives
    (the exact case of W. D. Clinger, "How to read floating point numbers
    accurately", PLDI 1990).  Other rows are left to the caller.

    Examples
    --------
    >>> data = b"time,stream,value\\nx,-0.50\\nx,+12\\nx,7.\\nx,1e3\\nx,.25\\nx,-\\n"
    >>> body = _Body.split(bytearray(data + bytes(_PAD)), 18, len(data), 2)
    >>> v, ok = _parse_decimal_column(body, 1)
    >>> v[ok].tolist(), ok.tolist()
    ([-0.5, 12.0, 7.0, 0.25], [True, True, True, False, True, False])
    """
    s, e = body.starts[:, col], body.ends[:, col]
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
    w = np.stack([body.words(s + 8 * k) for k in range(3)], axis=1)
    new = np.ones(w.shape[0], dtype=bool)
    new[1:] = (w[1:] != w[:-1]).any(axis=1)
    firsts = np.flatnonzero(new)
    parsed = _parse_iso_ms_column(w[firsts].view(np.uint8).reshape(-1, 24))
    if parsed is None:
        return None
    return parsed if firsts.shape[0] == w.shape[0] else parsed[np.cumsum(new) - 1]


def _distinct(sorted_values: NDArray[Any]) -> NDArray[Any]:
    """The distinct values of a sorted array."""
    keep = np.ones(sorted_values.shape[0], dtype=bool)
    keep[1:] = sorted_values[1:] != sorted_values[:-1]
    return sorted_values[keep]


def _stream_codes(body: _Body, col: int) -> tuple[IntArray, list[bytes]] | None:
    """A code per row for the bytes of its field, and the distinct fields by code.

    Fields are hashed eight bytes at a time and every field is compared with
    the first one of its code, so equal codes mean equal bytes (None on a
    hash collision, which the caller takes as a doubt).
    """
    s, e = body.starts[:, col], body.ends[:, col]
    lens = e - s
    words = []
    h = lens.astype(np.uint64)
    for k in range((int(lens.max(initial=0)) + 7) // 8):
        wk = body.words(s + 8 * k) & _LOW_BYTES[np.clip(lens - 8 * k, 0, 8)]
        words.append(wk)
        h = (h ^ wk) * np.uint64(0x100000001B3)
        h ^= h >> np.uint64(29)
    # Most files hold few streams: look them up among those of the first rows,
    # and sort all hashes only when that does not cover every row.
    # (Sorting, not np.unique: that would import numpy.ma on its first call.)
    distinct = _distinct(np.sort(h[:4096]))
    codes = np.searchsorted(distinct, h)
    if not bool((distinct[np.minimum(codes, distinct.shape[0] - 1)] == h).all()):
        distinct = _distinct(np.sort(h))
        codes = np.searchsorted(distinct, h)
    first = np.full(distinct.shape[0], h.shape[0], dtype=np.int64)
    np.minimum.at(first, codes, np.arange(h.shape[0]))
    rep = first[codes]
    if not bool((lens[rep] == lens).all()) or not all(bool((wk[rep] == wk).all()) for wk in words):
        return None
    b = body.buf
    return codes.astype(np.int64), [bytes(b[int(s[i]):int(e[i])]) for i in first.tolist()]


def _read_fast(buf: bytearray, begin: int, end: int, ncols: int, ti: int, si: int, vi: int,
               fbits: int, streams: dict[str, StreamSeries], files: list[str]) -> int | None:
    """Column-wise reading of a clean file body ``buf[begin:end]``; returns the
    row count, or None (adding nothing) at the first doubt.

    A clean body has no quotes or carriage returns, exactly ``ncols`` fields
    on every line, readable times, numbers for values and non-empty stream
    names.  Then everything runs in array operations: fields are found from
    the positions of commas and newlines, shiftwatch's own time form and
    plain decimals are parsed with integer arithmetic (other forms go
    through the parsers of the row-by-row reader), and stream names are
    grouped by a hash of their bytes.  ``buf`` has :data:`_PAD` spare bytes
    after ``end`` and the header line before ``begin``.
    """
    if buf.find(b'"', begin, end) >= 0 or buf.find(b"\r", begin, end) >= 0:
        return None
    if buf.count(b"\n", begin, end) == end - begin:
        return 0 if end - begin <= 1 else None  # no rows, or blank lines only
    if buf[end - 1] != 10:
        buf[end] = 10  # a newline after the last line, in the padding
        end += 1
    body = _Body.split(buf, begin, end, ncols)
    if body is None:
        return None
    n = int(body.starts.shape[0])
    try:
        values, plain = _parse_decimal_column(body, vi)
        if not bool(plain.all()):
            values[~plain] = [float(body.text(i, vi)) for i in np.flatnonzero(~plain).tolist()]
        times = _iso_ms_times(body, ti)
        if times is None:
            times, plain = _parse_decimal_column(body, ti)  # epoch seconds
            if not bool(plain.all()):
                tcol = body.texts(ti)
                distinct = list(set(tcol))
                parsed = dict(zip(distinct, _parse_times(distinct)))
                times = np.fromiter(map(parsed.__getitem__, tcol), dtype=np.float64, count=n)
    except (ValueError, OverflowError, UnicodeDecodeError):
        return None
    got = _stream_codes(body, si)
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
    places = np.arange(2, n + 2, dtype=np.int64) | fbits
    parts: list[Any]
    if len(keys) == 1:
        parts = [slice(None)]
    else:
        # Stable: each stream's rows stay in file order.
        order = np.argsort(codes.astype(np.int16) if len(keys) < 2**15 else codes, kind="stable")
        parts = np.split(order, np.cumsum(np.bincount(codes, minlength=len(keys)))[:-1])
    for key, sel in zip(keys, parts):
        ser = streams.get(key)
        if ser is None:
            ser = streams[key] = StreamSeries(files)
        ser.add(times[sel], values[sel], places[sel])
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


def _read_padded(path: str | Path) -> tuple[bytearray, int]:
    """The file's bytes with :data:`_PAD` zero bytes after them, and its size."""
    with open(path, "rb") as fb:
        size = os.fstat(fb.fileno()).st_size
        buf = bytearray(size + _PAD)
        with memoryview(buf) as view:
            got = fb.readinto(view[:size]) if size else 0
        rest = fb.read()
    if got == size and not rest:
        return buf, size
    data = bytes(buf[:got]) + rest  # the size changed, or not a regular file
    return bytearray(data) + bytes(_PAD), len(data)


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
            buf, size = _read_padded(path)
        except OSError as exc:
            raise CsvFormatError(f"{name}: cannot open: {exc.strerror or exc}") from None
        utf8 = buf.isascii()
        if not utf8:
            try:
                buf.decode("utf-8")
                utf8 = True
            except UnicodeDecodeError:
                pass
        if utf8:
            eol = buf.find(b"\n", 0, size)
            begin = size if eol < 0 else eol + 1
            try:
                header = next(csv.reader([buf[:eol if eol >= 0 else size].decode()])) if size else None
            except csv.Error as exc:
                raise CsvFormatError(f"{name}:1: unreadable header: {exc}") from None
            if header is None:
                raise CsvFormatError(f"{name}:1: the file is empty; expected a header time,stream,value")
            cols, ti, si, vi = _columns(name, header)
            got = _read_fast(buf, begin, size, len(cols), ti, si, vi, fbits, streams, files)
            if got is not None:
                rows += got
                continue
        del buf
        # Slow path: the file has problems; go row by row and name each line.
        with open(path, newline="", encoding="utf-8", errors="replace") as fh:
            reader = csv.reader(fh)
            try:
                header = next(reader)
            except (StopIteration, csv.Error):
                raise CsvFormatError(f"{name}:1: unreadable header") from None
            cols, ti, si, vi = _columns(name, header)
            width = max(ti, si, vi) + 1
            if not utf8:
                problems.append(f"{name}: the file is not valid UTF-8; unreadable characters were replaced")
            last_text: str | None = None
            last_t = 0.0
            collected: dict[str, tuple[list[float], list[float], list[int]]] = {}
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
                        lists = collected.setdefault(key, ([], [], []))
                        app = appenders[stream] = (lists[0].append, lists[1].append, lists[2].append)
                    app[0](last_t)
                    app[1](v)
                    app[2](fbits | reader.line_num)
            except (csv.Error, UnicodeDecodeError) as exc:
                problems.append(f"{name}:{reader.line_num + 1}: unreadable row: {exc}")
            for key, (ts, vs, ps) in collected.items():
                ser = streams.get(key)
                if ser is None:
                    ser = streams[key] = StreamSeries(files)
                ser.add(np.array(ts, dtype=np.float64), np.array(vs, dtype=np.float64),
                        np.array(ps, dtype=np.int64))
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
