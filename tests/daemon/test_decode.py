"""Tests of the MQTT payload decoders (shiftwatch.decode).

References:
- RFC 8428 (SenML), the examples of section 5.1 and the rules of sections
  4.5.1 (names), 4.5.3 (relative time) and 4.6 (resolution).  The RFC text
  was not at hand while writing these tests: the examples are recalled from
  memory and say so beside each one.  The expected readings follow from the
  resolution rules, which the tests state explicitly.
- RFC 3339 section 5.8 (date-time examples); the expected epoch values are
  computed here with calendar.timegm from the broken-down UTC time, not with
  the parser under test.

Demo names (the Brackenfield plant, its fillers, ovens and cappers) are
invented.
"""

from __future__ import annotations

import calendar
import json
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import decode as decode_module
from shiftwatch.decode import (
    REASONS,
    Decoded,
    DecodeProblem,
    Reading,
    decode,
    decode_many,
    stream_name,
)

from .fuzz_strategies import JSON_VALUES, PATHS, PROPERTY, SCALARS, SENML_RECORDS, TOKENS, is_safe

NOW = 1764633600.0  # 2025-12-02T00:00:00Z, the arrival time used throughout
SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9\-:./_]*")  # RFC 8428 section 4.5.1


def reasons(out: Decoded) -> list[str]:
    return [p.reason for p in out.problems]


def check_invariants(out: Decoded, fmt: str) -> None:
    """What every result must satisfy, whatever the payload."""
    assert isinstance(out, Decoded)
    assert out.readings or out.problems  # every payload is accounted for
    for p in out.problems:
        assert isinstance(p, DecodeProblem)
        assert p.reason in REASONS, p
        assert isinstance(p.message, str) and p.message
    for r in out.readings:
        assert isinstance(r, Reading)
        assert type(r.value) is float and math.isfinite(r.value), r
        assert r.time is None or (type(r.time) is float and math.isfinite(r.time)), r
        assert r.unit is None or isinstance(r.unit, str)
        if fmt == "senml":
            assert isinstance(r.name, str) and SENML_NAME.fullmatch(r.name), r
            assert r.time is not None
        else:
            assert r.name is None and r.unit is None


def rfc3339_expected(y: int, mo: int, d: int, h: int, mi: int, s: int, frac: float = 0.0) -> float:
    return calendar.timegm((y, mo, d, h, mi, s, 0, 0, 0)) + frac


# ---------------------------------------------------------------------------
# Every reason label: one example each, and REASONS covers what the code uses.

REASON_EXAMPLES: dict[str, tuple[bytes, str, dict[str, Any]]] = {
    "too_large": (b"12345678901", "number", {"max_bytes": 10}),
    "not_utf8": (b"\xff12", "number", {}),
    "not_json": (b'{"value": 1', "json", {}),
    "too_deep": (b"[[[1]]]", "json", {"max_depth": 2}),
    "empty": (b"", "json", {}),
    "too_many_items": (b"[1, 2, 3]", "json", {"max_items": 2}),
    "not_an_object": (b"[[1]]", "json", {}),
    "no_value": (b'{"weight_g": 500}', "json", {}),
    "not_a_number": (b'{"value": true}', "json", {}),
    "value_is_text": (b'{"value": "12.5"}', "json", {}),
    "nan": (b"nan", "number", {}),
    "infinite": (b"-inf", "number", {}),
    "no_time": (b'{"value": 1}', "json", {"time_path": "ts"}),
    "bad_time": (b'{"value": 1, "ts": "yesterday"}', "json", {"time_path": "ts"}),
    "senml_invalid": (b'[{"v": 1}]', "senml", {}),
    "duplicate_key": (b'{"value": 1, "value": 2}', "json", {}),
}


def test_every_reason_has_an_example_and_a_sentence() -> None:
    assert set(REASON_EXAMPLES) == set(REASONS)
    for label, sentence in REASONS.items():
        assert re.fullmatch(r"[a-z0-9]+(?:_[a-z0-9]+)*", label)
        assert sentence[0].isupper() and sentence.endswith(".")


@pytest.mark.parametrize("reason", sorted(REASON_EXAMPLES))
def test_each_reason_is_produced(reason: str) -> None:
    payload, fmt, kwargs = REASON_EXAMPLES[reason]
    out = decode(payload, fmt, now=NOW, **kwargs)
    assert reason in reasons(out)
    check_invariants(out, fmt)


def test_reasons_cover_every_label_in_the_source() -> None:
    source = Path(decode_module.__file__).read_text(encoding="utf-8")
    used = set(re.findall(r'(?:_Reject|DecodeProblem)\(\s*"([a-z_0-9]+)"', source))
    assert used == set(REASONS), used ^ set(REASONS)


# ---------------------------------------------------------------------------
# number

@pytest.mark.parametrize("payload, value", [
    (b"500.25", 500.25), (b" 500.25\n", 500.25), (b"\t-12\r\n", -12.0), (b"+.5", 0.5),
    (b"7.", 7.0), (b"1e3", 1000.0), (b"-2.5E-3", -0.0025), (b"0", 0.0), (b"\xef\xbb\xbf42", 42.0),
])
def test_number_good(payload: bytes, value: float) -> None:
    out = decode(payload, "number", now=NOW)
    assert out == Decoded([Reading(None, None, value, None)], [])


@pytest.mark.parametrize("payload, reason", [
    (b"nan", "nan"), (b"NaN", "nan"), (b"-nan", "nan"), (b" NAN ", "nan"),
    (b"inf", "infinite"), (b"-inf", "infinite"), (b"Infinity", "infinite"), (b"+infinity", "infinite"),
    (b"1e999", "infinite"), (b"9" * 400, "infinite"),
    (b"12,5", "not_a_number"), (b"12.5 g", "not_a_number"), (b"0x10", "not_a_number"),
    (b"1_000", "not_a_number"), ("\u0661\u0662".encode(), "not_a_number"), (b"--1", "not_a_number"),
    (b"{\"value\": 1}", "not_a_number"), (b"", "empty"), (b"  \n", "empty"),
])
def test_number_bad(payload: bytes, reason: str) -> None:
    out = decode(payload, "number", now=NOW)
    assert out.readings == [] and reasons(out) == [reason]


def test_long_digit_runs() -> None:
    # Regression: an ambiguous number pattern once made these quadratic in the payload size.
    digits = b"9" * 65000
    assert reasons(decode(digits + b"x", "number", now=NOW)) == ["not_a_number"]
    assert reasons(decode(digits + b"e", "number", now=NOW)) == ["not_a_number"]
    assert reasons(decode(b"1." + digits + b"e", "number", now=NOW)) == ["not_a_number"]
    assert reasons(decode(b'{"value": "' + digits + b'x"}', "json", now=NOW)) == ["not_a_number"]
    assert reasons(decode(b'{"value": "' + digits + b'"}', "json", now=NOW)) == ["value_is_text"]
    assert reasons(decode(b'{"value": 1, "ts": "' + digits + b'"}', "json", time_path="ts", now=NOW)) == ["bad_time"]
    assert reasons(decode(b'[{"n": "' + b"a" * 65000 + b' ", "v": 1}]', "senml", now=NOW)) == ["senml_invalid"]


# ---------------------------------------------------------------------------
# json

