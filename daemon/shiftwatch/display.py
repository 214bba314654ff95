"""Times as people read them: in the site's time zone (``display.time_zone``), dated when not today.

Records, snapshots and every machine-read field stay RFC 3339 UTC
(:func:`shiftwatch.core.timefmt.format_time`); what is shown here goes into
alert summaries, log lines, the demo's display and the replay report.  Time
zones are IANA names read from the system's tz database through
:mod:`zoneinfo`; ``UTC`` keeps the ``Z`` of RFC 3339.
"""

from __future__ import annotations

import functools
import math
from dataclasses import replace
from datetime import UTC, datetime, tzinfo
from zoneinfo import ZoneInfo

from shiftwatch.core.records import AlertRecord
from shiftwatch.core.repeats import RepeatSpan
from shiftwatch.core.timefmt import format_duration

UTC_NAMES = frozenset(("UTC", "Etc/UTC", "Z"))


@functools.lru_cache(maxsize=16)
def zone(name: str) -> tzinfo:
    """The tzinfo of an IANA name (``UTC`` is :data:`datetime.timezone.utc`)."""
    return UTC if name in UTC_NAMES else ZoneInfo(name)


def _local(t: float, tz: str) -> datetime:
    return datetime.fromtimestamp(t, tz=zone(tz))


def _zone_suffix(dt: datetime, tz: str) -> str:
    if tz in UTC_NAMES:
        return "Z"
    return " " + (dt.tzname() or dt.strftime("%z"))


def clock(t: float, tz: str = "UTC", *, today: float | None = None) -> str:
    """A time of day in ``tz``, with the date in front when it falls on another day than ``today``.

    ``today`` is a time on the reference day (for an alert summary, the time the
    record was made, so a replay gives the same text on any day).

    Examples
    --------
    >>> clock(1772432592.0)                        # 2026-03-02 06:23:12 UTC
    '06:23:12Z'
    >>> clock(1772432592.0, today=1772432592.0 + 86400)
    '2026-03-02 06:23:12Z'
    >>> clock(1772432592.0, "Europe/Berlin")
    '07:23:12 CET'
    >>> clock(1772432592.0, "America/Chicago", today=1772432592.0)
    '00:23:12 CST'
    >>> clock(1772432592.0 - 7 * 3600, "America/Chicago", today=1772432592.0)
    '2026-03-01 17:23:12 CST'
    """
    dt = _local(t, tz)
    ref = _local(t if today is None else today, tz)
    fmt = "%H:%M:%S" if dt.date() == ref.date() else "%Y-%m-%d %H:%M:%S"
    return dt.strftime(fmt) + _zone_suffix(dt, tz)


def stamp(t: float, tz: str = "UTC") -> str:
    """RFC 3339 with milliseconds in ``tz``: its offset, or ``Z`` for UTC.

    Examples
    --------
    >>> stamp(1772432592.25)
    '2026-03-02T06:23:12.250Z'
    >>> stamp(1772432592.25, "Asia/Kolkata")
    '2026-03-02T11:53:12.250+05:30'
    """
    dt = _local(round(t * 1000) / 1000, tz)
    text = dt.isoformat(timespec="milliseconds")
    return text[:-6] + "Z" if tz in UTC_NAMES else text


def human_duration(seconds: float) -> str:
    """A duration as a person says it, to about two figures: 250 ms, 9.8 s, 1 min 38 s, 7.5 d.

    Examples
    --------
    >>> [human_duration(s) for s in (0.25, 9.84, 48.3, 98.0, 113.0, 600.0, 754.0, 7500.0, 50400.0)]
    ['250 ms', '9.8 s', '48 s', '1 min 38 s', '1 min 53 s', '10 min', '13 min', '2 h 5 min', '14 h']
    >>> [human_duration(s) for s in (86400.0, 648000.0, 2592000.0, 120 * 86400.0)]
    ['1 d', '7.5 d', '30 d', '120 d']
    """
    if seconds < 1:
        return f"{float(f'{seconds * 1000:.2g}'):g} ms"
    if seconds < 59.5:
        return f"{float(f'{seconds:.2g}'):g} s"
    if seconds < 3570:
        m, s = divmod(round(seconds), 60)
        return f"{m} min {s} s" if m < 10 and s else f"{round(seconds / 60)} min"
    if seconds < 86400 - 1800:
        h, m = divmod(round(seconds / 60), 60)
        return f"{h} h {m} min" if h < 10 and m else f"{round(seconds / 3600)} h"
    days = seconds / 86400
    return f"{float(f'{days:.2g}'):g} d" if days < 10 else f"{days:.0f} d"


