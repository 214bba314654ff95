"""The engine call's trimmed fixed work against the reference it stands in for.

An established stream's engine call costs some tens of microseconds whatever it
carries (a JSON array of 260 samples is one call in the daemon; a replay's 4,096-sample
batch is several watch stretches).  ``engine.LEAN_CALLS`` (with its share in
``follow.LEAN_CALLS``) and ``baseline.DIRECT_CALLS`` trim that work without touching the arithmetic: the clip
ufunc and np.dot's C function called directly (ndarray.clip and np.dot reach the same
functions through a Python wrapper and a dispatcher), the follower's delay and rate
looked up per phi, the unfolded offsets read through a view, the follower's one-block
path worked in one buffer, an empty batch's bookkeeping skipped.  Off, each is the
reference path.  These tests replay random histories (steps, lone spikes, gaps,
bad values, samples stamped ahead of their arrival, autocorrelated and heavy-tailed
noise; batches of 260 and 4,096 samples and every other kind) through both and
require the same records, rejections, counters and saved state, every number of it
at full precision, bit for bit.  The reference paths themselves are held to outside
references by the other tests of tests/core (test_engine.py, test_events.py:
statsmodels, scipy, published tables).
"""

from __future__ import annotations

import functools
import itertools
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import baseline, engine, follow
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.follow import follow_path
from shiftwatch.core.settings import DetectionSettings

from . import batches
from .batches import mixed_cuts

T0 = 1_788_000_000.0


@contextmanager
def _lean(on: bool) -> Iterator[None]:
    saved = engine.LEAN_CALLS, follow.LEAN_CALLS, baseline.DIRECT_CALLS
    engine.LEAN_CALLS = follow.LEAN_CALLS = baseline.DIRECT_CALLS = on
    try:
        yield
    finally:
        engine.LEAN_CALLS, follow.LEAN_CALLS, baseline.DIRECT_CALLS = saved


_run = functools.partial(batches.switched_run, _lean)  # (eng, t, x, a, cuts, on): everything said and kept
_history = functools.partial(batches.random_history, t0=T0, level=50.0, sigma=0.8, least_step=0.5, spiky=0.3, bare=0.3)


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_lean_calls_equal_the_reference(kind: str) -> None:
    rng = np.random.default_rng({"iid": 41, "ar": 42, "t3": 43, "quantised": 44}[kind])
    for _ in range(8):
        n = int(rng.integers(1500, 9000))
        t, x, a = _history(kind, n, rng)
        cuts = mixed_cuts(n, rng, 5)
        lean = _run(StreamEngine("s"), t, x, a, cuts, True)
        ref = _run(StreamEngine("s"), t, x, a, cuts, False)
        assert lean == ref


@pytest.mark.parametrize("test_name", ["cusum", "glr"])
def test_lean_calls_with_the_other_tests(test_name: str) -> None:
    rng = np.random.default_rng({"cusum": 45, "glr": 46}[test_name])
    s = DetectionSettings(test=test_name)
    for kind in ("iid", "ar", "t3"):
        n = int(rng.integers(2000, 6000))
        t, x, a = _history(kind, n, rng)
        cuts = mixed_cuts(n, rng, 5)
        assert _run(StreamEngine("s", s), t, x, a, cuts, True) == _run(StreamEngine("s", s), t, x, a, cuts, False)


def test_established_batches_of_260_and_4096() -> None:
    # The case the change is for: streams past their warm-up, simply watching, fed arrays of
    # 260 (with arrival times) and replay's 4,096 (spikes of +9 sigma at 0.1%, a step late).
    rng = np.random.default_rng(47)
    for size in (260, 4096):
        n = 2000 + 8 * size
        x = 100.0 + rng.standard_normal(n)
        x[2000:][rng.random(n - 2000) < 0.001] += 9.0
        x[n - 2 * size:] += 1.5
        t = T0 + np.arange(float(n))
        a = t + 0.05 if size == 260 else None
        cuts = [2000 + k * size for k in range(8)]
        lean = _run(StreamEngine("s"), t, x, a, cuts, True)
        assert lean == _run(StreamEngine("s"), t, x, a, cuts, False)
        assert lean["records"]  # the step was found: the event path ran after the watch


