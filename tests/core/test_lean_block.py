"""The CUSUM bank's trimmed few-pass block against the block it stands in for.

``MultiCusumTest.update`` takes blocks of ``FAST_FROM`` samples or more through a
few-pass path while no chart is near its limit.  With ``multicusum.LEAN_BLOCK`` that
path runs with its fixed work trimmed (``_block_lean``: the sums' order checked on a
list, k and h read as floats, the reductions and running sums called as the ufuncs
the ndarray methods reach through Python wrappers); off, the reference
(``_block_fast``).  These tests feed both the same residuals from the same sums and
require the same trip index, sums, statistic, direction and chart, bit for bit, and
the same engine outcome on replay-like histories.  The reference itself is held to the
plain recursion and to published ARL tables by tests/core/test_multicusum.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from shiftwatch.core import multicusum
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.settings import DetectionSettings

from .batches import mixed_cuts, noise

T0 = 1_788_000_000.0


def _feed(test: MultiCusumTest, start: np.ndarray, z: np.ndarray, lean: bool,
          monkeypatch: pytest.MonkeyPatch) -> tuple:
    monkeypatch.setattr(multicusum, "LEAN_BLOCK", lean)
    test._c[:] = start
    test._stat, test._dir, test._tripped = 0.0, 0, -1
    trips = []
    rest = z
    while rest.shape[0] and len(trips) < 6:
        i = test.update(rest)
        trips.append(i)
        if i < 0:
            break
        # carry on after the trip from the tripped sums (the bank's recursion does; the
        # engine opens an event instead)
        rest = rest[i + 1:]
    return trips, test._c.tobytes(), test._stat, test._dir, test._tripped


@given(arl=st.sampled_from([500.0, 3600.0, 86400.0, 604800.0]), shift=st.sampled_from([0.5, 1.0, 2.0]),
       n=st.integers(1024, 9000), drift=st.sampled_from([0.0, 0.0, 0.2, -0.4, 1.0]),
       start=st.lists(st.floats(0.0, 1.0), min_size=8, max_size=8),
       order=st.sampled_from(["zero", "ordered", "ordered", "any"]), state=st.integers(0, 2**32 - 1))
@hsettings(max_examples=150, deadline=None)
def test_lean_block_equals_the_reference(arl: float, shift: float, n: int, drift: float, start: list[float],
                                         order: str, state: int) -> None:
    mp = pytest.MonkeyPatch()
    try:
        test = MultiCusumTest.design(arl, shift)
        rng = np.random.default_rng(state)
        z = np.clip(rng.standard_normal(n) + drift, -4.0, 4.0)
        z[rng.random(n) < 0.01] = rng.choice([-4.0, 4.0])
        # Sums at zero, in the order the fast path needs (each chart's sum no larger than the
        # first chart's on its side), or any below the limits (the fast path declines).
        hs = np.concatenate((test.hs, test.hs))
        if order == "zero":
            c = np.zeros(8)
        elif order == "ordered":
            c = np.array(start) * hs
            for side in (0, 4):
                c[side + 1: side + 4] = np.minimum(c[side + 1: side + 4], c[side])
                c[side: side + 4] = np.minimum(c[side: side + 4], 0.9 * hs[side: side + 4])
        else:
            c = np.array(start) * hs
        assert _feed(test, c, z, True, mp) == _feed(test, c, z, False, mp)
    finally:
        mp.undo()


def test_lean_block_is_taken(monkeypatch: pytest.MonkeyPatch) -> None:
    # The switch does route the long blocks through the trimmed path.
    taken = []
    lean = MultiCusumTest._block_lean

    def spy(self: MultiCusumTest, blk: np.ndarray) -> int:
        taken.append(blk.shape[0])
        return lean(self, blk)

    monkeypatch.setattr(MultiCusumTest, "_block_lean", spy)
    test = MultiCusumTest.design(3600.0, 1.0)
    test.update(np.random.default_rng(1).standard_normal(5000))
    assert taken and multicusum.LEAN_BLOCK is True


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_lean_block_gives_the_same_engine_outcome(kind: str, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng({"iid": 31, "ar": 32, "t3": 33, "quantised": 34}[kind])
    for _ in range(3):
        n = 20000
        x = 50.0 + noise(kind, n, rng)
        for at in rng.integers(300, n, size=int(rng.integers(0, 3))):
            x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.6, 3.0))
        x[rng.random(n) < 0.001] += 9.0
        t = T0 + np.arange(float(n))
        cuts = mixed_cuts(n, rng)
        outs = []
        for lean in (True, False):
            monkeypatch.setattr(multicusum, "LEAN_BLOCK", lean)
            eng = StreamEngine("s", DetectionSettings())
            got = []
            for a, b in zip([0, *cuts], [*cuts, n]):
                res = eng.process(t[a:b], x[a:b])
                got.append(([r.to_dict() for r in res.records], [tuple(r) for r in res.rejected]))
            got.append(repr(eng.get_state(arrays=True)))
            outs.append(got)
        assert outs[0] == outs[1]
