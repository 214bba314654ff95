"""Screening with one arrival time for a batch, held to the limits on its ends
(``screen.ARRIVAL_ENDS``), against the reference that works out every sample's lag.

On the array path the times are finite and strictly increasing once the arrival limits
are looked at, so ``arrived - t`` falls as ``t`` grows, and correctly rounded subtraction
keeps that order (IEEE 754: each result is the exact difference rounded, and rounding is
monotone; common practice): the last time's lag is the smallest of the batch and the
first time's the largest, the same doubles the two reductions find.  Guard of a speed
change: every output of ``screen_samples`` must be the same, bit for bit, with the switch
on and off, and the same as with the arrival given as an array of that one time (how the
daemon gave it before), on random batches whose lags lie on, just inside and just outside
each limit (one unit in the last place), with NaN and infinite arrivals, and clean or
bad batches that take the full path.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import screen
from shiftwatch.core.screen import screen_samples


@contextmanager
def _ends(on: bool) -> Iterator[None]:
    saved = screen.ARRIVAL_ENDS
    screen.ARRIVAL_ENDS = on
    try:
        yield
    finally:
        screen.ARRIVAL_ENDS = saved


def _screened(on: bool, t: np.ndarray, v: np.ndarray, last: float, arrived: Any, ahead: float | None,
              behind: float | None) -> str:
    with _ends(on):
        s = screen_samples(t, v, last, None, arrived=arrived, max_ahead=ahead, max_behind=behind)
    return repr((s.times.tobytes(), s.values.tobytes(), s.kept.tolist(), s.rejected,
                 math.copysign(1.0, s.high), repr(s.high), repr(s.low)))


def _agree(t: np.ndarray, v: np.ndarray, last: float, arrived: float, ahead: float | None,
           behind: float | None) -> str:
    on = _screened(True, t, v, last, arrived, ahead, behind)
    assert on == _screened(False, t, v, last, arrived, ahead, behind)
    assert on == _screened(False, t, v, last, np.full(t.shape[0], arrived), ahead, behind)
    return on


def test_one_arrival_on_random_batches() -> None:
    rng = np.random.default_rng(161)
    outcomes = set()
    for _ in range(4000):
        n = int(rng.choice([9, 12, 60, 260, 1000]))
        t = 1_790_000_000.0 + np.cumsum(rng.uniform(0.001, 2.0, n))
        v = 500.0 + rng.standard_normal(n)
        if rng.random() < 0.1:
            v[int(rng.integers(0, n))] = float(rng.choice([np.nan, np.inf]))
        if rng.random() < 0.05:
            t[int(rng.integers(1, n))] = t[0]
        ahead = float(rng.choice([600.0, 0.0, 1e-3, 37.25])) if rng.random() < 0.8 else None
        behind = float(rng.choice([3600.0, 0.0, 1e-3, 12.5])) if rng.random() < 0.8 else None
        kind = int(rng.integers(0, 6))
        if kind == 0 and ahead is not None:  # the newest time exactly at the ahead limit, or one ulp past it
            arrived = float(t[-1]) - ahead
            arrived = float(np.nextafter(arrived, -np.inf)) if rng.random() < 0.5 else arrived
        elif kind == 1 and behind is not None:  # the oldest time exactly at the behind limit, or one ulp past it
            arrived = float(t[0]) + behind
            arrived = float(np.nextafter(arrived, np.inf)) if rng.random() < 0.5 else arrived
        elif kind == 2:
            arrived = float(rng.choice([np.nan, np.inf, -np.inf]))
        else:
            arrived = float(t[-1]) + float(rng.choice([0.05, -0.05, 700.0, -700.0, 4000.0]))
        last = float(rng.choice([-np.inf, float(t[0]) - 1.0, float(t[0])]))
        outcomes.add(_agree(t, v, last, arrived, ahead, behind).count("time_"))
    assert len(outcomes) > 2  # clean batches and batches with samples set aside for their times


@settings(max_examples=300, deadline=None)
@given(t0=st.floats(-1e12, 1e12), steps=st.lists(st.floats(1e-9, 1e6), min_size=8, max_size=300),
       lag=st.floats(-1e7, 1e7), ahead=st.one_of(st.none(), st.floats(0.0, 1e7)),
       behind=st.one_of(st.none(), st.floats(0.0, 1e7)))
def test_one_arrival_on_hypothesis_batches(t0: float, steps: list[float], lag: float, ahead: float | None,
                                           behind: float | None) -> None:
    t = t0 + np.cumsum(np.array(steps))  # (sums that round to a repeated time take the full path: compared too)
    v = np.zeros(t.shape[0])
    _agree(t, v, -math.inf, float(t[-1]) + lag, ahead, behind)


def test_the_switch_is_on() -> None:
    assert screen.ARRIVAL_ENDS is True