def test_json_value_paths() -> None:
    doc = b'{"value": 1.5, "data": {"weight_g": 498, "deep": {"x": -3}}, "a.b": 7}'
    assert decode(doc, "json", now=NOW).readings[0].value == 1.5
    assert decode(doc, "json", value_path="data.weight_g", now=NOW).readings[0].value == 498.0
    assert decode(doc, "json", value_path="data.deep.x", now=NOW).readings[0].value == -3.0
    # The whole path is tried as one key first.
    assert decode(doc, "json", value_path="a.b", now=NOW).readings[0].value == 7.0
    missing = decode(doc, "json", value_path="data.volume_ml", now=NOW)
    assert missing.readings == [] and reasons(missing) == ["no_value"]
    through_number = decode(doc, "json", value_path="value.x", now=NOW)
    assert reasons(through_number) == ["no_value"]


def test_json_bare_number_and_scalars() -> None:
    assert decode(b" 12.5 ", "json", now=NOW).readings == [Reading(None, None, 12.5, None)]
    assert reasons(decode(b'"12.5"', "json", now=NOW)) == ["value_is_text"]
    assert reasons(decode(b'"twelve"', "json", now=NOW)) == ["not_a_number"]
    assert reasons(decode(b"true", "json", now=NOW)) == ["not_a_number"]
    assert reasons(decode(b"null", "json", now=NOW)) == ["no_value"]


@pytest.mark.parametrize("value, reason", [
    ("true", "not_a_number"), ("false", "not_a_number"), ("null", "no_value"),
    ('"12.5"', "value_is_text"), ('" -3e2 "', "value_is_text"), ('"NaN"', "value_is_text"),
    ('"12.5 g"', "not_a_number"), ("[12.5]", "not_a_number"), ('{"v": 1}', "not_a_number"),
    ("NaN", "nan"), ("Infinity", "infinite"), ("-Infinity", "infinite"),
    ("1e400", "infinite"), ("-1e400", "infinite"),
    ("1" + "0" * 400, "infinite"), ("-1" + "0" * 5000, "infinite"), ("1" + "0" * 320, "infinite"),
])
def test_json_bad_values(value: str, reason: str) -> None:
    out = decode(f'{{"value": {value}}}'.encode(), "json", now=NOW)
    assert out.readings == [] and reasons(out) == [reason]


def test_json_large_but_finite_values() -> None:
    out = decode(b'[{"value": 1e308}, {"value": -' + b"9" * 300 + b"}]", "json", now=NOW)
    assert [r.value for r in out.readings] == [1e308, -float("9" * 300)] and out.problems == []


@pytest.mark.parametrize("stamp, expected", [
    # RFC 3339 section 5.8 examples.
    ('"1985-04-12T23:20:50.52Z"', rfc3339_expected(1985, 4, 12, 23, 20, 50, 0.52)),
    ('"1996-12-19T16:39:57-08:00"', rfc3339_expected(1996, 12, 20, 0, 39, 57)),
    ('"1990-12-31T23:59:60Z"', rfc3339_expected(1991, 1, 1, 0, 0, 0)),
    ('"1990-12-31T15:59:60-08:00"', rfc3339_expected(1991, 1, 1, 0, 0, 0)),
    ('"1937-01-01T12:00:27.87+00:20"', rfc3339_expected(1937, 1, 1, 11, 40, 27, 0.87)),
    # Variants RFC 3339 section 5.6's NOTE allows: lower-case t/z, a space (an offset is required:
    # a time without one is bad_time, tests/daemon/test_input_times.py).
    ('"2025-12-02t06:25:17z"', rfc3339_expected(2025, 12, 2, 6, 25, 17)),
    ('"2025-12-02 06:25:17.250Z"', rfc3339_expected(2025, 12, 2, 6, 25, 17, 0.25)),
    # Numbers: epoch seconds, or epoch milliseconds above 1e11.
    ("1764633601", 1764633601.0), ("1764633601.5", 1764633601.5),
    ("1764633601500", 1764633601.5), ("100000000000", 100000000000.0), ("100000000001", 100000000.001),
    ("0", 0.0), ("-86400", -86400.0),
])
def test_json_times(stamp: str, expected: float) -> None:
    out = decode(f'{{"value": 1, "meta": {{"ts": {stamp}}}}}'.encode(), "json",
                 time_path="meta.ts", now=NOW)
    assert out.problems == []
    assert out.readings[0].time == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize("stamp", [
    '"yesterday"', '"1764633601"', '"2025-12-02"', '"2025-13-02T00:00:00Z"', '"2025-12-02T25:00:00Z"',
    '"2025-12-02T00:00:00+24:00"', '"2025-12-02T00:00Z"', "true", "[1]", '{"s": 1}',
    "NaN", "Infinity", "-Infinity", "1e400", "1" + "0" * 400,
])
def test_json_bad_times_drop_the_item(stamp: str) -> None:
    out = decode(f'{{"value": 1, "ts": {stamp}}}'.encode(), "json", time_path="ts", now=NOW)
    assert out.readings == [] and reasons(out) == ["bad_time"]


def test_json_missing_time_keeps_the_reading() -> None:
    for doc in (b'{"value": 3}', b'{"value": 3, "ts": null}', b"3"):
        out = decode(doc, "json", time_path="ts", now=NOW)
        assert out.readings == [Reading(None, None, 3.0, None)]
        assert reasons(out) == ["no_time"]
    # No time path configured: no time, and no problem.
    assert decode(b'{"value": 3, "ts": 5}', "json", now=NOW) == Decoded([Reading(None, None, 3.0, None)], [])


def test_json_batch_keeps_good_items_and_reports_bad_ones() -> None:
    batch = [
        {"weight_g": 500.1, "ts": 1764633600},
        {"weight_g": "500.2", "ts": 1764633601},
        {"weight_g": 500.3, "ts": "2025-12-02T00:00:02Z"},
        {"ts": 1764633603},
        [500.4],
        499.9,
        {"weight_g": 500.5, "ts": "soon"},
        {"weight_g": True},
        {"weight_g": 500.6},
        None,
    ]
    text = json.dumps(batch).encode()
    out = decode(text, "json", value_path="weight_g", time_path="ts", now=NOW)
    assert out.readings == [
        Reading(None, 1764633600.0, 500.1, None),
        Reading(None, 1764633602.0, 500.3, None),
        Reading(None, None, 499.9, None),
        Reading(None, None, 500.6, None),
    ]
    assert reasons(out) == ["value_is_text", "no_value", "not_an_object", "no_time", "bad_time",
                            "not_a_number", "no_time", "no_value"]
    assert [p.message.split(":")[0].split(" is ")[0] for p in out.problems] == [
        "item 1", "item 3", "item 4", "item 5", "item 6", "item 7", "item 8", "item 9"]


def test_json_batch_with_nan_literals() -> None:
    out = decode(b'[{"value": NaN}, {"value": 2}, {"value": -Infinity}, NaN, 4]', "json", now=NOW)
    assert [r.value for r in out.readings] == [2.0, 4.0]
    assert reasons(out) == ["nan", "infinite", "nan"]


def test_json_batch_limits() -> None:
    out = decode(json.dumps(list(range(10))).encode(), "json", max_items=4, now=NOW)
    assert [r.value for r in out.readings] == [0.0, 1.0, 2.0, 3.0]
    assert reasons(out) == ["too_many_items"]
    exact = decode(json.dumps(list(range(4))).encode(), "json", max_items=4, now=NOW)
    assert len(exact.readings) == 4 and exact.problems == []
    assert reasons(decode(b" [ ] ", "json", now=NOW)) == ["empty"]


# ---------------------------------------------------------------------------
# guards

