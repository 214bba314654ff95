"""The SenML column path with its lean reading (``decode.LEAN_SENML``: the columns of fields
no record holds left out, the others read by list comprehensions, the colons counted by
numpy, the times taken whole when they are all absolute, the first record parsed apart
from the others) against the reference reading
(the whole pack parsed into one kind of record, every column by ``map(attrgetter)``,
``bytes.count``, ``np.where`` over every sum).

Guard of a speed change: the two must give the same names, units, record order and float64
columns bit for bit, or both leave the pack to the usual path with the same readings and
problems; a daemon fed the same packs must give the same alert records, engine states and
journal bytes with either.  The resolved numbers are also held to RFC 8428 section 4.6
(name = bn + n, time = bt + t with times below 2**28 relative to now, value = bv + v),
worked out from Python's own JSON parser (``json.loads``, each number as ``float()``).
"""

from __future__ import annotations

import json
import struct
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import decode as decode_mod
from shiftwatch.decode import Decoded, decode
from shiftwatch.mqtt import Message

from .fuzz_strategies import PROPERTY
from .switchrun import RunOutput, local_daemon, run_rounds
from .test_decode import _senml_pack

NOW = 1_790_000_000.0
T0 = 1_790_000_000.0


@contextmanager
def lean(on: bool) -> Iterator[None]:
    saved = decode_mod.LEAN_SENML
    decode_mod.LEAN_SENML = on
    try:
        yield
    finally:
        decode_mod.LEAN_SENML = saved


def both(payload: bytes, now: float = NOW) -> tuple[Decoded, Decoded]:
    out = {}
    for on in (True, False):
        with lean(on):
            out[on] = decode(payload, "senml", now=now, columns=True)
    return out[True], out[False]


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def assert_same(payload: bytes, now: float = NOW) -> Decoded:
    new, old = both(payload, now)
    assert new.readings == old.readings and new.problems == old.problems
    assert (new.senml is None) == (old.senml is None)
    if new.senml is not None and old.senml is not None:
        assert new.senml.names == old.senml.names and new.senml.units == old.senml.units
        assert same_bits(new.senml.order, old.senml.order)
        assert all(same_bits(a, b) for a, b in zip(new.senml.times, old.senml.times, strict=True))
        assert all(same_bits(a, b) for a, b in zip(new.senml.values, old.senml.values, strict=True))
    return new


def _is_json(text: str) -> bool:
    try:
        return isinstance(json.loads(text), list)
    except ValueError:
        return False


@settings(PROPERTY, max_examples=1500)
@given(pack=_senml_pack(), n=st.integers(min_value=1, max_value=40), drop=st.sets(st.sampled_from(["t", "u", "n"])))
def test_property_lean_senml_columns_are_the_reference_columns(pack: str, n: int, drop: set[str]) -> None:
    # test_decode.py's packs (plain records, and records of any pieces), the later records
    # repeated up to 40 times, and with some fields taken out of every record (so that
    # packs without any "t", "u" or "n" come often): the same columns bit for bit, or the
    # same readings and problems of the usual path.
    records = json.loads(pack) if _is_json(pack) else None
    if records:
        records = [{k: v for k, v in r.items() if k not in drop} if isinstance(r, dict) else r for r in records]
        payload = json.dumps(records[:1] + records[1:] * n).encode()
    else:
        payload = pack.encode()
    assert_same(payload)


TIMES = st.one_of(
    st.integers(min_value=-(2**29), max_value=2**29),  # relative, and absolute just past 2**28
    st.integers(min_value=1_700_000_000, max_value=1_800_000_000),  # seconds
    st.integers(min_value=1_700_000_000_000, max_value=1_800_000_000_000),  # milliseconds
    st.floats(min_value=-1e13, max_value=1e13, allow_nan=False),
    st.sampled_from([2**28, 2**28 - 1, 1e11, 1e11 + 1, 99999999999.9, -0.0, 0.0, 1e300]),
)


@settings(PROPERTY, max_examples=800)
@given(bt=st.none() | TIMES, ts=st.lists(st.none() | TIMES, min_size=1, max_size=30),
       bv=st.none() | st.sampled_from([0.0, -0.0, 100.0, 1e308]),
       vs=st.data(), names=st.sampled_from([["a"], ["a", "b"], [None], ["a", None]]),
       unit=st.sampled_from([None, "g", "Cel"]), now=st.sampled_from([NOW, 0.0, 1e9]))
