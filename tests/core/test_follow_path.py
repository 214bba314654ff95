"""The follower's path with its blocks worked out together, against one block at a time.

``follow.follow_path`` (the follower of slow change: ``u_i = (1 - lam) u_(i-1) + lam
r_i``) works in blocks of about ``4 / lam`` samples.  Its long-stretch form computes
every block's running sum in one array and carries only the offset from block to block
in plain floats (``follow.FOLLOW_BLOCKS_TOGETHER``); the reference is the block-by-block
loop (the flag off), and the outside reference for both is the recursion itself, sample
by sample, to which they stay within a few units in the 14th digit.  The two forms must
give the same floats bit for bit, directly and through the engine's records.
"""

from __future__ import annotations

import itertools
import json
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import engine, follow
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.follow import follow_path

T0 = 1_788_000_000.0


def _both(r: np.ndarray, u0: float, lam: float) -> tuple[np.ndarray, np.ndarray]:
    saved = follow.FOLLOW_BLOCKS_TOGETHER
    try:
        follow.FOLLOW_BLOCKS_TOGETHER = True
        fast = follow_path(r, u0, lam)
        follow.FOLLOW_BLOCKS_TOGETHER = False
        ref = follow_path(r, u0, lam)
    finally:
        follow.FOLLOW_BLOCKS_TOGETHER = saved
    return fast, ref


def _recursion(r: np.ndarray, u0: float, lam: float) -> np.ndarray:
    out = [u0]
    for v in r.tolist():
        out.append((1.0 - lam) * out[-1] + lam * v)
    return np.array(out)


@pytest.mark.parametrize("lam", [1.0 / 110, 1.0 / 40, 1.0 / 2000, 0.3, 1e-4])
def test_blocks_together_equal_blocks_one_by_one(lam: float) -> None:
    rng = np.random.default_rng(int(1 / lam))
    for m in (1, 15, 16, 17, 439, 440, 441, 880, 881, 4095, 4096, 9000):
        r = rng.standard_normal(m) * float(rng.choice([1e-3, 1.0, 50.0])) + float(rng.choice([0.0, 3.0]))
        u0 = float(rng.standard_normal())
        fast, ref = _both(r, u0, lam)
        assert fast.tobytes() == ref.tobytes(), (lam, m)
        # both against the recursion itself (Hunter's EWMA, sample by sample)
        np.testing.assert_allclose(fast, _recursion(r, u0, lam), rtol=1e-9, atol=1e-9 * float(np.abs(r).max()))


@settings(max_examples=60, deadline=None)
@given(m=st.integers(1, 6000), lam=st.floats(1e-4, 0.5), u0=st.floats(-100.0, 100.0),
       seed=st.integers(0, 2**32 - 1))
def test_blocks_together_property(m: int, lam: float, u0: float, seed: int) -> None:
    r = np.random.default_rng(seed).standard_normal(m)
    fast, ref = _both(r, u0, lam)
    assert fast.tobytes() == ref.tobytes()


def _run(x: np.ndarray, together: bool) -> dict[str, Any]:
    saved = follow.FOLLOW_BLOCKS_TOGETHER
    follow.FOLLOW_BLOCKS_TOGETHER = together
    try:
        eng = StreamEngine("brackenfield/dryer1/outlet")
        t = T0 + np.arange(float(x.shape[0]))
        records, states = [], []
        for a, b in itertools.pairwise([0, 300, 4396, 8492, 9000, 13096, x.shape[0]]):
            res = eng.process(t[a:b], x[a:b])
            records += [rec.to_dict() for rec in res.records]
            states.append(json.dumps(eng.get_state(), sort_keys=True))
        return {"records": records, "states": states}
    finally:
        follow.FOLLOW_BLOCKS_TOGETHER = saved


@pytest.mark.parametrize("kind", ["drift", "ar", "steps"])
def test_engine_records_are_the_same(kind: str) -> None:
    rng = np.random.default_rng({"drift": 1, "ar": 2, "steps": 3}[kind])
    n = 16_000
    x = rng.standard_normal(n)
    if kind == "drift":
        x += np.linspace(0.0, 4.0, n)
    elif kind == "ar":
        for i in range(1, n):
            x[i] += 0.5 * x[i - 1]
    else:
        for at in (3000, 7000, 12000):
            x[at:] += 2.5
    x[rng.integers(0, n, 20)] += 12.0
    assert _run(20.0 + x, True) == _run(20.0 + x, False)


def test_the_switch_is_the_followers() -> None:
    # On by default, and only where follow_path reads it: one set on engine.py (where it
    # lived before follow.py) would switch nothing, and the tests above would compare a
    # path with itself.
    assert follow.FOLLOW_BLOCKS_TOGETHER is True
    assert not hasattr(engine, "FOLLOW_BLOCKS_TOGETHER")