def test_size_is_checked_before_anything_else() -> None:
    assert decode(b"1" * 10, "number", max_bytes=10, now=NOW).readings == [Reading(None, None, 1111111111.0, None)]
    # Invalid UTF-8 and invalid JSON beyond the limit: only too_large.
    assert reasons(decode(b"\xff" * 11, "json", max_bytes=10, now=NOW)) == ["too_large"]
    assert reasons(decode(bytearray(b"[" * 65537), "senml", now=NOW)) == ["too_large"]


@pytest.mark.parametrize("payload", [b"\xff", b"\xc3", b"\xed\xa0\x80", b'{"value": 1, "x": "\xe9"}', b"\xc0\xaf"])
def test_not_utf8(payload: bytes) -> None:
    for fmt in ("number", "json", "senml"):
        assert reasons(decode(payload, fmt, now=NOW)) == ["not_utf8"]


@pytest.mark.parametrize("payload", [b"{", b"[1,]", b"{'value': 1}", b'{"value": 1} x', b"\x00", b"nan", b"0x10"])
def test_not_json(payload: bytes) -> None:
    for fmt in ("json", "senml"):
        assert reasons(decode(payload, fmt, now=NOW)) == ["not_json"]


def test_depth_limit_is_exact_and_ignores_brackets_in_strings() -> None:
    at_limit = b'{"value": 1, "a": ' + b"[" * 31 + b"]" * 31 + b"}"
    assert decode(at_limit, "json", now=NOW).readings == [Reading(None, None, 1.0, None)]
    over = b'{"value": 1, "a": ' + b"[" * 32 + b"]" * 32 + b"}"
    assert reasons(decode(over, "json", now=NOW)) == ["too_deep"]
    in_strings = b'{"value": 2, "note": "' + b"[{" * 500 + b'\\"[[[", "n": "]]]"}'
    assert decode(in_strings, "json", now=NOW).readings == [Reading(None, None, 2.0, None)]


def test_very_deep_input_never_recurses() -> None:
    deep = b"[" * 100000 + b"]" * 100000
    assert reasons(decode(deep, "json", max_bytes=10**6, now=NOW)) == ["too_deep"]
    assert reasons(decode(b"[" * 100000, "senml", max_bytes=10**6, now=NOW)) == ["too_deep"]
    # With the depth guard opened wide, the parser's own recursion limit is caught.
    out = decode(deep, "json", max_bytes=10**6, max_depth=10**6, now=NOW)
    assert reasons(out) == ["too_deep"]


def test_programming_errors_raise() -> None:
    with pytest.raises(TypeError):
        decode("1", "number", now=NOW)  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        decode(b"1", "csv", now=NOW)
    with pytest.raises(ValueError):
        decode(b"1", "json", value_path="data..x", now=NOW)
    with pytest.raises(ValueError):
        decode(b"1", "json", time_path="", now=NOW)
    with pytest.raises(ValueError):
        decode(b"1", "json", max_items=0, now=NOW)
    with pytest.raises(ValueError):
        decode(b"1", "number", now=math.nan)


# ---------------------------------------------------------------------------
# SenML: RFC 8428 examples (recalled from memory) and resolution rules

def senml(records: list[dict[str, Any]] | str, now: float = NOW) -> Decoded:
    """The pack decoded as usual; its decoding as columns (the daemon's) must give the same."""
    text = records if isinstance(records, str) else json.dumps(records)
    out = decode(text.encode(), "senml", now=now)
    check_invariants(out, "senml")
    assert _as_readings(decode(text.encode(), "senml", now=now, columns=True)) == out
    return out


def test_rfc8428_5_1_1_single_datapoint() -> None:
    # RFC 8428 section 5.1.1 (recalled from memory). No time: "roughly now" (section 4.5.3).
    out = senml('[{"n":"urn:dev:ow:10e2073a01080063","u":"Cel","v":23.1}]')
    assert out == Decoded([Reading("urn:dev:ow:10e2073a01080063", NOW, 23.1, "Cel")], [])


def test_rfc8428_5_1_2_multiple_datapoints() -> None:
    # RFC 8428 section 5.1.2 (recalled from memory): bn prefixes each n.
    out = senml('[{"bn":"urn:dev:ow:10e2073a01080063:","n":"voltage","u":"V","v":120.1},'
                '{"n":"current","u":"A","v":1.2}]')
    assert out.problems == []
    assert [(r.name, r.unit, r.value) for r in out.readings] == [
        ("urn:dev:ow:10e2073a01080063:voltage", "V", 120.1),
        ("urn:dev:ow:10e2073a01080063:current", "A", 1.2),
    ]


def test_rfc8428_5_1_3_multiple_measurements_resolve_as_5_1_4() -> None:
    # RFC 8428 section 5.1.3 (recalled from memory, including its bn without the final "3"),
    # and its resolved form in section 5.1.4: bt + t, bu where u is absent.
    pack = """[
     {"bn":"urn:dev:ow:10e2073a0108006:","bt":1.276020076001e+09,
      "bu":"A","bver":5,
      "n":"voltage","u":"V","v":120.1},
     {"n":"current","t":-5,"v":1.2},
     {"n":"current","t":-4,"v":1.3},
     {"n":"current","t":-3,"v":1.4},
     {"n":"current","t":-2,"v":1.5},
     {"n":"current","t":-1,"v":1.6},
     {"n":"current","v":1.7}
    ]"""
    resolved = [  # section 5.1.4
        ("urn:dev:ow:10e2073a0108006:voltage", "V", 120.1, 1.276020076001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.2, 1.276020071001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.3, 1.276020072001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.4, 1.276020073001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.5, 1.276020074001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.6, 1.276020075001e+09),
        ("urn:dev:ow:10e2073a0108006:current", "A", 1.7, 1.276020076001e+09),
    ]
    out = senml(pack)
    assert out.problems == []
    assert [(r.name, r.unit, r.value) for r in out.readings] == [x[:3] for x in resolved]
    assert [r.time for r in out.readings] == pytest.approx([x[3] for x in resolved], abs=1e-6)
    # The daemon's columns: one pair of arrays per name, the same resolution.
    cols = decode(pack.encode(), "senml", now=NOW, columns=True)
    assert cols.senml is not None and cols.readings == [] and cols.problems == []
    assert cols.senml.names == ["urn:dev:ow:10e2073a0108006:voltage", "urn:dev:ow:10e2073a0108006:current"]
    assert cols.senml.units == ["V", "A"]
    assert cols.senml.values[1].tolist() == [1.2, 1.3, 1.4, 1.5, 1.6, 1.7]
    assert cols.senml.times[1].tolist() == pytest.approx([x[3] for x in resolved[1:]], abs=1e-6)


def test_rfc8428_5_1_3_humidity_and_location() -> None:
    # The second pack of RFC 8428 section 5.1.3 (recalled from memory): no n, so every record
    # resolves to the base name; units switch per record, bu "%RH" where u is absent.
    pack = """[
      {"bn":"urn:dev:ow:10e2073a01080063:","bt":1.320067464e+09,"bu":"%RH","v":20},
      {"u":"lon","v":24.30621},
      {"u":"lat","v":60.07965},
      {"t":60,"v":20.3},
      {"u":"lon","t":60,"v":24.30622},
      {"u":"lat","t":60,"v":60.07965},
      {"t":120,"v":20.7},
      {"u":"lon","t":120,"v":24.30623},
      {"u":"lat","t":120,"v":60.07966},
      {"u":"%EL","t":150,"v":98},
      {"t":180,"v":21.2},
      {"u":"lon","t":180,"v":24.30628},
      {"u":"lat","t":180,"v":60.07967}
    ]"""
    out = senml(pack)
    assert out.problems == [] and len(out.readings) == 13
    assert {r.name for r in out.readings} == {"urn:dev:ow:10e2073a01080063:"}
    humidity = [(r.time, r.value) for r in out.readings if r.unit == "%RH"]
    assert humidity == [(1320067464.0, 20.0), (1320067524.0, 20.3), (1320067584.0, 20.7), (1320067644.0, 21.2)]
    assert [r.value for r in out.readings if r.unit == "%EL"] == [98.0]


