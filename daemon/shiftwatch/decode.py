"""Payload decoders for MQTT messages: a plain number, JSON objects and SenML.

:func:`decode` turns one message payload into :class:`Reading` objects and
:class:`DecodeProblem` reports.  It never raises on any payload: every defect
of the payload (size, encoding, syntax, nesting, types, values, times) becomes
a problem with a stable ``reason`` label, listed with an operator-readable
sentence in :data:`REASONS`.  It raises only on programming errors (a payload
that is not bytes, an unknown format, bad limits or paths, a non-finite
``now``).

The module is pure: no I/O, no clock (the arrival time ``now`` is passed in),
no MQTT library.

Formats
-------
``number``
    UTF-8 text of one decimal number; surrounding whitespace is allowed.
``json``
    A JSON object whose value sits at ``value_path`` (a key or a dot path
    such as ``data.weight_g``) and, optionally, whose time sits at
    ``time_path``.  A bare JSON number is taken as the value.  A JSON array
    is a batch: each element is decoded on its own, good elements are kept
    and bad ones reported.
``senml``
    A SenML pack in JSON, RFC 8428: base fields ``bn``, ``bt``, ``bu``,
    ``bv``, ``bs``, ``bver`` and regular fields ``n``, ``t``, ``u``, ``v``
    (``vs``, ``vb``, ``vd``, ``s``), resolved as in RFC 8428 section 4.6.

Behaviour decisions
-------------------
- Only JSON numbers are values.  ``true``/``false``, ``null``, lists and
  objects are not.  A number written as text (``"12.5"``) is rejected with
  ``value_is_text`` rather than parsed: a producer that quotes its numbers
  usually quotes other things too (``"12,5"``, ``"12.5 g"``), and accepting
  some of them would make the feed's behaviour depend on each value's
  spelling.  A ``null`` value is ``no_value``.
- ``NaN``, ``Infinity`` and ``-Infinity`` (which Python's ``json`` accepts)
  give ``nan`` / ``infinite``; so do integers too large for a float
  (e.g. ``10**400``) and sums that overflow.
- Times: a JSON number is epoch seconds, except that a number above
  ``1e11`` (year 5138 as seconds) is taken as epoch milliseconds; text is
  RFC 3339 section 5.6's date-time, the same grammar replay reads (``Z``, ``z``
  or an offset, which is required: a payload has no time zone to read a time
  without one in; a space may stand for ``T``; a leap second ``:60`` counts as
  the second after ``:59``).  A time must lie in the years 1 to 9999.
  Numbers written as text are not times.  Anything else, or a non-finite
  number, is ``bad_time`` and the item is dropped, because a reading that
  cannot be placed in time cannot be placed in a series.
- A configured ``time_path`` that is absent from an item, or holds
  ``null``, gives the problem ``no_time``; the reading is returned with
  ``time=None`` and the problem, and the daemon sets it aside: placed at its
  arrival time among readings placed by their own times, it would stand
  after every reading of a broker backlog stamped earlier, and those would
  then all be rejected as ``out_of_order`` (one such message cost 151 of 446
  good samples after a 30 s outage).
- Key paths: the whole path is first tried as one key (so keys containing
  dots still work), then it is split on dots and walked through nested
  objects.  Lists are not indexed.
- A payload that is empty or only whitespace, and an empty array, give
  ``empty``.  A leading UTF-8 byte-order mark is ignored.
- Guards run before parsing: the size (``too_large``, checked on the raw
  bytes before anything else), UTF-8 (``not_utf8``) and nesting depth
  (``too_deep``, counted on the text with strings skipped, so ``json`` never
  recurses deeply; a ``RecursionError`` is caught too).  A batch or pack
  longer than ``max_items`` is cut to its first ``max_items`` elements and
  reported once as ``too_many_items``.
- Batch problems name the element (``item 3: ...``, ``record 2: ...``);
  each bad element gives exactly one problem, except that a kept reading
  may carry a ``no_time`` note.

SenML specifics (RFC 8428)
--------------------------
- Base fields apply to the record they appear in and to every following
  record until changed (section 4.6).  name = ``bn`` + ``n``;
  time = ``bt`` + ``t``; value = ``bv`` + ``v``; unit = ``u``, else ``bu``.
- The resolved name must be non-empty, start with a letter or digit and use
  only letters, digits and ``- : . / _`` (section 4.5.1); otherwise
  ``senml_invalid``.
- A resolved time below ``2**28`` is relative to ``now`` (section 4.5.3):
  time = ``now`` + time, so a record without ``t`` and ``bt`` is "now".
  Above ``1e11`` the millisecond rule above applies, although RFC 8428 times
  are seconds, because no plausible seconds stamp is that large.  A resolved
  time before the year 1 (``-1e12`` from now, say) is ``bad_time``.
- ``vs``, ``vb`` and ``vd`` (string, boolean and data values) give
  ``not_a_number`` for that record.  A record with a sum ``s`` and no value
  is skipped without a problem, and so is a record holding only base fields
  (it only sets base values for the records after it); a pack that holds
  nothing else gives ``empty``, so every payload yields a reading or a
  problem.  Any other record without a value field, or with more than one,
  is ``senml_invalid``.
- A base field of the wrong type (``bn`` not text, ``bt`` not a number,
  ``bver`` not a positive integer or above 10, ...) makes its record
  ``senml_invalid``, and the broken base stays in force: later records that
  depend on it are rejected too until a record sets it again, rather than
  silently falling back to an earlier base.  A non-finite ``bt`` or ``t``
  is ``bad_time``; a non-finite ``bv`` is ``nan`` / ``infinite``.
- A label ending in ``_`` is a must-understand extension (section 4.4);
  none is understood here, so such a record is ``senml_invalid``.  Other
  unknown labels (e.g. ``ut``) are ignored.
- A pack must be a JSON array; anything else is ``senml_invalid``.
- Readings keep their unit, but the stream is chosen by name alone
  (:func:`stream_name`): records that share a name and differ in unit share
  a stream.

The RFC 8428 section numbers above were written from memory.

Examples
--------
>>> decode(b" 500.25\\n", "number", now=1764633600.0).readings
[Reading(name=None, time=None, value=500.25, unit=None)]
>>> decode(b'{"data": {"weight_g": 498}, "ts": "2025-12-02T00:00:01Z"}', "json",
...        value_path="data.weight_g", time_path="ts", now=0.0).readings
[Reading(name=None, time=1764633601.0, value=498.0, unit=None)]
>>> out = decode(b'[{"bn": "filler3/", "bt": 1764633600, "n": "fill_g", "u": "g", "v": 500.1},'
...              b' {"n": "nozzle_temp", "u": "Cel", "t": 2, "v": 71.5}]', "senml", now=0.0)
>>> [(r.name, r.time, r.value, r.unit) for r in out.readings]
[('filler3/fill_g', 1764633600.0, 500.1, 'g'), ('filler3/nozzle_temp', 1764633602.0, 71.5, 'Cel')]
>>> decode(b'NaN', "number", now=0.0).problems
[DecodeProblem(reason='nan', message='the payload is NaN')]
"""

from __future__ import annotations

import functools
import hashlib
import json
import math
import operator
import re
import struct
from collections import Counter
from collections.abc import Sequence
from itertools import accumulate
from typing import Any, NamedTuple, get_args

import msgspec
import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.timefmt import RFC3339, TIME_MAX_MS, TIME_MIN, parse_rfc3339

FloatArray = NDArray[np.float64]

FORMATS: tuple[str, ...] = ("number", "json", "senml")
"""The payload formats :func:`decode` understands."""

REASONS: dict[str, str] = {
    "too_large": "The message is larger than the configured size limit and was dropped unread.",
    "not_utf8": "The message is not valid UTF-8 text.",
    "not_json": "The message is not valid JSON.",
    "too_deep": "The message nests lists or objects deeper than the configured limit and was dropped unread.",
    "empty": ("The message holds no readings: it is empty, blank, an empty list, "
              "or a SenML pack of base fields and sums only."),
    "too_many_items": "The message holds more items than the configured limit; only the first ones were used.",
    "not_an_object": "A batch item is neither a JSON object nor a number.",
    "no_value": "The item has no value at the configured value path, or the value is null.",
    "not_a_number": "The value is not a number (it is text, true/false, a list or an object).",
    "value_is_text": "The value is a number written as text in quotes; only plain JSON numbers are accepted.",
    "nan": "The value is NaN (not a number).",
    "infinite": "The value is infinite or too large to represent.",
    "no_time": "The item has no time at the configured time path; the daemon sets it aside.",
    "bad_time": ("The time is not epoch seconds, epoch milliseconds or an RFC 3339 time, "
                 "or is not finite; the item was dropped."),
    "duplicate_key": ("The value or time key (in SenML any field) appears twice in one object; "
                      "which reading is meant cannot be told, so the item was dropped."),
    "senml_invalid": ("A SenML record breaks RFC 8428 (a bad name, a bad base field, "
                      "a missing value or a wrong type); the record was dropped."),
}
"""Every problem reason label, with one sentence an operator can read.

The labels are stable: they are used as Prometheus label values.
"""


