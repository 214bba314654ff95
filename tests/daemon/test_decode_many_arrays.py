"""``decode_many`` with ``columns=True`` on rounds of JSON arrays: since 2026-12-05 it reads
each array's columns itself, with the options checked once for the round, instead of
calling ``decode`` for each payload.  Guard of that speed change: each result must be
exactly ``decode``'s for the payload (the same columns bit for bit, or the same readings
and problems), on rounds that mix clean arrays with bad, oversized, non-ASCII, non-array
and bytearray payloads, and with the same error for a bad arrival time.  The numbers of
clean arrays are also held to Python's own JSON parser (``json.loads``, each value by
``float()``), a reference outside the project.
"""

from __future__ import annotations

import json
import math
import struct
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.decode import Decoded, decode, decode_many

from .fuzz_strategies import PROPERTY

NOW = 1_790_000_000.0


def same(a: Decoded, b: Decoded) -> bool:
    if a.readings != b.readings or a.problems != b.problems or a.senml != b.senml:
        return False
    if a.columns is None or b.columns is None:
        return a.columns is b.columns
    return all((x is None and y is None) or (x is not None and y is not None and x.dtype == y.dtype
                                             and x.tobytes() == y.tobytes())
               for x, y in zip(a.columns, b.columns, strict=True))


NUMBERS = st.one_of(st.floats(allow_nan=False, allow_infinity=False).map(repr),
                    st.integers(min_value=-(10**25), max_value=10**25).map(str),
                    st.sampled_from(["-0.0", "-0", "1e400", "NaN", '"5"', "null", "true", "1764633600123"]))
ITEMS = st.one_of(
    st.builds(lambda v, t: f'{{"v": {v}, "ts": {t}}}', NUMBERS, NUMBERS),
    st.builds(lambda v, t: f'{{"ts":{t},"v":{v}}}', NUMBERS, NUMBERS),
    st.builds(lambda v: f'{{"v": {v}}}', NUMBERS),
    st.builds(lambda v, t: f'{{"v": {v}, "ts": {t}, "note": "é"}}', NUMBERS, NUMBERS),
    st.builds(lambda v, t: f'{{"v": {v}, "v": {t}, "ts": 1}}', NUMBERS, NUMBERS),
    st.sampled_from(['{"v": 1, "ts": {"x": 2}}', '[1]', '{', '1', '"v"']),
)
PAYLOADS = st.one_of(
    st.lists(ITEMS, max_size=8).map(lambda xs: ("[" + ", ".join(xs) + "]").encode()),
    st.lists(ITEMS, min_size=1, max_size=3).map(lambda xs: (" [" + ",".join(xs) + "]").encode()),
    st.builds(lambda v: f'{{"v": {v}, "ts": 1764633600}}'.encode(), NUMBERS),
    st.binary(max_size=30),
    st.just(b"[" + b'{"v": 1, "ts": 1764633600},' * 40 + b'{"v": 2, "ts": 1764633601}]'),  # past max_bytes below
)


@settings(PROPERTY, max_examples=1500)
@given(payloads=st.lists(PAYLOADS, min_size=2, max_size=6), as_bytearray=st.lists(st.booleans(), min_size=6,
                                                                                   max_size=6),
       time_path=st.sampled_from(["ts", None]), max_items=st.sampled_from([2, 10000]),
       max_bytes=st.sampled_from([1000, 65536]))
def test_property_decode_many_reads_arrays_as_decode_does(payloads: list[bytes], as_bytearray: list[bool],
                                                          time_path: str | None, max_items: int,
                                                          max_bytes: int) -> None:
    ps: list[bytes | bytearray] = [bytearray(p) if b else p for p, b in zip(payloads, as_bytearray)]
    now = [NOW + i for i in range(len(ps))]
    kwargs: dict[str, Any] = {"value_path": "v", "time_path": time_path, "max_items": max_items,
                              "max_bytes": max_bytes, "columns": True}
    many = decode_many(ps, "json", now=now, **kwargs)
    each = [decode(p, "json", now=t, **kwargs) for p, t in zip(ps, now)]
    assert len(many) == len(each)
    assert all(same(a, b) for a, b in zip(many, each))


def test_decode_many_reads_a_round_of_clean_arrays_as_json_loads_does() -> None:
    # Python's json.loads and float() of each number (the reference outside the project);
    # the times in milliseconds as float()/1000, the rule of the usual path.
    ps = [json.dumps([{"v": round(500 + 0.01 * ((j * 7 + i) % 13), 3), "ts": 1764633600000 + 1000 * j}
                      for j in range(260)]).encode() for i in range(5)]
    got = decode_many(ps, "json", value_path="v", time_path="ts", now=[NOW] * 5, columns=True)
    for p, d in zip(ps, got):
        assert d.columns is not None and not d.readings and not d.problems
        ts, vs = d.columns
        doc = json.loads(p)
        assert vs.tobytes() == struct.pack("260d", *[float(x["v"]) for x in doc])
        assert ts is not None and ts.tobytes() == struct.pack("260d", *[float(x["ts"]) / 1000.0 for x in doc])


@pytest.mark.parametrize("bad", [math.nan, math.inf])
def test_decode_many_refuses_a_bad_arrival_time_as_decode_does(bad: float) -> None:
    ps = [b'[{"v": 1, "ts": 1764633600}]', b'[{"v": 2, "ts": 1764633601}]']
    with pytest.raises(ValueError) as many:
        decode_many(ps, "json", value_path="v", time_path="ts", now=[NOW, bad], columns=True)
    with pytest.raises(ValueError) as one:
        decode(ps[1], "json", value_path="v", time_path="ts", now=bad, columns=True)
    assert str(many.value) == str(one.value)