def test_rfc8428_5_1_5_multiple_data_types() -> None:
    # RFC 8428 section 5.1.5 (recalled from memory): only the numeric value is a reading.
    out = senml('[{"bn":"urn:dev:ow:10e2073a01080063:","n":"temp","u":"Cel","v":23.1},'
                '{"n":"label","vs":"Machine Room"},{"n":"open","vb":false},{"n":"nfc-reader","vd":"aGkgCg"}]')
    assert out.readings == [Reading("urn:dev:ow:10e2073a01080063:temp", NOW, 23.1, "Cel")]
    assert reasons(out) == ["not_a_number"] * 3
    assert "label" in out.problems[0].message and "(vs)" in out.problems[0].message


def test_rfc8428_5_1_7_base_only_record() -> None:
    # RFC 8428 section 5.1.7 (recalled from memory): a first record holding only bn.
    out = senml('[{"bn":"urn:dev:ow:10e2073a01080063:"},{"n":"temp","u":"Cel","v":23.1},'
                '{"n":"heat","u":"/","v":1},{"n":"fan","u":"/","v":0}]')
    assert out.problems == []
    assert [(r.name, r.unit, r.value) for r in out.readings] == [
        ("urn:dev:ow:10e2073a01080063:temp", "Cel", 23.1),
        ("urn:dev:ow:10e2073a01080063:heat", "/", 1.0),
        ("urn:dev:ow:10e2073a01080063:fan", "/", 0.0),
    ]


def test_senml_relative_time_boundary() -> None:
    # RFC 8428 section 4.5.3: resolved times below 2**28 are relative to now.
    out = senml([{"n": "oven2", "t": -5, "v": 1}, {"n": "oven2", "t": 2**28 - 1, "v": 2},
                 {"n": "oven2", "t": 2**28, "v": 3}, {"n": "oven2", "bt": 2**28 - 10, "t": 20, "v": 4},
                 {"n": "oven2", "bt": 0, "t": 0, "v": 5}])
    assert [r.time for r in out.readings] == [NOW - 5, NOW + 2**28 - 1, float(2**28), float(2**28 + 10), NOW]


def test_senml_base_values_apply_until_changed() -> None:
    # RFC 8428 section 4.6: bases apply to their own record and the following ones until changed.
    out = senml([
        {"bn": "brackenfield/filler3/", "bt": 1764633600, "bu": "g", "bv": 500, "n": "fill_g", "v": 0.25},
        {"n": "fill_g", "t": 1, "v": -0.5},
        {"bn": "brackenfield/capper1/", "bu": "N.m", "bv": 0, "n": "torque", "t": 2, "v": 2.1},
        {"n": "torque", "u": "Nm", "t": 3, "v": 2.2},
    ])
    assert out.problems == []
    assert out.readings == [
        Reading("brackenfield/filler3/fill_g", 1764633600.0, 500.25, "g"),
        Reading("brackenfield/filler3/fill_g", 1764633601.0, 499.5, "g"),
        Reading("brackenfield/capper1/torque", 1764633602.0, 2.1, "N.m"),
        Reading("brackenfield/capper1/torque", 1764633603.0, 2.2, "Nm"),
    ]


def test_senml_milliseconds_heuristic() -> None:
    out = senml([{"n": "oven1", "bt": 1764633600000, "t": 500, "v": 180.5}])
    assert out.readings[0].time == pytest.approx(1764633600.5)


@pytest.mark.parametrize("pack, expected", [
    ([{"v": 1}], ["senml_invalid"]),                                      # no name
    ([{"n": "", "v": 1}], ["senml_invalid"]),
    ([{"n": "oven 1", "v": 1}], ["senml_invalid"]),                       # section 4.5.1: no spaces
    ([{"n": "-oven1", "v": 1}], ["senml_invalid"]),                       # must start alphanumeric
    ([{"n": "oven1+", "v": 1}], ["senml_invalid"]),
    ([{"n": 5, "v": 1}], ["senml_invalid"]),
    ([{"n": "oven1", "u": 5, "v": 1}], ["senml_invalid"]),
    ([{"n": "oven1", "t": "2025-12-02T00:00:00Z", "v": 1}], ["senml_invalid"]),
    ([{"n": "oven1", "t": True, "v": 1}], ["senml_invalid"]),
    ([{"n": "oven1"}], ["senml_invalid"]),                                # no value
    ([{"n": "oven1", "t": 3}], ["senml_invalid"]),
    ([{"n": "oven1", "v": 1, "vs": "x"}], ["senml_invalid"]),             # two values
    ([{"n": "oven1", "v": 1, "ext_": 1}], ["senml_invalid"]),             # must-understand field
    ([{}], ["senml_invalid"]),
    ([{"foo": 1}], ["senml_invalid"]),
    ([5], ["senml_invalid"]),
    ([[{"n": "a", "v": 1}]], ["senml_invalid"]),
    ([{"bn": 5, "n": "a", "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bt": "now", "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bu": ["g"], "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bv": "500", "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bs": "1", "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bver": 11, "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bver": 0, "v": 1}], ["senml_invalid"]),
    ([{"bn": "a", "bver": 5.0, "v": 1}], ["senml_invalid"]),
    ([{"n": "a", "v": "1.5"}], ["value_is_text"]),
    ([{"n": "a", "v": True}], ["not_a_number"]),
    ([{"n": "a", "v": None}], ["no_value"]),
    ([{"n": "a", "v": 1e308, "bv": 1e308}], ["infinite"]),                # bv + v overflows
    ([{"n": "a", "bt": 1e308, "t": 1e308, "v": 1}], ["bad_time"]),
    ([{"n": "a", "s": 10}], ["empty"]),                                   # sum only: nothing to use
    ([{"n": "a", "s": 10}, {"n": "a", "v": 1}], []),                      # sum skipped, value kept
    ([{"n": "a", "s": 10, "v": 2}], []),
    ([{"bn": "a", "bt": 1, "bu": "g", "bv": 1, "bver": 10}], ["empty"]),  # base only: nothing to use
])
def test_senml_bad_records(pack: list[Any], expected: list[str]) -> None:
    out = senml(pack)
    assert reasons(out) == expected
    if expected:
        assert out.readings == []


@pytest.mark.parametrize("literal, reason", [("NaN", "nan"), ("Infinity", "infinite"), ("-Infinity", "infinite"),
                                             ("1" + "0" * 500, "infinite")])
def test_senml_non_finite_literals(literal: str, reason: str) -> None:
    assert reasons(senml(f'[{{"n":"a","v":{literal}}}]')) == [reason]
    assert reasons(senml(f'[{{"n":"a","t":{literal},"v":1}}]')) == ["bad_time"]
    assert reasons(senml(f'[{{"n":"a","bt":{literal},"v":1}}]')) == ["bad_time"]
    assert reasons(senml(f'[{{"n":"a","bv":{literal},"v":1}}]')) == [reason]


