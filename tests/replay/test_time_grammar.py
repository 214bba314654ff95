"""Which texts replay reads as a moment: RFC 3339's date-time, and no other ISO 8601 form.

Replay read times with ``datetime.fromisoformat``, which takes many forms of ISO 8601 that
are not RFC 3339 and that nobody would expect to be read as a moment: a date alone (read as
midnight), the basic form (``20260302T060000``), week dates (``2026-W10-1``), hours only
(``2026-03-02T06``), no seconds, a decimal comma, an offset without its colon or with
seconds, any character between date and time.  numpy's parser, on the column-wise path,
took hours only and a space before the ``Z``.

Reference: RFC 3339 (Date and Time on the Internet: Timestamps), section 5.6, its ABNF
transcribed rule by rule below (``RFC3339_DATE_TIME``), with the readings its text allows
and the README documents:

- section 5.6, the NOTE under the grammar: the ``T`` may be a space ("for the sake of
  readability"), and ``T`` and ``Z`` may be lower case;
- ``time-second`` 00-60 "based on leap second rules": second 60 is read as the next
  second, as POSIX counts it (IEEE Std 1003.1, Base Definitions 4.16, "Seconds Since the
  Epoch", the formula ``calendar.timegm`` computes);
- a time without ``time-offset`` (RFC 3339's ``partial-time`` after a ``full-date``) only
  when ``--timezone`` names the zone (ISO 8601's local time), here UTC;
- a ``time-secfrac`` of more than six digits is read to the microsecond, cut, not rounded
  (the resolution of Python's ``datetime``, which the daemon's decoder uses too);
- the year 0000, which ``date-fullyear`` allows, is no year of the proleptic Gregorian
  calendar Python counts from the year 1, and is refused, as is a time past 9999-12-31
  after its offset.

The daemon's decoder (``shiftwatch.decode``) and the floor commands read a time by the same
grammar (``timefmt.parse_rfc3339``); they refuse one without an offset (an MQTT payload has
no ``--timezone``), and are held here to the reference read without a zone.  Demo data: the invented Brackenfield plant.
"""

from __future__ import annotations

import calendar
import re
from datetime import UTC
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from shiftwatch import decode, sources
from shiftwatch.sources import TIME_MAX, TIME_MIN, TimeTextError, parse_time

from .history import T0, one_batch_records, printed_records, readings, stdlib_long, write_long

# RFC 3339 section 5.6 (ABNF of RFC 5234: DIGIT is 0-9 only), rule by rule.
DIGIT = "[0-9]"
DATE_FULLYEAR = f"{DIGIT}{{4}}"
DATE_MONTH = f"{DIGIT}{{2}}"  # 01-12
DATE_MDAY = f"{DIGIT}{{2}}"  # 01-28, 01-29, 01-30, 01-31 based on month/year
TIME_HOUR = f"{DIGIT}{{2}}"  # 00-23
TIME_MINUTE = f"{DIGIT}{{2}}"  # 00-59
TIME_SECOND = f"{DIGIT}{{2}}"  # 00-58, 00-59, 00-60 based on leap second rules
TIME_SECFRAC = rf"\.{DIGIT}+"
TIME_NUMOFFSET = f"[+-]{TIME_HOUR}:{TIME_MINUTE}"
TIME_OFFSET = f"[Zz]|{TIME_NUMOFFSET}"  # "Z" / time-numoffset; 'z' by the NOTE
PARTIAL_TIME = f"({TIME_HOUR}):({TIME_MINUTE}):({TIME_SECOND})({TIME_SECFRAC})?"
FULL_DATE = f"({DATE_FULLYEAR})-({DATE_MONTH})-({DATE_MDAY})"
#: date-time = full-date "T" full-time; 'T' may be 't' or a space (the NOTE); the offset may
#: be left out only where the zone is given (README: --timezone).
RFC3339_DATE_TIME = re.compile(f"{FULL_DATE}[Tt ]{PARTIAL_TIME}({TIME_OFFSET})?")


def reference(text: str, zone_given: bool) -> float | None:
    """Epoch seconds of an RFC 3339 date-time by the rules above, or None where it is none."""
    t = unbounded(text, zone_given)
    return t if t is not None and TIME_MIN <= t <= TIME_MAX else None