def test_property_lean_times_are_the_reference_times(bt: float | None, ts: list[float | None], bv: float | None,
                                                     vs: st.DataObject, names: list[str | None], unit: str | None,
                                                     now: float) -> None:
    # Sums of base and record times that are all absolute, all in milliseconds, all
    # relative or mixed, past the float range or below year 1; values with a base value
    # that overflows: the lean reading takes the whole sums only where np.where would.
    values = vs.draw(st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=len(ts), max_size=len(ts)))
    head: dict[str, Any] = {"bn": "brackenfield:filler3:"}
    if bt is not None:
        head["bt"] = bt
    if bv is not None:
        head["bv"] = bv
    if unit is not None:
        head["bu"] = unit
    recs = []
    for i, (t, v) in enumerate(zip(ts, values)):
        r: dict[str, Any] = {"v": v}
        name = names[i % len(names)]
        if name is not None:
            r["n"] = name
        if t is not None:
            r["t"] = t
        recs.append(r)
    recs[0] = {**head, **recs[0]}
    assert_same(json.dumps(recs).encode(), now)


@pytest.mark.parametrize("payload", [
    # a quoted "t", "u" or "n" that is a value, not a key: the columns are read all the same
    b'[{"bn": "dev:", "n": "t", "v": 1}, {"n": "t", "v": 2}]',
    b'[{"n": "u", "v": 1, "t": 5}, {"n": "u", "v": 2, "t": 6}]',
    b'[{"bn": "n:", "bu": "u", "v": 1}, {"v": 2}]',
    b'[{"bu": "t", "n": "a", "v": 1}]',
    # no record with a time, a unit or a name
    b'[{"bn": "oven2:zone1", "bt": 1790000000, "v": 1.5}, {"v": 2.5}]',
    # a field repeated in a later record, a base field after the first: the usual path
    b'[{"n": "a", "v": 1}, {"n": "a", "t": 1, "t": 2, "v": 2}]',
    b'[{"n": "a", "v": 1}, {"n": "a", "bt": 5, "v": 2}]',
    b'[{"n": "a", "v": 1}, {"n": "a", "u": "g", "u": "g", "v": 2}]',
    # sums: every one absolute; every one in milliseconds; relative and absolute mixed
    b'[{"bn": "a:", "bt": 1790000000, "n": "x", "v": 1}, {"n": "x", "t": 1, "v": 2}]',
    b'[{"bn": "a:", "bt": 1790000000000, "n": "x", "v": 1}, {"n": "x", "t": 1000, "v": 2}]',
    b'[{"bn": "a:", "n": "x", "t": -5, "v": 1}, {"n": "x", "t": 1790000000, "v": 2}]',
    b'[{"bn": "a:", "n": "x", "t": 268435456, "v": 1}, {"n": "x", "t": 100000000000, "v": 2}]',
    # the limits themselves: 2**28 is absolute, 1e11 is still seconds (1e11 + 1 is not)
    b'[{"bn": "a:", "n": "x", "t": 268435456, "v": 1}, {"n": "x", "t": 268435457, "v": 2}]',
    b'[{"bn": "a:", "n": "x", "t": 100000000000, "v": 1}, {"n": "x", "t": 100000000001, "v": 2}]',
    b'[{"bn": "a:", "n": "x", "t": 100000000000, "v": 1}, {"n": "x", "t": 100000000000, "v": 2}]',
    b'[{"bn": "a:", "bt": 1e308, "n": "x", "t": 1e308, "v": 1}]',
    b'[{"bn": "a:", "bv": 1e308, "n": "x", "v": 1e308}]',
    # the first record parsed apart from the others: a "}" in its text, a trailing comma,
    # whitespace of every kind around the comma, one record, a base field in the second
    b'[{"bn": "a}b:", "n": "x", "v": 1}, {"n": "x", "v": 2}]',
    b'[{"u": "}", "n": "x", "v": 1}, {"n": "x", "v": 2}]',
    b'[{"n": "x", "v": 1},]',
    b'[{"n": "x", "v": 1}, ]',
    b'[{"n": "x", "v": 1},, {"n": "x", "v": 2}]',
    b'[{"n": "x", "v": 1} {"n": "x", "v": 2}]',
    b'[ {"n": "x", "v": 1}\t,\r\n{"n": "x", "v": 2} ]',
    b'[{"n": "x", "v": 1}]',
    b'[{"n": "x", "v": 1}, {"bn": "y:", "n": "x", "v": 2}]',
    b'[{"n": "x", "v": 1}, 5]',
    b'[{"n": "x", "v": 1}, {"n": "x", "v": 2}',
    b'[{"n": "x", "v": {"a": 1}}, {"n": "x", "v": 2}]',
])
def test_lean_senml_columns_on_chosen_packs(payload: bytes) -> None:
    assert_same(payload)


