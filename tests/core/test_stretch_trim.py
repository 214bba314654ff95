"""The watch stretch's trimmed fixed work against the reference it stands in for.

A watch stretch (the samples an established stream watches between two refinements,
recentrings, events or call ends) costs some tens of array calls whatever its length, and
a replay cuts each stream into a dozen of them, the daemon's JSON arrays of 260 samples
into one or two a call.  ``engine.TRIM_STRETCH``, ``multicusum.AS_GIVEN`` and
``baseline.DIRECT_CALLS`` trim that work without touching the arithmetic: screening's
largest and smallest value stand for the spike check on every stretch of a call (not only
the first), the follower's delay and rate are kept on the engine, the window's rows are
sliced once, the first stretch takes the screened arrays themselves, the CUSUM bank takes
the residual array as it is, the baseline sums read their scalars with ``item()`` and call
count_nonzero's C function, a refinement clips its phi in plain floats.  Off, each is the reference path.  These tests replay random
histories (iid, AR(1), heavy-tailed and quantised noise; steps; lone spikes and bursts of
+9 sigma; gaps; bad values; samples stamped a day ahead; batches of 1 to 4,096 and every
other kind, with and without arrival times) through both and require the same records,
rejections, counters and saved state after every batch, every number of it at full
precision (the state as JSON text: a zero's sign counts), bit for bit.  The reference paths
themselves are held to outside references by the other tests of tests/core
(test_engine.py, test_multicusum.py, test_events.py: statsmodels, scipy, published tables).
"""

from __future__ import annotations

import functools
import json
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import baseline, engine, multicusum
from shiftwatch.core.baseline import BaselineSums, estimate_baseline
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.multicusum import MultiCusumTest

from . import batches

T0 = 1_788_000_000.0


@contextmanager
def _trim(on: bool) -> Iterator[None]:
    saved = engine.TRIM_STRETCH, multicusum.AS_GIVEN, baseline.DIRECT_CALLS
    engine.TRIM_STRETCH = multicusum.AS_GIVEN = baseline.DIRECT_CALLS = on
    try:
        yield
    finally:
        engine.TRIM_STRETCH, multicusum.AS_GIVEN, baseline.DIRECT_CALLS = saved


_run = functools.partial(batches.switched_run, _trim)  # (eng, t, x, a, cuts, on): everything said and kept
_history = functools.partial(batches.random_history, t0=T0, level=20.0, sigma=0.5, least_step=0.4, spiky=0.4, bare=0.4)


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_trimmed_stretches_equal_the_reference(kind: str) -> None:
    batches.mixed_runs_agree(_run, _history, kind, np.random.default_rng({"iid": 61, "ar": 62, "t3": 63, "quantised": 64}[kind]))


@pytest.mark.parametrize("test_name", ["cusum", "glr"])
def test_trimmed_stretches_with_the_other_tests(test_name: str) -> None:
    batches.other_tests_agree(_run, _history, test_name, np.random.default_rng({"cusum": 65, "glr": 66}[test_name]))


def test_later_stretches_of_a_call_with_spikes_and_refinements() -> None:
    # The case the spike bounds on every stretch are for: replay's calls of 4,096 cut into
    # several stretches by refinements and recentrings, some calls holding a spike (then the
    # bounds do not stand for the check, which runs), some not; a spike in the last sample
    # of a call (held over the call's end: the next call's stretches take no bounds); a step
    # late.  Established streams with arrival times in arrays of 260 as well.
    rng = np.random.default_rng(67)
    for size, arrivals in ((4096, False), (4096, True), (260, True), (1000, False)):
        n = 1000 + 10 * size
        x = 100.0 + rng.standard_normal(n)
        x[1000:][rng.random(n - 1000) < 0.0005] += 9.0
        x[1000 + 3 * size - 1] -= 12.0
        x[n - 2 * size:] += 1.5
        t = T0 + np.arange(float(n))
        a = t + 0.05 if arrivals else None
        cuts = [1000 + k * size for k in range(10)]
        trimmed = _run(StreamEngine("s"), t, x, a, cuts, True)
        assert trimmed == _run(StreamEngine("s"), t, x, a, cuts, False)
        assert trimmed["records"]  # the step was found: the event path ran after the watch
        assert any(r[1] == "spike" for r in trimmed["rejected"])


