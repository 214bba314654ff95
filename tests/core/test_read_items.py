"""Screening's single type check and the engine's item() reads against their reference.

``screen.READ_ONCE`` checks a float batch's type once (the small-batch path and the array
path shared it) and reads its first and last time with ``item()``; ``engine.READ_ITEMS``
reads a call's last time and last residual with ``item()`` and leaves the unfolded
offsets unmoved when all of them leave.  Off, each is the reference path.  These tests
replay random histories (iid, AR(1), heavy-tailed and quantised noise; steps; lone spikes
and bursts of +9 sigma; gaps; bad values; samples stamped a day ahead; batches of 1 to
4,096 and every other kind, with and without arrival times) through both and require the
same records, rejections, counters and saved state after every batch, bit for bit, and
screening's every output on random batches, clean and not.  The reference paths are held
to outside references by the other tests of tests/core (test_screen.py,
test_screen_fast.py, test_engine.py).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import engine, screen
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.screen import screen_samples

from . import batches

T0 = 1_788_000_000.0


@contextmanager
def _items(on: bool) -> Iterator[None]:
    saved = engine.READ_ITEMS, screen.READ_ONCE
    engine.READ_ITEMS = screen.READ_ONCE = on
    try:
        yield
    finally:
        engine.READ_ITEMS, screen.READ_ONCE = saved


_run = functools.partial(batches.switched_run, _items)  # (eng, t, x, a, cuts, on): everything said and kept
_history = functools.partial(batches.random_history, t0=T0, level=20.0, sigma=0.5, least_step=0.4, spiky=0.4, bare=0.4)


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_item_reads_equal_the_reference(kind: str) -> None:
    batches.mixed_runs_agree(_run, _history, kind,
                             np.random.default_rng({"iid": 91, "ar": 92, "t3": 93, "quantised": 94}[kind]), runs=6)


def test_established_streams_in_arrays_of_a_guard_and_more() -> None:
    # Batches of 260 (every unfolded offset leaves each call: the case the unmoved offsets
    # are for), of exactly the guard (60) and of one less and one more, with arrival times,
    # a spike now and then, an hour's gap and a step.
    rng = np.random.default_rng(95)
    for size in (260, 60, 59, 61):
        n = 2000 + 20 * size
        x = 100.0 + rng.standard_normal(n)
        x[2000:][rng.random(n - 2000) < 0.003] += 9.0
        x[n - 6 * size:] += 1.5
        t = T0 + np.arange(float(n))
        t[2000 + 7 * size:] += 3600.0
        cuts = [2000 + k * size for k in range(20)]
        on = _run(StreamEngine("s"), t, x, t + 0.05, cuts, True)
        assert on == _run(StreamEngine("s"), t, x, t + 0.05, cuts, False)
        assert on["records"]


@settings(max_examples=30, deadline=None)
@given(state=st.integers(0, 2**32 - 1), n=st.integers(400, 5000), most=st.integers(2, 4097))
def test_item_reads_on_random_histories(state: int, n: int, most: int) -> None:
    batches.random_run_agrees(_run, _history, state, n, most)


def _screened(on: bool, *args: Any, **kw: Any) -> str:
    with _items(on):
        try:
            s = screen_samples(*args, **kw)
        except ValueError as e:
            return f"ValueError: {e}"
    return repr((s.times.dtype, s.times.tobytes(), s.values.tobytes(), s.kept.tolist(), s.rejected,
                 math.copysign(1.0, s.high), repr(s.high), repr(s.low)))


def test_screening_equals_the_reference_on_random_batches() -> None:
    # Float batches of 0 to 12 and of 260 samples (the small-batch path, its failures that
    # go on to the array path, the array path, the full path): NaN, infinite and too-large
    # values, times repeated, out of order, NaN or infinite, before or at the stream's
    # newest, arrival limits met and not, one arrival for the batch or one per sample.
    rng = np.random.default_rng(96)
    for _ in range(3000):
        n = int(rng.choice([0, 1, 2, 3, 7, 8, 9, 12, 260]))
        t = 100.0 + np.cumsum(rng.uniform(0.5, 1.5, n))
        v = rng.standard_normal(n)
        for _ in range(int(rng.integers(0, 3))):
            if n:
                j = int(rng.integers(0, n))
                kind = int(rng.integers(0, 6))
                if kind == 0:
                    v[j] = float(rng.choice([np.nan, np.inf, -np.inf, 2e150]))
                elif kind == 1:
                    t[j] = float(rng.choice([np.nan, np.inf, -np.inf]))
                elif kind == 2 and j:
                    t[j] = t[j - 1]
                elif kind == 3:
                    t[j] = t[0] - 1.0
                elif kind == 4:
                    t[j] += 86400.0
        last = float(rng.choice([-np.inf, 100.0, t[0] if n else 0.0, t[0] - 0.1 if n else 0.0]))
        kw: dict[str, Any] = {}
        if rng.random() < 0.5:
            form = int(rng.integers(0, 3))
            kw["arrived"] = (float(t[-1]) + 0.05 if n else 0.0, t + 0.05, (t + 0.05).tolist())[form]
            kw["max_ahead"] = float(rng.choice([600.0, 1e-3])) if rng.random() < 0.8 else None
            kw["max_behind"] = float(rng.choice([3600.0, 1e-3])) if rng.random() < 0.8 else None
        seen = np.array([t[0] - 2.0, t[0] - 1.0]) if n and rng.random() < 0.5 else None
        assert _screened(True, t, v, last, seen, **kw) == _screened(False, t, v, last, seen, **kw)


def test_the_switches_are_on() -> None:
    assert engine.READ_ITEMS is True and screen.READ_ONCE is True
