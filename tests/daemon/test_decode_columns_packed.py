"""The columns of a JSON array written by ``struct.pack_into`` (``decode.PACKED_COLUMNS``)
against ``np.fromiter`` over the same floats (the reference path, the switch off).

Guard of a speed change: the two must give the same float64 arrays bit for bit (NaN
cannot reach a column; signed zeros, subnormals, the largest doubles, integers past
2**53 and times in milliseconds can), and a daemon fed the same batched messages must
give the same alert records, engine states and journal bytes with either.  The values
are also held to the standard library's JSON parser (``json.loads``, Python's own
reference implementation of RFC 8259 number parsing, each number converted by
``float()``): the packed column is exactly those doubles.
"""

from __future__ import annotations

import json
import math
import struct
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import decode as decode_mod
from shiftwatch.decode import decode
from shiftwatch.mqtt import Message

from .fuzz_strategies import PROPERTY
from .switchrun import RunOutput, local_daemon, run_rounds
from .test_decode import _senml_pack

NOW = 1_790_000_000.0
T0 = 1_790_000_000.0


@contextmanager
def packed(on: bool) -> Iterator[None]:
    saved = decode_mod.PACKED_COLUMNS
    decode_mod.PACKED_COLUMNS = on
    try:
        yield
    finally:
        decode_mod.PACKED_COLUMNS = saved


def both(payload: bytes, time_path: str | None) -> tuple[Any, Any]:
    kwargs: dict[str, Any] = {"value_path": "v", "time_path": time_path, "now": NOW, "columns": True}
    with packed(True):
        new = decode(payload, "json", **kwargs)
    with packed(False):
        old = decode(payload, "json", **kwargs)
    return new, old


def same_bits(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    if a is None or b is None:
        return a is b
    return a.dtype == b.dtype == np.float64 and a.shape == b.shape and a.tobytes() == b.tobytes()


# Numbers as a sender writes them: shortest round-trip text of any finite double (signed
# zeros, subnormals, the extremes), integers (past 2**53 too), exponents, fixed decimals.
NUMBERS = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.integers(min_value=-(10**30), max_value=10**30).map(str),
    st.sampled_from(["-0.0", "0", "5e-324", "-5e-324", "2.2250738585072014e-308", "1.7976931348623157e308",
                     "-1.7976931348623157e308", "9007199254740993", "1E+2", "2.5e-3", "100.123", "1e-400"]),
    st.decimals(allow_nan=False, allow_infinity=False, places=3,
                min_value=-1000, max_value=1000).map(str),
)
TIMES = st.one_of(
    st.integers(min_value=1_700_000_000_000, max_value=1_800_000_000_000).map(str),  # milliseconds
    st.integers(min_value=0, max_value=2_000_000_000).map(str),  # seconds
    st.floats(min_value=-1e12, max_value=1e13, allow_nan=False).map(repr),
)


@settings(PROPERTY, max_examples=800)
@given(values=st.lists(NUMBERS, min_size=1, max_size=300), data=st.data(),
       time_path=st.none() | st.just("ts"), extra=st.booleans())
def test_property_packed_columns_are_the_reference_columns(values: list[str], data: st.DataObject,
                                                           time_path: str | None, extra: bool) -> None:
    times = data.draw(st.lists(TIMES, min_size=len(values), max_size=len(values)))
    # ``extra``: a key beside the watched ones (the lenient parse; the columns all the same).
    items = [("{" + f'"v": {v}' + (f', "ts": {t}' if time_path else "") + (', "note": "x"' if extra else "") + "}")
             for v, t in zip(values, times)]
    payload = ("[" + ", ".join(items) + "]").encode()
    new, old = both(payload, time_path)
    assert (new.columns is None) == (old.columns is None)
    assert new.readings == old.readings and new.problems == old.problems
    if new.columns is None:
        return
    (nt, nv), (ot, ov) = new.columns, old.columns
    assert same_bits(nv, ov) and same_bits(nt, ot)
    assert nv.flags.writeable and nv.flags.owndata and (nt is None or (nt.flags.writeable and nt.flags.owndata))
    # The reference outside the project: Python's json.loads and float() of each value.
    ref = [float(item["v"]) for item in json.loads(payload)]
    assert nv.tobytes() == struct.pack(f"{len(ref)}d", *ref)


def test_packed_columns_near_the_limits_are_the_reference_columns() -> None:
    # The property above draws at most 300 items; a column of 1,900 (a payload near the
    # 64 KiB default, times included) and one of the 10,000-item limit (values only,
    # with max_bytes raised) take the same path on the same floats.
    assert decode_mod.PACKED_COLUMNS is True  # the daemon's default is the packed path
    rng = np.random.default_rng(20261205)
    for n, with_time, max_bytes in ((1_900, True, 65536), (10_000, False, 400_000)):
        vals = [repr(float(v)) for v in np.round(rng.normal(100.0, 1.0, n), 3)]
        items = [('{"v":' + v + (f',"ts":{1_790_000_000_000 + 1000 * i}' if with_time else "") + "}")
                 for i, v in enumerate(vals)]
        payload = ("[" + ",".join(items) + "]").encode()
        assert len(payload) <= max_bytes
        kwargs: dict[str, Any] = {"value_path": "v", "time_path": "ts" if with_time else None, "now": NOW,
                                  "columns": True, "max_bytes": max_bytes}
        with packed(True):
            new = decode(payload, "json", **kwargs)
        with packed(False):
            old = decode(payload, "json", **kwargs)
        assert new.columns is not None and old.columns is not None, (n, new.problems)
        (nt, nv), (ot, ov) = new.columns, old.columns
        assert len(nv) == n and same_bits(nv, ov) and same_bits(nt, ot)
        # Python's json.loads and float() of each value: the reference outside the project.
        assert nv.tobytes() == struct.pack(f"{n}d", *[float(item["v"]) for item in json.loads(payload)])


