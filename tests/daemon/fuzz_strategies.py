"""Hypothesis strategies shared by the decoder properties, the message-path
properties (tests/daemon/test_fuzz.py) and the long fuzz run
(tests/bench/bench_fuzz.py).

Every property runs with :data:`PROPERTY`: derandomized and without an
example database, so a run in CI sees the same examples as a run here.
"""

from __future__ import annotations

import unicodedata
from typing import Any

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

PROPERTY = settings(derandomize=True, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.filter_too_much])

KEYS = st.sampled_from(["value", "v", "n", "bn", "bt", "bu", "bv", "bs", "bver", "t", "u", "s", "vs", "vb",
                        "vd", "ts", "data", "weight_g", "x_", "ut"]) | st.text(max_size=4)
SCALARS = (st.none() | st.booleans() | st.integers() | st.floats(allow_nan=True, allow_infinity=True)
           | st.text(max_size=8)
           | st.sampled_from([10**400, -(10**4000), 2**28, 1e11 + 1, "12.5", "NaN", "2025-12-02T00:00:00Z",
                              "urn:dev:ow:1:", "brackenfield/"]))
JSON_VALUES = st.recursive(SCALARS, lambda inner: st.lists(inner, max_size=4)
                           | st.dictionaries(KEYS, inner, max_size=5), max_leaves=12)
PATHS = st.sampled_from(["value", "v", "data.weight_g", "ts", "a.b.c", "n"])
TOKENS = st.sampled_from(["[", "]", "{", "}", ",", ":", '"v"', '"n"', '"bt"', '"value"', "NaN", "Infinity",
                          "-Infinity", "1e999", "9" * 400, "-" + "9" * 5000, "12.5", '"a"', '"\\ud800"', "true",
                          "null", " ", '"', "\\", "0", "-0.0e-0"])