@settings(max_examples=30, deadline=None)
@given(state=st.integers(0, 2**32 - 1), n=st.integers(400, 5000), most=st.integers(2, 4097))
def test_trimmed_stretches_on_random_histories(state: int, n: int, most: int) -> None:
    batches.random_run_agrees(_run, _history, state, n, most)


def test_bank_takes_arrays_as_given() -> None:
    # MultiCusumTest.update on residual arrays as the engine hands them (1-D float64) and on
    # what still goes through asarray and ravel (lists, 2-D, strided, float32): the same sums,
    # statistic, direction and trip, every sum to the bit, from sums at zero and not.
    rng = np.random.default_rng(68)
    for _ in range(200):
        m = int(rng.integers(1, 2000 if rng.random() < 0.8 else 10000))  # (past a block of 4,096 too)
        z = np.clip(rng.standard_normal(m) * float(rng.choice([0.5, 1.0, 2.0])) + float(rng.choice([0.0, 0.8])),
                    -4.0, 4.0)
        start = rng.uniform(0.0, 5.0, 8) if rng.random() < 0.5 else np.zeros(8)
        form = int(rng.integers(0, 4))
        given_z: Any = (z, z.tolist(), z.reshape(1, -1), np.repeat(z, 2)[::2])[form]
        out = []
        for on in (True, False):
            bank = MultiCusumTest(ks=[0.375, 0.5, 0.75, 1.0], hs=[17.164, 13.157, 8.923, 6.689])
            bank._c[:] = start
            with _trim(on):
                i = bank.update(given_z)
            out.append((i, bank._c.tobytes(), json.dumps(bank.get_state())))
        assert out[0] == out[1]


def test_baseline_sums_with_gaps_and_cuts() -> None:
    # BaselineSums.add's direct path (scalars read with item(), a part's steps sliced only when
    # not all regular) against the reference: batches whose steps are all regular, whose gaps
    # fall in one part only or in both, with and without a cut, phi zero and not.
    rng = np.random.default_rng(69)

    def steps(m: int) -> np.ndarray:
        out = np.ones(m) if rng.random() < 0.5 else rng.uniform(0.8, 1.2, m)
        for g in rng.integers(0, m, size=int(rng.integers(0, 3))):
            out[g] = float(rng.choice([0.0, 12.0, 30.0, 3600.0]))  # a repeat, gaps
        return out

    batches.baseline_sums_agree(_trim, rng, 300, 400, steps)


def test_the_switches_are_on() -> None:
    assert engine.TRIM_STRETCH is True and multicusum.AS_GIVEN is True and baseline.DIRECT_CALLS is True


def test_refinement_clips_phi_as_the_reference() -> None:
    # A refinement's phi clipped to +-0.95 in plain floats against np.clip: blocks of slow
    # drift or alternation (phi of the block near +1 or -1, beyond the bound) and of noise
    # (well inside), on young baselines whose weight the block outweighs.
    rng = np.random.default_rng(70)
    seen = set()
    for _ in range(120):
        b = estimate_baseline(np.arange(40.0), 10.0 + rng.standard_normal(40))
        n = int(rng.integers(16, 3000))
        kind = int(rng.integers(0, 3))
        if kind == 0:  # a random walk: lag-1 correlation near +1
            v = 10.0 + 0.2 * np.cumsum(rng.standard_normal(n))
        elif kind == 1:  # alternation: near -1
            v = 10.0 + np.where(np.arange(n) % 2 == 0, 1.0, -1.0) + 0.01 * rng.standard_normal(n)
        else:
            v = 10.0 + rng.standard_normal(n)
        out = []
        for on in (True, False):
            s = BaselineSums()
            with _trim(on):
                s.add(b, v, 40.0 + np.arange(float(n)))
                nb = s.refine(b, clip=4.0, floor=1e-9, max_weight=20000)
            out.append(json.dumps([nb.phi_raw, nb.phi, nb.level, nb.sigma, nb.innovation_sigma, nb.interval, nb.n,
                                   nb.clip, nb.tail_fraction]))
            assert type(nb.phi_raw) is float
        assert out[0] == out[1]
        seen.add(round(json.loads(out[0])[0], 2))
    assert {0.95, -0.95} <= seen  # both bounds were reached