def test_packed_columns_keep_signed_zeros_and_extremes() -> None:
    payload = (b'[{"v": -0.0, "ts": 1790000000000}, {"v": 5e-324, "ts": 1790000001000}, '
               b'{"v": 1.7976931348623157e308, "ts": 1790000002000}, {"v": 9007199254740993, "ts": 1790000003000}]')
    new, old = both(payload, "ts")
    assert new.columns is not None and old.columns is not None
    (nt, nv), (ot, ov) = new.columns, old.columns
    assert same_bits(nv, ov) and same_bits(nt, ot)
    # float() of the same texts (Python's correctly rounded conversion, IEEE 754-2008 binary64)
    assert math.copysign(1.0, float(nv[0])) == -1.0
    assert nv.tolist() == [-0.0, 5e-324, 1.7976931348623157e308, float(9007199254740993)]
    # milliseconds to seconds, as float()/1000 of the texts (the usual path's rule)
    assert nt.tolist() == [1790000000000 / 1000.0, 1790000001000 / 1000.0, 1790000002000 / 1000.0,
                           1790000003000 / 1000.0]


@settings(PROPERTY, max_examples=1500)
@given(pack=_senml_pack(), n=st.integers(min_value=1, max_value=40))
def test_property_packed_senml_columns_are_the_reference_columns(pack: str, n: int) -> None:
    # test_decode.py's packs (plain records, and records of any pieces), the records repeated
    # up to 40 times so that longer columns are packed too: the same names, units, order
    # and float64 columns bit for bit, or both not columns.
    records = json.loads(pack) if _is_json(pack) else None
    payload = (json.dumps(records[:1] + records[1:] * n) if records else pack).encode()
    out = {}
    for on in (True, False):
        with packed(on):
            out[on] = decode(payload, "senml", now=NOW, columns=True)
    new, old = out[True], out[False]
    assert new.readings == old.readings and new.problems == old.problems
    assert (new.senml is None) == (old.senml is None)
    if new.senml is None:
        return
    assert new.senml.names == old.senml.names and new.senml.units == old.senml.units
    assert new.senml.order.tobytes() == old.senml.order.tobytes()
    assert all(same_bits(a, b) for a, b in zip(new.senml.times, old.senml.times, strict=True))
    assert all(same_bits(a, b) for a, b in zip(new.senml.values, old.senml.values, strict=True))


def test_packed_senml_columns_with_records_without_a_time() -> None:
    # A record without "t" is at the base time (RFC 8428 section 4.5.3: t defaults to 0,
    # relative to bt); the packed path meets the missing time and takes the reference's way.
    payload = (b'[{"bn": "oven2:", "bt": 1790000000, "n": "zone1", "v": -0.0}, {"n": "zone1", "t": 1, "v": 5e-324}, '
               b'{"n": "zone1", "v": 1.7976931348623157e308}]')
    out = {}
    for on in (True, False):
        with packed(on):
            out[on] = decode(payload, "senml", now=NOW, columns=True).senml
    new, old = out[True], out[False]
    assert new is not None and old is not None
    assert same_bits(new.times[0], old.times[0]) and same_bits(new.values[0], old.values[0])
    assert new.times[0].tolist() == [1790000000.0, 1790000001.0, 1790000000.0]
    # the value is the base value plus v (RFC 8428 section 4.5.3; bv defaults to 0): in
    # IEEE 754 arithmetic 0.0 + -0.0 is +0.0, on both paths
    assert math.copysign(1.0, float(new.values[0][0])) == 1.0
    assert new.values[0].tolist() == [0.0 + -0.0, 0.0 + 5e-324, 0.0 + 1.7976931348623157e308]


def _is_json(text: str) -> bool:
    try:
        return isinstance(json.loads(text), list)
    except ValueError:
        return False


def _rounds() -> list[list[Message]]:
    """12 streams, 30 rounds of JSON arrays of 260 (times in milliseconds, 1 s apart):
    a third step by 1 to 4 sigma at round 12, every stream has 8-sigma spikes now and then."""
    rng = np.random.default_rng(15)
    out = []
    for k in range(30):
        msgs = []
        for i in range(12):
            x = 50.0 + rng.standard_normal(260)
            if i % 3 == 0 and k >= 12:
                x += 1.0 + i / 4.0
            x[rng.random(260) < 0.004] += 8.0
            t0 = (T0 + k * 260) * 1000.0
            items = ",".join(f'{{"v":{v:.4f},"ts":{int(t0) + 1000 * j}}}' for j, v in enumerate(x))
            msgs.append(Message(f"line/s{i}/v", f"[{items}]".encode(), T0 + (k + 1) * 260 + 0.05, 0, 0))
        out.append(msgs)
    return out


def _run(tmp_path: Path, name: str, on: bool) -> RunOutput:
    return run_rounds(local_daemon(tmp_path, name, "{topic: 'line/+/v', format: json, value: v, time: ts}"), _rounds(), packed, on)


def test_daemon_gives_the_same_records_states_and_journal_with_packed_columns(tmp_path: Path) -> None:
    new = _run(tmp_path, "packed", True)
    old = _run(tmp_path, "fromiter", False)
    assert len(new[0]) > 0  # the steps were detected: records to compare
    assert new[0] == old[0]
    assert new[1] == old[1]
    assert len(new[2]) > 12 * 30 * 260 * 24 and new[2] == old[2]