def any_of(good: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    return good | SCALARS


SENML_RECORDS = st.fixed_dictionaries({}, optional={
    "bn": any_of(st.text("ab09:/._-", max_size=8)),
    "bt": any_of(st.integers(-10, 2**28 + 10) | st.floats(1e9, 2e12)),
    "bu": any_of(st.sampled_from(["g", "Cel", "N.m", "%RH"])),
    "bv": any_of(st.floats(-1e3, 1e3)),
    "bs": any_of(st.floats(-1e3, 1e3)),
    "bver": any_of(st.integers(-1, 12)),
    "n": any_of(st.text("ab09:/._- ", max_size=6)),
    "t": any_of(st.floats(-100, 100)),
    "u": any_of(st.sampled_from(["g", "Cel"])),
    "v": any_of(st.floats(-1e6, 1e6) | st.just(1e308)),
    "vs": SCALARS, "vb": SCALARS, "vd": SCALARS, "s": SCALARS, "ut": SCALARS,
})


def is_safe(s: str) -> bool:
    """No MQTT wildcard, control character, line separator or surrogate in ``s``."""
    return all(ch not in "+#" and unicodedata.category(ch) not in ("Cc", "Cs", "Zl", "Zp") for ch in s)


# ---------------------------------------------------------------------------
# Whole messages: a topic (as the bytes paho received) and a payload.

#: Pieces of topic text that would break an alert topic or a metrics label if
#: they got through: wildcards, NUL, separators, quotes, backslashes, newlines,
#: '..', '$', a bidirectional override, a noncharacter, and length in
#: characters and in levels.
HOSTILE_PIECES = st.sampled_from([
    "+", "#", "\x00", "/", "..", "../..", '"', "\\", "\n", "\r\n", '\\"}\n# TYPE x counter\nx 1',
    "$SYS", "\u2028", "\u202e", "\ufffe", "\x85", " ", "é", "\U0001f9ea", "x" * 300, "/x" * 150,
    "/" * 250, "a/+/b", "a/#",
])
TOPIC_TEXT = st.lists(HOSTILE_PIECES | st.text(max_size=6), max_size=4).map("".join)
#: Where messages land: one root per stream entry of the test configuration,
#: fixed topics of the test's steady streams, and a root no entry matches.
ROOTS = st.sampled_from(["fz/num/", "fz/json/", "fz/batch/", "fz/senml/", "other/", ""])
FIXED_TOPICS = st.sampled_from(["fz/num/a", "fz/json/a", "fz/batch/a", "fz/senml/a"])
TOPICS = (FIXED_TOPICS.map(str.encode)
          | st.builds(lambda r, t: (r + t).encode("utf-8"), ROOTS, TOPIC_TEXT)
          | st.builds(lambda r, b: r.encode() + b, ROOTS, st.binary(max_size=8)))  # maybe not UTF-8


def _json(doc: Any) -> bytes:
    import json

    return json.dumps(doc).encode("utf-8", "surrogatepass")


#: Payloads named by the fuzzing task: deep nesting, NaN and Infinity
#: literals, numbers as text, huge integers (10**400, and past Python's
#: 4300-digit int-string limit), giant arrays, SenML with missing or
#: conflicting base fields, oversized messages, invalid UTF-8.
SPECIAL_PAYLOADS = st.sampled_from([
    b"[" * 100_000, b"[" * 65_000, b"[" * 30_000 + b"]" * 30_000, b'{"v":' * 40 + b"1" + b"}" * 40,
    b"NaN", b"Infinity", b"-Infinity", b'{"v": NaN, "ts": 1790000000}', b'{"v": Infinity}',
    b'{"value": -Infinity}', b'"12.5"', b'{"v": "12.5"}', b'{"value": "1e3"}', b'[{"n": "a", "v": "7"}]',
    str(10**400).encode(), b'{"v": ' + str(10**400).encode() + b"}", b"9" * 5000, b'{"v": ' + b"9" * 5000 + b"}",
    b'{"v": 1, "ts": ' + b"9" * 4301 + b"}", b'[{"n": "a", "bt": ' + b"9" * 4400 + b', "v": 1}]',
    b"[" + b"1," * 30_000 + b"1]", b"[" + b'{"value": 1},' * 5000 + b'{"value": 1}]',
    b'[{"bn": "oven/", "v": 1}, {"n": "t", "v": 2}]', b'[{"n": "t", "v": 1, "bv": 1e308}]',
    b'[{"bn": 5, "n": "a", "v": 1}, {"n": "b", "v": 2}]', b'[{"bt": "now", "n": "a", "v": 1}, {"n": "a", "v": 2}]',
    b'[{"bn": "a/", "bver": 99, "n": "b", "v": 1}]', b'[{"n": "a", "v": 1, "vs": "x"}]', b'[{"bn": "a"}]',
    b'[{"n": "a", "s": 3}]', b'[{"n": "a/+/#", "v": 1}]', b'[{"n": "a\\u0000b", "v": 1}]',
    b'[{"n": "a/../../x", "v": 1}]', b'[{"n": "' + b"a/" * 150 + b'x", "v": 1}]',
    b"1" * 70_000, b"[" + b" " * 70_000 + b"]", b"\xff\xfe\xfd", b'{"v": 1, "x": "\xe9"}', b"\xed\xa0\x80",
    b"", b"   ", b"[]", b"\xef\xbb\xbf42",
])
PAYLOADS = (st.binary(max_size=200) | st.text(max_size=60).map(lambda t: t.encode("utf-8", "surrogatepass"))
            | JSON_VALUES.map(_json) | st.lists(TOKENS, max_size=40).map(lambda ts: "".join(ts).encode())
            | st.lists(SENML_RECORDS | SCALARS, max_size=6).map(_json)
            | st.floats(allow_nan=True, allow_infinity=True).map(lambda f: repr(f).encode())
            | st.builds(lambda v, t: _json({"v": v, "ts": t}), st.floats(-1e3, 1e3) | SCALARS,
                        st.integers(1_780_000_000, 1_800_000_000) | SCALARS)
            | SPECIAL_PAYLOADS)
MESSAGES = st.lists(st.tuples(TOPICS, PAYLOADS), min_size=1, max_size=3)


# ---------------------------------------------------------------------------
# Sparkplug B (format: sparkplug_b): topics and payloads built with the schema of
# shiftwatch.sparkplug, some fields left out, some of the wrong kind, and raw bytes.

_SP_NODE_TOPICS = st.sampled_from([
    "spBv1.0/fz/NBIRTH/e1", "spBv1.0/fz/NDATA/e1", "spBv1.0/fz/NDEATH/e1", "spBv1.0/fz/DBIRTH/e1/d1",
    "spBv1.0/fz/DDATA/e1/d1", "spBv1.0/fz/DDEATH/e1/d1", "spBv1.0/fz/NBIRTH/e2", "spBv1.0/fz/DDATA/e2/d2"])
_SP_OTHER_TOPICS = st.sampled_from([
    "spBv1.0/fz/NCMD/e1", "spBv1.0/fz/DCMD/e1/d1", "spBv1.0/STATE/host1", "spBv1.0/fz/NDATA/e1/d1",
    "spBv1.0/fz/XDATA/e1", "spBv1.0/fz/DDATA/e1", "spBv1.0/fz/DDATA/e2/d\x00", "spBv1.0/fz/DBIRTH/e2/#",
    # Names no broker would carry, where a rebirth request must not be published.
    "spBv1.0/fz/NDATA/e\x00", "spBv1.0/f+/NDATA/e1", "spBv1.0/fz/DDATA/#/d1"])
#: Mostly the messages of two edge nodes and their devices, sometimes anything else.
SP_TOPICS = st.one_of(_SP_NODE_TOPICS, _SP_NODE_TOPICS, _SP_NODE_TOPICS, _SP_OTHER_TOPICS)
SP_METRICS = st.fixed_dictionaries({}, optional={
    "name": st.sampled_from(["", "bdSeq", "Fill Weight", "a/b", "Node Control/Rebirth", "x+#"]) | st.text(max_size=6),
    "alias": st.integers(0, 5) | st.sampled_from([2**64 - 1]),
    "timestamp": st.integers(0, 2**64 - 1) | st.just(1_790_000_000_000),
    "datatype": st.integers(0, 40) | st.sampled_from([2**32 - 1]),
    "is_null": st.booleans(),
    "is_historical": st.booleans(),
    "int_value": st.integers(0, 2**32 - 1),
    "long_value": st.integers(0, 2**64 - 1),
    "float_value": st.floats(width=32, allow_nan=True, allow_infinity=True),
    "double_value": st.floats(allow_nan=True, allow_infinity=True),
    "boolean_value": st.booleans(),
    "string_value": st.text(max_size=6),
    "bytes_value": st.binary(max_size=6),
})
#: Well-formed metrics (a name or an alias, a numeric datatype and its value field), so that
#: sequences reach births followed by data and deaths, not only the error paths.
SP_GOOD_METRICS = st.one_of(
    st.fixed_dictionaries({"name": st.sampled_from(["Fill Weight", "Line Speed", "a/b"]),
                           "alias": st.integers(0, 3), "datatype": st.just(10),
                           "double_value": st.floats(-1e6, 1e6)}),
    st.fixed_dictionaries({"alias": st.integers(0, 3), "double_value": st.floats(-1e6, 1e6)},
                          optional={"timestamp": st.integers(1_790_000_000_000, 1_790_000_100_000)}),
    st.fixed_dictionaries({"name": st.sampled_from(["Count", "Fill Weight"]), "datatype": st.sampled_from([1, 3, 4, 7]),
                           "int_value": st.integers(0, 2**32 - 1)}),
    st.fixed_dictionaries({"name": st.just("bdSeq"), "datatype": st.just(8), "long_value": st.integers(0, 3)}))
SP_PAYLOADS = st.fixed_dictionaries({"metrics": st.lists(SP_GOOD_METRICS | SP_METRICS, max_size=5)}, optional={
    "timestamp": st.integers(0, 2**64 - 1) | st.just(1_790_000_000_000),
    "seq": st.integers(0, 4) | st.integers(0, 300) | st.sampled_from([2**64 - 1]),
    "uuid": st.text(max_size=4),
    "body": st.binary(max_size=4),
})