def test_senml_broken_base_stays_in_force_until_reset() -> None:
    out = senml([
        {"bn": "brackenfield/oven1/", "n": "zone1", "v": 180.0},
        {"bn": 42, "n": "zone2", "v": 181.0},          # broken bn
        {"n": "zone3", "v": 182.0},                     # relies on it: rejected, not "zone3"
        {"bn": "brackenfield/oven2/", "n": "zone1", "v": 175.0},  # reset
        {"bt": "2025-12-02", "n": "zone2", "v": 176.0},  # broken bt
        {"n": "zone3", "v": 177.0},
        {"bt": 1764633600, "n": "zone3", "v": 178.0},
    ])
    assert [(r.name, r.value) for r in out.readings] == [
        ("brackenfield/oven1/zone1", 180.0), ("brackenfield/oven2/zone1", 175.0),
        ("brackenfield/oven2/zone3", 178.0)]
    assert reasons(out) == ["senml_invalid"] * 4
    assert "earlier record 1" in out.problems[1].message
    assert "earlier record 4" in out.problems[3].message


def test_senml_pack_shape() -> None:
    assert reasons(senml('{"n": "a", "v": 1}')) == ["senml_invalid"]
    assert reasons(senml("1.5")) == ["senml_invalid"]
    assert reasons(senml("[]")) == ["empty"]
    big = [{"n": "brackenfield/filler1/fill_g", "v": float(i)} for i in range(50)]
    out = decode(json.dumps(big).encode(), "senml", max_items=20, now=NOW)
    assert len(out.readings) == 20 and reasons(out) == ["too_many_items"]


def test_senml_mixed_pack_keeps_good_records() -> None:
    out = senml([
        {"bn": "brackenfield/capper2/", "bt": 1764633600, "n": "torque", "u": "N.m", "v": 2.05},
        {"n": "torque", "t": 1, "v": "2.06"},
        {"n": "torque", "t": 2, "v": 2.07},
        {"n": "state", "t": 2, "vs": "running"},
        {"n": "torque", "t": 3, "v": float("nan")},
        {"n": "torque count", "t": 4, "v": 3},
        {"n": "torque", "t": 5, "v": 2.09},
    ])
    assert [(r.time, r.value) for r in out.readings] == [(1764633600.0, 2.05), (1764633602.0, 2.07),
                                                         (1764633605.0, 2.09)]
    assert reasons(out) == ["value_is_text", "not_a_number", "nan", "senml_invalid"]


# ---------------------------------------------------------------------------
# Properties: decode never raises, and its output is always well formed.
# Together these run well over 10,000 decode examples with a fixed random state.

FORMATS = st.sampled_from(["number", "json", "senml"])


def run(payload: bytes, fmt: str, **kwargs: Any) -> Decoded:
    out = decode(payload, fmt, now=NOW, **kwargs)
    check_invariants(out, fmt)
    return out


@settings(PROPERTY, max_examples=3000)
@given(payload=st.binary(max_size=200), fmt=FORMATS)
def test_property_arbitrary_bytes(payload: bytes, fmt: str) -> None:
    run(payload, fmt)


@settings(PROPERTY, max_examples=1500)
@given(text=st.text(max_size=100), fmt=FORMATS)
def test_property_arbitrary_text(text: str, fmt: str) -> None:
    run(text.encode("utf-8", "surrogatepass"), fmt)


@settings(PROPERTY, max_examples=2500)
@given(doc=JSON_VALUES, fmt=FORMATS, value_path=PATHS, time_path=st.none() | PATHS,
       max_depth=st.integers(1, 8), max_items=st.integers(1, 6))
def test_property_json_structures(doc: Any, fmt: str, value_path: str, time_path: str | None,
                                  max_depth: int, max_items: int) -> None:
    payload = json.dumps(doc).encode("utf-8", "surrogatepass")
    out = run(payload, fmt, value_path=value_path, time_path=time_path, max_depth=max_depth,
              max_items=max_items)
    assert len(out.readings) <= max_items


@settings(PROPERTY, max_examples=1500)
@given(tokens=st.lists(TOKENS, max_size=60), fmt=FORMATS, max_depth=st.integers(1, 40))
def test_property_token_soup(tokens: list[str], fmt: str, max_depth: int) -> None:
    run("".join(tokens).encode("utf-8", "surrogatepass"), fmt, max_depth=max_depth, time_path="bt")




@settings(PROPERTY, max_examples=2000)
@given(pack=st.lists(SENML_RECORDS | SCALARS, max_size=8), max_items=st.integers(1, 10))
def test_property_senml_random_base_fields(pack: list[Any], max_items: int) -> None:
    out = run(json.dumps(pack).encode("utf-8", "surrogatepass"), "senml", max_items=max_items)
    # Each record gives at most one reading or one problem (plus one too_many_items).
    assert len(out.readings) + len(out.problems) <= min(len(pack), max_items) + 1


@settings(PROPERTY, max_examples=40)
@given(n=st.sampled_from([0, 1, 9999, 10000, 10001, 20000]) | st.integers(0, 20000),
       item=st.sampled_from(["1", "NaN", '{"value":2}', '"x"', "[]", "1e999"]),
       fmt=FORMATS, max_items=st.sampled_from([1, 10000]) | st.integers(1, 30000))
def test_property_giant_arrays(n: int, item: str, fmt: str, max_items: int) -> None:
    payload = ("[" + ",".join([item] * n) + "]").encode()
    out = run(payload, fmt, max_items=max_items, max_bytes=10**6)
    if n > max_items and fmt != "number":
        assert "too_many_items" in reasons(out)


@settings(PROPERTY, max_examples=40)
@given(depth=st.sampled_from([1, 31, 32, 33, 999, 1001, 100000]) | st.integers(1, 100000),
       opener=st.sampled_from(["[", '{"a":', '[{"v":']), closed=st.booleans(),
       fmt=FORMATS, max_depth=st.sampled_from([32, 10**6]) | st.integers(1, 10**6))
def test_property_deep_nesting(depth: int, opener: str, closed: bool, fmt: str, max_depth: int) -> None:
    closer = {"[": "]", '{"a":': "}", '[{"v":': "}]"}[opener]
    text = opener * depth + ("1" + closer * depth if closed else "")
    out = run(text.encode(), fmt, max_depth=max_depth, max_bytes=10**7)
    levels = depth * len(closer)
    if levels > max_depth and fmt != "number":
        assert reasons(out) == ["too_deep"]


@settings(PROPERTY, max_examples=300)
@given(digits=st.integers(300, 20000), sign=st.sampled_from(["", "-"]), fmt=FORMATS,
       wrap=st.sampled_from(["{}", '{{"value": {}}}', '[{{"n": "a", "v": {}}}]', '[{{"n": "a", "bt": {}, "v": 1}}]',
                             '{{"value": 1, "ts": {}}}']))
def test_property_huge_integers(digits: int, sign: str, fmt: str, wrap: str) -> None:
    run(wrap.format(sign + "7" * digits).encode(), fmt, time_path="ts")


# ---------------------------------------------------------------------------
# stream_name