def unbounded(text: str, zone_given: bool) -> float | None:
    """As :func:`reference`, without the range of years a record can be written at."""
    m = RFC3339_DATE_TIME.fullmatch(text.strip())
    if m is None:
        return None
    y, mo, d, h, mi, s = (int(g) for g in m.groups()[:6])
    frac, offset = m.group(7), m.group(8)
    if not (1 <= mo <= 12 and h <= 23 and mi <= 59 and s <= 60 and y >= 1):
        return None
    if not 1 <= d <= calendar.monthrange(y, mo)[1]:
        return None
    if offset is None and not zone_given:
        return None
    shift = 0
    if offset is not None and offset not in "Zz":
        oh, om = int(offset[1:3]), int(offset[4:6])
        if oh > 23 or om > 59:
            return None
        shift = (oh * 3600 + om * 60) * (1 if offset[0] == "+" else -1)
    whole = calendar.timegm((y, mo, d, h, mi, s, 0, 0, 0)) - shift
    micro = int((frac or ".")[1:7].ljust(6, "0"))
    return (whole * 10**6 + micro) / 10**6


def _same(got: float, want: float, text: str) -> bool:
    # A leap second is read as second 59 plus one second: the sum may differ from the
    # reference's single division in the last bit, so there a microsecond is allowed.
    if re.search(r":60(?=[.Zz+ -]|$)", text.strip()):
        return abs(got - want) <= 1e-6
    return got == want


#: ISO 8601 forms that are not RFC 3339, each of the instant 2026-03-02T06:MM:SSZ of its row
#: (row k of the file below is T0 + k seconds), so that read as a moment it would go unnoticed.
NOT_RFC3339 = {
    0: "2026-03-02",                    # a date alone (ISO 8601 calendar date, no time)
    60: "2026-03-02T06:01Z",            # no seconds
    100: "20260302T060140Z",            # ISO 8601 basic form
    120: "2026-03-02T06:02:00,000Z",    # a decimal comma
    180: "2026-W10-1T06:03:00Z",        # an ISO 8601 week date
    240: "2026-03-02T06:04:00+0000",    # an offset without its colon
    300: "2026-03-02T06:05:00+00",      # an offset of hours only
    360: "2026-03-02T05:06:00-00:60",   # an offset's minute past 59 (time-minute 00-59)
    420: "2026-03-02_06:07:00Z",        # another character for the T
    480: "2026-03-02T06:08:00 Z",       # a space before the Z
    3600: "2026-03-02T07Z",             # hours only
}


def test_iso_8601_forms_that_are_not_rfc3339_are_refused_by_parse_time_and_the_decoder() -> None:
    for text in NOT_RFC3339.values():
        assert reference(text, zone_given=True) is None, text  # RFC 3339 section 5.6
        with pytest.raises((TimeTextError, ValueError)):
            parse_time(text, UTC)
        with pytest.raises(decode._Reject):
            decode._rfc3339(text, "time")


def test_replay_names_each_time_that_is_not_rfc3339_and_reads_the_rest(cli, tmp_path: Path) -> None:
    name = "brackenfield/line2/filler/head1/fill"
    data = readings(4000, [name])
    t, v = data[name]
    stamps = [sources_format(float(x)) for x in t]
    for row, text in NOT_RFC3339.items():
        assert sources_format(T0 + row) == stamps[row]
        stamps[row] = f'"{text}"' if "," in text else text  # quoted, as a CSV writer quotes a comma
    path = write_long(tmp_path / "mixed.csv", data, stamps=stamps)
    keep = [i for i in range(t.shape[0]) if i not in NOT_RFC3339]
    clean = write_long(tmp_path / "clean.csv", {name: (t[keep], v[keep])})
    got = cli("replay", str(path))
    assert got.returncode == 1, got.stderr  # rows with problems: replay's exit status 1
    for row, text in NOT_RFC3339.items():
        line = row + 2  # the header is line 1
        assert f"{path}:{line}: time {text!r} is not RFC 3339, epoch seconds or epoch milliseconds" in got.stderr, (
            text, got.stderr)
    assert "replayed 4000 rows in 1 stream(s)" in got.stderr, got.stderr
    assert f"; {len(NOT_RFC3339)} unreadable row(s) or cell(s) skipped\n" in got.stderr, got.stderr
    series, bad = stdlib_long(clean)
    assert bad == []
    assert printed_records(got.stdout) == one_batch_records(series)
    assert len(printed_records(got.stdout)) >= 2


