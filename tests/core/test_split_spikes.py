"""Spikes split from a segment at its outliers only, against the passes over the whole segment.

``StreamEngine._split_spikes`` sets lone outliers aside and holds a trailing one;
when a segment holds an outlier, ``_split_spikes_sparse`` works that out at the
outliers only (``engine.SPARSE_SPIKES``).  The reference is the original array
code (``engine.SPARSE_SPIKES = False``, built on ``engine.lone_outliers``): the same
kept samples, spikes, held sample, directions and settling times, called directly
on many random segments, and the same records, rejections and saved state from the
whole engine on many random series (spikes alone, in pairs that start a large step,
at batch edges, steps, AR(1) noise, quantised values, gaps in time).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core import engine
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .batches import run_in_batches, split_spikes_with

T0 = 1_788_000_000.0


def _segment(rng: np.random.Generator, n: int) -> np.ndarray:
    x = rng.standard_normal(n)
    for at in rng.integers(0, n, size=int(rng.integers(1, 8))):
        x[at] += float(rng.choice([-9.0, 9.0]))
        if rng.random() < 0.3 and at + 1 < n:  # a pair: the start of a large step
            x[at + 1] += float(rng.choice([-9.0, 9.0]))
    if rng.random() < 0.3:
        x[-1] += float(rng.choice([-9.0, 9.0]))  # an outlier last: held for the next sample
    if rng.random() < 0.2:
        x[0] += float(rng.choice([-9.0, 9.0]))
    return 40.0 + 0.2 * x


def test_sparse_split_equals_the_array_split_on_random_segments() -> None:
    rng = np.random.default_rng(77)
    for _ in range(600):
        n = int(rng.integers(1, 300))
        x = _segment(rng, n)
        t = T0 + np.cumsum(rng.choice([1.0, 1.0, 1.0, 7.5], n))
        pending = None
        if rng.random() < 0.3:
            pending = (T0 - 1.0, 40.0 + float(rng.choice([-1.8, 1.8])))
        prev_out = int(rng.choice([-1, 0, 0, 1]))
        limit = int(rng.choice([1, 2, max(1, n // 2), n, n + 5]))
        assert split_spikes_with(True, t, x, pending, limit, prev_out=prev_out) == split_spikes_with(False, t, x, pending, limit, prev_out=prev_out)


def test_an_outlier_at_the_spike_limit_is_judged_as_the_reference_judges_it() -> None:
    # Values whose deviation lies within a rounding of spike_sigma * sigma either way.
    k = DetectionSettings().spike_sigma
    base = 40.0 + k * 0.2
    near = [base + j * np.spacing(base) for j in range(-3, 4)]
    for v in near:
        x = np.array([40.0, v, 40.0, 40.0 + 2.0 * k * 0.2, v, 40.0])
        t = T0 + np.arange(6.0)
        for limit in (3, 6):
            assert split_spikes_with(True, t, x, None, limit, prev_out=0) == split_spikes_with(False, t, x, None, limit, prev_out=0)


def _run(t: np.ndarray, x: np.ndarray, cuts: list[int], sparse: bool) -> dict[str, Any]:
    return run_in_batches(StreamEngine("brackenfield/press4/ram", DetectionSettings()), t, x, cuts,
                          "SPARSE_SPIKES", sparse)


def _series(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    kind = int(rng.integers(0, 3))
    x = rng.standard_normal(n)
    if kind == 1:
        for i in range(1, n):
            x[i] += 0.6 * x[i - 1]
    elif kind == 2:
        x = np.round(x * 2.0) / 2.0
    for at in rng.integers(0, n, size=int(rng.integers(0, 3))):
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.8, 5.0))
    for at in rng.integers(0, n, size=int(rng.integers(2, 30))):
        x[at] += float(rng.choice([-12.0, 12.0]))
        if rng.random() < 0.2 and at + 1 < n:
            x[at + 1] += 12.0
    dt = np.ones(n)
    dt[rng.random(n) < 0.02] = 60.0
    return T0 + np.cumsum(dt), 7.0 + 0.1 * x


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_engine_records_are_the_same_with_the_sparse_split(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for trial in range(12):
        n = int(rng.choice([900, 3000, 9000]))
        t, x = _series(rng, n)
        cuts = ([] if trial % 3 == 0 else list(range(int(rng.integers(50, 700)), n, 4096)) if trial % 3 == 1
                else sorted({int(v) for v in rng.integers(1, n, size=12)}))
        assert _run(t, x, cuts, True) == _run(t, x, cuts, False), trial


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(250, 2500), cut=st.integers(1, 2500))
def test_sparse_split_property(seed: int, n: int, cut: int) -> None:
    t, x = _series(np.random.default_rng(seed), n)
    cuts = [cut] if cut < n else []
    assert _run(t, x, cuts, True) == _run(t, x, cuts, False)


# ``engine.HEAD_SPIKES``: a segment longer than the samples a stretch can keep is searched
# for outliers in those samples first; with none there, the stretch keeps them all,
# whatever the rest holds.  Held to the search of the whole segment (``HEAD_SPIKES =
# False``), whose outcome says for each kept sample "no outlier" with a direction of 0 and
# its own time as its settling time where the head's says so with None.

def _call_head(head: bool, t: np.ndarray, x: np.ndarray, pending: tuple[float, float] | None, prev_out: int,
               limit: int, sparse: bool) -> tuple[Any, ...]:
    saved = engine.HEAD_SPIKES
    engine.HEAD_SPIKES = head
    try:
        kt, kx, spikes, used, osign, settled, held = split_spikes_with(sparse, t, x, pending, limit, prev_out=prev_out)
    finally:
        engine.HEAD_SPIKES = saved
    if osign is None:
        osign = [0] * len(kt)
    if settled is None:
        settled = list(kt)
    return kt, kx, spikes, used, osign, settled, held


def test_a_head_without_outliers_keeps_what_the_whole_segment_keeps() -> None:
    rng = np.random.default_rng(91)
    for _ in range(800):
        n = int(rng.integers(2, 400))
        x = _segment(rng, n)
        if rng.random() < 0.5:
            # Outliers only after a clean head (the case the head's search settles).
            clean = int(rng.integers(1, n))
            x[:clean] = 40.0 + 0.2 * np.clip(rng.standard_normal(clean), -3.0, 3.0)
        t = T0 + np.cumsum(rng.choice([1.0, 1.0, 1.0, 7.5], n))
        pending = None
        if rng.random() < 0.3:
            pending = (T0 - 1.0, 40.0 + float(rng.choice([-1.8, 1.8, 0.1])))
        prev_out = int(rng.choice([-1, 0, 0, 1]))
        limit = int(rng.choice([1, 2, max(1, n // 3), max(1, n - 1), n, n + 5]))
        for sparse in (True, False):
            assert (_call_head(True, t, x, pending, prev_out, limit, sparse)
                    == _call_head(False, t, x, pending, prev_out, limit, sparse))


def test_the_head_search_at_the_spike_limit() -> None:
    # The first sample past the head, and the head's last, within a rounding of the limit.
    k = DetectionSettings().spike_sigma
    base = 40.0 + k * 0.2
    for v in [base + j * np.spacing(base) for j in range(-3, 4)]:
        for where in (2, 3):
            x = np.full(6, 40.0)
            x[where] = v
            t = T0 + np.arange(6.0)
            for limit in (2, 3, 4):
                assert _call_head(True, t, x, None, 0, limit, True) == _call_head(False, t, x, None, 0, limit, True)


@pytest.mark.parametrize("seed", [4, 5])
def test_engine_records_are_the_same_with_the_head_search(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for trial in range(10):
        n = int(rng.choice([900, 3000, 9000]))
        t, x = _series(rng, n)
        cuts = ([] if trial % 3 == 0 else list(range(int(rng.integers(50, 700)), n, 4096)) if trial % 3 == 1
                else sorted({int(v) for v in rng.integers(1, n, size=12)}))
        eng = StreamEngine("brackenfield/press4/ram", DetectionSettings())
        ref = run_in_batches(StreamEngine("brackenfield/press4/ram", DetectionSettings()), t, x, cuts,
                             "HEAD_SPIKES", False)
        assert run_in_batches(eng, t, x, cuts, "HEAD_SPIKES", True) == ref, trial


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(250, 2500), cut=st.integers(1, 2500))
def test_head_search_property(seed: int, n: int, cut: int) -> None:
    t, x = _series(np.random.default_rng(seed), n)
    cuts = [cut] if cut < n else []
    eng = StreamEngine("brackenfield/press4/ram", DetectionSettings())
    ref = run_in_batches(StreamEngine("brackenfield/press4/ram", DetectionSettings()), t, x, cuts,
                         "HEAD_SPIKES", False)
    assert run_in_batches(eng, t, x, cuts, "HEAD_SPIKES", True) == ref