def human_number(x: float, digits: int = 5) -> str:
    """A measured number to ``digits`` significant figures, without exponent for everyday sizes.

    Examples
    --------
    >>> human_number(3.0683249999999873), human_number(1097.75), human_number(-0.000123456)
    ('3.0683', '1097.8', '-0.00012346')
    """
    return f"{float(f'{x:.{digits}g}'):g}" if 1e-5 <= abs(x) < 1e15 or x == 0 else f"{x:.{digits}g}"


def zone_label(tz: str) -> str:
    """How a chart or a heading names the zone: ``UTC`` or the IANA name.

    Examples
    --------
    >>> zone_label("UTC"), zone_label("Europe/Berlin")
    ('UTC', 'Europe/Berlin')
    """
    return "UTC" if tz in UTC_NAMES else tz


def alert_summary(rec: AlertRecord, label: str | None = None, tz: str = "UTC", *,
                  today: float | None = None) -> str:
    """One line an operator reads at a glance: what stepped, by how much, when, and how soon it was seen.

    ``label`` is the operator's name of the stream (the config's ``label``);
    without it the stream name is used.  Times are shown in ``tz`` (the
    config's ``display.time_zone``, an IANA name), with the date in front
    when the time falls on another day than ``today`` (the daemon and replay
    pass the time the summary is written; by default the record's ``as_of``).

    Examples
    --------
    >>> rec = AlertRecord(id="ace7", phase="confirmed", stream="plant/line2/filler/head7/fill",
    ...     detected_at=1772432601.0, shift_at=1772432592.0, shift_at_low=1772432590.0,
    ...     shift_at_high=1772432593.0, level_before=500.03, level_after=501.83, delta=1.8,
    ...     delta_sigma=2.1, sigma=0.86, n_before=1200, n_after=60, test="multi_cusum",
    ...     statistic=1.02, threshold=1.0, as_of=1772432650.0, interval_level=0.9,
    ...     level_before_se=0.02, level_after_se=0.1, f_stat=80.0, p_value=1e-15,
    ...     direction="up", unit="g")
    >>> alert_summary(rec, "fill weight on filler 7")
    'CONFIRMED fill weight on filler 7 stepped up 1.8 g (2.1 sigma) at 06:23:12Z, detected 9 s later: 500.03 -> 501.83 g'
    >>> alert_summary(rec, "filler 7", "Europe/Berlin")
    'CONFIRMED filler 7 stepped up 1.8 g (2.1 sigma) at 07:23:12 CET, detected 9 s later: 500.03 -> 501.83 g'
    >>> alert_summary(rec, "filler 7", today=rec.as_of + 86400)[:71]
    'CONFIRMED filler 7 stepped up 1.8 g (2.1 sigma) at 2026-03-02 06:23:12Z'
    >>> from dataclasses import replace
    >>> alert_summary(replace(rec, phase="dismissed"), "filler 7")
    "DISMISSED filler 7: no lasting step found after the detection at 06:23:21Z; the level stays 500.03 g (any follow-up is for the site's procedures)"
    >>> alert_summary(replace(rec, phase="planned", plan_id="5277bb177513"), "filler 7")
    'PLANNED filler 7 stepped up 1.8 g (2.1 sigma) at 06:23:12Z, inside planned window 5277bb177513: no alarm, watching on from the new level: 500.03 -> 501.83 g'
    >>> alert_summary(rec)[:60]
    'CONFIRMED plant/line2/filler/head7/fill stepped up 1.8 g (2.'
    >>> alert_summary(replace(rec, level_after=0.0, delta=-500.03, direction="down", repeated_value=0.0,
    ...                       repeated_count=60, repeated_of=60), "filler 7")
    'CONFIRMED filler 7: 60 of the last 60 readings are one value, 0 g: a stuck sensor is possible; the level read 500.03 -> 0 g from 06:23:12Z, detected 9 s later'
    >>> alert_summary(replace(rec, phase="undecided", level_after=500.33, delta=0.3, spread_ratio=3.0,
    ...                       sigma_after=1.8), "filler 7")
    "UNDECIDED filler 7: the noise's spread grew 3 times (sigma 0.6 -> 1.8 g) after the detection at 06:23:21Z, with no clear step in level (500.03 -> 500.33 g): a loose sensor or a worn part is possible; watching on at the new spread"
    """
    unit = f" {rec.unit}" if rec.unit else ""
    who = label or rec.stream
    ref = rec.as_of if today is None else today
    verb = {"detected": "DETECTED", "confirmed": "CONFIRMED", "dismissed": "DISMISSED"}.get(
        rec.phase, rec.phase.upper())
    before, after = _levels(rec.level_before, rec.level_after, rec.delta)
    at = clock(rec.shift_at, tz, today=ref)
    if rec.gap_from is not None and rec.gap_from < rec.shift_at_low:
        # a step across a pause in the readings that ends where its interval begins (the
        # fit's split may lie a reading or two later: then the first reading is named too)
        first = "" if rec.shift_at <= rec.shift_at_low else f"or from {clock(rec.shift_at_low, tz, today=ref)}, "
        at += (f" ({first}the first reading after {human_duration(rec.shift_at_low - rec.gap_from)} without "
               f"readings, since {clock(rec.gap_from, tz, today=ref)})")
    elif rec.gap_from is not None:  # the interval holds the pause: the step may lie in it
        at += (f" (the step may lie anywhere from {clock(rec.shift_at_low, tz, today=ref)} to "
               f"{clock(rec.shift_at_high, tz, today=ref)}: the readings paused after "
               f"{clock(rec.gap_from, tz, today=ref)})")
    if rec.repeated_value is not None:  # a stuck sensor is possible: no size in sigmas
        return _stuck_summary(rec, verb, who, at, before, after, unit, tz, ref)
    if rec.spread_ratio is not None:
        if rec.phase == "undecided":
            return (f"{verb} {who}: {_spread_text(rec, unit)} after the detection at "
                    f"{clock(rec.detected_at, tz, today=ref)}, with no clear step in level ({before} -> "
                    f"{after}{unit}): a loose sensor or a worn part is possible; watching on at the new spread")
        return (f"{alert_summary(replace(rec, spread_ratio=None), label, tz, today=today)}; "
                f"{_spread_text(rec, unit).replace(' spread grew', ' spread also grew')}")
    if rec.phase == "dismissed":
        return (f"{verb} {who}: no lasting step found after the detection at "
                f"{clock(rec.detected_at, tz, today=ref)}; the level stays "
                f"{_levels(rec.level_before, rec.level_before, rec.sigma)[0]}{unit} "
                f"(any follow-up is for the site's procedures)")
    if rec.phase == "returned":
        start = "?" if rec.excursion_start is None else clock(rec.excursion_start, tz, today=ref)
        return (f"{verb} {who} went back {rec.direction} {abs(rec.delta):.3g}{unit} at "
                f"{at}, ending the excursion that began at {start}: "
                f"{before} -> {after}{unit}")
    if rec.phase == "planned":
        return (f"{verb} {who} stepped {rec.direction} {abs(rec.delta):.3g}{unit} "
                f"({sigmas_text(rec.delta_sigma)}) at {at}, inside planned "
                f"window {rec.plan_id}: no alarm, watching on from the new level: "
                f"{before} -> {after}{unit}")
    if rec.phase == "undecided":
        return (f"{verb} {who}: after {rec.n_after} samples the step detected at "
                f"{clock(rec.detected_at, tz, today=ref)} is still uncertain ({before} -> "
                f"{after}{unit}); watching on from the current level")
    return (f"{verb} {who} stepped {rec.direction} {abs(rec.delta):.3g}{unit} "
            f"({sigmas_text(rec.delta_sigma)}) at {at}, detected "
            f"{_lag_text(rec.detected_at - rec.shift_at)} later: {before} -> {after}{unit}")