def test_stream_name_examples() -> None:
    assert stream_name("brackenfield/filler3/fill_g", None) == "brackenfield/filler3/fill_g"
    # A name in the form of RFC 8428's examples in section 5 (recalled from memory): a URN is
    # read as levels, without urn:dev:.
    assert stream_name("brackenfield/oven2", "urn:dev:ow:10e2073a01080063:temp") == \
        "brackenfield/oven2/ow/10e2073a01080063/temp"
    assert stream_name("brackenfield/l4/senml", "urn:brackenfield:l4:filler:fill_volume") == \
        "brackenfield/l4/senml/l4/filler/fill_volume"
    assert stream_name("brackenfield/oven2", "oven2:zone3") == "brackenfield/oven2/oven2:zone3"
    odd = stream_name("brackenfield/+/cap#\x00", "a\nb")
    assert odd.startswith("brackenfield/_/cap__/a_b~") and len(odd) == len("brackenfield/_/cap__/a_b~") + 12
    assert stream_name("", None).startswith("_~")
    long = stream_name("brackenfield/" + "x" * 300, None)
    assert len(long) == 256 and long.startswith("brackenfield/xxx")
    assert stream_name("a" * 256, None) == "a" * 256
    assert len(stream_name("a" * 257, None)) == 256


@settings(PROPERTY, max_examples=1500)
@given(topic=st.text(max_size=400), name=st.none() | st.text(max_size=400))
def test_property_stream_name_is_safe(topic: str, name: str | None) -> None:
    out = stream_name(topic, name)
    assert 1 <= len(out) <= 256
    assert is_safe(out)
    out.encode("utf-8")  # no lone surrogates
    assert stream_name(out, None) == out  # a safe name is kept as it is


SAFE_TEXT = st.text(st.characters(categories=["L", "N", "P", "S", "Zs"], exclude_characters="+#"),
                    min_size=1, max_size=120)


@settings(PROPERTY, max_examples=1000)
@given(a=st.tuples(SAFE_TEXT, st.none() | SAFE_TEXT), b=st.tuples(SAFE_TEXT, st.none() | SAFE_TEXT))
def test_property_safe_short_names_are_kept_and_distinct(a: tuple[str, str | None],
                                                         b: tuple[str, str | None]) -> None:
    def joined(p: tuple[str, str | None]) -> str:
        return p[0] if p[1] is None else f"{p[0]}/{p[1]}"
    assert stream_name(*a) == joined(a)
    if joined(a) != joined(b):
        assert stream_name(*a) != stream_name(*b)


@settings(PROPERTY, max_examples=500)
@given(prefix=st.text(max_size=300), a=st.text(min_size=1, max_size=20), b=st.text(min_size=1, max_size=20))
def test_property_long_or_unsafe_names_stay_distinct(prefix: str, a: str, b: str) -> None:
    long_prefix = "brackenfield/" + "x" * 260 + prefix
    if a != b:
        assert stream_name(long_prefix, a) != stream_name(long_prefix, b)
        assert stream_name("brackenfield/#" + a, None) != stream_name("brackenfield/#" + b, None)


# ---------------------------------------------------------------------------
# decode_many: the daemon's per-round decoder gives exactly what decode gives


def each(payloads: list[bytes], fmt: str = "json", **kwargs: Any) -> list[Decoded]:
    return [decode(p, fmt, now=NOW, **kwargs) for p in payloads]


def test_decode_many_equals_decode_on_flat_objects_and_their_defects() -> None:
    payloads = [b'{"v": 1.5, "ts": 1764633600}', b'{"v": "1.5", "ts": 1764633601}', b'{"v": NaN}',
                b'{"ts": 1764633602}', b'{"v": 2, "ts": "2025-12-02T00:00:03Z"}', b'{"v": 1e999}',
                b'{"v": 3, "ts": "soon"}', b'{"v": 4, "v": 5}', b'{"v": 6, "ts": 1764633604500}',
                b'{"v": 7.25, "ts": 1764633605.5}', b'{"v": false, "ts": 1764633606}']
    kwargs: dict[str, Any] = {"value_path": "v", "time_path": "ts"}
    assert decode_module._joined_objects(payloads, 65536) is not None  # the one-parse path is taken
    assert decode_module._joined_objects([b'{"a":"}', b'{","b":1}'], 65536) is None
    out = decode_many(payloads, "json", now=[NOW] * len(payloads), **kwargs)
    assert out == each(payloads, **kwargs)
    # {"v": 4, "v": 5} is set aside as duplicate_key (it once gave 5, the last value, silently)
    assert [r.value for d in out for r in d.readings] == [1.5, 2.0, 6.0, 7.25]
    assert reasons(out[7]) == ["duplicate_key"]
    assert out[8].readings[0].time == 1764633604.5  # epoch milliseconds, also on the quick path


@pytest.mark.parametrize("payloads", [
    # Joined, these two parse into ONE object {"a": "},{", "b": 1}: the count check must catch it.
    [b'{"a":"}', b'{","b":1}'],
    [b'{"v": 1}', b'{"v": 2'],                      # not flat-closed: decoded one by one
    [b'{"v": 1}', b'\xff{"v": 2}'],                # bad UTF-8
    [b'{"v": 1}', b'{"v": [1]}', b'{"v": {"w": 1}}'],
    [b'{"v": 1}', b' {"v": 2}', b''],
    [b'{"v": 1}', b'{"v": 2} {"v": 3}'],            # two documents in one payload
    [b'{"v": 1}', b'{"v": 2}, {"v": 3}'],
    [b'{"v": 1}', b'{' + b'"k": 1, ' * 10 + b'"v": 2}'],
])
def test_decode_many_never_mixes_payloads(payloads: list[bytes]) -> None:
    assert decode_many(payloads, "json", value_path="v", now=[NOW] * len(payloads)) == \
        each(payloads, value_path="v")


def test_decode_many_checks_its_arguments() -> None:
    with pytest.raises(ValueError, match="2 payloads but 1 arrival times"):
        decode_many([b"1", b"2"], "number", now=[NOW])
    with pytest.raises(ValueError, match="now must be finite"):
        decode_many([b'{"value": 1}', b'{"value": 2}'], "json", now=[NOW, float("nan")])


FLAT_PIECES = st.sampled_from(['"v": 1', '"v": 2.5', '"v": "x"', '"v": NaN', '"ts": 1764633600',
                               '"ts": 1764633600123', '"ts": 1764633600.25', '"ts": -5', '"v": true',
                               '"v": -0.0', '"v": 1e308', '"ts": 1e400', '"v": null', '"ts": true',
                               '"ts": "2025-12-02T00:00:00Z"', '"ts": null', '"a": "}"', '"b": "{"',
                               '"c": ","', '"d": "\\""', '"v": 9' + "9" * 400, '"v": 1' + "0" * 350,
                               '"v": -' + "9" * 400, '"ts": -' + "9" * 400, '"v": -' + "9" * 399,
                               # integers past 64 bits and past 2**53, within the float range; exponents
                               '"v": 9007199254740993', '"v": 123456789012345678901234567890',
                               '"v": -' + "7" * 300, '"ts": 1' + "3" * 20, '"v": 2.5e-3', '"v": 1E+2',
                               '"ts": 100000000000', '"ts": 100000000001', '"ts": 1e11',
                               '"', ",", "}", "{", " ", ":"])


@settings(PROPERTY, max_examples=1500)
@given(items=st.lists(st.lists(FLAT_PIECES, max_size=5), min_size=2, max_size=6),
       time_path=st.none() | st.just("ts"))
def test_property_decode_many_equals_decode(items: list[list[str]], time_path: str | None) -> None:
    # Mostly flat objects (the fast path), with stray braces, quotes and commas
    # that try to make the joined array parse differently from the parts.
    payloads = [("{" + ", ".join(parts) + "}").encode() for parts in items]
    assert decode_many(payloads, "json", value_path="v", time_path=time_path, now=[NOW] * len(payloads)) == \
        each(payloads, value_path="v", time_path=time_path)


