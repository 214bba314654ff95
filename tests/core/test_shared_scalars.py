"""The engine's array calls with shared 0-d operands against the reference they stand in for.

numpy turns a Python float handed to a ufunc into a 0-d array on every call, some 1,000 to
1,900 instructions an operand (callgrind), more than the arithmetic on a batch of a few
hundred.  ``baseline.SHARED_SCALARS`` hands the operands that few streams differ in (the
clip bounds of ``BaselineSums.add``, of the watch and of the event trial; the tail bound;
the follower's rate in ``engine.follow_path``) over as read-only 0-d float64 arrays, one per
value, shared by every stream; off, the floats, the reference.  These tests replay random
histories (iid, AR(1), heavy-tailed and quantised noise; steps; lone spikes and bursts of
+9 sigma; gaps; bad values; samples stamped a day ahead; batches of 1 to 4,096 and every
other kind, with and without arrival times) through both and require the same records,
rejections, counters and saved state after every batch, every number at full precision
(the state as JSON text: a zero's sign counts), bit for bit.  The reference path itself is
held to outside references by the other tests of tests/core (test_engine.py,
test_baseline.py, test_events.py: statsmodels, scipy, published tables).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import baseline
from shiftwatch.core.baseline import _clip, clip_bounds
from shiftwatch.core.engine import StreamEngine, follow_path

from . import batches

T0 = 1_788_000_000.0


@contextmanager
def _shared(on: bool) -> Iterator[None]:
    saved = baseline.SHARED_SCALARS
    baseline.SHARED_SCALARS = on
    try:
        yield
    finally:
        baseline.SHARED_SCALARS = saved


_run = functools.partial(batches.switched_run, _shared)  # (eng, t, x, a, cuts, on): everything said and kept
_history = functools.partial(batches.random_history, t0=T0, level=20.0, sigma=0.5, least_step=0.4, spiky=0.4, bare=0.4)


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_shared_operands_equal_the_reference(kind: str) -> None:
    batches.mixed_runs_agree(_run, _history, kind, np.random.default_rng({"iid": 81, "ar": 82, "t3": 83, "quantised": 84}[kind]))


@pytest.mark.parametrize("test_name", ["cusum", "glr"])
def test_shared_operands_with_the_other_tests(test_name: str) -> None:
    batches.other_tests_agree(_run, _history, test_name, np.random.default_rng({"cusum": 85, "glr": 86}[test_name]))


def test_established_streams_in_arrays_of_260_with_steps_and_spikes() -> None:
    # The daemon's batched path: established streams handed arrays of 260 with arrival times
    # (and without, as replay hands them), many streams sharing one clip and one rate, a lone
    # spike of +9 sigma now and then, a gap of an hour, a step late (the event's trial clips
    # too), heavy-tailed noise for the smaller clip (HEAVY_TAIL_CLIP: the tail counted before
    # the clip in BaselineSums.add).
    rng = np.random.default_rng(87)
    for kind, arrivals in (("iid", True), ("iid", False), ("t3", True), ("ar", True)):
        n = 2000 + 12 * 260
        x = 100.0 + batches.noise(kind, n, rng)
        x[2000:][rng.random(n - 2000) < 0.002] += 9.0
        x[n - 4 * 260:] += 1.5
        t = T0 + np.arange(float(n))
        t[2000 + 5 * 260:] += 3600.0
        a = t + 0.05 if arrivals else None
        cuts = [2000 + k * 260 for k in range(12)]
        shared = _run(StreamEngine("s"), t, x, a, cuts, True)
        assert shared == _run(StreamEngine("s"), t, x, a, cuts, False)
        assert shared["records"]  # the step was found: the event path ran after the watch
        assert any(r[1] == "spike" for r in shared["rejected"])


@settings(max_examples=30, deadline=None)
@given(state=st.integers(0, 2**32 - 1), n=st.integers(400, 5000), most=st.integers(2, 4097))
def test_shared_operands_on_random_histories(state: int, n: int, most: int) -> None:
    batches.random_run_agrees(_run, _history, state, n, most)


def test_baseline_sums_with_shared_bounds() -> None:
    # BaselineSums.add with the shared bounds and tail bound against the floats: clip 4 (tail
    # counted after the clip) and 2 (before), phi zero and not, with and without a cut, gaps.
    rng = np.random.default_rng(88)

    def steps(m: int) -> np.ndarray:
        out = np.ones(m) if rng.random() < 0.5 else rng.uniform(0.8, 1.2, m)
        for g in rng.integers(0, m, size=int(rng.integers(0, 3))):
            out[g] = float(rng.choice([0.0, 12.0, 3600.0]))
        return out

    batches.baseline_sums_agree(_shared, rng, 300, 400, steps)


def test_follow_path_with_the_shared_rate() -> None:
    # The follower's one-block path with lam as the shared 0-d array against lam the float
    # (numpy's multiply on the same doubles), rates of iid and autocorrelated streams.
    rng = np.random.default_rng(89)
    for _ in range(300):
        lam = float(rng.choice([1 / 110, 1 / 37.5, 1 / 400, float(rng.uniform(0.001, 0.2))]))
        r = rng.standard_normal(int(rng.integers(1, 300))) * float(rng.uniform(0.01, 3.0))
        u0 = float(rng.normal(0.0, 0.5))
        out = []
        for on in (True, False):
            with _shared(on):
                out.append(follow_path(r, u0, lam).tobytes())
        assert out[0] == out[1]


def test_clip_bounds_are_the_doubles_and_keep_no_zero() -> None:
    # The shared pair holds -c and c exactly and is read-only; 0.0 and -0.0 (equal as dict
    # keys, different doubles) are never kept, so each gets bounds of its own sign; a clip
    # of either zero gives numpy's clip of the floats, zero signs included (np.clip, the
    # reference library's own function).
    for c in (4.0, 2.0, 1e-300, 3.0000000000000004):
        lo, hi = clip_bounds(c)
        assert (lo.item(), hi.item()) == (-c, c) and lo.ndim == hi.ndim == 0
        assert not lo.flags.writeable and not hi.flags.writeable
        assert clip_bounds(c)[0] is lo
    z = np.array([-1.0, -0.0, 0.0, 1.0])
    for c in (0.0, -0.0):
        lo, hi = clip_bounds(c)
        assert math.copysign(1.0, hi.item()) == math.copysign(1.0, c)
        assert _clip(z, lo, hi).tobytes() == np.clip(z, -c, c).tobytes()
    assert 0.0 not in baseline._BOUNDS


def test_the_switch_is_on() -> None:
    assert baseline.SHARED_SCALARS is True
