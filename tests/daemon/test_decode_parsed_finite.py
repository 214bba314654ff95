"""A JSON array's value column is not checked for finiteness after msgspec's parse
(``decode.PARSED_FINITE``): msgspec refuses every number beyond the float range and the
NaN and Infinity literals, so none of its values is NaN or infinite.

Guard of a speed change.  First the premise, against Python's own JSON parser
(``json.loads``, a reference outside the project, which turns the same spellings into
``inf`` and ``nan``): both of the column path's decoders refuse each of them.  Then the
change itself: ``decode`` and ``decode_many`` give the same result, columns bit for bit,
readings and problems alike, with the check and without it, on payloads full of such
numbers beside finite ones.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from contextlib import contextmanager

import msgspec
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import decode as decode_mod
from shiftwatch.decode import decode, decode_many

from .fuzz_strategies import PROPERTY
from .test_decode_many_arrays import same

NOW = 1_790_000_000.0
NOT_FINITE = ["1e400", "-1e400", "1e309", "17976931348623159e292", "1" + "0" * 400, "-" + "9" * 320,
              "NaN", "Infinity", "-Infinity"]


@contextmanager
def checked(on: bool) -> Iterator[None]:
    saved = decode_mod.PARSED_FINITE
    decode_mod.PARSED_FINITE = not on
    try:
        yield
    finally:
        decode_mod.PARSED_FINITE = saved


@pytest.mark.parametrize("number", NOT_FINITE)
def test_msgspec_refuses_what_json_loads_makes_not_finite(number: str) -> None:
    payload = f'[{{"v": 1.5, "ts": {NOW}}}, {{"v": {number}, "ts": {NOW + 1}}}]'.encode()
    parsed = json.loads(payload)[1]["v"]  # Python's parser: inf or nan, or an int past float's range
    if isinstance(parsed, int):
        with pytest.raises(OverflowError):
            float(parsed)
    else:
        assert not math.isfinite(parsed)
    decoders = decode_mod._column_decoders("v", "ts")
    assert decoders is not None
    strict, lenient, _colons = decoders
    for dec in (strict, lenient):
        with pytest.raises(msgspec.MsgspecError):
            dec.decode(payload)
    with checked(False):  # and the payload goes the usual way, which names the problem
        got = decode(payload, "json", value_path="v", time_path="ts", now=NOW, columns=True)
    assert got.columns is None and got.problems


VALUES = st.one_of(st.floats(allow_nan=False, allow_infinity=False).map(repr), st.sampled_from(NOT_FINITE),
                   st.integers(-(10**30), 10**30).map(str))


@settings(PROPERTY, max_examples=600)
@given(values=st.lists(VALUES, min_size=1, max_size=12), extra=st.booleans())
def test_decoding_is_the_same_with_and_without_the_check(values: list[str], extra: bool) -> None:
    note = ', "note": 1' if extra else ""
    items = [f'{{"v": {v}, "ts": {NOW + i}{note}}}' for i, v in enumerate(values)]
    payload = ("[" + ", ".join(items) + "]").encode()
    results = []
    for on in (True, False):
        with checked(on):
            results.append((decode(payload, "json", value_path="v", time_path="ts", now=NOW, columns=True),
                            decode_many([payload, payload], "json", value_path="v", time_path="ts",
                                        now=[NOW, NOW], columns=True)))
    (one_on, many_on), (one_off, many_off) = results
    assert same(one_on, one_off)
    assert all(same(a, b) for a, b in zip(many_on, many_off, strict=True))


def test_the_switch_is_on() -> None:
    assert decode_mod.PARSED_FINITE is True