def test_a_parquet_text_time_column_is_held_to_the_same_grammar(cli, tmp_path: Path) -> None:
    name = "brackenfield/line2/capper/torque"
    data = readings(4000, [name])
    t, v = data[name]
    stamps = [sources_format(float(x)) for x in t]
    for row, text in NOT_RFC3339.items():
        stamps[row] = text
    path = tmp_path / "mixed.parquet"
    pq.write_table(pa.table({"time": stamps, "stream": [name] * len(stamps), "value": v}), path)
    keep = [i for i in range(t.shape[0]) if i not in NOT_RFC3339]
    clean = write_long(tmp_path / "clean.csv", {name: (t[keep], v[keep])})
    got = cli("replay", str(path))
    assert got.returncode == 1, got.stderr
    for row, text in NOT_RFC3339.items():
        assert (f"{path}: row group 0, row {row}, column time: time {text!r} is not RFC 3339, epoch seconds "
                "or epoch milliseconds") in got.stderr, (text, got.stderr)
    series, _ = stdlib_long(clean)
    assert printed_records(got.stdout) == one_batch_records(series)


def sources_format(t: float) -> str:
    from shiftwatch.core.timefmt import format_time

    return format_time(t)


# ---------------------------------------------------------------------------
# Every path held to the grammar and to each other, on texts near RFC 3339.

def _field(valid: tuple[int, int], edge: tuple[int, int]) -> st.SearchStrategy[int]:
    return st.one_of(st.integers(*valid), st.integers(*valid), st.integers(*edge))


#: ISO 8601 forms and slips that turn an RFC 3339 time into something else.
VARIANTS = ["as is", "as is", "as is", "as is", "date alone", "no seconds", "basic form", "hours only",
            "decimal comma", "offset without colon", "offset hours only", "offset with seconds", "underscore",
            "space before offset", "signed year", "drop a character", "add a character"]


@st.composite
def near_rfc3339(draw: st.DrawFn) -> str:
    """An RFC 3339 time from its fields (some out of their ranges), as it is or turned into
    one of the ISO 8601 variants and slips around it."""
    y = draw(st.one_of(st.integers(1970, 2100), st.integers(0, 9999), st.sampled_from([0, 1, 9999])))
    mo, d = draw(_field((1, 12), (0, 13))), draw(_field((1, 28), (0, 32)))
    h, mi, sec = draw(_field((0, 23), (0, 24))), draw(_field((0, 59), (0, 60))), draw(_field((0, 59), (58, 61)))
    frac = draw(st.one_of(st.just(""), st.text("0123456789", min_size=1, max_size=10).map("." .__add__)))
    offset = draw(st.one_of(st.sampled_from(["Z", "z", ""]), st.builds(
        "{}{:02d}:{:02d}".format, st.sampled_from("+-"), _field((0, 23), (0, 24)), _field((0, 59), (0, 60)))))
    sep = draw(st.sampled_from(["T", "t", " "]))
    date, clock = f"{y:04d}-{mo:02d}-{d:02d}", f"{h:02d}:{mi:02d}:{sec:02d}"
    text = f"{date}{sep}{clock}{frac}{offset}"
    variant = draw(st.sampled_from(VARIANTS))
    numeric = offset[:1] in ("+", "-")
    if variant == "date alone":
        text = date
    elif variant == "no seconds":
        text = f"{date}{sep}{clock[:5]}{offset}"
    elif variant == "basic form":
        text = f"{date.replace('-', '')}T{clock.replace(':', '')}{frac}{offset.replace(':', '')}"
    elif variant == "hours only":
        text = f"{date}{sep}{clock[:2]}{offset}"
    elif variant == "decimal comma" and frac:
        text = f"{date}{sep}{clock}{frac.replace('.', ',')}{offset}"
    elif variant == "offset without colon" and numeric:
        text = f"{date}{sep}{clock}{frac}{offset.replace(':', '')}"
    elif variant == "offset hours only" and numeric:
        text = f"{date}{sep}{clock}{frac}{offset[:3]}"
    elif variant == "offset with seconds" and numeric:
        text = f"{text}:30"
    elif variant == "underscore":
        text = f"{date}_{clock}{frac}{offset}"
    elif variant == "space before offset" and offset:
        text = f"{date}{sep}{clock}{frac} {offset}"
    elif variant == "signed year":
        text = "+" + text
    elif variant == "drop a character":
        k = draw(st.integers(0, len(text) - 1))
        text = text[:k] + text[k + 1:]
    elif variant == "add a character":
        k = draw(st.integers(0, len(text)))
        text = text[:k] + draw(st.sampled_from("0-:T .Z+W")) + text[k:]
    pad = draw(st.sampled_from(["", "", " "]))
    return pad + text + pad