class DecodeProblem(NamedTuple):
    """One defect found in a payload.

    Attributes
    ----------
    reason : str
        Stable snake_case label, a key of :data:`REASONS`.
    message : str
        Short detail for logs (which item, what was found).
    """

    reason: str
    message: str


class Reading(NamedTuple):
    """One decoded sample (a named tuple: tens of thousands are made a second).

    Attributes
    ----------
    name : str or None
        The resolved SenML name; None for the ``number`` and ``json`` formats.
    time : float or None
        Epoch seconds, or None to use the arrival time.  Always finite.
    value : float
        The value, always finite.
    unit : str or None
        The SenML unit, if any.
    """

    name: str | None
    time: float | None
    value: float
    unit: str | None


class SenmlColumns(NamedTuple):
    """A clean SenML pack as columns, one pair of arrays per resolved name.

    ``names`` are the distinct names in the order of their first record,
    ``units`` the unit of each (the same on all its records), ``times`` and
    ``values`` each name's samples in record order, and ``order`` the index
    into ``names`` of every record, so :meth:`readings` gives back exactly the
    readings the pack stands for, in record order.
    """

    names: list[str]
    units: list[str | None]
    times: list[FloatArray]
    values: list[FloatArray]
    order: NDArray[np.intp]

    def readings(self) -> list[Reading]:
        """The readings, one per record, in record order."""
        seen = [0] * len(self.names)
        out = []
        for i in self.order.tolist():
            j = seen[i]
            seen[i] = j + 1
            out.append(Reading(self.names[i], float(self.times[i][j]), float(self.values[i][j]),
                               self.units[i]))
        return out


class Decoded(NamedTuple):
    """What one payload gave: the usable readings and the problems found.

    A payload can give both, e.g. a batch with some bad items.  With
    ``columns=True`` (see :func:`decode`) a clean JSON array comes as
    ``columns``, its times (None: none configured) and values as float64
    arrays, and a clean SenML pack as ``senml``; ``readings`` is then empty.
    """

    readings: list[Reading]
    problems: list[DecodeProblem]
    columns: tuple[FloatArray | None, FloatArray] | None = None
    senml: SenmlColumns | None = None


class _Reject(Exception):
    """Internal: one item or record is rejected with ``reason``."""

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(reason, message)
        self.reason = reason
        self.message = message


class _Constant:
    """A ``NaN`` / ``Infinity`` / ``-Infinity`` literal met by the JSON parser."""

    __slots__ = ("text",)

    def __init__(self, text: str) -> None:
        self.text = text

    @property
    def reason(self) -> str:
        return "nan" if self.text == "NaN" else "infinite"


class _Missing:
    __slots__ = ()


_MISSING = _Missing()

# Every pattern here is unambiguous, so a failed match on a long hostile
# payload (say 64 KiB of digits and one letter) costs linear time.
_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)
_NONFINITE = re.compile(r"[+-]?(?:(nan)|inf|infinity)", re.ASCII | re.IGNORECASE)
#: RFC 3339 section 5.6's date-time (:data:`shiftwatch.core.timefmt.RFC3339`); replay reads file
#: times by this same grammar, the decoder and the floor commands by :func:`parse_rfc3339`.
_RFC3339 = RFC3339
# A JSON string, or an unterminated one up to the end of the text: always
# matches from a quote, so scanning stays linear on hostile input.
_JSON_STRING = re.compile(r'"[^"\\]*(?:\\.[^"\\]*)*"?', re.DOTALL)
_NOT_BRACKET = re.compile(r"[^\[\]{}]+")
_BRACKET_STEP = {"[": 1, "{": 1, "]": -1, "}": -1}
_SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9\-:./_]*", re.ASCII)
_SENML_BASE = ("bn", "bt", "bu", "bv", "bs", "bver")
_SENML_REGULAR = ("n", "u", "v", "vs", "vb", "vd", "s", "t", "ut")
_SENML_VALUES = ("v", "vs", "vb", "vd")
_SENML_VERSION = 10  # RFC 8428 section 4.1: the version when bver is absent, and ours
_RELATIVE_LIMIT = 2.0 ** 28  # RFC 8428 section 4.5.3
#: A numeric time above this (year 5138 in seconds) is epoch milliseconds; replay reads files by the same rule.
EPOCH_MS_ABOVE = 1e11
_MS_THRESHOLD = EPOCH_MS_ABOVE
#: The largest numeric time read: 9999-12-31T23:59:59.999Z in epoch milliseconds. RFC 3339
#: writes no later year (date-fullyear is 4DIGIT), and replay reads none; a number past it is
#: most often epoch microseconds or nanoseconds, which the millisecond rule would read as the
#: year 58,000 or later.
_RAW_TIME_MAX = float(TIME_MAX_MS)  # core.timefmt, the one limit
#: The earliest time read: 0001-01-01T00:00:00Z (RFC 3339's date-fullyear is 4DIGIT, and
#: there is no year 0000 in datetime's calendar).  An earlier time cannot be written in a record.
_TIME_MIN = TIME_MIN
_BEFORE_1 = "before the year 1"
_PAST_9999 = ("past the year 9999 (shiftwatch reads epoch seconds, and epoch milliseconds above "
              "100,000,000,000: divide epoch microseconds or nanoseconds first)")
_BIG_INT_DIGITS = 400  # longer integer literals overflow a float anyway


def _parse_int(text: str) -> int | float:
    # Python refuses int() on more than 4300 digits; such literals are
    # beyond any float, so go straight to float (which gives +-inf).
    return float(text) if len(text) > _BIG_INT_DIGITS else int(text)