def test_lean_senml_columns_follow_rfc_8428() -> None:
    # RFC 8428 section 4.6: name = bn + n, time = bt + t (below 2**28 relative to now,
    # section 4.5.3; epoch milliseconds above 1e11 are this project's rule), value = bv + v,
    # unit = u else bu; the numbers as Python's json.loads and float() give them.
    payload = (b'[{"bn": "brackenfield:filler3:", "bt": 1790000000, "bu": "g", "bv": 500, "n": "fill", "t": 0.5,'
               b' "v": -0.25}, {"n": "fill", "t": 1.5, "v": 0.125}, {"n": "fill", "v": 3}]')
    assert decode_mod.LEAN_SENML is True  # the daemon's default is the lean reading
    got = assert_same(payload)
    assert got.senml is not None
    doc = json.loads(payload)
    head = doc[0]
    want_t = [float(head["bt"]) + float(r.get("t", 0.0)) for r in doc]
    want_v = [float(head["bv"]) + float(r["v"]) for r in doc]
    assert got.senml.names == ["brackenfield:filler3:fill"] and got.senml.units == ["g"]
    assert got.senml.times[0].tobytes() == struct.pack(f"{len(doc)}d", *want_t)
    assert got.senml.values[0].tobytes() == struct.pack(f"{len(doc)}d", *want_v)


# ---------------------------------------------------------------- a daemon, end to end

def _rounds() -> list[list[Message]]:
    """8 Brackenfield fillers, 26 rounds of SenML packs of 260 records (base name, time
    and unit in the first record, the time of each record relative to it): a third step by
    1 to 4 sigma at round 10, every one has 8-sigma spikes now and then; every fourth
    filler sends two names in one pack."""
    rng = np.random.default_rng(28)
    out = []
    for k in range(26):
        msgs = []
        for i in range(8):
            x = 50.0 + rng.standard_normal(260)
            if i % 3 == 0 and k >= 10:
                x += 1.0 + i / 2.0
            x[rng.random(260) < 0.004] += 8.0
            names = ["fill_g", "head_c"] if i % 4 == 0 else ["fill_g"]
            recs: list[dict[str, Any]] = [{"n": names[j % len(names)], "t": j, "v": round(float(v), 4)}
                                          for j, v in enumerate(x)]
            recs[0] = {"bn": f"brackenfield:filler{i}:", "bt": T0 + k * 260, "bu": "g", **recs[0]}
            msgs.append(Message(f"line/f{i}/pack", json.dumps(recs).encode(), T0 + (k + 1) * 260 + 0.05, 0, 0))
        out.append(msgs)
    return out


def _run(tmp_path: Path, name: str, on: bool) -> RunOutput:
    return run_rounds(local_daemon(tmp_path, name, "{topic: 'line/+/pack', format: senml}"), _rounds(), lean, on)


def test_daemon_gives_the_same_records_states_and_journal_with_the_lean_senml_reading(tmp_path: Path) -> None:
    new = _run(tmp_path, "lean", True)
    old = _run(tmp_path, "reference", False)
    assert len(new[0]) > 0  # the steps were detected: records to compare
    assert len(new[1]) == 10  # 8 fillers, two of them with two names
    assert new[0] == old[0]
    assert new[1] == old[1]
    assert len(new[2]) > 8 * 26 * 260 * 24 and new[2] == old[2]