TEXTS = st.one_of(near_rfc3339(), near_rfc3339(), near_rfc3339(), st.text("0123456789-:Tt Zz.+,W", max_size=30))


def _fast_and_slow(text: str, zone: object) -> tuple[sources.Block | None, sources.Block]:
    """The one-row file ``text,stream,1`` read column-wise (None where that path hands the
    chunk on) and row by row, as replay reads a chunk."""
    src = sources.Source(path="one.csv", kind="csv", layout="long", header=["time", "stream", "value"],
                         time_col=0, stream_col=1, value_col=2)
    data = f"{text},brackenfield/line2/oven/zone1,1\n".encode()
    pad = sources._PAD
    buf = bytearray(len(data) + 2 * pad)
    buf[pad:pad + len(data)] = data
    fast = sources._read_fast(src, buf, pad, pad + len(data), 2, 0, zone)  # type: ignore[arg-type]
    fast_block = None if fast is None else sources.Block(0, 0, fast[0], [], fast[1], len(data))
    slow = sources._slow_rows(src, 0, sources._Lines(bytearray(data), 0, len(data), None), 2,
                              zone, 0, len(data))  # type: ignore[arg-type]
    return fast_block, slow


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=TEXTS, zone_given=st.booleans())
@example(text="0001-01-01T00:00:00.1", zone_given=True)  # read as not existing in UTC, once: no microsecond there
@example(text="2026-03-02T05:06:00-00:60", zone_given=False)  # the decoder read +01:60 as +02:00
@example(text="2026-03-02T06Z", zone_given=False)  # numpy read hours alone
@example(text="0001-01-01T00:00:00.0003Z", zone_given=False)  # numpy rounded twice, far from 1970
def test_every_time_path_reads_what_rfc3339_section_5_6_allows_and_nothing_else(text: str, zone_given: bool) -> None:
    if "," in text or decode._NUMBER.fullmatch(text.strip()) or not text.strip():
        return  # a comma splits the CSV row; epoch numbers are test_number_forms.py's
    zone = UTC if zone_given else None
    want = reference(text, zone_given)
    # the row-by-row path, and parse_time under it (Parquet's text column goes through it too)
    if want is None:
        with pytest.raises((TimeTextError, ValueError, OverflowError)):
            parse_time(text, zone)
    else:
        assert _same(parse_time(text, zone), want, text), (text, parse_time(text, zone), want)
    # the batch of distinct texts of a column, with numpy's parser for the 'Z' forms
    try:
        batch: float | None = sources._parse_times([text], zone)[0]
    except (TimeTextError, ValueError, OverflowError):
        batch = None
    assert (batch is None) == (want is None), (text, batch, want)
    if want is not None and batch is not None:
        assert _same(batch, want, text), (text, batch, want)
    # the column-wise reading of a chunk and the row-by-row one, as replay reads a file
    fast, slow = _fast_and_slow(text, zone)
    if want is None:
        assert fast is None, (text, fast.parts if fast else None)
        assert len(slow.problems) == 1 and slow.problems[0].startswith("one.csv:2: time "), (text, slow.problems)
        assert slow.parts == []
    else:
        assert slow.problems == [], (text, slow.problems)
        assert _same(float(slow.parts[0][1][0]), want, text)
        if fast is not None:
            assert float(fast.parts[0][1][0]) == float(slow.parts[0][1][0]), text
    # the daemon's decoder (and the floor commands, by the same parse_rfc3339): the same grammar
    # and the same years, an offset required (a payload has no --timezone)
    try:
        daemon: float | None = decode._rfc3339(text, "time")
    except decode._Reject:
        daemon = None
    want_offset = reference(text, zone_given=False)
    assert (daemon is None) == (want_offset is None), (text, daemon, want_offset)
    if want_offset is not None and daemon is not None:
        assert _same(daemon, want_offset, text), (text, daemon, want_offset)