def _stuck_summary(rec: AlertRecord, verb: str, who: str, at: str, before: str, after: str, unit: str,
                   tz: str, ref: float) -> str:
    """The summary of a record whose last readings repeat one value (``repeated_value``):
    it says so, and that a stuck sensor is possible, with no size in sigmas (the noise
    they measure is gone)."""
    same = (f"{rec.repeated_count} of the last {rec.repeated_of} readings are one value, "
            f"{human_number(rec.repeated_value or 0.0, 6)}{unit}")
    detected = clock(rec.detected_at, tz, today=ref)
    if rec.phase == "dismissed":
        return (f"{verb} {who}: no lasting step found after the detection at {detected}; {same}: a stuck "
                f"sensor is possible (any follow-up is for the site's procedures)")
    if rec.phase == "undecided":
        return (f"{verb} {who}: {same}: a stuck sensor is possible; the step detected at {detected} is "
                f"still uncertain ({before} -> {after}{unit}); watching on from the current level")
    if rec.phase == "planned":
        return (f"{verb} {who}: {same}: a stuck sensor is possible; inside planned window {rec.plan_id}: "
                f"no alarm; the level read {before} -> {after}{unit} from {at}")
    return (f"{verb} {who}: {same}: a stuck sensor is possible; the level read {before} -> {after}{unit} "
            f"from {at}, detected {_lag_text(rec.detected_at - rec.shift_at)} later")