@settings(max_examples=25, deadline=None)
@given(state=st.integers(0, 2**32 - 1), n=st.integers(400, 3000), most=st.integers(2, 600))
def test_lean_calls_on_random_short_histories(state: int, n: int, most: int) -> None:
    batches.random_run_agrees(_run, _history, state, n, most)


def test_follower_one_block_in_place_equals_the_reference() -> None:
    # follow_path's one-block form worked in one buffer against the expression it replaces,
    # on stretches of one to a block's length, rates of the follower's kind and tiny ones.
    rng = np.random.default_rng(48)
    for _ in range(300):
        m = int(rng.integers(1, 700))
        lam = float(rng.choice([1.0 / 110, 1.0 / 440, 1e-3, 0.25, float(rng.uniform(1e-3, 0.3))]))
        r = rng.standard_normal(m) * float(rng.choice([1e-12, 1.0, 1e6]))
        u0 = float(rng.standard_normal())
        outs = []
        for on in (True, False):
            with _lean(on):
                outs.append(follow_path(r, u0, lam))
        assert outs[0].tobytes() == outs[1].tobytes()


def test_baseline_sums_direct_calls_equal_the_reference() -> None:
    # BaselineSums.add with np.dot's C function and the clip ufunc called directly: the same
    # sums (every one, through to_list) after random batches with and without a cut, phi zero
    # and not, clip 4 and 2 (the tail count taken before or after the clip).
    rng = np.random.default_rng(49)
    batches.baseline_sums_agree(_lean, rng, 60, 600, lambda m: rng.choice([1.0, 1.0, 1.0, 30.0], m))


def test_the_switches_are_on() -> None:
    assert engine.LEAN_CALLS is True and follow.LEAN_CALLS is True and baseline.DIRECT_CALLS is True


def test_screen_gives_the_batch_extremes_it_took() -> None:
    # The largest and smallest value screening hands the engine's spike check are the batch's
    # own (Python's max and min over the values), and NaN whenever the batch was not taken
    # whole by the array fast path (a rejection, or a small batch).
    from shiftwatch.core.screen import screen_samples
    rng = np.random.default_rng(50)
    whole = 0
    for _ in range(300):
        n = int(rng.integers(1, 400))
        t = T0 + np.cumsum(rng.uniform(0.5, 1.5, n))
        v = 100.0 + rng.standard_normal(n) * float(rng.choice([1e-9, 1.0, 1e6]))
        if rng.random() < 0.2:
            v[int(rng.integers(n))] = float(rng.choice([np.nan, np.inf, 1e200]))
        s = screen_samples(t, v, T0, arrived=t + 0.05, max_ahead=600.0, max_behind=600.0)
        if s.rejected or n <= 8:
            assert np.isnan(s.high) and np.isnan(s.low)
        else:
            whole += 1
            assert (s.high, s.low) == (max(v.tolist()), min(v.tolist()))
    assert whole > 150


def test_a_spike_held_over_a_batch_end() -> None:
    # A batch that ends on an outlier holds it for the next batch's first sample; the next
    # batch, all within the band, must still be judged with the held sample in front (a
    # lone spike then, or the start of a step when the next batch's first sample deviates
    # the same way), not taken whole on the screen's extremes.
    rng = np.random.default_rng(51)
    for size, steps in itertools.product((260, 4096, 33), (False, True)):
        n = 2000 + 12 * size
        x = 100.0 + rng.standard_normal(n)
        ends = [2000 + k * size - 1 for k in range(1, 12)]
        for j, at in enumerate(ends):
            x[at] += 9.0
            if steps and j % 3 == 2 and at + size < n:  # confirmed by what follows: a step of 9 sigma
                x[at + 1:] += 9.0
        t = T0 + np.arange(float(n))
        cuts = [2000 + k * size for k in range(12)]
        for a in (None, t + 0.05):
            lean = _run(StreamEngine("s"), t, x, a, cuts, True)
            assert lean == _run(StreamEngine("s"), t, x, a, cuts, False)
            assert any(r[1] == "spike" for r in lean["rejected"])
