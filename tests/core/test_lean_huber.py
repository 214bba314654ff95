"""Huber's proposal-2 scale in one buffer against the reference expression.

``baseline.huber_scale`` iterates ``s * sqrt(mean(clip(r / s, -c, c)^2) / beta)``.  With
``baseline.LEAN_HUBER`` each iteration runs the ufuncs np.mean and np.clip reach through
their Python wrappers in one buffer; off, the reference expression.  These tests require
the same scale bit for bit on many residual vectors (Gaussian, heavy-tailed, quantised,
constant stretches, outliers) and the same baselines through ``estimate_baseline``.  The
reference itself is held to the Gaussian sigma and to a published consistency factor by
tests/core/test_engine.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from shiftwatch.core import baseline

from .batches import noise


def _both(monkeypatch: pytest.MonkeyPatch, fn, *args, **kw):  # type: ignore[no-untyped-def]
    out = []
    for lean in (True, False):
        monkeypatch.setattr(baseline, "LEAN_HUBER", lean)
        out.append(fn(*args, **kw))
    return out


@given(n=st.integers(1, 600), kind=st.sampled_from(["iid", "ar", "t3", "quantised"]),
       c=st.sampled_from([2.0, 3.0, 4.0, 1.345]), scale=st.floats(1e-6, 1e6),
       start=st.floats(0.05, 20.0), outliers=st.integers(0, 5), state=st.integers(0, 2**32 - 1))
@hsettings(max_examples=300, deadline=None)
def test_lean_huber_scale_equals_the_reference(n: int, kind: str, c: float, scale: float, start: float,
                                               outliers: int, state: int) -> None:
    mp = pytest.MonkeyPatch()
    try:
        rng = np.random.default_rng(state)
        r = scale * noise(kind, n, rng)
        r[rng.integers(0, n, size=outliers)] += scale * 50.0
        lean, ref = _both(mp, baseline.huber_scale, r, c, start * scale)
        assert lean.hex() == ref.hex()
    finally:
        mp.undo()


def test_lean_huber_scale_on_edge_cases(monkeypatch: pytest.MonkeyPatch) -> None:
    for r, s0 in [(np.zeros(50), 1.0), (np.array([1.0]), 1.0), (np.zeros(0), 1.0), (np.ones(10), 0.0),
                  (np.array([1e-300, -1e-300, 0.0]), 1e-300), (np.arange(100.0) - 49.5, 3.0)]:
        lean, ref = _both(monkeypatch, baseline.huber_scale, r, 3.0, s0)
        assert lean.hex() == ref.hex()
    # a short iteration budget: the last iterate, not a converged one
    lean, ref = _both(monkeypatch, baseline.huber_scale, np.random.default_rng(3).standard_normal(200) ** 3,
                      2.0, 0.01, iterations=3)
    assert lean.hex() == ref.hex()


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_lean_huber_gives_the_same_baselines(kind: str, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng({"iid": 51, "ar": 52, "t3": 53, "quantised": 54}[kind])
    for n in (5, 40, 200, 400, 2000):
        x = 100.0 + 0.3 * noise(kind, n, rng)
        t = 1_788_000_000.0 + np.arange(float(n))
        lean, ref = _both(monkeypatch, baseline.estimate_baseline, t, x, clip=4.0)
        assert lean == ref


def test_residuals_other_than_one_dimensional_float64_take_the_reference_path(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # The package passes only 1-D float64 residuals; through the API float32 residuals are
    # worked in float32 by the reference (numpy's promotion rules), and a 2-D array is
    # averaged whole.  The one buffer of float64 would give another float for the first and
    # refuse the second: such input goes the reference way.
    r = noise("t3", 400, np.random.default_rng(11)) * 1.3
    for x in (r.astype(np.float32), r.reshape(20, 20)):
        lean, ref = _both(monkeypatch, baseline.huber_scale, x, 2.0, 1.0)
        assert lean.hex() == ref.hex()
