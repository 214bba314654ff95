"""The run watch's lean batch path against its reference (``repeats.LEAN_FEED``).

On, a batch's repeats are found by ``ndarray.nonzero`` (and the steps between them by
one subtraction, np.diff's), its first reading is compared as a float, and a batch
whose runs are all of one reading is folded without working out the least limit; off,
the reference path of before.  It is pure speed work: these tests feed the same readings
both ways, cut into batches of every size (1 to 600, the daemon's 260, single readings),
and require after every batch the same flagged spans and the same state, bit for bit
(all eleven doubles of the watch's array, its kept limit and the times included), and
through the engine the same records, rejections, counters and saved state.  The readings
are rounded to a resolution (0.001 to 0.5 of the noise's sigma, so repeats go from rare
to a third of the pairs) and carry frozen stretches of 2 to 400 readings, at plant
settings whose limits go from ``REPEAT_MIN`` (a false alarm a minute) to long ones (a
week).  The reference path is held to outside references by tests/core/test_repeats.py
(scipy.stats for the run probabilities, Feller for the run-start bound).
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

from shiftwatch.core import repeats
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.repeats import RepeatWatch
from shiftwatch.core.sensorcheck import REPEAT_MIN
from shiftwatch.core.settings import DetectionSettings

from . import batches

T0 = 1_764_633_600.0
EVERY = (60.0, 3600.0, 7 * 86400.0)


@contextmanager
def _lean(on: bool) -> Iterator[None]:
    saved = repeats.LEAN_FEED
    repeats.LEAN_FEED = on
    try:
        yield
    finally:
        repeats.LEAN_FEED = saved


def _readings(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Times (a 1 s interval, now and then a gap) and readings rounded to a resolution,
    with frozen stretches."""
    res = float(rng.choice([0.001, 0.01, 0.1, 0.5]))
    x = np.round((500.0 + 0.4 * rng.standard_normal(n)) / (0.4 * res)) * (0.4 * res)
    for _ in range(int(rng.integers(0, 6))):
        a = int(rng.integers(0, n))
        x[a: a + int(rng.choice([2, 3, 4, 6, 12, 40, 400]))] = x[a]
    dt = np.ones(n)
    dt[rng.integers(1, n, size=int(rng.integers(0, 4)))] = float(rng.choice([5.0, 600.0]))
    return T0 + np.cumsum(dt), x


def _cuts(rng: np.random.Generator, n: int) -> list[int]:
    mode = int(rng.integers(0, 4))
    if mode == 0:
        return list(range(260, n, 260))
    if mode == 1:
        return list(range(1, n))
    if mode == 2:
        return batches.steps_of(n, rng, 600)
    return batches.steps_of(n, rng, 12)


def _watch_run(t: np.ndarray, x: np.ndarray, cuts: list[int], every: float, on: bool) -> list[object]:
    """Everything the watch says and holds after each batch, the lean path on or off."""
    w = RepeatWatch()
    out: list[object] = []
    with _lean(on):
        for a, b in itertools.pairwise([0, *cuts, x.shape[0]]):
            try:
                spans = w.feed(t[a:b], x[a:b], every)
            except (ValueError, ZeroDivisionError) as exc:  # (see test_a_limit_that_raises_...)
                out.append((a, type(exc).__name__, str(exc), w.tobytes()))
                return out
            out.append((spans, w.tobytes()))
    return out


def test_the_watch_agrees_with_the_reference_on_random_readings() -> None:
    rng = np.random.default_rng(151)
    flagged = 0
    for _ in range(60):
        n = int(rng.integers(300, 3000))
        t, x = _readings(rng, n)
        cuts = _cuts(rng, n)
        every = float(rng.choice(EVERY))
        on = _watch_run(t, x, cuts, every, True)
        assert on == _watch_run(t, x, cuts, every, False)
        flagged += sum(1 for spans, _ in on if spans)
    assert flagged  # (some runs were flagged: the cases the fold must not swallow)


def test_batches_whose_longest_run_is_at_the_least_limit() -> None:
    # A false alarm a minute: the limit is REPEAT_MIN, so a run of REPEAT_MIN readings is
    # flagged; batches of 260 sound readings (one reading a run) with one such run, or one
    # a reading shorter, after 400 readings of history.
    for run in (REPEAT_MIN - 1, REPEAT_MIN, REPEAT_MIN + 1):
        rng = np.random.default_rng(152 + run)
        n = 400 + 4 * 260
        t = T0 + np.arange(float(n))
        x = 500.0 + np.arange(float(n)) * 0.001 + 1e-4 * rng.standard_normal(n)
        for k in range(4):
            a = 400 + 260 * k + int(rng.integers(0, 250))
            x[a: a + run] = x[a]
        cuts = [400 + 260 * k for k in range(4)]
        on = _watch_run(t, x, cuts, 60.0, True)
        assert on == _watch_run(t, x, cuts, 60.0, False)
        assert any(spans for spans, _ in on) == (run >= REPEAT_MIN)


@settings(max_examples=40, deadline=None)
@given(state=st.integers(0, 2**32 - 1), n=st.integers(2, 2500), every=st.sampled_from(EVERY))
def test_the_watch_agrees_on_hypothesis_readings(state: int, n: int, every: float) -> None:
    rng = np.random.default_rng(state)
    t, x = _readings(rng, n)
    cuts = _cuts(rng, n)
    assert _watch_run(t, x, cuts, every, True) == _watch_run(t, x, cuts, every, False)


@pytest.mark.parametrize("every", [1e308, 0.0])
def test_a_limit_that_raises_raises_the_same(every: float) -> None:
    # A false_alarm_every past about 1.8e307 s (its tenfold is infinite: the budget is 0,
    # whose logarithm raises) or of 0 (a division by zero) makes working out a limit raise;
    # the lean fold must not skip that, so the same batch raises the same error both ways.
    rng = np.random.default_rng(156)
    t, x = T0 + np.arange(2000.0), 500.0 + np.arange(2000.0) * 0.001
    cuts = list(range(260, 2000, 260))
    on = _watch_run(t, x, cuts, every, True)
    assert on == _watch_run(t, x, cuts, every, False)
    assert len(on[-1]) == 4  # (it raised)
    t2, x2 = _readings(rng, 1500)
    cuts2 = _cuts(rng, 1500)
    assert _watch_run(t2, x2, cuts2, every, True) == _watch_run(t2, x2, cuts2, every, False)


_run = functools.partial(batches.switched_run, _lean)


@pytest.mark.parametrize("every", EVERY)
def test_engines_agree_with_the_reference(every: float) -> None:
    # The engine around the watch: quantised noise with steps, spikes, bad values and
    # arrival times (tests/core/batches.py), cut as the daemon and replay cut streams.
    rng = np.random.default_rng({60.0: 153, 3600.0: 154}.get(every, 155))
    s = DetectionSettings(false_alarm_every=every)
    for _ in range(4):
        n = int(rng.integers(1500, 6000))
        t, x, a = batches.random_history("quantised", n, rng, t0=T0, level=20.0, sigma=0.5, least_step=0.4,
                                         spiky=0.4, bare=0.4)
        x[n // 2: n // 2 + int(rng.integers(2, 300))] = x[n // 2]  # a frozen stretch
        cuts = batches.mixed_cuts(n, rng)
        on = _run(StreamEngine("brackenfield/filler3/fill_g", s), t, x, a, cuts, True)
        assert on == _run(StreamEngine("brackenfield/filler3/fill_g", s), t, x, a, cuts, False)


def test_the_switch_is_on() -> None:
    assert repeats.LEAN_FEED is True
