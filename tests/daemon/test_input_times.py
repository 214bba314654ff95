"""Times the daemon takes in: a payload's time and a floor command's ``start`` / ``end``.

An outside tester's defects, reproduced before they were fixed:

- D2: a payload time before the year 1 (``-1e12`` epoch seconds, about the year -29,700) was
  taken as a sample, written into the snapshot and broke the status page of its stream (HTTP
  500, nothing logged) for good; on a stream with samples it was counted as ``duplicate_time``.
  The years a time may have are RFC 3339's: date-fullyear is 4DIGIT (RFC 3339 section 5.6),
  and the year 0000 is not a year of the Gregorian calendar as Python's ``datetime`` counts it
  (``datetime.MINYEAR`` is 1, the standard library's documentation).
- D3: a time without a UTC offset was read as UTC in a payload and in a command.  RFC 3339
  section 5.6's date-time has ``time-offset`` (``Z`` or ``+hh:mm``) as a required part; its
  section 4.4 says a time whose offset is unknown cannot be placed without ambiguity.  Replay
  refuses such a time without ``--timezone``; the decoder and the commands have no zone to use.

The epoch values below come from ``calendar.timegm`` (the standard library), never from the
code under test.
"""

from __future__ import annotations

import calendar
import json
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import pytest

from shiftwatch.broker import wait_until
from shiftwatch.core.plans import CommandError, parse_command
from shiftwatch.decode import decode, decode_many

from .faultkit import metric_matching as metric

NOW = float(calendar.timegm((2026, 12, 5, 6, 0, 0, 0, 0, 0)))
#: 0001-01-01T00:00:00Z and 9999-12-31T23:59:59Z, by calendar.timegm (the proleptic Gregorian calendar).
YEAR_1 = float(calendar.timegm((1, 1, 1, 0, 0, 0, 0, 0, 0)))
END_9999 = float(calendar.timegm((9999, 12, 31, 23, 59, 59, 0, 0, 0)))


def reasons(out: Any) -> list[str]:
    return [p.reason for p in out.problems]


# ------------------------------------------------------------------ D2: the decoder's range
@pytest.mark.parametrize("stamp, said", [
    ("-1e12", "before the year 1"),                          # the tester's payload
    (repr(YEAR_1 - 1.0), "before the year 1"),               # one second before 0001-01-01T00:00:00Z
    ('"0001-01-01T00:30:00+01:00"', "before the year 1"),    # 0000-12-31T23:30:00Z after its offset
    ('"9999-12-31T23:59:59-01:00"', "past the year 9999"),   # 10000-01-01T00:59:59Z after its offset
    ("253402300800000", "past the year 9999"),               # epoch ms of 10000-01-01T00:00:00Z
])
def test_a_payload_time_outside_the_years_1_to_9999_is_bad_time(stamp: str, said: str) -> None:
    payload = f'{{"v": 1, "ts": {stamp}}}'.encode()
    out = decode(payload, "json", value_path="v", time_path="ts", now=NOW)
    assert out.readings == [] and reasons(out) == ["bad_time"], out
    assert said in out.problems[0].message, out.problems[0].message
    # the daemon's path of many messages at once, and a JSON array read as columns
    good = f'{{"v": 2, "ts": {NOW}}}'.encode()
    many = decode_many([good, payload, good], "json", value_path="v", time_path="ts", now=[NOW] * 3)
    assert many[1].readings == [] and reasons(many[1]) == ["bad_time"], many
    assert [r.time for r in many[0].readings + many[2].readings] == [NOW, NOW]
    batch = f'[{{"v": 1, "ts": {NOW}}}, {{"v": 2, "ts": {stamp}}}]'.encode()
    cols = decode(batch, "json", value_path="v", time_path="ts", now=NOW, columns=True)
    assert cols.columns is None and [r.time for r in cols.readings] == [NOW] and reasons(cols) == ["bad_time"]


def test_the_first_and_last_seconds_of_rfc3339s_years_are_read() -> None:
    for stamp, want in (('"0001-01-01T00:00:00Z"', YEAR_1), (repr(YEAR_1), YEAR_1),
                        ('"9999-12-31T23:59:59Z"', END_9999), ('"9999-12-31T23:59:59+00:00"', END_9999)):
        out = decode(f'{{"v": 1, "ts": {stamp}}}'.encode(), "json", value_path="v", time_path="ts", now=NOW)
        assert out.problems == [] and out.readings[0].time == want, (stamp, out)


def test_a_senml_time_relative_to_now_before_the_year_1_is_bad_time() -> None:
    # RFC 8428 section 4.5.3: a time below 2**28 is relative to now; -1e12 s from now is before the year 1.
    for pack in (b'[{"n": "a", "v": 1, "t": -1e12}]', b'[{"bn": "a", "bt": -1e12, "v": 1}, {"v": 2, "t": 1}]'):
        out = decode(pack, "senml", now=NOW, columns=True)
        assert out.readings == [] and out.senml is None and set(reasons(out)) == {"bad_time"}, out
        assert "before the year 1" in out.problems[0].message