def _spread_text(rec: AlertRecord, unit: str) -> str:
    """``the noise's spread grew 3 times (sigma 0.6 -> 1.8 g)``, of a record with ``spread_ratio``."""
    ratio = rec.spread_ratio or 1.0
    s_after = rec.sigma_after if rec.sigma_after is not None else math.nan
    return (f"the noise's spread grew {ratio:.2g} times (sigma {human_number(s_after / ratio, 3)} -> "
            f"{human_number(s_after, 3)}{unit})")


#: What a table (status page, replay report) shows in place of a step's size in sigmas when
#: the record's last readings repeat one value (``repeated_value``): a stuck sensor is possible.
REPEATS = "one value repeated"


def fault_text(repeated_value: float | None, spread_ratio: float | None) -> str | None:
    """What a table shows in place of a step's size in sigmas for a record that names a
    sensor fault (core/sensorcheck.py), or None for a record that names none.

    >>> fault_text(0.0, None), fault_text(None, 2.24), fault_text(None, None)
    ('one value repeated', 'spread x2.2', None)
    """
    if repeated_value is not None:
        return REPEATS
    if spread_ratio is not None:
        return f"spread x{spread_ratio:.2g}"
    return None


#: What a summary says in place of a step's size in sigmas when the readings had no noise
#: (sigma 0: the size in sigmas is infinite, ``null`` in the record's ``delta_sigma``).
NO_NOISE = "no noise to measure it in sigmas"


def sigmas_text(delta_sigma: float, *, signed: bool = False) -> str:
    """A step's size in noise sigmas for people: ``2.1 sigma`` (``+2.1 sigma`` signed), or
    :data:`NO_NOISE` when it is not finite.  Before, a step on readings without noise
    (a stuck sensor that moved) read "(inf sigma)" in the summary and "(+inf sigma)" on
    the status page.

    >>> sigmas_text(2.104), sigmas_text(-2.104, signed=True), sigmas_text(float("inf"))
    ('2.1 sigma', '-2.1 sigma', 'no noise to measure it in sigmas')
    """
    if not math.isfinite(delta_sigma):
        return NO_NOISE
    return f"{delta_sigma:+.2g} sigma" if signed else f"{abs(delta_sigma):.2g} sigma"


def _levels(a: float, b: float, scale: float) -> tuple[str, str]:
    """Two levels for a summary line: five significant figures, or, where their last
    figure would be more than a twentieth of ``scale`` (the step, or for one level its
    noise sigma), with the decimals that show ``scale`` to three figures, so that the
    two levels shown differ by the step to within 5%.  Before, a 1.2 Pa step at
    101325 Pa read "1.0133e+05 -> 1.0133e+05".

    >>> _levels(500.03, 501.83, 1.8), _levels(101325.37, 101326.59, 1.22), _levels(773.152, 773.15542, 0.00342)
    (('500.03', '501.83'), ('101325.37', '101326.59'), ('773.15200', '773.15542'))
    """
    top = max(abs(a), abs(b))
    if (math.isfinite(top) and math.isfinite(scale) and scale != 0.0 and 0.0 < top < 1e15
            and 10.0 ** (math.floor(math.log10(top)) - 4) > abs(scale) / 20.0):
        d = max(0, 2 - math.floor(math.log10(abs(scale))))
        return f"{a:.{d}f}", f"{b:.{d}f}"
    return _same_decimals(f"{a:.5g}", a, f"{b:.5g}", b)


def _decimals(text: str) -> int:
    return len(text) - text.index(".") - 1 if "." in text else 0


def _same_decimals(ta: str, a: float, tb: str, b: float) -> tuple[str, str]:
    """Two levels written with ``.5g``, a trailing zero it dropped from one put back so
    both show the same decimals ("500.02 -> 501.30"), each only as far as its own five
    significant figures reach (12345 takes no decimals from 0.5).  A level that the five
    figures round keeps their zeros ("500.00", not "500"): before, levels of 499.9951 and
    502.2031 read "500.0 -> 502.2", both a zero short, as neither could lend its decimals.

    >>> _same_decimals("500.02", 500.02, "501.3", 501.3), _same_decimals("12345", 12345.0, "0.5", 0.5)
    (('500.02', '501.30'), ('12345', '0.5'))
    >>> _same_decimals("499.98", 499.98, "0", 0.0), _same_decimals("500", 499.9951, "502.2", 502.2031)
    (('499.98', '0'), ('500.00', '502.20'))
    """
    if "e" in ta or "e" in tb or "n" in ta or "n" in tb:  # exponent form, inf or nan
        return ta, tb
    want = max(_decimals(t if float(t) == x else f"{x:#.5g}") for t, x in ((ta, a), (tb, b)))
    out = []
    for text, x in ((ta, a), (tb, b)):
        if x == 0.0:  # an exact zero (a sensor stuck at 0) gains nothing from zeros after it
            out.append(text)
            continue
        d = min(want, max(4 - math.floor(math.log10(abs(x))), 0))
        out.append(f"{x:.{d}f}" if d > _decimals(text) else text)
    return out[0], out[1]


