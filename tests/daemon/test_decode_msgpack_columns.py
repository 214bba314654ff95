"""A JSON array's columns read out of msgspec's MessagePack encoding of the parsed structs
(``decode.MSGPACK_COLUMNS``) against the reference, two list comprehensions and
``struct.pack_into``.

Guard of a speed change: the two must give the same columns bit for bit (signed zeros,
subnormals, the largest doubles, integers turned into floats, times in seconds and in
milliseconds), or both leave the payload to the usual path, for arrays of 1 to 300
objects (the encoding's header is one byte below 16 items and three from 16), keys of
any length, with and without a time key; a daemon fed the same arrays must give the same
records, engine states and journal bytes either way.  The columns are also held to
Python's own JSON parser (``json.loads``, each number by ``float()``, packed by
``struct``), a reference outside the project, and to the MessagePack specification's
float 64 format (``0xcb`` then the big-endian IEEE 754 double, msgpack/spec.md).  A
parsed struct that holds anything but floats (an int) changes the encoding's length: the
check sees it and the list comprehensions take the payload.
"""

from __future__ import annotations

import json
import struct
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, get_args

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import decode as decode_mod
from shiftwatch.decode import _array_columns, decode
from shiftwatch.mqtt import Message

from .fuzz_strategies import PROPERTY
from .switchrun import local_daemon, run_rounds

NOW = 1_790_000_000.0


@contextmanager
def packed(on: bool) -> Iterator[None]:
    saved = decode_mod.MSGPACK_COLUMNS
    decode_mod.MSGPACK_COLUMNS = on
    try:
        yield
    finally:
        decode_mod.MSGPACK_COLUMNS = saved


def columns(payload: bytes, vkey: str, tkey: str | None, on: bool) -> Any:
    with packed(on):
        got = _array_columns(payload, (vkey,), None if tkey is None else (tkey,), 10000, 32)
    if got is None:
        return None
    return tuple(None if c is None else (c.dtype.str, c.flags.writeable, c.tobytes()) for c in got)


NUMBERS = st.one_of(st.floats(allow_nan=False, allow_infinity=False), st.integers(-(10**20), 10**20),
                    st.sampled_from([0.0, -0.0, 5e-324, -2.2250738585072014e-308, 1.7976931348623157e308]))
TIMES = st.one_of(st.floats(1e9, 2e9), st.floats(1e12, 2e12), st.integers(1_000_000_000, 2_000_000_000))
KEYS = st.sampled_from([("v", "ts"), ("value", None), ("fill_g", "time"), ("a" * 40, "t:b"), ("x" * 300, "y")])


@settings(PROPERTY, max_examples=700)
@given(values=st.lists(NUMBERS, min_size=1, max_size=40), times=st.lists(TIMES, min_size=40, max_size=40),
       keys=KEYS, spaced=st.booleans())
def test_msgpack_columns_are_the_reference_columns(values: list[float], times: list[float],
                                                   keys: tuple[str, str | None], spaced: bool) -> None:
    vkey, tkey = keys
    sep = ", " if spaced else ","
    items = [json.dumps({vkey: v} if tkey is None else {vkey: v, tkey: t}, separators=(sep, ": " if spaced else ":"))
             for v, t in zip(values, times, strict=False)]
    payload = ("[" + sep.join(items) + "]").encode()
    on = columns(payload, vkey, tkey, True)
    assert on == columns(payload, vkey, tkey, False)
    if on is not None:  # Python's own parser, each number by float(), packed by struct
        doc = json.loads(payload)
        assert on[-1][2] == struct.pack(f"={len(doc)}d", *(float(o[vkey]) for o in doc))


@pytest.mark.parametrize("n", [1, 15, 16, 17, 260, 4096, 10000])
def test_msgpack_columns_at_every_header_size(n: int) -> None:
    rng = np.random.default_rng(181 + n)
    x = np.round(500 + 0.4 * rng.standard_normal(n), 4)
    x[::7] = -0.0
    payload = json.dumps([{"v": float(v), "ts": NOW + j} for j, v in enumerate(x)]).encode()
    on = columns(payload, "v", "ts", True)
    assert on is not None and on == columns(payload, "v", "ts", False)
    assert on[1][2] == struct.pack(f"={n}d", *(o["v"] for o in json.loads(payload)))
    ms = json.dumps([{"v": float(v), "ts": (NOW + j) * 1000.0} for j, v in enumerate(x)]).encode()
    assert columns(ms, "v", "ts", True) == columns(ms, "v", "ts", False) == on


def test_the_layout_follows_the_msgpack_float64_format() -> None:
    # msgpack/spec.md, "float format family": float 64 stores 0xcb and the big-endian
    # IEEE 754 double; a map of N <= 15 pairs begins 0x80 | N; a str of up to 31 bytes
    # 0xa0 | length.
    lay = decode_mod._msgpack_layout("v", "ts")
    assert lay is not None
    assert lay.fixed == b"\x82\xa1v\xcb" + bytes(8) + b"\xa2ts\xcb" + bytes(8)
    assert (lay.item, lay.value, lay.time) == (24, 4, 16)


def test_a_struct_holding_an_int_leaves_the_payload_to_the_list_comprehensions() -> None:
    decoders = decode_mod._column_decoders("v", "ts")
    assert decoders is not None
    (kind,) = get_args(decoders[0].type)
    doc = [kind(1.5, NOW), kind(2, NOW + 1.0)]  # (an int where msgspec's parse puts a float)
    assert decode_mod._msgpack_columns(doc, 2, "v", "ts") is None
    ok = decode_mod._msgpack_columns([kind(1.5, NOW), kind(2.0, NOW + 1.0)], 2, "v", "ts")
    assert ok is not None and ok[1].tolist() == [1.5, 2.0] and ok[0] is not None and ok[0].tolist() == [NOW, NOW + 1.0]


# ---------------------------------------------------------------- a daemon, end to end

def _rounds() -> list[list[Message]]:
    """6 Brackenfield fillers, 20 rounds of JSON arrays of 260 samples; two step by 2 sigma at
    round 8, every one has 8-sigma spikes now and then, filler 4 stamps in milliseconds."""
    rng = np.random.default_rng(182)
    out = []
    for k in range(20):
        msgs = []
        for i in range(6):
            x = 50.0 + rng.standard_normal(260)
            if i in (1, 3) and k >= 8:
                x += 2.0
            x[rng.random(260) < 0.004] += 8.0
            scale = 1000.0 if i == 4 else 1.0
            body = [{"v": round(float(v), 4), "ts": (NOW + k * 260 + j) * scale} for j, v in enumerate(x)]
            msgs.append(Message(f"brackenfield/line1/filler{i}/fill", json.dumps(body).encode(),
                                NOW + (k + 1) * 260 + 0.05, 0, 0))
        out.append(msgs)
    return out


def test_daemon_gives_the_same_records_states_and_journal_with_msgpack_columns(tmp_path: Path) -> None:
    entry = "{topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts}"
    new = run_rounds(local_daemon(tmp_path, "packed", entry), _rounds(), packed, True)
    old = run_rounds(local_daemon(tmp_path, "lists", entry), _rounds(), packed, False)
    assert len(new[0]) > 0 and len(new[1]) == 6
    assert new[0] == old[0]
    assert new[1] == old[1]
    assert len(new[2]) > 6 * 20 * 260 * 24 and new[2] == old[2]


def test_the_switch_is_on() -> None:
    assert decode_mod.MSGPACK_COLUMNS is True
    assert decode(b'[{"v": 1.5, "ts": 1790000000}]', "json", value_path="v", time_path="ts", now=NOW,
                  columns=True).columns is not None
