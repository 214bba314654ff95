"""RFC 3339 forms that replay refused though the standard allows them.

References:
- RFC 3339 (Date and Time on the Internet: Timestamps), section 5.6, the NOTE under
  the grammar: "the 'T' and 'Z' characters in this syntax may alternatively be lower
  case 't' or 'z' respectively".
- RFC 3339 section 5.6, ``time-second = 2DIGIT ; 00-58, 00-59, 00-60 based on leap
  second rules``, and the examples of section 5.8: "1990-12-31T23:59:60Z" and
  "1990-12-31T15:59:60-08:00", the leap second at the end of 1990.
- POSIX (IEEE Std 1003.1, Base Definitions 4.16, "Seconds Since the Epoch"): the
  formula adds ``tm_sec`` as it stands, so second 60 takes the value of the next
  minute's second 0. The stdlib's ``calendar.timegm`` computes that same formula; it
  is the reference value below. The daemon's decoder reads a leap second this way.
"""

from __future__ import annotations

import calendar
import json
from pathlib import Path

import pytest

from shiftwatch import decode
from shiftwatch.sources import parse_time

from .history import readings, write_long


def _lower(text: str) -> str:
    """The same file with every time's 'T' and 'Z' in lower case (RFC 3339 section 5.6 NOTE)."""
    out = []
    for line in text.splitlines(keepends=True):
        stamp, rest = line.split(",", 1)
        if stamp[:1].isdigit():
            stamp = stamp.replace("T", "t").replace("Z", "z")
        out.append(stamp + "," + rest)
    return "".join(out)


def test_lower_case_t_and_z_read_as_upper_case(cli, tmp_path: Path) -> None:
    # Before: every row was named "is not RFC 3339" and replay exited 1 with no records.
    data = readings(1500)
    upper = write_long(tmp_path / "upper.csv", data)
    lower = tmp_path / "lower.csv"
    lower.write_text(_lower(upper.read_text()))
    assert "t" in lower.read_text().splitlines()[1].split(",")[0]
    want = cli("replay", str(upper))
    got = cli("replay", str(lower))
    assert want.returncode == 0, want.stderr
    assert got.returncode == 0, got.stderr
    assert "unreadable" not in got.stderr, got.stderr
    assert got.stdout == want.stdout and got.stdout.count("\n") >= 2
    name = next(iter(data))
    fit_lower = cli("fit", str(lower), "--stream", name, "--json")
    fit_upper = cli("fit", str(upper), "--stream", name, "--json")
    assert fit_lower.returncode == 0, fit_lower.stderr
    assert json.loads(fit_lower.stdout) == json.loads(fit_upper.stdout)


@pytest.mark.parametrize(("text", "fields"), [
    ("1990-12-31T23:59:60Z", (1990, 12, 31, 23, 59, 60)),             # RFC 3339 section 5.8
    ("1990-12-31T15:59:60-08:00", (1990, 12, 31, 23, 59, 60)),        # RFC 3339 section 5.8
    ("1990-12-31t23:59:60.250z", (1990, 12, 31, 23, 59, 60.25)),
    ("2016-12-31T23:59:60.5Z", (2016, 12, 31, 23, 59, 60.5)),         # the leap second of 2016
])
def test_a_leap_second_reads_as_posix_counts_it_and_as_the_daemon_does(text: str, fields: tuple) -> None:
    y, mo, d, h, mi, s = fields
    whole = calendar.timegm((y, mo, d, h, mi, int(s), 0, 0, 0))
    posix = whole + (s - int(s))
    assert parse_time(text) == posix
    assert decode._rfc3339(text, "time") == posix


def test_a_leap_second_in_local_time_needs_the_zone_and_reads_as_the_next_second() -> None:
    from shiftwatch.sources import TimeTextError, time_zone

    # 00:59:60 in Berlin (UTC+1 in winter) is the leap second at the end of 2016.
    got = parse_time("2017-01-01T00:59:60", time_zone("Europe/Berlin"))
    assert got == calendar.timegm((2016, 12, 31, 23, 59, 60, 0, 0, 0))
    with pytest.raises(TimeTextError, match="no UTC offset"):
        parse_time("2017-01-01T00:59:60")


def test_a_file_across_a_leap_second_is_read_and_only_the_colliding_row_set_aside(cli, tmp_path: Path) -> None:
    # A 1 Hz sensor writes ...:58, :59, :60, then 00:00:00: read as POSIX counts them, :60 and
    # the next 00:00:00 are the same instant, so one of them is set aside as not later than the
    # one before (named and counted), and every other row is read.
    rows = ["time,stream,value"]
    start = calendar.timegm((2016, 12, 31, 23, 50, 0, 0, 0, 0))
    from shiftwatch.core.timefmt import format_time

    for k in range(1200):
        t = start + k
        if t == start + 599:  # 23:59:59 -> the leap second follows
            rows.append(f"{format_time(t)},brackenfield/line2/oven/zone1,{180 + (k % 7) * 0.01:.2f}")
            rows.append(f"2016-12-31T23:59:60.000Z,brackenfield/line2/oven/zone1,{180.03:.2f}")
            continue
        rows.append(f"{format_time(t)},brackenfield/line2/oven/zone1,{180 + (k % 7) * 0.01:.2f}")
    path = tmp_path / "leap.csv"
    path.write_text("\n".join(rows) + "\n")
    got = cli("replay", str(path))
    assert "not RFC 3339" not in got.stderr and "unreadable" not in got.stderr, got.stderr
    assert "replayed 1201 rows in 1 stream(s)" in got.stderr, got.stderr
    # the row of 00:00:00 (line 603: the header, 600 rows to 23:59:59, the leap second) is the one
    # set aside, named by its line; replay exits 1 when a sample was set aside
    assert got.returncode == 1, got.stderr
    assert "samples set aside: duplicate_time 1\n" in got.stderr, got.stderr
    assert "leap.csv:603: stream brackenfield/line2/oven/zone1: time stamp repeats" in got.stderr, got.stderr