def _as_readings(d: Decoded) -> Decoded:
    """A result with columns (JSON arrays, SenML packs), as the readings they stand for; the
    columns are float64 arrays, and their numbers must be exactly the readings' floats."""
    if d.senml is not None:
        assert not d.readings and not d.problems and d.columns is None
        assert all(t.dtype == np.float64 and v.dtype == np.float64 for t, v in zip(d.senml.times, d.senml.values))
        return Decoded(d.senml.readings(), [])
    if d.columns is None:
        return d
    ts, vs = d.columns
    assert not d.readings and not d.problems
    assert vs.dtype == np.float64 and (ts is None or ts.dtype == np.float64)
    return Decoded([Reading(None, None if ts is None else t, v, None)
                    for t, v in zip(ts.tolist() if ts is not None else [None] * len(vs), vs.tolist())], [])


def _fields(draw: Any, choices: dict[str, list[str]], must: tuple[str, ...] = ()) -> list[str]:
    keys = [k for k in choices if k in must or draw(st.booleans())]
    return [f'"{k}": {draw(st.sampled_from(choices[k]))}' for k in keys]


_PLAIN_ITEM = {"v": ["1", "2.5", "-0.0", "1e308", "9007199254740993", "-" + "7" * 300, "2.5e-3"],
               "ts": ["1764633600", "1764633600123", "1764633600.25", "-5", "1e11", "1" + "3" * 20],
               "note": ['"x"', "true", "null"]}


@settings(PROPERTY, max_examples=1500)
@given(items=st.lists(st.none() | st.lists(FLAT_PIECES, max_size=5), min_size=1, max_size=6),
       time_path=st.none() | st.just("ts"), max_items=st.sampled_from([3, 10000]), data=st.data())
def test_property_columns_give_the_readings_of_the_usual_path(items: list[list[str] | None], time_path: str | None,
                                                               max_items: int, data: st.DataObject) -> None:
    # A JSON array of flat objects, some plain (a number at each key, so that many arrays
    # take the column path), the rest with duplicate keys, stray braces and quotes, text,
    # NaN, huge numbers: columns=True must give the same numbers as the usual path (the
    # stdlib parser with repeated-key detection), or decode as usual.
    parts = [_fields(data.draw, _PLAIN_ITEM, ("v", "ts")) if it is None else it for it in items]
    payload = ("[" + ", ".join("{" + ", ".join(p) + "}" for p in parts) + "]").encode()
    kwargs: dict[str, Any] = {"value_path": "v", "time_path": time_path, "now": NOW, "max_items": max_items}
    assert _as_readings(decode(payload, "json", columns=True, **kwargs)) == decode(payload, "json", **kwargs)


SENML_PIECES = st.sampled_from([
    '"v": 1.5', '"v": 7', '"v": -0.0', '"v": "x"', '"v": true', '"v": null', '"v": NaN', '"v": 1e400',
    '"v": 1e308', '"v": 9' + "9" * 30, '"vs": "a"', '"vb": true', '"s": 1', '"n": "a"', '"n": "b:c"',
    '"n": ""', '"n": "bad name"', '"n": 5', '"n": "v"', '"t": 1', '"t": -5', '"t": 0.25', '"t": 1e12',
    '"t": 1764633600', '"t": "x"', '"t": null', '"u": "g"', '"u": "kg"', '"u": null', '"bn": "dev:"',
    '"bn": "urn:x:y:"', '"bn": ""', '"bn": 3', '"bt": 1764633600', '"bt": 1764633600000',
    '"bt": -1e308', '"bt": "now"', '"bu": "g"', '"bu": "Cel"', '"bv": 100', '"bv": 1e308',
    '"bv": "x"', '"bver": 10', '"bver": 11', '"bver": 5.0', '"bver": 0', '"bs": 1', '"x_": 1',
    '"ut": 1', '"q": [1]', '"r": {"v": 1}', '"w": "}"', '"v\\u0061": 1', '"', ",", "}", "{", " "])


_PLAIN_SENML = {"v": ["1.5", "7", "-0.0", "1e308", "2.5e-3", "-" + "3" * 25], "n": ['"a"', '"b:c"', '"a"'],
                "t": ["1", "-5", "0.25", "1e12", "1764633600"], "u": ['"g"']}
_PLAIN_BASE = {"bn": ['"dev:"', '"urn:x:y:"', '""'], "bt": ["1764633600", "1764633600000", "-1e308"],
               "bu": ['"g"', '"Cel"'], "bv": ["100", "1e308"], "bver": ["10", "11", "1"]}


@st.composite
def _senml_pack(draw: Any) -> str:
    """A pack of plain records (each takes the column path alone) and records of any pieces."""
    plain = draw(st.lists(st.sampled_from([True] * 5 + [False]), min_size=1, max_size=6))
    records = [_fields(draw, _PLAIN_SENML, ("v", "n")) if p else draw(st.lists(SENML_PIECES, max_size=5))
               for p in plain]
    if draw(st.booleans()):
        records[0] = _fields(draw, _PLAIN_BASE) + records[0]
    return "[" + ", ".join("{" + ", ".join(parts) + "}" for parts in records) + "]"


@settings(PROPERTY, max_examples=2000)
@given(pack=_senml_pack(), max_items=st.sampled_from([3, 10000]))
def test_property_senml_columns_give_the_readings_of_the_usual_path(pack: str, max_items: int) -> None:
    # SenML packs of flat records, some plain (so that many packs take the column path),
    # the rest with every kind of defect, repeated and base fields anywhere: columns=True
    # must give exactly the readings and problems of the usual path (the stdlib parser with
    # repeated-key detection, RFC 8428 resolution).
    kwargs: dict[str, Any] = {"now": NOW, "max_items": max_items}
    payload = pack.encode()
    assert _as_readings(decode(payload, "senml", columns=True, **kwargs)) == decode(payload, "senml", **kwargs)


def test_senml_columns_take_plain_packs() -> None:
    # RFC 8428 section 4.6 resolution on a pack the columns take: bt + t (relative below
    # 2**28 to now, section 4.5.3; epoch milliseconds above 1e11 are our rule), bv + v,
    # u else bu; records in an order that interleaves two names.
    pack = (b'[{"bn": "brackenfield:filler3:", "bt": 1764633600, "bu": "g", "bv": 500, "n": "fill", "v": 0.5},'
            b' {"n": "head", "u": "Cel", "t": 1, "v": -430},'
            b' {"n": "fill", "t": 2, "v": -0.25}, {"n": "head", "u": "Cel", "t": 3, "v": -429.5}]')
    got = decode(pack, "senml", now=NOW, columns=True)
    assert got.senml is not None
    assert got.senml.names == ["brackenfield:filler3:fill", "brackenfield:filler3:head"]
    assert got.senml.units == ["g", "Cel"]
    assert [v.tolist() for v in got.senml.values] == [[500.5, 499.75], [70.0, 70.5]]
    assert [t.tolist() for t in got.senml.times] == [[1764633600.0, 1764633602.0], [1764633601.0, 1764633603.0]]
    assert got.senml.order.tolist() == [0, 1, 0, 1]
    relative = decode(b'[{"n": "a", "t": -5, "v": 1}, {"n": "a", "v": 2}]', "senml", now=NOW, columns=True)
    assert relative.senml is not None and relative.senml.times[0].tolist() == [NOW - 5, NOW]
    millis = decode(b'[{"n": "a", "t": 1764633600500, "v": 1}]', "senml", now=NOW, columns=True)
    assert millis.senml is not None and millis.senml.times[0].tolist() == [1764633600.5]
    # Left to the usual path: a unit that changes within a name, a base field after the
    # first record, a string value, a repeated field, a sum, an extension, bad bytes.
    for payload in (b'[{"n": "a", "u": "g", "v": 1}, {"n": "a", "v": 2}]',
                    b'[{"n": "a", "v": 1}, {"bn": "x:", "n": "a", "v": 2}]',
                    b'[{"n": "a", "vs": "on"}]',
                    b'[{"n": "a", "v": 1, "v": 2}]',
                    b'[{"n": "a", "v": 1}, {"n": "a", "s": 2}]',
                    b'[{"n": "a", "v": 1, "x_": 0}]',
                    '[{"n": "\u00e9", "v": 1}]'.encode()):
        d = decode(payload, "senml", now=NOW, columns=True)
        assert d.senml is None and d == decode(payload, "senml", now=NOW)