# ------------------------------------------------------------------ D3: an offset is required
@pytest.mark.parametrize("stamp", ['"2026-12-05T05:00:00"', '"2026-12-05 05:00:00.250"', '"2026-12-05t05:00:00"'])
def test_a_payload_time_without_a_utc_offset_is_bad_time(stamp: str) -> None:
    out = decode(f'{{"v": 1, "ts": {stamp}}}'.encode(), "json", value_path="v", time_path="ts", now=NOW)
    assert out.readings == [] and reasons(out) == ["bad_time"], out
    assert "no UTC offset" in out.problems[0].message


@pytest.mark.parametrize("start", ["2026-12-05T06:00:00", "2026-12-05 06:30", "2026-12-05 06:30:00",
                                   "2026-12-05T06", "2026-12-05T06:00:00+0100", "0001-01-01T00:30:00+01:00"])
def test_a_command_time_that_is_not_rfc3339_with_an_offset_is_refused(start: str) -> None:
    with pytest.raises(CommandError) as err:
        parse_command("plan", {"target": "t/json/+", "start": start, "for": "1h"}, NOW)
    assert err.value.reason == "bad_time" and "start" in str(err.value), err.value


def test_a_command_time_with_an_offset_is_read_as_rfc3339_section_5_6_says() -> None:
    # RFC 3339 section 5.8's example: 1996-12-19T16:39:57-08:00 is 1996-12-20T00:39:57Z.
    c = parse_command("plan", {"target": "t/+", "start": "1996-12-19T16:39:57-08:00",
                               "end": "1996-12-20 00:40:57z"}, calendar.timegm((1996, 12, 20, 0, 0, 0, 0, 0, 0)))
    assert (c.start, c.end) == (calendar.timegm((1996, 12, 20, 0, 39, 57, 0, 0, 0)),
                                calendar.timegm((1996, 12, 20, 0, 40, 57, 0, 0, 0)))


# ------------------------------------------------------------------ the real daemon
STREAM = "  - topic: r/+\n    format: json\n    value: v\n    time: ts\n"


def get(url: str) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def test_the_daemon_refuses_a_time_before_the_year_1_and_its_status_page_stays_up(
        daemon_factory, publisher, tmp_path: Path) -> None:
    d = daemon_factory(STREAM).start()
    now = time.time()
    publisher.publish("r/a", json.dumps({"v": 1, "ts": -1e12}))
    publisher.publish("r/a", json.dumps({"v": 2, "ts": now}))
    publisher.publish("r/a", json.dumps({"v": 3, "ts": now + 1}))
    # On a stream with samples: before the fix counted as duplicate_time.
    publisher.publish("r/a", json.dumps({"v": 4, "ts": -1e12}))
    publisher.publish("r/a", json.dumps({"v": 5, "ts": "2026-12-05T05:00:00"}))
    publisher.publish_wait("r/a", json.dumps({"v": 6, "ts": now + 2}))
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == 3), d.scrape()
    text = d.scrape()
    assert metric(text, "shiftwatch_samples_rejected_total", stream="r/a", reason="duplicate_time") is None
    assert metric(text, "shiftwatch_messages_dropped_total", reason="bad_time") == 3, text
    base = f"http://127.0.0.1:{d.metrics_port}"
    code, body = get(f"{base}/status/stream.json?name=r%2Fa")
    assert code == 200, body
    assert "before the year 1" in d.log_text()
    assert d.stop() == 0
    assert "Traceback" not in d.log_text()


def test_a_snapshot_holding_a_time_before_the_year_1_is_set_aside_with_a_reason(
        daemon_factory, publisher, tmp_path: Path) -> None:
    from shiftwatch.statestore import StateStore

    d = daemon_factory(STREAM).start()
    now = time.time()
    for i in range(5):
        publisher.publish("r/a", json.dumps({"v": float(i), "ts": now - 100 + i}))
    publisher.publish_wait("r/b", json.dumps({"v": 1.0, "ts": now}))
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == 5)
    assert d.stop() == 0
    # What an older version wrote after taking -1e12 as a time: the stream's times hold it.
    store = StateStore(tmp_path / "state" / "snapshots")
    saved, meta = store.load()
    streams = dict(saved)
    entry = dict(streams["r/a"])
    entry["times"] = [-1e12, *list(entry["times"])[1:]]
    streams["r/a"] = entry
    store.save(streams, meta)
    d.start()
    base = f"http://127.0.0.1:{d.metrics_port}"
    code, body = get(f"{base}/status/stream.json?name=r%2Fa")
    assert code in (200, 404), body  # set aside (a new stream, not yet fed) or rendered; never a 500
    lines = [line for line in d.log_text().splitlines() if "saved state of stream" in line and "r/a" in line]
    assert len(lines) == 1 and "before the year 1" in lines[0], d.log_text()
    assert metric(d.scrape(), "shiftwatch_stream_states_set_aside_total") == 1
    assert d.stop() == 0
    assert "Traceback" not in d.log_text()


