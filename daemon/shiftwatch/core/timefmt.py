"""Time stamps: RFC 3339 in and out, epoch seconds inside.

The core carries every time as float seconds since the Unix epoch (UTC).
These helpers only convert; none of them reads the clock.
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime

#: RFC 3339 section 5.6's date-time ('T' may be 't' or a space, 'Z' may be 'z': its NOTE); an offset's
#: hour is 00-23 and its minute 00-59 (time-numoffset), which datetime.fromisoformat does not check
#: for the minute ("+01:60" read as +02:00).  The offset is optional here only so that replay can
#: read a file's times in its --timezone; :func:`parse_rfc3339` requires it.
RFC3339 = re.compile(
    r"(\d{4}-\d{2}-\d{2})[Tt ](\d{2}:\d{2}:\d{2}(?:\.\d+)?)([Zz]|[+-](?:[01]\d|2[0-3]):[0-5]\d)?", re.ASCII)
#: The times a record can be written at (RFC 3339 has four-digit years): from the year 1 to the
#: last millisecond of the year 9999, 9999-12-31T23:59:59.999Z, the last time a record's
#: millisecond format can write.  The one limit for text, epoch milliseconds, replay and
#: snapshots alike: ``TIME_MAX_MS`` is it in epoch milliseconds, and ``TIME_MAX`` in epoch
#: seconds is the same rational, correctly rounded (as the decoder's ms / 1000 is).
TIME_MAX_MS = 253402300799999
TIME_MIN, TIME_MAX = -62135596800.0, TIME_MAX_MS / 1000
#: What an RFC 3339 time looks like, for messages about one that is not.
RFC3339_FORM = ("an RFC 3339 time has a date, a time of day to the second and a UTC offset, as in "
                "2026-03-02T06:00:00Z or 2026-03-02 07:00:00.5+01:00")
_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(ms|s|m|min|h|d|w)?\s*$")
_UNIT_SECONDS = {"ms": 0.001, "s": 1.0, "m": 60.0, "min": 60.0, "h": 3600.0, "d": 86400.0, "w": 604800.0}


def format_time(t: float) -> str:
    """Format epoch seconds as RFC 3339 UTC with milliseconds and ``Z``.

    Examples
    --------
    >>> format_time(0.0)
    '1970-01-01T00:00:00.000Z'
    >>> format_time(1764633600.25)
    '2025-12-02T00:00:00.250Z'
    """
    ms = int(round(t * 1000.0))  # noqa: RUF046  an int whatever t is, NumPy scalars too
    sec, milli = divmod(ms, 1000)
    dt = datetime.fromtimestamp(sec, tz=UTC)
    return dt.strftime("%Y-%m-%dT%H:%M:%S") + f".{milli:03d}Z"


def parse_time(text: str | float) -> float:
    """Parse RFC 3339 / ISO 8601 text or epoch seconds into epoch seconds.

    A number (or numeric text) is taken as epoch seconds.  Text with a date is
    parsed as ISO 8601; a missing offset is taken as UTC.  Raises ``ValueError``
    with the offending text when it is neither.

    Examples
    --------
    >>> parse_time("2025-12-02T00:00:00.250Z")
    1764633600.25
    >>> parse_time("1764633600.5")
    1764633600.5
    >>> parse_time("yesterday")
    Traceback (most recent call last):
    ...
    ValueError: not an RFC 3339 time or epoch seconds: 'yesterday'
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value = float(text)
        if not math.isfinite(value):
            raise ValueError(f"time is not finite: {text!r}")
        return value
    s = str(text).strip()
    if s and (s[0].isdigit() or s[0] in "+-.") and "-" not in s[1:] and ":" not in s:
        try:
            value = float(s)
        except ValueError:
            pass
        else:
            if math.isfinite(value):
                return value
            raise ValueError(f"time is not finite: {text!r}")
    try:
        dt = datetime.fromisoformat(s[:-1] + "+00:00" if s.endswith(("Z", "z")) else s)
    except ValueError:
        raise ValueError(f"not an RFC 3339 time or epoch seconds: {text!r}") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def parse_rfc3339(text: str) -> float:
    """RFC 3339 section 5.6's date-time, with its UTC offset, as epoch seconds.

    The grammar is :data:`RFC3339` (replay reads a file's times by it too); a
    leap second (``:60``) is the second after ``:59``, as POSIX counts it.  A
    time without an offset, any other ISO 8601 form, a date that does not exist
    and a time outside the years 1 to 9999 raise ``ValueError`` saying which.

    Examples
    --------
    >>> parse_rfc3339("2026-12-05T06:00:00+01:00"), parse_rfc3339("1990-12-31t23:59:60.25z")
    (1796446800.0, 662688000.25)
    >>> parse_rfc3339("2026-12-05T06:00:00")
    Traceback (most recent call last):
    ...
    ValueError: has no UTC offset (add Z for UTC, or the offset such as +01:00)
    >>> parse_rfc3339("0001-01-01T00:30:00+01:00")
    Traceback (most recent call last):
    ...
    ValueError: is before the year 1
    """
    m = RFC3339.fullmatch(text.strip())
    if m is None:
        raise ValueError(f"is not an RFC 3339 time ({RFC3339_FORM})")
    date, clock, offset = m.groups()
    if offset is None:
        raise ValueError("has no UTC offset (add Z for UTC, or the offset such as +01:00)")
    leap = 0.0
    if clock[6:8] == "60":  # a leap second (RFC 3339 section 5.6): the next second
        clock, leap = clock[:6] + "59" + clock[8:], 1.0
    try:
        t = datetime.fromisoformat(f"{date}T{clock}{'+00:00' if offset in 'Zz' else offset}").timestamp() + leap
    except (ValueError, OverflowError):
        raise ValueError("is not a valid date and time") from None
    if t < TIME_MIN:
        raise ValueError("is before the year 1")
    if t > TIME_MAX:
        raise ValueError("is past the year 9999")
    return t