def test_columns_take_clean_arrays_and_leave_the_rest() -> None:
    clean = b'[{"v": 1, "ts": 1764633600123}, {"v": -2.5, "ts": 1764633601}]'
    got = decode(clean, "json", value_path="v", time_path="ts", now=NOW, columns=True)
    assert got.columns is not None and got.readings == []
    assert [c.tolist() for c in got.columns] == [[1764633600.123, 1764633601.0], [1.0, -2.5]]
    for payload in (b'[{"v": 1, "v": 2}, {"w": 3, "v": 4}]',  # one object has the key twice
                    b'[{"v": 1, "x": {"v": 2}}]',  # nested
                    b'[{"v": 1}, {"v": "2"}]',  # text
                    b'[{"v\\u0020": 1}]',  # an escape
                    b' [{"v": 1}]'):  # not at the first byte
        d = decode(payload, "json", value_path="v", now=NOW, columns=True)
        assert d.columns is None and d == decode(payload, "json", value_path="v", now=NOW)


@settings(PROPERTY, max_examples=500)
@given(payloads=st.lists(st.binary(max_size=40), max_size=5), fmt=FORMATS)
def test_property_decode_many_on_arbitrary_bytes(payloads: list[bytes], fmt: str) -> None:
    assert decode_many(payloads, fmt, now=[NOW] * len(payloads)) == each(payloads, fmt)


# ---------------------------------------------------------------------------
# Duplicate keys.  RFC 8259 section 4 says names within an object SHOULD be
# unique and that receivers differ on what they do with repeats; Python's json
# keeps the last.  For the value or time key that would be a silent choice
# between two readings, so such an item is set aside as duplicate_key.  Repeats
# of keys the stream does not use change nothing.

@pytest.mark.parametrize("payload, kwargs, kept", [
    (b'{"value": 1, "value": 2}', {}, []),
    (b'{"value": 1, "ts": 5, "ts": 6}', {"time_path": "ts"}, []),
    (b'{"a": {"b": 1, "b": 2}}', {"value_path": "a.b"}, []),
    (b'{"v\\u0061lue": 1, "value": 2}', {}, []),  # the same key, spelled with an escape
    (b'{"value": 1, "note": "x", "note": "y"}', {}, [1.0]),
    (b'{"value": 1, "meta": {"value": 2}}', {}, [1.0]),  # the same name in another object
    (b'[{"value": 1, "value": 2}, {"value": 3}]', {}, [3.0]),  # one batch item only
])
def test_a_repeated_value_or_time_key_sets_the_item_aside(payload: bytes, kwargs: dict[str, Any],
                                                          kept: list[float]) -> None:
    out = decode(payload, "json", now=NOW, **kwargs)
    assert [r.value for r in out.readings] == kept
    assert reasons(out) == ([] if kept == [1.0] else ["duplicate_key"])
    # decode_many, over flat objects joined into one parse, says the same
    if payload.startswith(b"{"):
        many = decode_many([b'{"value": 7}', payload, b'{"value": 8}'], "json", now=[NOW] * 3, **kwargs)
        assert many[1] == out


def test_a_senml_record_with_a_repeated_field_is_set_aside_alone() -> None:
    out = decode(b'[{"bn": "line2/", "n": "a", "v": 1, "v": 2}, {"n": "b", "v": 3}]', "senml", now=NOW)
    assert [(r.name, r.value) for r in out.readings] == [("line2/b", 3.0)]
    assert reasons(out) == ["duplicate_key"]


def test_colons_are_counted_as_bytes_count_counts_them() -> None:
    # The column path's duplicate-key check counts a payload's colons with numpy; the
    # reference is the standard library's bytes.count, on random payloads of every byte
    # value (colons, UTF-8 lead and continuation bytes, NUL) and length, empty included.
    rng = np.random.default_rng(71)
    for _ in range(2000):
        n = int(rng.integers(0, 3000))
        alphabet = rng.choice([b":", b"{", b'"', b"\xc3", b"\xa9", b"\x00", b"9"], size=int(rng.integers(1, 6)))
        payload = b"".join(rng.choice(alphabet, size=n).tolist()) if n else b""
        assert decode_module._count_colons(payload) == payload.count(b":")
    assert decode_module._count_colons(bytes(range(256)) * 3) == 3


@pytest.mark.parametrize("stamp", ["1772431200000000", "1772431200000000000", "1772431200000000.5"])
@pytest.mark.parametrize("shape", ["object", "array", "senml"])
def test_epoch_microseconds_and_nanoseconds_are_refused_as_past_the_year_9999(stamp: str, shape: str) -> None:
    # Before, epoch microseconds read as milliseconds of the year 58,000 or later, and the
    # sample was set aside as too far ahead of the receiving clock, which did not say why.
    # RFC 3339 (section 5.6, date-fullyear = 4DIGIT) writes no year past 9999, nor does replay
    # read one; the reason names the likely cause, as replay's does.
    if shape == "object":
        out = decode(f'{{"value": 1, "ts": {stamp}}}'.encode(), "json", time_path="ts", now=NOW)
    elif shape == "array":
        out = decode(f'[{{"value": 1, "ts": {stamp}}}, {{"value": 2, "ts": {stamp}1}}]'.encode(), "json",
                     time_path="ts", now=NOW, columns=True)
    else:
        out = decode(f'[{{"n": "brackenfield:oven", "v": 1, "t": {stamp}}}]'.encode(), "senml", now=NOW,
                     columns=True)
    assert out.readings == [] and out.columns is None and out.senml is None
    assert set(reasons(out)) == {"bad_time"}, out
    assert all("past the year 9999" in p.message and "divide epoch microseconds or nanoseconds first" in p.message
               for p in out.problems), out.problems
    # decode_many (joined objects) agrees
    if shape == "object":
        many = decode_many([f'{{"value": 1, "ts": {stamp}}}'.encode()] * 2, "json", time_path="ts", now=[NOW] * 2)
        assert all(reasons(d) == ["bad_time"] for d in many), many


def test_the_last_millisecond_of_the_year_9999_is_still_a_time() -> None:
    # 9999-12-31T23:59:59.999Z in epoch milliseconds (calendar.timegm, the stdlib's POSIX count)
    import calendar

    last = calendar.timegm((9999, 12, 31, 23, 59, 59, 0, 0, 0)) * 1000 + 999
    out = decode(f'{{"value": 1, "ts": {last}}}'.encode(), "json", time_path="ts", now=NOW)
    assert out.problems == [] and out.readings[0].time == last / 1000.0