def test_plan_on_the_command_line_refuses_a_start_without_an_offset(daemon_factory, cli) -> None:
    d = daemon_factory(STREAM).start()
    for start in ("2026-12-05T06:00:00", "2026-12-05 06:30"):
        r = cli("plan", "--config", str(d.config), "r/b", "--start", start, "--for", "1h", timeout=60)
        assert r.returncode != 0 and "ACCEPTED" not in r.stdout, (start, r.stdout, r.stderr)
        assert "start" in r.stdout + r.stderr and "Traceback" not in r.stderr, (r.stdout, r.stderr)
    r = cli("plan", "--config", str(d.config), "r/b", "--start", "2026-12-05T06:00:00+01:00", "--for", "1h",
            timeout=60)
    assert r.returncode == 0 and r.stdout.startswith("ACCEPTED") and "05:00:00.000Z" in r.stdout, r.stdout
    assert d.stop() == 0


class _BrokenBoard:
    """A status board whose stream page fails as the old snapshot's time made it fail."""

    def page(self, path: str, query: str) -> tuple[int, bytes, str]:
        raise ValueError("year -29719 is out of range")

    def want(self, name: str) -> bool:
        return True

    def has_stream(self, name: str) -> bool:
        return True


def test_a_status_page_that_cannot_be_rendered_is_answered_500_and_logged_with_its_reason(caplog) -> None:
    from shiftwatch.metrics import Metrics

    server = Metrics().serve("127.0.0.1:0", pages=_BrokenBoard())
    try:
        with caplog.at_level("ERROR", logger="shiftwatch"):
            for _ in range(3):
                code, body = get(f"http://127.0.0.1:{server.port}/status/stream.json?name=r%2Fa")
                assert code == 500 and b"could not be rendered" in body
            assert wait_until(lambda: any("could not be rendered" in r.getMessage() for r in caplog.records))
    finally:
        server.close()
    lines = [r.getMessage() for r in caplog.records if "could not be rendered" in r.getMessage()]
    # one line a minute, naming the page and the reason (before the fix: none at all)
    assert len(lines) == 1 and "/status/stream.json" in lines[0] and "year -29719 is out of range" in lines[0], lines


def test_a_snapshot_entry_whose_values_are_text_is_reported_under_values() -> None:
    # The tester's entry: values "abc" was reported as "times: could not convert ...".
    from shiftwatch.core.engine import StreamEngine
    from shiftwatch.core.settings import DetectionSettings

    eng = StreamEngine("r/a", DetectionSettings())
    eng.process([NOW + i for i in range(5)], [1.0, 2.0, 1.5, 1.2, 1.8])
    state = dict(eng.get_state())
    state["values"] = "abc"
    with pytest.raises(ValueError, match=r"^values: ") as err:
        StreamEngine("r/a", DetectionSettings()).set_state(state)
    assert "times" not in str(err.value), err.value


def test_the_last_second_of_9999_is_read_alike_as_text_as_epoch_ms_and_from_a_snapshot() -> None:
    # RFC 3339 section 5.6 allows a fraction of the second; 9999-12-31T23:59:59.5Z is an
    # instant of the year 9999 (END_9999 from calendar.timegm, plus half a second).  The
    # decoder took it as epoch ms 253402300799500 but refused it as text, and a snapshot
    # took up to TIME_MAX + 0.999: one limit now, the last millisecond of the year 9999.
    from shiftwatch import sources
    from shiftwatch.core import engine, timefmt

    for frac, ms in ((".5", 500), (".999", 999)):
        want = END_9999 + ms / 1000.0
        text = decode(f'{{"v": 1, "ts": "9999-12-31T23:59:59{frac}Z"}}'.encode(), "json", value_path="v",
                      time_path="ts", now=NOW)
        raw = decode(f'{{"v": 1, "ts": {int(END_9999) * 1000 + ms}}}'.encode(), "json", value_path="v",
                     time_path="ts", now=NOW)
        assert text.problems == [] and raw.problems == [], (text, raw)
        assert text.readings[0].time == raw.readings[0].time == pytest.approx(want, abs=1e-6)
    # past the last millisecond: refused as text and as epoch ms alike
    text = decode(b'{"v": 1, "ts": "9999-12-31T23:59:59.9995Z"}', "json", value_path="v", time_path="ts",
                  now=NOW)
    raw = decode(b'{"v": 1, "ts": 253402300799999.5}', "json", value_path="v", time_path="ts", now=NOW)
    assert reasons(text) == reasons(raw) == ["bad_time"], (text, raw)
    # the limit is defined once, and a snapshot holds a time up to it and no further
    assert sources.TIME_MAX == timefmt.TIME_MAX == END_9999 + 0.999
    assert timefmt.format_time(timefmt.TIME_MAX) == "9999-12-31T23:59:59.999Z"
    engine._time_array([timefmt.TIME_MAX], "t")
    with pytest.raises(ValueError, match="past the year 9999"):
        engine._time_array([timefmt.TIME_MAX + 0.0005], "t")