def _lag_text(lag: float) -> str:
    """A detection delay as an operator says it: 40 ms, 1.3 s, 9 s, 2.5 min.

    Examples
    --------
    >>> _lag_text(0.008), _lag_text(0.25), _lag_text(0.9999), _lag_text(0.0)
    ('8 ms', '250 ms', '1 s', '0 s')
    """
    if 0 < lag < 0.9995:  # sub-second data: "0 s" said nothing (three figures, as format_duration)
        return f"{lag * 1000:.3g} ms"
    if lag < 10:
        return f"{max(lag, 0.0):.1f} s".replace(".0 s", " s")
    if lag < 120:
        return f"{lag:.0f} s"
    return format_duration(lag)


def repeat_text(span: RepeatSpan, who: str, unit: str | None = None, tz: str = "UTC", *,
                today: float | None = None) -> str:
    """One line for a run of one repeated reading the engine flagged (core/repeats.py):
    when it began, or, once a different reading came, when it ended.  It is a flag of the
    stream, not an alert record; shiftwatch stays advisory.

    >>> from shiftwatch.core.repeats import RepeatSpan
    >>> s = RepeatSpan(500.0, 1772432400.0, 1772432404.0, 5, None)
    >>> print(repeat_text(s, "fill weight on filler head7", "g"))
    readings of fill weight on filler head7 repeat one value, 500 g, since 06:20:00Z (5 readings by 06:20:04Z, improbable for its own noise and resolution): a stuck sensor is possible; check it by your site's procedures (advisory only)
    >>> print(repeat_text(s._replace(readings=1201, until=1772433600.0), "fill weight on filler head7", "g"))
    readings of fill weight on filler head7 vary again after 1201 readings of one value, 500 g, from 06:20:00Z to 06:40:00Z
    """
    u = f" {unit}" if unit else ""
    value = f"{human_number(span.value, 6)}{u}"
    since = clock(span.since, tz, today=today)
    if span.until is None:
        return (f"readings of {who} repeat one value, {value}, since {since} ({span.readings} readings by "
                f"{clock(span.flagged_at, tz, today=today)}, improbable for its own noise and resolution): "
                f"a stuck sensor is possible; check it by your site's procedures (advisory only)")
    return (f"readings of {who} vary again after {span.readings} readings of one value, {value}, from "
            f"{since} to {clock(span.until, tz, today=today)}")


def frozen_text(span: RepeatSpan, who: str, unit: str | None = None, tz: str = "UTC") -> str:
    """What a replay says of a run of one repeated reading the engine flagged: the stream, the
    value, from when to when (or to the end of the data), and how many readings.

    >>> from shiftwatch.core.repeats import RepeatSpan
    >>> s = RepeatSpan(500.0, 1772432400.0, 1772432404.0, 1201, 1772433600.0)
    >>> print(frozen_text(s, "fill weight on filler head7", "g"))
    fill weight on filler head7: 1201 readings repeated one value, 500 g, from 2026-03-02T06:20:00.000Z to 2026-03-02T06:40:00.000Z (improbable for its own noise from 2026-03-02T06:20:04.000Z): a stuck sensor is possible
    >>> print(frozen_text(s._replace(until=None), "head7"))
    head7: 1201 readings repeat one value, 500, from 2026-03-02T06:20:00.000Z to the end of the data (improbable for its own noise from 2026-03-02T06:20:04.000Z): a stuck sensor is possible
    """
    u = f" {unit}" if unit else ""
    end = "the end of the data" if span.until is None else stamp(span.until, tz)
    verb = "repeat" if span.until is None else "repeated"
    return (f"{who}: {span.readings} readings {verb} one value, {human_number(span.value, 6)}{u}, from "
            f"{stamp(span.since, tz)} to {end} (improbable for its own noise from {stamp(span.flagged_at, tz)}): "
            f"a stuck sensor is possible")
