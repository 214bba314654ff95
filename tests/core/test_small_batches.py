"""The plain-float paths for the one or two samples a live stream brings per round.

A live stream reaches its engine a sample or two at a time, and a dozen
array operations on them cost far more than the arithmetic.  So
screening, the watching step, the baseline sums and the CUSUM bank each
have a path in plain floats for small batches.  These tests hold those
paths to the array paths they stand in for: the same numbers exactly where
the operations are the same, the same records wherever a stream is cut.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from shiftwatch.core.baseline import BaselineSums, estimate_baseline
from shiftwatch.core.engine import SMALL_BATCH, StreamEngine
from shiftwatch.core.screen import screen_samples
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0


@pytest.mark.parametrize("phi", [0.0, 0.4])
def test_one_sample_sums_equal_the_array_sums_exactly(phi: float) -> None:
    rng = np.random.default_rng(8)
    t = np.arange(300.0)
    x = 50.0 + rng.standard_normal(300)
    b = estimate_baseline(t[:100], x[:100])
    b = dataclasses.replace(b, phi=phi)
    x[150] += 40.0  # clipped
    t[200:] += 30.0  # one long gap (a stoppage)
    arrays, floats = BaselineSums(), BaselineSums()
    for i in range(100, 300):
        arrays.add(b, x[i:i + 1], t[i:i + 1])
        floats.add_one(b, float(x[i]), float(t[i]))
    assert floats.to_list() == arrays.to_list()


def test_small_clean_batches_screen_as_the_full_path_does() -> None:
    # Float arrays of up to SMALL_BATCH samples take the plain-float check;
    # the same samples as lists of objects take the array path.  Both must
    # accept and reject the same samples for the same reasons.
    rng = np.random.default_rng(21)
    specials = [math.nan, math.inf, -math.inf, 1e200]
    for _ in range(3000):
        n = int(rng.integers(1, SMALL_BATCH + 1))
        t = T0 + np.cumsum(rng.choice([1.0, 1.0, 1.0, 0.0, -2.0], size=n))
        v = rng.standard_normal(n)
        if rng.random() < 0.2:
            v[int(rng.integers(n))] = specials[int(rng.integers(4))]
        if rng.random() < 0.1:
            t[int(rng.integers(n))] = specials[int(rng.integers(3))]
        last = T0 + float(rng.choice([-5.0, 0.0, 0.5]))
        arrived = t + rng.choice([0.1, 700.0, -700.0], size=n, p=[0.9, 0.05, 0.05])
        fast = screen_samples(t, v, last, arrived=arrived, max_ahead=600.0, max_behind=600.0)
        full = screen_samples(list(t), list(v), last, arrived=list(arrived), max_ahead=600.0,
                              max_behind=600.0)
        assert fast.rejected == full.rejected
        assert fast.kept.tolist() == full.kept.tolist()
        np.testing.assert_array_equal(fast.times, full.times)
        np.testing.assert_array_equal(fast.values, full.values)


@pytest.mark.parametrize("test", ["multi_cusum", "cusum", "glr"])
def test_watching_one_sample_at_a_time_keeps_the_state_of_batches(test: str) -> None:
    # Fed one sample at a time (the plain-float path) or in batches longer
    # than SMALL_BATCH (the array path), an engine watching a stream with a
    # step, spikes and an autocorrelated stretch gives the same records and
    # ends with the same baseline and test statistic, up to rounding.
    rng = np.random.default_rng(5)
    n = 4000
    t = T0 + np.arange(float(n))
    e = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = e[0]
    for i in range(1, n):
        x[i] = (0.5 if 1000 <= i < 2500 else 0.0) * x[i - 1] + e[i]
    x = 20.0 + 0.5 * x
    x[3000:] += 0.9
    x[[700, 1700, 3500]] += np.array([9.0, -8.0, 10.0])
    settings = DetectionSettings(test=test)
    small, big = StreamEngine("s", settings), StreamEngine("s", settings)
    recs_small = [r.to_dict() for i in range(n) for r in small.process(t[i:i + 1], x[i:i + 1]).records]
    recs_big = [r.to_dict() for a in range(0, n, SMALL_BATCH + 5)
                for r in big.process(t[a:a + SMALL_BATCH + 5], x[a:a + SMALL_BATCH + 5]).records]
    assert recs_small == recs_big
    assert any(r["phase"] == "confirmed" for r in recs_small)
    assert small.state == big.state
    assert small.level == pytest.approx(big.level, rel=1e-12)
    assert small.sigma == pytest.approx(big.sigma, rel=1e-12)
    assert small.statistic == pytest.approx(big.statistic, rel=1e-9, abs=1e-12)
    assert small.samples_total == big.samples_total == n
    assert small.rejected_total == big.rejected_total


def test_the_sampling_interval_does_not_depend_on_where_a_batch_ends() -> None:
    # Found when the design ARL began to follow the interval more closely: a block
    # whose mean step lay within 20% of the interval was taken whole, so a 21 s gap
    # (samples rejected for a clock jump) counted in a long block and not in a short
    # one, and one stream read 1.031 s or 1.0 s by batching.  Gaps of 10 intervals or
    # more are left out step by step now, in blocks as one by one.
    rng = np.random.default_rng(12)
    t = np.concatenate((np.arange(500.0), 520.0 + np.arange(300.0)))
    x = 50.0 + 0.2 * rng.standard_normal(t.size)
    b = estimate_baseline(t[:200], x[:200])
    whole, pieces, single = BaselineSums(), BaselineSums(), BaselineSums()
    whole.add(b, x[200:], t[200:])
    for idx in np.array_split(np.arange(200, t.size), 7):
        pieces.add(b, x[idx], t[idx])
    for i in range(200, t.size):
        single.add_one(b, float(x[i]), float(t[i]))
    assert whole.ndt == pieces.ndt == single.ndt == t.size - 200 - 2  # every step but the gap
    assert whole.sdt == pytest.approx(single.sdt) and pieces.sdt == pytest.approx(single.sdt)
    assert whole.sdt / whole.ndt == pytest.approx(1.0)