#: The forms a duration may take, shown in every error about one.
DURATION_FORMS = "a number with a unit: 250ms, 30s, 10min (or 10m), 12h, 7d or 2w"


def parse_duration(text: str | float) -> float:
    """Parse a duration such as ``7d``, ``12h``, ``30 min``, ``1.5s`` or ``250ms`` into seconds.

    The unit is required: a bare number (``7``, or the YAML number 7) is
    refused, since nobody can tell whether it meant seconds or days.  Raises
    ``ValueError`` naming the text and showing the accepted forms.

    Examples
    --------
    >>> parse_duration("7d")
    604800.0
    >>> parse_duration("250ms")
    0.25
    >>> parse_duration(7)
    Traceback (most recent call last):
    ...
    ValueError: 7 has no unit (use a number with a unit: 250ms, 30s, 10min (or 10m), 12h, 7d or 2w)
    >>> parse_duration("90")
    Traceback (most recent call last):
    ...
    ValueError: '90' has no unit (use a number with a unit: 250ms, 30s, 10min (or 10m), 12h, 7d or 2w)
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        raise ValueError(f"{text!r} has no unit (use {DURATION_FORMS})")  # noqa: TRY004  callers catch ValueError
    m = _DURATION.match(str(text))
    if not m:
        raise ValueError(f"not a duration: {text!r} (use {DURATION_FORMS})")
    if m.group(2) is None:
        raise ValueError(f"{text!r} has no unit (use {DURATION_FORMS})")
    value = float(m.group(1)) * _UNIT_SECONDS[m.group(2)]
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"duration must be positive: {text!r}")
    return value


def duration_text(seconds: float) -> str:
    """Seconds as a duration :func:`parse_duration` reads back exactly (for resolved settings).

    Examples
    --------
    >>> duration_text(604800.0), duration_text(90.0), duration_text(0.25), duration_text(600.0)
    ('7d', '90s', '250ms', '10min')
    >>> parse_duration(duration_text(1.0 / 3.0)) == 1.0 / 3.0
    True
    """
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0), ("s", 1.0)):
        n = seconds / size
        if n >= 1 and n == int(n) and int(n) * size == seconds:
            return f"{int(n)}{unit}"
    if seconds * 1000 == int(seconds * 1000):
        return f"{int(seconds * 1000)}ms"
    return f"{seconds!r}s"


def format_duration(seconds: float) -> str:
    """Render seconds in the largest unit that keeps it readable.

    Examples
    --------
    >>> format_duration(604800)
    '7 d'
    >>> format_duration(90)
    '1.5 min'
    >>> format_duration(0.25)
    '250 ms'
    """
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0), ("s", 1.0)):
        if seconds >= size:
            return f"{seconds / size:.4g} {unit}"
    return f"{seconds * 1000:.4g} ms"