def _show(v: Any) -> str:
    """A short, safe description of a JSON value for a problem message."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "an object"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, _Constant):
        return v.text
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, int):
        text = str(v)
        return text if len(text) <= 24 else f"an integer of {len(text)} digits"
    text = repr(v) if isinstance(v, str) else type(v).__name__
    return text if len(text) <= 40 else text[:37] + "..."


def _value(v: Any, what: str) -> float:
    """A JSON value as a finite float, or :class:`_Reject`."""
    if isinstance(v, bool):
        raise _Reject("not_a_number", f"{what} is {_show(v)}, not a number")
    if isinstance(v, int):
        try:
            return float(v)
        except OverflowError:
            raise _Reject("infinite", f"{what} is {_show(v)}, too large for a float") from None
    if isinstance(v, float):
        if math.isnan(v):
            raise _Reject("nan", f"{what} is NaN")
        if math.isinf(v):
            raise _Reject("infinite", f"{what} is {_show(v)}")
        return v
    if isinstance(v, _Constant):
        raise _Reject(v.reason, f"{what} is {v.text}")
    if v is None:
        raise _Reject("no_value", f"{what} is null")
    if isinstance(v, str):
        s = v.strip()
        if _NUMBER.fullmatch(s) or _NONFINITE.fullmatch(s):
            raise _Reject("value_is_text", f"{what} is the text {_show(v)}, not a JSON number")
    raise _Reject("not_a_number", f"{what} is {_show(v)}, not a number")


def _seconds(t: float) -> float:
    """Epoch seconds from a time that may be in epoch milliseconds."""
    return t / 1000.0 if t > _MS_THRESHOLD else t


def _finite_time(t: float, what: str) -> float:
    if not math.isfinite(t):
        raise _Reject("bad_time", f"{what} is not finite")
    if t > _RAW_TIME_MAX:
        raise _Reject("bad_time", f"{what} is {t:.17g}, {_PAST_9999}")
    if t < _TIME_MIN:
        raise _Reject("bad_time", f"{what} is {t:.17g}, {_BEFORE_1}")
    return _seconds(t)


def _epoch(v: Any, what: str) -> float:
    """A JSON time (epoch seconds / milliseconds or RFC 3339 text) as epoch seconds."""
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        try:
            t = float(v)
        except OverflowError:
            raise _Reject("bad_time", f"{what} is {_show(v)}, too large") from None
        return _finite_time(t, what)
    if isinstance(v, str):
        return _rfc3339(v, what)
    raise _Reject("bad_time", f"{what} is {_show(v)}, not a time")


def _rfc3339(text: str, what: str) -> float:
    try:
        return parse_rfc3339(text)
    except ValueError as exc:
        raise _Reject("bad_time", f"{what} is {_show(text)}, {exc}") from None


def _check_now(now: Any) -> None:
    if isinstance(now, bool) or not isinstance(now, (int, float)) or not math.isfinite(now):
        raise ValueError(f"now must be finite epoch seconds, got {now!r}")


@functools.lru_cache(maxsize=256)
def _split_path(path: str | None, what: str) -> tuple[str, ...] | None:
    if path is None:
        return None
    if not isinstance(path, str) or not path or any(not p for p in path.split(".")):
        raise ValueError(f"{what} must be a key or a dot path such as 'data.weight_g', got {path!r}")
    return tuple(path.split("."))


class _Repeated(dict[str, Any]):
    """A JSON object in which some keys appeared more than once (``repeated``); it holds
    the last value of each, as ``json`` does."""

    __slots__ = ("repeated",)
    repeated: set[str]


def _pairs(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    d = dict(pairs)
    if len(d) == len(pairs):
        return d
    out = _Repeated(d)
    out.repeated = {k for k, times in Counter(k for k, _ in pairs).items() if times > 1}
    return out


def _repeats(obj: dict[str, Any], path: str, parts: tuple[str, ...]) -> bool:
    """True when the key at ``path`` (whole, or walked by its parts) appears twice in its object."""
    if type(obj) is _Repeated and path in obj.repeated:
        return True
    if path in obj:
        return False
    cur: Any = obj
    for part in parts:
        if not isinstance(cur, dict):
            return False
        if type(cur) is _Repeated and part in cur.repeated:
            return True
        cur = cur.get(part)
    return False


def _may_repeat(payload: bytes, keys: tuple[bytes, ...]) -> bool:
    """Cheap test before the parse: can a watched key appear twice?  A key spelled with
    escapes is caught by the backslash."""
    return b"\\" in payload or any(payload.count(k) > 1 for k in keys)


@functools.lru_cache(maxsize=256)
def _watched(value_parts: tuple[str, ...], time_parts: tuple[str, ...] | None) -> tuple[bytes, ...]:
    """The watched keys as they appear, quoted, in a payload (for :func:`_may_repeat`)."""
    names = {*value_parts, *(time_parts or ())}
    return tuple(json.dumps(n).encode() for n in sorted(names))


def _lookup(obj: dict[str, Any], path: str, parts: tuple[str, ...]) -> Any:
    if path in obj:
        return obj[path]
    cur: Any = obj
    for part in parts:
        if not isinstance(cur, dict) or part not in cur:
            return _MISSING
        cur = cur[part]
    return cur


def _too_deep(text: str, limit: int) -> bool:
    """True when lists/objects nest deeper than ``limit`` (strings are skipped)."""
    if text.count("[") + text.count("{") <= limit:
        return False
    brackets = _NOT_BRACKET.sub("", _JSON_STRING.sub("", text))
    return max(accumulate(_BRACKET_STEP[c] for c in brackets), default=0) > limit


@functools.lru_cache(maxsize=256)
def _checked_options(fmt: str, value_path: str, time_path: str | None, max_bytes: int, max_items: int,
                     max_depth: int) -> tuple[tuple[str, ...], tuple[str, ...] | None]:
    """Validate the decoding options once per distinct set (the daemon reuses a few)."""
    if fmt not in FORMATS:
        raise ValueError(f"unknown payload format {fmt!r}; expected one of {', '.join(FORMATS)}")
    value_parts = _split_path(value_path, "value_path")
    time_parts = _split_path(time_path, "time_path")
    assert value_parts is not None
    for label, limit in (("max_bytes", max_bytes), ("max_items", max_items), ("max_depth", max_depth)):
        if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
            raise ValueError(f"{label} must be a positive integer, got {limit!r}")
    return value_parts, time_parts


def _fast_loads(data: bytes | str) -> Any:
    """orjson's parse of a JSON text, or _NOT_FAST when orjson refuses it (or is missing).

    orjson parses the daemon's payloads 2 to 5 times faster than the stdlib
    decoder (measured: 1.8 against 3.9 microseconds a message for joined
    single-sample objects, 0.30 against 1.38 ms for a 260-sample array) and
    gives the same values where it accepts a text: floats correctly rounded,
    integers as int.  What it refuses (NaN and Infinity literals, integers
    past 64 bits, lone surrogates, invalid text) goes to the stdlib decoder,
    which says what is wrong in the same words as before.
    """
    if _orjson is None:
        return _NOT_FAST
    try:
        return _orjson.loads(data)
    except (ValueError, TypeError):  # orjson.JSONDecodeError is a ValueError
        return _NOT_FAST


_NOT_FAST: Any = object()
_orjson: Any
try:
    import orjson as _orjson
except ImportError:  # pragma: no cover - orjson is a dependency; the stdlib path still works
    _orjson = None

#: One decoder for every message (json.loads would build a new one each call).
_JSON = json.JSONDecoder(parse_constant=_Constant, parse_int=_parse_int)
#: The same without the Python call per integer, for joined payloads that hold
#: no digit run long enough for _parse_int to matter (_LONG_DIGITS finds one).
_JSON_PLAIN_INTS = json.JSONDecoder(parse_constant=_Constant)
_LONG_DIGITS = re.compile(rb"[0-9]{%d}" % _BIG_INT_DIGITS)
#: The same, noting keys that appear twice in an object (see _Repeated): used for SenML,
#: and for a JSON payload in which a watched key may appear twice (see _may_repeat).
_JSON_PAIRS = json.JSONDecoder(parse_constant=_Constant, parse_int=_parse_int, object_pairs_hook=_pairs)  # with a sign, 400 digits are 401 characters


def decode(payload: bytes | bytearray, fmt: str, *, value_path: str = "value", time_path: str | None = None,
           max_bytes: int = 65536, now: float, max_items: int = 10000, max_depth: int = 32,
           columns: bool = False) -> Decoded:
    """Decode one MQTT payload into readings and problems; never raises on the payload.

    Parameters
    ----------
    payload : bytes
        The raw message payload (``bytes`` or ``bytearray``).
    fmt : {"number", "json", "senml"}
        The payload format.
    value_path : str, optional
        ``json`` only: key or dot path of the value (default ``"value"``).
    time_path : str or None, optional
        ``json`` only: key or dot path of the time; None means arrival time.
    max_bytes : int, optional
        Payloads longer than this are rejected unread (``too_large``).
    now : float
        Arrival time, epoch seconds.  Used for SenML relative times.
    max_items : int, optional
        Longest batch or SenML pack used; the rest is cut (``too_many_items``).
    max_depth : int, optional
        Deepest nesting of lists/objects accepted (``too_deep``).
    columns : bool, optional
        A JSON array of flat objects whose every item has one number at each
        (plain) key comes back as ``columns`` (times, values), and a plain
        SenML pack (see :func:`_senml_columns`) as ``senml``, instead of
        readings: the same numbers, without an object per sample.

    Returns
    -------
    Decoded
        The readings (finite values, finite-or-None times) and the problems.

    Raises
    ------
    TypeError
        If ``payload`` is not bytes.
    ValueError
        If ``fmt``, a path, a limit or ``now`` is invalid (programming or
        configuration errors, never payload errors).

    Examples
    --------
    >>> decode(b'[{"value": 12.5}, {"value": "12.5"}, {"value": 13}]', "json", now=0.0)
    ... # doctest: +NORMALIZE_WHITESPACE
    Decoded(readings=[Reading(name=None, time=None, value=12.5, unit=None),
                      Reading(name=None, time=None, value=13.0, unit=None)],
            problems=[DecodeProblem(reason='value_is_text',
                                    message="item 1: value is the text '12.5', not a JSON number")],
            columns=None, senml=None)
    >>> decode(b'[' * 100, "json", now=0.0).problems[0].reason
    'too_deep'
    >>> decode(b'{"value": 1}', "json", time_path="ts", now=0.0)
    ... # doctest: +NORMALIZE_WHITESPACE
    Decoded(readings=[Reading(name=None, time=None, value=1.0, unit=None)],
            problems=[DecodeProblem(reason='no_time', message="message: no time at 'ts'")],
            columns=None, senml=None)
    >>> [c.tolist() for c in decode(b'[{"v": 1, "ts": 10}, {"v": 2.5, "ts": 11}]', "json", value_path="v",
    ...                             time_path="ts", now=0.0, columns=True).columns]
    [[10.0, 11.0], [1.0, 2.5]]
    >>> pack = decode(b'[{"bn": "oven2:", "bt": 1764633600, "n": "zone1", "v": 181.5}, {"n": "zone1", "t": 1, '
    ...               b'"v": 181.75}]', "senml", now=0.0, columns=True).senml
    >>> pack.names, [t.tolist() for t in pack.times], [v.tolist() for v in pack.values]
    (['oven2:zone1'], [[1764633600.0, 1764633601.0]], [[181.5, 181.75]])
    """
    if not isinstance(payload, (bytes, bytearray)):
        raise TypeError(f"payload must be bytes, got {type(payload).__name__}")
    value_parts, time_parts = _checked_options(fmt, value_path, time_path, max_bytes, max_items, max_depth)
    _check_now(now)

    readings: list[Reading] = []
    problems: list[DecodeProblem] = []
    out = Decoded(readings, problems)
    if len(payload) > max_bytes:
        problems.append(DecodeProblem("too_large", f"the payload has {len(payload)} bytes; the limit is {max_bytes}"))
        return out
    if columns and fmt != "number" and payload[:1] == b"[" and payload.isascii():
        # ASCII is valid UTF-8, has no byte-order mark and is not blank when it starts
        # with "[": the checks of the text below would pass, so they come after this.
        if fmt == "json":
            cols = _array_columns(bytes(payload), value_parts, time_parts, max_items, max_depth)
            if cols is not None:
                return Decoded(readings, problems, cols)
        else:
            pack = _senml_columns(bytes(payload), now, max_items, max_depth)
            if pack is not None:
                return Decoded(readings, problems, None, pack)
    try:
        text = bytes(payload).decode("utf-8")
    except UnicodeDecodeError as exc:
        problems.append(DecodeProblem("not_utf8", f"invalid UTF-8 at byte {exc.start}"))
        return out
    text = text.removeprefix("\ufeff")
    if not text.strip():
        problems.append(DecodeProblem("empty", "the payload is empty" if not text else "the payload is blank"))
        return out

    if fmt == "number":
        try:
            readings.append(Reading(None, None, _number_text(text), None))
        except _Reject as rej:
            problems.append(DecodeProblem(rej.reason, rej.message))
        return out

    if _too_deep(text, max_depth):
        problems.append(DecodeProblem("too_deep", f"lists/objects nest deeper than {max_depth} levels"))
        return out
    watch_pairs = fmt == "senml" or _may_repeat(bytes(payload), _watched(value_parts, time_parts))
    doc = _NOT_FAST if watch_pairs or _LONG_DIGITS.search(bytes(payload)) else _fast_loads(text)
    try:
        if doc is _NOT_FAST:
            doc = (_JSON_PAIRS if watch_pairs else _JSON).decode(text)
    except RecursionError:
        problems.append(DecodeProblem("too_deep", "lists/objects nest too deep to parse"))
        return out
    except ValueError as exc:
        problems.append(DecodeProblem("not_json", f"invalid JSON: {_json_error(exc)}"))
        return out

    if fmt == "senml" and not isinstance(doc, list):
        problems.append(DecodeProblem(
            "senml_invalid", f"a SenML pack is a JSON array of records, got {_show(doc)}"))
        return out
    if isinstance(doc, list):
        if not doc:
            problems.append(DecodeProblem("empty", "the payload is an empty list"))
            return out
        if len(doc) > max_items:
            problems.append(DecodeProblem(
                "too_many_items", f"{len(doc)} items; only the first {max_items} were used"))
            doc = doc[:max_items]
    if fmt == "senml":
        _senml(doc, now, readings, problems)
        if not readings and not problems:  # only base fields or sums: still accounted for
            problems.append(DecodeProblem("empty", "the SenML pack holds no value records"))
    elif isinstance(doc, list):
        for i, item in enumerate(doc):
            _json_item(item, f"item {i}", True, value_path, value_parts, time_path, time_parts,
                       readings, problems)
    else:
        _json_item(doc, "message", False, value_path, value_parts, time_path, time_parts,
                   readings, problems)
    return out


def decode_many(payloads: Sequence[bytes | bytearray], fmt: str, *, value_path: str = "value",
                time_path: str | None = None, max_bytes: int = 65536, now: Sequence[float],
                max_items: int = 10000, max_depth: int = 32, columns: bool = False) -> list[Decoded]:
    """:func:`decode` applied to each payload, with JSON objects parsed together.

    Gives exactly ``[decode(p, fmt, now=t, ...) for p, t in zip(payloads, now)]``.
    When every payload is a flat JSON object (``{`` first, ``}`` last, no
    other ``{`` and no ``[``) they are parsed with one call over the array
    that joins them, which costs a fraction of one call each.  The same
    checks then run on each object as in :func:`decode`.  If that array does
    not parse into one object per payload, each payload is decoded on its
    own, so every bad payload is reported as :func:`decode` reports it.

    Why the join cannot mix payloads up: the joined text holds exactly one
    ``{`` per payload, at its start.  If it parses into as many objects as
    there are payloads, every ``{`` opens one of them, so each object runs
    from the start of one payload to just before the separator ahead of the
    next; a payload that ends in ``}`` is then that object and nothing else.

    Parameters
    ----------
    payloads : sequence of bytes
        The raw payloads.
    fmt, value_path, time_path, max_bytes, max_items, max_depth
        As for :func:`decode`, the same for every payload.
    now : sequence of float
        Arrival time of each payload, epoch seconds.

    Returns
    -------
    list of Decoded
        One per payload, in order.

    Examples
    --------
    >>> [d.readings[0].value if d.readings else d.problems[0].reason
    ...  for d in decode_many([b'{"v": 1}', b'{"v": "x"}', b'{"v": 3}'], "json", value_path="v",
    ...                       now=[0.0, 0.0, 0.0])]
    [1.0, 'not_a_number', 3.0]
    """
    if len(payloads) != len(now):
        raise ValueError(f"{len(payloads)} payloads but {len(now)} arrival times")
    doc = None
    if fmt == "json" and len(payloads) > 1:
        value_parts, time_parts = _checked_options(fmt, value_path, time_path, max_bytes, max_items, max_depth)
        doc = _joined_objects(payloads, max_bytes, _watched(value_parts, time_parts))
        if doc is None and columns:
            # JSON arrays (batches): what decode() does first with one, without its checks of
            # the options (done above) for each; anything else goes through decode().
            many: list[Decoded] = []
            for p, at in zip(payloads, now):
                if type(p) is bytes and p[:1] == b"[" and len(p) <= max_bytes and p.isascii():
                    _check_now(at)
                    cols = _array_columns(p, value_parts, time_parts, max_items, max_depth)
                    if cols is not None:
                        many.append(Decoded([], [], cols))
                        continue
                many.append(decode(p, fmt, value_path=value_path, time_path=time_path, max_bytes=max_bytes,
                                   now=at, max_items=max_items, max_depth=max_depth, columns=columns))
            return many
    if doc is None:
        return [decode(p, fmt, value_path=value_path, time_path=time_path, max_bytes=max_bytes, now=t,
                       max_items=max_items, max_depth=max_depth, columns=columns) for p, t in zip(payloads, now)]
    value_parts, time_parts = _checked_options(fmt, value_path, time_path, max_bytes, max_items, max_depth)
    for arrived in now:
        _check_now(arrived)
    out: list[Decoded] = []
    no_problems: list[DecodeProblem] = []  # shared by the clean results below; never appended to
    for item in doc:
        if type(item) is dict:
            # The common case, with the same outcome as _json_item: a finite float
            # or a plain int (type() leaves out bool) right under each key.
            v: Any = item.get(value_path)
            tv = type(v)
            if (tv is float and v - v == 0.0) or (tv is int and -_BIG_INT < v < _BIG_INT):
                if time_path is None:
                    out.append(Decoded([Reading(None, None, float(v), None)], no_problems))
                    continue
                t: Any = item.get(time_path)
                tt = type(t)
                if ((tt is float and t - t == 0.0 and _TIME_MIN <= t <= _RAW_TIME_MAX)
                        or (tt is int and _TIME_MIN <= t <= _RAW_TIME_MAX)):
                    out.append(Decoded([Reading(None, _seconds(float(t)), float(v), None)], no_problems))
                    continue
        readings: list[Reading] = []
        problems: list[DecodeProblem] = []
        _json_item(item, "message", False, value_path, value_parts, time_path, time_parts, readings, problems)
        out.append(Decoded(readings, problems))
    return out


#: Integers below this in magnitude convert to a finite float.
_BIG_INT = 2 ** 1000


def _array_columns(payload: bytes, value_parts: tuple[str, ...], time_parts: tuple[str, ...] | None,
                   max_items: int, max_depth: int) -> tuple[FloatArray | None, FloatArray] | None:
    """The times and values of a JSON array of flat objects, when :func:`decode` would give
    exactly these readings and no problem; None otherwise (then it decodes as usual).

    msgspec parses the array straight into one small struct per object (see
    :func:`_column_decoders`): a value or time that is not a JSON number, or is beyond
    the float range, fails the parse, and so does anything that is not JSON (NaN and
    Infinity literals included); the usual path then says what is wrong.

    Why no duplicate key can hide.  With no backslash a key has one spelling.  The
    strict parse takes objects of the watched keys only, all numbers: the only text is
    then the keys, so the payload's colons are one per key (plus those a key holds), and
    as many as the keys of one object times the objects means no object has a key twice.
    Otherwise (other keys beside them) the payload must hold as many quoted value keys
    (and time keys) as objects, and every object has one, so no object has two.
    """
    if (len(value_parts) != 1 or (time_parts is not None and len(time_parts) != 1) or max_depth < 2
            or len(payload) < 2 or payload[-1] != 0x5D or b"\\" in payload
            or payload.find(b"[", 1) >= 0 or payload.find(b"]", 0, len(payload) - 1) >= 0):
        return None
    decoders = _column_decoders(value_parts[0], None if time_parts is None else time_parts[0])
    if decoders is None:
        return None
    strict, lenient, colons = decoders
    try:
        doc = strict.decode(payload)
        if _count_colons(payload) != colons * len(doc):
            return None
    except msgspec.MsgspecError:
        n = payload.count(b"{")
        keys = _watched(value_parts, time_parts)
        if n == 0 or n > max_items or payload.count(b"}") != n or any(payload.count(k) != n for k in keys):
            return None
        try:
            doc = lenient.decode(payload)
        except msgspec.MsgspecError:
            return None
        if len(doc) != n:
            return None
    if not doc or len(doc) > max_items:
        return None
    # The same doubles into float64 arrays: out of msgspec's MessagePack encoding of the
    # structs (MSGPACK_COLUMNS), else by a list comprehension over the structs and struct's
    # pack_into (see _column), which cost about 70,000 fewer instructions for two columns of
    # 260 than np.fromiter over map(attrgetter) (callgrind, 2026-12-04).
    n = len(doc)
    packed = _msgpack_columns(doc, n, value_parts[0], None if time_parts is None else time_parts[0]) \
        if MSGPACK_COLUMNS else None
    values = _column([s.a for s in doc], n) if packed is None else packed[1]
    if not PARSED_FINITE and not np.isfinite(values).all():
        return None
    if time_parts is None:
        return None, values
    t = packed[0] if packed is not None and packed[0] is not None else _column([s.b for s in doc], n)
    # Every time finite: a NaN makes the largest NaN, an infinity the largest or the
    # smallest infinite (two reductions instead of isfinite's array and its all()).
    top = float(np.maximum.reduce(t))
    low = float(np.minimum.reduce(t))
    if not (math.isfinite(top) and math.isfinite(low)) or low < _TIME_MIN:
        return None  # each such time is a problem of its own: the usual path names it
    # _seconds, element by element: the same division, for a column that holds a time in
    # milliseconds (none is past the threshold otherwise, and the column is kept as it is).
    if top > _MS_THRESHOLD:
        if top > _RAW_TIME_MAX:  # each such time is a problem of its own: the usual path names it
            return None
        if low > _MS_THRESHOLD:  # all of them (a sender's clock in milliseconds): in place
            np.divide(t, 1000.0, out=t)
            return t, values
        return np.where(t > _MS_THRESHOLD, t / 1000.0, t), values
    return t, values


#: A JSON array's values are not checked for finiteness once parsed: msgspec refuses every
#: number beyond the float range ("Number out of range", 1e400 and 10**400 alike) and the
#: NaN and Infinity literals (not JSON), in both decoders of _column_decoders, so no value it
#: gives is NaN or infinite (tests/daemon/test_decode_parsed_finite.py, against Python's
#: json.loads, which gives inf and nan for them).  False: the check, the reference.
PARSED_FINITE = True

#: The columns of a JSON array and a SenML pack's values and times are written into their
#: float64 arrays by ``struct``'s ``pack_into`` (False: ``np.fromiter`` over the list, or
#: ``np.array`` of it for the SenML times, the reference).  All store each
#: float's double as it is (``PyFloat_AsDouble``, then the 8 bytes in the machine's
#: order, which is float64's, a plain copy, so NaN payloads too): the same arrays bit for
#: bit (tests/daemon/test_decode_columns_packed.py: signed zeros, extremes, columns of up
#: to the 10,000-item limit; msgspec lets no NaN reach a column).  About 74,000 against
#: 99,000 instructions for a column of 260 (callgrind, 2026-12-05).
PACKED_COLUMNS = True


@functools.lru_cache(maxsize=64)
def _doubles(n: int) -> struct.Struct:
    """The ``struct`` layout of ``n`` doubles in the machine's order and alignment: float64's."""
    return struct.Struct(f"{n}d")


def _column(items: list[float], n: int) -> FloatArray:
    """A new float64 array of the ``n`` floats ``items`` (a writable array of its own)."""
    if not PACKED_COLUMNS:
        return np.fromiter(items, np.float64, n)
    out = np.empty(n, dtype=np.float64)
    _doubles(n).pack_into(out.data, 0, *items)
    return out


#: A JSON array's columns are read out of msgspec's MessagePack encoding of the parsed
#: structs (one encoder call in C, no Python object per value) instead of by two list
#: comprehensions and ``pack_into``: each struct is a map of the same keys whose numbers
#: msgspec writes as float64 (``0xcb`` and 8 bytes, big-endian), so every item has one
#: length and each column is a strided view of the encoding, copied into a native float64
#: array: the same doubles bit for bit (a byte swap).  The layout is taken from a probe
#: struct once per pair of keys and checked on every payload (the length, and the first
#: item's bytes outside its numbers); anything else takes the list comprehensions.
#: False: the list comprehensions, the reference (tests/daemon/test_decode_msgpack_columns.py).
#: About 152,000 against 124,000 instructions for the two columns of 260 (callgrind,
#: 2026-12-05; a look at it on 2026-12-05 afternoon counted 149,000 against 124,000).
MSGPACK_COLUMNS = True
_MSGPACK = msgspec.msgpack.Encoder()
_BE_F64 = np.dtype(">f8")


class _Layout(NamedTuple):
    item: int  # bytes an item takes
    value: int  # offset of the value's 8 bytes in an item
    time: int  # offset of the time's 8 bytes in an item (-1: no time field)
    fixed: bytes  # the probe item with its numbers' bytes zeroed
    holes: tuple[int, ...]  # the offsets of its numbers (8 bytes each)


@functools.lru_cache(maxsize=64)
def _msgpack_layout(value_key: str, time_key: str | None) -> _Layout | None:
    """Where the numbers lie in msgspec's MessagePack encoding of one parsed struct of
    :func:`_column_decoders`' kind; None when it is not as :data:`MSGPACK_COLUMNS` needs."""
    decoders = _column_decoders(value_key, time_key)
    if decoders is None:
        return None
    (kind,) = get_args(decoders[0].type)
    a, b = 1.0000000000000002, 3.0000000000000004  # (distinct bytes, found once each below)
    probe = kind(a, b) if time_key is not None else kind(a)
    enc = _MSGPACK.encode([probe])
    if enc[:1] != b"\x91":  # a fixarray of one
        return None
    item = enc[1:]
    pa, pb = struct.pack(">d", a), struct.pack(">d", b)
    va = item.find(b"\xcb" + pa) + 1
    tb = item.find(b"\xcb" + pb) + 1 if time_key is not None else -1
    if va <= 0 or item.count(pa) != 1 or (time_key is not None and (tb <= 0 or item.count(pb) != 1)):
        return None
    holes = (va,) if time_key is None else (va, tb)
    fixed = bytearray(item)
    for h in holes:
        fixed[h: h + 8] = bytes(8)
    return _Layout(len(item), va, tb, bytes(fixed), holes)


def _msgpack_columns(doc: list[Any], n: int, value_key: str, time_key: str | None
                     ) -> tuple[FloatArray | None, FloatArray] | None:
    """The time and value columns of parsed structs, read out of their MessagePack encoding
    (see :data:`MSGPACK_COLUMNS`); None when the encoding is not laid out as expected."""
    lay = _msgpack_layout(value_key, time_key)
    if lay is None:
        return None
    enc = _MSGPACK.encode(doc)
    head = 1 if n < 16 else (3 if n < 65536 else 5)
    if len(enc) != head + n * lay.item:
        return None
    first = bytearray(enc[head: head + lay.item])
    for h in lay.holes:
        first[h: h + 8] = bytes(8)
    if first != lay.fixed:
        return None
    values = np.ndarray((n,), _BE_F64, enc, head + lay.value, (lay.item,)).astype(np.float64)
    if lay.time < 0:
        return None, values
    return np.ndarray((n,), _BE_F64, enc, head + lay.time, (lay.item,)).astype(np.float64), values


def _count_colons(payload: bytes) -> int:
    """``payload.count(b":")``, counted by numpy: bytes.count scans a byte at a time, a
    comparison over the bytes as uint8 runs in vector instructions (about 3 against 8
    microseconds on the daemon benchmark's 9.6 kB arrays)."""
    return int(np.count_nonzero(np.frombuffer(payload, np.uint8) == 0x3A))


@functools.lru_cache(maxsize=64)
def _column_decoders(value_key: str, time_key: str | None) -> tuple[Any, Any, int] | None:
    """msgspec decoders of a JSON array of objects holding a number at ``value_key``
    (field ``a``) and at ``time_key`` (field ``b``): one that refuses any other key, one
    that skips other keys; and the colons an object of the first kind holds.

    msgspec takes a JSON integer for a float field as ``float()`` does (correctly
    rounded), refuses true/false, null, text, objects and lists there, and refuses
    numbers beyond the float range: exactly the values :func:`_value` and
    :func:`_epoch` take as numbers.  On the daemon benchmark's 260-sample arrays it
    parsed in 28 microseconds, against 60 for orjson's parse into dicts.
    """
    if time_key == value_key:
        return None
    fields: list[tuple[str, type]] = [("a", float)]
    rename = {"a": value_key}
    if time_key is not None:
        fields.append(("b", float))
        rename["b"] = time_key
    out = []
    for forbid in (True, False):
        sample = msgspec.defstruct("Sample", fields, rename=rename, gc=False, forbid_unknown_fields=forbid)
        out.append(msgspec.json.Decoder(list[sample]))  # type: ignore[valid-type]
    return out[0], out[1], sum(1 + key.count(":") for key in rename.values())


class _SenmlRecord(msgspec.Struct, forbid_unknown_fields=True, gc=False):
    """A SenML record the fast path takes: a numeric value, and nothing it does not
    resolve itself (no vs/vb/vd/s/bs, no unknown or must-understand label)."""

    v: float
    n: str | msgspec.UnsetType = msgspec.UNSET
    t: float | msgspec.UnsetType = msgspec.UNSET
    u: str | msgspec.UnsetType = msgspec.UNSET
    bn: str | msgspec.UnsetType = msgspec.UNSET
    bt: float | msgspec.UnsetType = msgspec.UNSET
    bu: str | msgspec.UnsetType = msgspec.UNSET
    bv: float | msgspec.UnsetType = msgspec.UNSET
    bver: int | msgspec.UnsetType = msgspec.UNSET


_SENML_PACK = msgspec.json.Decoder(list[_SenmlRecord])


class _SenmlLater(msgspec.Struct, forbid_unknown_fields=True, gc=False):
    """A record after the first that the fast path takes: a numeric value and ``n``, ``t``,
    ``u`` only (a base field after the first record leaves the pack to the usual path)."""

    v: float
    n: str | msgspec.UnsetType = msgspec.UNSET
    t: float | msgspec.UnsetType = msgspec.UNSET
    u: str | msgspec.UnsetType = msgspec.UNSET


_SENML_LATER = msgspec.json.Decoder(list[_SenmlLater])
_JSON_SPACE = b" \t\r\n"


def _senml_records(payload: bytes) -> list[Any] | None:
    """The records of a pack (``[`` first, ``]`` last) as :data:`_SENML_PACK` parses them, the
    first as a :class:`_SenmlRecord` and the others as :class:`_SenmlLater` (four fields to
    fill instead of nine, about a tenth of the parse); None when either part does not parse
    (then the whole pack is parsed as one, as before).

    The first ``}`` ends the first record unless it stands in a string, and then the first
    part ends inside that string and does not parse."""
    end = payload.find(b"}") + 1
    if end == 0:
        return None
    rest = payload[end:].lstrip(_JSON_SPACE)
    try:
        first = _SENML_PACK.decode(payload[:end] + b"]")
        if len(first) != 1:
            return None
        if rest == b"]":
            return first
        if rest[:1] != b",":
            return None
        later = _SENML_LATER.decode(b"[" + rest[1:])
    except msgspec.MsgspecError:
        return None
    # ("[{...},]" would give none: a trailing comma, which the whole parse refuses)
    return first + later if later else None


#: :func:`_senml_columns` parses the first record apart from the others (which have four
#: fields to fill, :func:`_senml_records`), leaves out the columns of fields no record has
#: (a quoted key the payload's text does not hold), reads the others with list
#: comprehensions, counts the colons with numpy and takes the times whole when they are all
#: absolute (False: the whole pack as one kind of record, every column by
#: ``map(attrgetter)``, ``bytes.count`` and ``np.where`` over each sum, the reference).  The
#: same columns, names, units and order bit for bit (tests/daemon/test_decode_senml_lean.py).
#: ``_senml_columns`` on packs of 260 records as bench_rounds.py sends them (base name, time
#: and unit in the first record, ``n``, ``t``, ``v`` in each): 996,000 instructions a pack
#: against 1,250,000 (callgrind, 2026-12-05), of which msgspec's parses about 540,000.
LEAN_SENML = True

_GET_N = operator.attrgetter("n")
_GET_T = operator.attrgetter("t")
_GET_U = operator.attrgetter("u")
_GET_V = operator.attrgetter("v")
_UNSET: Any = msgspec.UNSET


def _senml_columns(payload: bytes, now: float, max_items: int, max_depth: int) -> SenmlColumns | None:
    """A SenML pack as columns when :func:`decode` would give exactly its readings and no
    problem; None otherwise (then it decodes as usual).

    Taken: records of scalar fields only (so nothing nests), no backslash, base fields
    in the first record only, every record with a numeric ``v`` and nothing but ``n``,
    ``t``, ``u`` beside it, names that pass RFC 8428 section 4.5.1, one unit per name,
    finite sums.  The colons tell the rest.  With no backslash a key has one spelling,
    and the payload's colons are one per key it holds plus those inside its text values.
    They are counted against the keys of the parsed records (the first record's base
    fields, and ``v``, ``n``, ``t``, ``u`` of each) and the colons of their names and
    units: a key held twice in a record (the parse keeps one), or a base field in a
    later record, adds at least one colon more.
    """
    if max_depth < 2 or payload[-1] != 0x5D or b"\\" in payload:
        return None
    recs = _senml_records(payload) if LEAN_SENML else None
    if recs is None:
        try:
            recs = _SENML_PACK.decode(payload)
        except msgspec.MsgspecError:
            return None
    n = len(recs)
    if n == 0 or n > max_items:
        return None
    head: Any = recs[0]  # (its fields are narrowed by "is _UNSET", which mypy does not follow)
    n_col: list[Any]
    t_col: list[Any] | None
    u_col: list[Any] | None
    if LEAN_SENML:
        # With no backslash a key has one spelling, so a pack whose text holds no quoted
        # "t" (or "u", "n") has no record with that field: each is UNSET.  A list
        # comprehension reads a field of the structs in about half the instructions of
        # list(map(attrgetter)).
        n_col = [r.n for r in recs] if b'"n"' in payload else [_UNSET] * n
        t_col = [r.t for r in recs] if b'"t"' in payload else None
        u_col = [r.u for r in recs] if b'"u"' in payload else None
    else:
        n_col = list(map(_GET_N, recs))
        t_col = list(map(_GET_T, recs))
        u_col = list(map(_GET_U, recs))
    n0 = n_col[0]
    if n_col.count(n0) == n:  # one name (a sensor's series): no comparison with UNSET per record
        firsts: dict[Any, None] = {n0: None}
        n_unset = n if n0 is _UNSET else 0
        n_colons = 0 if n_unset else n * n0.count(":")
    else:
        firsts = dict.fromkeys(n_col)
        n_unset = n_col.count(_UNSET)
        n_colons = "".join([x for x in n_col if x is not _UNSET] if n_unset else n_col).count(":")
    if t_col is None:  # no record has a time: each is 0 (RFC 8428 section 4.5.3)
        t = np.zeros(n, dtype=np.float64)
        t_unset = n
    else:
        try:
            # refuses UNSET: then the records without t are 0
            t = _column(t_col, n) if PACKED_COLUMNS else np.array(t_col, dtype=np.float64)
            t_unset = 0
        except (TypeError, struct.error):
            t_unset = t_col.count(_UNSET)
            t = np.array([0.0 if x is _UNSET else x for x in t_col], dtype=np.float64)
    u_unset = n if u_col is None else u_col.count(_UNSET)
    base = [head.bn, head.bt, head.bu, head.bv, head.bver]
    texts = [x for x in (head.bn, head.bu) if x is not _UNSET]
    fields = 4 * n - n_unset - t_unset - u_unset + 5 - base.count(_UNSET)
    colons = fields + sum(x.count(":") for x in texts) + n_colons
    if u_unset < n:
        assert u_col is not None
        colons += "".join([x for x in u_col if x is not _UNSET] if u_unset else u_col).count(":")
    if (_count_colons(payload) if LEAN_SENML else payload.count(b":")) != colons:
        return None
    bver = head.bver
    if bver is not _UNSET and not 1 <= bver <= _SENML_VERSION:
        return None
    bn = "" if head.bn is _UNSET else head.bn
    bu = None if head.bu is _UNSET else head.bu
    bv = 0.0 if head.bv is _UNSET else head.bv
    bt = 0.0 if head.bt is _UNSET else head.bt
    names = [bn + ("" if key is _UNSET else key) for key in firsts]
    if not all(name and _SENML_NAME.fullmatch(name) for name in names):
        return None
    if u_col is None or u_unset == n:
        units: list[str | None] = [bu] * len(names)
    else:
        per: dict[Any, Any] = {}
        for key, unit in zip(n_col, u_col):
            unit = bu if unit is _UNSET else unit
            if per.setdefault(key, unit) != unit:
                return None
        units = [per[key] for key in firsts]
    with np.errstate(over="ignore"):  # a sum past the float range is inf, refused below
        values = (_column([r.v for r in recs], n) if PACKED_COLUMNS
                  else np.fromiter(map(_GET_V, recs), np.float64, n)) + bv
        total = bt + t
    if LEAN_SENML:
        # Every sum finite: a NaN makes the largest NaN, an infinity the largest or the
        # smallest infinite.  A pack whose sums are all absolute seconds (or all epoch
        # milliseconds) takes them whole: what np.where would pick element by element.
        top = float(np.maximum.reduce(total))
        low = float(np.minimum.reduce(total))
        if (not (np.logical_and.reduce(np.isfinite(values)) and math.isfinite(top) and math.isfinite(low))
                or top > _RAW_TIME_MAX):
            return None
        if low >= _RELATIVE_LIMIT and top <= _MS_THRESHOLD:
            times = total
        elif low > _MS_THRESHOLD:
            times = total / 1000.0
        else:
            times = np.where(total < _RELATIVE_LIMIT, now + total,
                             np.where(total > _MS_THRESHOLD, total / 1000.0, total))
    else:
        if (not (np.isfinite(values).all() and np.isfinite(total).all())
                or float(np.maximum.reduce(total)) > _RAW_TIME_MAX):
            return None
        times = np.where(total < _RELATIVE_LIMIT, now + total,
                         np.where(total > _MS_THRESHOLD, total / 1000.0, total))
    if float(np.minimum.reduce(times)) < _TIME_MIN:  # the usual path names each such time
        return None
    if len(names) == 1:
        return SenmlColumns(names, units, [times], [values], np.zeros(n, dtype=np.intp))
    code = {key: j for j, key in enumerate(firsts)}
    order = np.array([code[key] for key in n_col], dtype=np.intp)
    picks = [order == j for j in range(len(names))]
    return SenmlColumns(names, units, [times[m] for m in picks], [values[m] for m in picks], order)


def _joined_objects(payloads: Sequence[bytes | bytearray], max_bytes: int,
                    keys: tuple[bytes, ...] = ()) -> list[Any] | None:
    """The payloads parsed as one JSON array when each is a flat object in which no watched
    key may appear twice (``keys``, see :func:`_may_repeat`); None otherwise."""
    for p in payloads:
        if (type(p) is not bytes or not p or p[0] != 0x7B or p[-1] != 0x7D or len(p) > max_bytes
                or b"[" in p or _may_repeat(p, keys)):
            return None
    joined = b",".join(payloads)
    if joined.count(b"{") != len(payloads):
        return None
    long_digits = _LONG_DIGITS.search(joined)
    doc = _NOT_FAST if long_digits else _fast_loads(b"[" + joined + b"]")
    if doc is _NOT_FAST:
        decoder = _JSON if long_digits else _JSON_PLAIN_INTS
        try:
            doc = decoder.decode("[" + joined.decode("utf-8") + "]")
        except (ValueError, RecursionError):  # UnicodeDecodeError is a ValueError
            return None
    if not isinstance(doc, list) or len(doc) != len(payloads) or not all(type(d) is dict for d in doc):
        return None
    return doc


def _json_error(exc: ValueError) -> str:
    if isinstance(exc, json.JSONDecodeError):
        return f"{exc.msg} at line {exc.lineno} column {exc.colno}"
    text = str(exc)
    return text if len(text) <= 80 else text[:77] + "..."


def _number_text(text: str) -> float:
    s = text.strip()
    m = _NONFINITE.fullmatch(s)
    if m:
        raise _Reject("nan" if m.group(1) else "infinite", f"the payload is {_show(s)[1:-1]}")
    if not _NUMBER.fullmatch(s):
        raise _Reject("not_a_number", f"the payload {_show(s)} is not a number")
    value = float(s)
    if not math.isfinite(value):
        raise _Reject("infinite", f"the payload {_show(s)} is beyond the float range")
    return value


def _json_item(item: Any, where: str, in_batch: bool, value_path: str, value_parts: tuple[str, ...],
               time_path: str | None, time_parts: tuple[str, ...] | None,
               readings: list[Reading], problems: list[DecodeProblem]) -> None:
    try:
        if isinstance(item, dict):
            for path, parts in ((value_path, value_parts), (time_path, time_parts)):
                if path is not None and parts is not None and _repeats(item, path, parts):
                    raise _Reject("duplicate_key", f"{where}: the key {path!r} appears twice; "
                                  "which reading is meant cannot be told")
            raw = _lookup(item, value_path, value_parts)
            if raw is _MISSING:
                raise _Reject("no_value", f"{where}: no value at {value_path!r}")
            value = _value(raw, f"{where}: {value_path}")
            raw_time: Any = _MISSING if time_parts is None else _lookup(item, time_path or "", time_parts)
        elif isinstance(item, list) and in_batch:
            raise _Reject("not_an_object", f"{where} is a list, not an object or a number")
        else:
            value = _value(item, where)
            raw_time = _MISSING
        time: float | None = None
        if time_path is not None:
            if raw_time is _MISSING or raw_time is None:
                note = DecodeProblem("no_time", f"{where}: no time at {time_path!r}")
                readings.append(Reading(None, None, value, None))
                problems.append(note)
                return
            time = _epoch(raw_time, f"{where}: {time_path}")
        readings.append(Reading(None, time, value, None))
    except _Reject as rej:
        problems.append(DecodeProblem(rej.reason, rej.message))


class _Broken:
    """A base field set to something unusable; records relying on it are rejected."""

    __slots__ = ("message", "reason")

    def __init__(self, reason: str, message: str) -> None:
        self.reason = reason
        self.message = message


def _is_number(v: Any) -> bool:
    return (isinstance(v, (int, float)) and not isinstance(v, bool)) or isinstance(v, _Constant)


def _senml_time(v: Any, what: str) -> float:
    if not _is_number(v):
        raise _Reject("senml_invalid", f"{what} is {_show(v)}, not a number")
    if isinstance(v, _Constant):
        raise _Reject("bad_time", f"{what} is {v.text}")
    try:
        t = float(v)
    except OverflowError:
        raise _Reject("bad_time", f"{what} is {_show(v)}, too large") from None
    if not math.isfinite(t):
        raise _Reject("bad_time", f"{what} is not finite")
    return t


def _senml_base(rec: dict[str, Any], base: dict[str, Any], where: str) -> None:
    """Apply the record's base fields to ``base``; raise the first defect after applying all."""
    first: _Reject | None = None
    for key in _SENML_BASE:
        if key not in rec:
            continue
        v = rec[key]
        try:
            if key in ("bn", "bu"):
                if not isinstance(v, str):
                    raise _Reject("senml_invalid", f"{where}: {key} is {_show(v)}, not text")
                base[key] = v
            elif key == "bt":
                base[key] = _senml_time(v, f"{where}: bt")
            elif key == "bv":
                if not _is_number(v):
                    raise _Reject("senml_invalid", f"{where}: bv is {_show(v)}, not a number")
                base[key] = _value(v, f"{where}: bv")
            elif key == "bs":
                if not _is_number(v):
                    raise _Reject("senml_invalid", f"{where}: bs is {_show(v)}, not a number")
            else:  # bver
                if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                    raise _Reject("senml_invalid", f"{where}: bver is {_show(v)}, not a positive integer")
                if v > _SENML_VERSION:
                    raise _Reject("senml_invalid",
                                  f"{where}: SenML version {_show(v)} is newer than {_SENML_VERSION}")
                base[key] = v
        except _Reject as rej:
            if key != "bs":
                base[key] = _Broken(rej.reason, f"{rej.message} (base field still in force)")
            first = first or rej
    if first is not None:
        raise first


def _base(base: dict[str, Any], key: str, where: str) -> Any:
    v = base[key]
    if isinstance(v, _Broken):
        raise _Reject(v.reason, f"{where}: relies on an earlier {v.message}")
    return v


def _senml(records: list[Any], now: float, readings: list[Reading], problems: list[DecodeProblem]) -> None:
    base: dict[str, Any] = {"bn": "", "bt": 0.0, "bu": None, "bv": 0.0, "bver": _SENML_VERSION}
    for i, rec in enumerate(records):
        where = f"record {i}"
        try:
            if not isinstance(rec, dict):
                raise _Reject("senml_invalid", f"{where} is {_show(rec)}, not an object")
            _senml_base(rec, base, where)  # its base fields still apply to the records after it
            if type(rec) is _Repeated:
                raise _Reject("duplicate_key", f"{where}: the field(s) "
                              f"{', '.join(sorted(map(repr, rec.repeated)))} appear twice")
            reading = _senml_record(rec, base, now, where)
            if reading is not None:
                readings.append(reading)
        except _Reject as rej:
            problems.append(DecodeProblem(rej.reason, rej.message))


def _senml_record(rec: dict[str, Any], base: dict[str, Any], now: float, where: str) -> Reading | None:
    _base(base, "bver", where)
    extension = next((k for k in rec if k.endswith("_")), None)
    if extension is not None:
        raise _Reject("senml_invalid", f"{where}: must-understand field {_show(extension)} is not supported")
    if not any(k in rec for k in _SENML_REGULAR):
        if any(k in rec for k in _SENML_BASE):
            return None  # base fields only: sets bases for the records after it
        raise _Reject("senml_invalid", f"{where} has no SenML fields")
    present = [k for k in _SENML_VALUES if k in rec]
    if len(present) > 1:
        raise _Reject("senml_invalid", f"{where} has more than one value field ({', '.join(present)})")
    if not present:
        if "s" in rec:
            return None  # sum only: not a level reading
        raise _Reject("senml_invalid", f"{where} has no value field (v, vs, vb, vd or s)")

    n = rec.get("n", "")
    if not isinstance(n, str):
        raise _Reject("senml_invalid", f"{where}: n is {_show(n)}, not text")
    name = _base(base, "bn", where) + n
    if not name:
        raise _Reject("senml_invalid", f"{where} has no name (neither bn nor n)")
    if not _SENML_NAME.fullmatch(name):
        raise _Reject("senml_invalid", f"{where}: name {_show(name)} breaks RFC 8428 section 4.5.1")

    unit = rec.get("u", _MISSING)
    if unit is _MISSING:
        unit = _base(base, "bu", where)
    elif not isinstance(unit, str):
        raise _Reject("senml_invalid", f"{where}: u is {_show(unit)}, not text")

    key = present[0]
    if key != "v":
        kind = {"vs": "a string", "vb": "a boolean", "vd": "a data"}[key]
        raise _Reject("not_a_number", f"{where} ({name}) has {kind} value ({key}), not a number")
    value = _value(rec["v"], f"{where}: v") + _base(base, "bv", where)
    if not math.isfinite(value):
        raise _Reject("infinite", f"{where}: bv + v overflows")

    t = _senml_time(rec["t"], f"{where}: t") if "t" in rec else 0.0
    total = _base(base, "bt", where) + t
    if not math.isfinite(total):
        raise _Reject("bad_time", f"{where}: bt + t overflows")
    if total < _RELATIVE_LIMIT:
        time = now + total
        if time < _TIME_MIN:
            raise _Reject("bad_time", f"{where}: time is {total:.17g} s from now, {_BEFORE_1}")
    else:
        time = _finite_time(total, f"{where}: time")
    return Reading(name, time, value, unit)


_MAX_STREAM = 256
_HASH_HEX = 12
#: Most topic levels in a stream name.  Mosquitto disconnects a client that
#: publishes to a topic of more than 201 levels (measured with Mosquitto
#: 2.0.11), and alerts go to ``<prefix>/alerts/<stream>``; with the prefix
#: held to :data:`MAX_PREFIX_LEVELS` the alert topic stays well inside it.
MAX_STREAM_LEVELS = 100
#: Most levels in ``alerts.topic_prefix`` (checked by the configuration).
MAX_PREFIX_LEVELS = 32


def _unsafe_class() -> str:
    # C0/C1 controls (NUL included), MQTT wildcards, line/paragraph
    # separators, bidirectional controls, surrogates and noncharacters.
    parts = ["\x00-\x1f\x7f-\x9f+#\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069",
             "\ud800-\udfff\ufdd0-\ufdef"]
    parts += [chr(plane * 0x10000 + 0xFFFE) + chr(plane * 0x10000 + 0xFFFF) for plane in range(17)]
    return "[" + "".join(parts) + "]"


_UNSAFE = re.compile(_unsafe_class())


def readable_senml_name(name: str) -> str:
    """The part of a stream name that a SenML name gives: the name, read as levels when it is a URN.

    RFC 8428 names are often URNs built from the base name (section 4.5.1
    recommends globally unique names, e.g. ``urn:dev:ow:10e2073a01080063:``
    followed by ``temp``).  A name that starts with ``urn:`` loses ``urn:``
    and its namespace (the text up to the next ``:``), and each further
    ``:`` becomes a topic level ``/``; a trailing ``:`` is dropped.  Any other
    name is kept as it is.  Distinct names stay distinct unless they differ
    only in the namespace or in ``:`` against ``/``.

    Examples
    --------
    >>> readable_senml_name("urn:brackenfield:l4:filler:fill_volume")
    'l4/filler/fill_volume'
    >>> readable_senml_name("urn:dev:ow:10e2073a01080063:temp")
    'ow/10e2073a01080063/temp'
    >>> readable_senml_name("oven2:zone3"), readable_senml_name("zone3")
    ('oven2:zone3', 'zone3')
    >>> readable_senml_name("urn:dev:")
    'urn:dev:'
    """
    if name[:4].lower() != "urn:":
        return name
    _, sep, rest = name[4:].partition(":")
    readable = rest.replace(":", "/").strip("/")
    return readable if sep and readable else name


def stream_name(topic: str, name: str | None) -> str:
    """The stream a reading belongs to: ``topic``, or ``topic/name`` for SenML names.

    A SenML name that is a URN is read as levels first
    (:func:`readable_senml_name`): ``urn:brackenfield:l4:filler:fill_volume`` on
    the topic ``brackenfield/l4/senml`` gives the stream
    ``brackenfield/l4/senml/l4/filler/fill_volume``.

    The result is used both as a suffix of MQTT topic levels (alerts are
    published under it) and as a Prometheus label value, so it is made safe
    for both: MQTT wildcards ``+`` and ``#``, NUL and other control
    characters (C0, C1, line and paragraph separators, bidirectional
    controls), lone surrogates and noncharacters become ``_`` (Mosquitto
    disconnects a client that publishes a topic holding any of them), the
    ``/`` after the 100th level becomes ``_`` (Mosquitto also refuses topics
    of more than about 200 levels), and the result has at most 256
    characters.  When anything had to change (a replaced character, an empty
    name, a cut), ``~`` and the first 12 hex digits of the SHA-256 of the
    original text are appended, so distinct inputs keep distinct names.
    Safe names of at most 256 characters and 100 levels are returned as they
    are.  Other text (``..``, spaces, quotes, backslashes, ``$``) is kept: it
    means nothing special in an MQTT topic level, and the metrics endpoint
    escapes it in label values.

    Parameters
    ----------
    topic : str
        The MQTT topic the message arrived on.
    name : str or None
        The reading's resolved SenML name, or None.

    Returns
    -------
    str
        The stream name.

    Examples
    --------
    >>> stream_name("brackenfield/filler3/fill_g", None)
    'brackenfield/filler3/fill_g'
    >>> stream_name("brackenfield/oven2", "zone1:temp")
    'brackenfield/oven2/zone1:temp'
    >>> stream_name("brackenfield/capper1", "torque\\x00#")
    'brackenfield/capper1/torque__~554664185411'
    >>> len(stream_name("brackenfield/" + "x" * 1000, None))
    256
    >>> stream_name("brackenfield" + "/x" * 120, None).count("/")
    99
    """
    raw = topic if name is None else f"{topic}/{readable_senml_name(name)}"
    safe = _UNSAFE.sub("_", raw)
    if safe.count("/") >= MAX_STREAM_LEVELS:
        levels = safe.split("/")
        keep = MAX_STREAM_LEVELS - 1
        safe = "/".join(levels[:keep]) + "/" + "_".join(levels[keep:])
    if raw and safe == raw and len(raw) <= _MAX_STREAM:
        return raw
    digest = hashlib.sha256(raw.encode("utf-8", "surrogatepass")).hexdigest()[:_HASH_HEX]
    suffix = "~" + digest
    return (safe or "_")[: _MAX_STREAM - len(suffix)] + suffix
