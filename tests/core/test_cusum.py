"""Checks of the two-sided CUSUM test and the textbook tabular CUSUM.

References used below:

* NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.3
  (tabular CUSUM example, 20 sample means, target 325, sigma 0.635).
* Montgomery, D. C., Introduction to Statistical Quality Control, tabular
  CUSUM example (30 observations, target 10, sigma 1, k = 0.5, h = 5);
  values from memory, the data are reproduced in public software
  documentation.
* The defining recursion C_t = max(0, C_{t-1} + z_t - k) evaluated sample by
  sample (Page 1954), as the reference for the vectorised update.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.core.arl import design_h
from shiftwatch.core.cusum import BLOCK, CusumTest, tabular_cusum

NIST_MEANS = [
    324.925, 324.675, 324.725, 324.350, 325.350, 325.225, 324.125, 324.525, 325.225, 324.600,
    324.625, 325.150, 328.325, 327.250, 327.825, 328.500, 326.675, 327.775, 326.875, 328.350,
]

MONTGOMERY_X = [
    9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
    9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
    10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52,
]


def _naive(
    z: np.ndarray, k: float, h: float, cp: float = 0.0, cm: float = 0.0
) -> tuple[int, float, float, np.ndarray, np.ndarray]:
    """Page's recursion one sample at a time (the definition)."""
    ups, los = [], []
    for i, zi in enumerate(z.tolist()):
        cp = max(0.0, cp + zi - k)
        cm = max(0.0, cm - zi - k)
        ups.append(cp)
        los.append(cm)
        if cp > h or cm > h:
            return i, cp, cm, np.array(ups), np.array(los)
    return -1, cp, cm, np.array(ups), np.array(los)


def _near_threshold(ups: np.ndarray, los: np.ndarray, h: float, tol: float = 1e-9) -> bool:
    return bool(np.any(np.abs(ups - h) < tol) or np.any(np.abs(los - h) < tol))


# --------------------------------------------------------------------------
# worked examples
# --------------------------------------------------------------------------


def test_nist_tabular_cusum_example() -> None:
    # NIST/SEMATECH e-Handbook, section 6.3.2.3: target 325, sigma 0.635,
    # k = 0.3175 and h = 4.1959 in original units (k = 0.5, h = 6.608 in
    # sigma units).  The upper sum first exceeds h at sample 14 (1-based)
    # with value 4.94; the lower sum never signals.
    sigma = 0.635
    cp, cm, first = tabular_cusum(NIST_MEANS, 325.0, sigma, 0.3175 / sigma, 4.1959 / sigma)
    assert first == 13
    assert cp[13] == pytest.approx(4.94, abs=0.005)
    assert cp[12] < 4.1959 < cp[13]
    assert np.all(cm <= 4.1959)
    assert np.all(cp >= 0.0) and np.all(cm >= 0.0)


def test_montgomery_tabular_cusum_example() -> None:
    # Montgomery, Introduction to Statistical Quality Control, tabular CUSUM
    # example (values from memory): target 10, sigma 1, k = 0.5, h = 5.  The
    # upper sum signals at sample 29 with C+ = 5.28; it has been nonzero for
    # N+ = 7 samples (so the shift is dated after sample 22) and the new mean
    # is estimated as target + k + C+/N+ = 11.25.
    cp, cm, first = tabular_cusum(MONTGOMERY_X, 10.0, 1.0, 0.5, 5.0)
    assert first == 28
    assert cp[28] == pytest.approx(5.28, abs=0.005)
    run = 0
    i = first
    while i >= 0 and cp[i] > 0.0:
        run += 1
        i -= 1
    assert run == 7
    assert i + 1 == 22  # sample 22 (1-based) is the last with C+ = 0
    assert 10.0 + 0.5 + cp[first] / run == pytest.approx(11.25, abs=0.005)
    assert np.all(cm <= 5.0)


def test_cusum_test_reproduces_worked_examples_on_standardised_data() -> None:
    # Same two published examples, fed to CusumTest as residuals
    # z = (x - target) / sigma: the trip sample, direction and the sum
    # (times sigma) must match the textbook tables.
    sigma = 0.635
    t = CusumTest(k=0.5, h=4.1959 / sigma)
    z = (np.array(NIST_MEANS) - 325.0) / sigma
    assert t.update(z) == 13
    assert t.direction == 1
    assert t.statistic * sigma == pytest.approx(4.94, abs=0.005)  # NIST 6.3.2.3

    t = CusumTest(k=0.5, h=5.0)
    assert t.update(np.array(MONTGOMERY_X) - 10.0) == 28
    assert t.direction == 1
    assert t.c_plus == pytest.approx(5.28, abs=0.005)  # Montgomery (from memory)


def test_lower_side_trips_downward() -> None:
    # Mirror image of the Montgomery data: the lower sum must trip at the same
    # sample with direction -1 (symmetry of Page's two-sided scheme).
    t = CusumTest(k=0.5, h=5.0)
    assert t.update(10.0 - np.array(MONTGOMERY_X)) == 28
    assert t.direction == -1
    assert t.c_minus == pytest.approx(5.28, abs=0.005)
    assert t.statistic == t.c_minus


# --------------------------------------------------------------------------
# vectorised update == the recursion
# --------------------------------------------------------------------------

_values = st.floats(min_value=-6.0, max_value=6.0, allow_nan=False, allow_infinity=False)


@settings(max_examples=150, deadline=None)
@given(
    z=st.lists(_values, min_size=0, max_size=300),
    k=st.floats(min_value=0.0, max_value=1.5),
    h=st.floats(min_value=0.1, max_value=12.0),
    cuts=st.lists(st.integers(min_value=0, max_value=300), max_size=8),
)
def test_batched_update_equals_naive_loop(
    z: list[float], k: float, h: float, cuts: list[int]
) -> None:
    # Reference: Page's recursion evaluated sample by sample.
    arr = np.array(z, dtype=np.float64)
    ref_idx, ref_cp, ref_cm, ups, los = _naive(arr, k, h)
    if _near_threshold(ups, los, h):
        return  # a sum within 1e-9 of h: rounding may legitimately decide the tie
    # one batch
    t = CusumTest(k, h)
    assert t.update(arr) == ref_idx
    assert t.c_plus == pytest.approx(ref_cp, abs=1e-9)
    assert t.c_minus == pytest.approx(ref_cm, abs=1e-9)
    # arbitrary split into batches; after a trip the rest is not consumed
    t2 = CusumTest(k, h)
    bounds = sorted({0, len(z), *[c for c in cuts if c <= len(z)]})
    got_idx = -1
    for a, b in itertools.pairwise(bounds):
        r = t2.update(arr[a:b])
        if r >= 0:
            got_idx = a + r
            break
    assert got_idx == ref_idx
    assert t2.c_plus == pytest.approx(ref_cp, abs=1e-9)
    assert t2.c_minus == pytest.approx(ref_cm, abs=1e-9)
    assert t2.statistic == pytest.approx(max(ref_cp, ref_cm), abs=1e-9)
    if ref_idx >= 0:
        assert t.direction == t2.direction == (1 if ref_cp > h else -1)
    else:
        assert t.direction == t2.direction == 0


@settings(max_examples=60, deadline=None)
@given(
    z=st.lists(_values, min_size=1, max_size=100),
    cp0=st.floats(min_value=0.0, max_value=4.0),
    cm0=st.floats(min_value=0.0, max_value=4.0),
)
def test_update_from_restored_state_equals_naive_loop(
    z: list[float], cp0: float, cm0: float
) -> None:
    # Page's recursion started from arbitrary sums (the S_0 - C_0 term of the
    # running-minimum form).
    k, h = 0.5, 4.0
    arr = np.array(z)
    ref_idx, ref_cp, ref_cm, ups, los = _naive(arr, k, h, cp0, cm0)
    if _near_threshold(ups, los, h):
        return
    t = CusumTest(k, h)
    t.set_state({"c_plus": cp0, "c_minus": cm0, "direction": 0})
    assert t.update(arr) == ref_idx
    assert t.c_plus == pytest.approx(ref_cp, abs=1e-9)
    assert t.c_minus == pytest.approx(ref_cm, abs=1e-9)


def test_long_batch_across_blocks_equals_naive_loop() -> None:
    # Several internal blocks, in-control noise then a shift (fixed random
    # state); reference is the per-sample recursion.
    rng = np.random.default_rng(11)
    n = 3 * BLOCK + 123
    z = rng.standard_normal(n)
    z[n - 200 :] += 1.0
    k, h = 0.5, design_h(1e6, 0.5)
    ref_idx, ref_cp, ref_cm, _, _ = _naive(z, k, h)
    t = CusumTest(k, h)
    assert t.update(z) == ref_idx
    assert t.c_plus == pytest.approx(ref_cp, abs=1e-9)
    assert t.c_minus == pytest.approx(ref_cm, abs=1e-9)
    # never trips on pure in-control noise of this length at ARL0 = 1e6
    # (probability of a trip < 2 %; the fixed random state makes it certain)
    t.reset()
    assert t.update(z[: n - 200]) == -1
    ref = _naive(z[: n - 200], k, h)
    assert t.c_plus == pytest.approx(ref[1], abs=1e-9)


def test_trip_leaves_state_at_trip_sample_and_reset_clears() -> None:
    t = CusumTest(k=0.5, h=4.0)
    z = np.array([0.1, -0.3, 2.0, 2.0, 2.0, 2.0, 2.0])
    # recursion by hand: C+ = 0, 0, 1.5, 3.0, 4.5 > 4 at index 4
    assert t.update(z) == 4
    assert t.statistic == pytest.approx(4.5)
    assert t.direction == 1
    assert t.threshold == 4.0
    t.reset()
    assert (t.statistic, t.direction, t.c_plus, t.c_minus) == (0.0, 0, 0.0, 0.0)
    assert t.update(np.array([], dtype=np.float64)) == -1
    assert t.update(np.zeros(10)) == -1 and t.statistic == 0.0


# --------------------------------------------------------------------------
# state, construction, design
# --------------------------------------------------------------------------


def test_state_round_trip_through_json() -> None:
    rng = np.random.default_rng(3)
    z = rng.standard_normal(500) * 0.8
    a = CusumTest(0.5, 6.0)
    a.update(z[:250])
    state = json.loads(json.dumps(a.get_state()))
    assert set(state) == {"c_plus", "c_minus", "direction"}
    assert all(type(v) in (float, int) for v in state.values())
    b = CusumTest(0.5, 6.0)
    b.set_state(state)
    assert b.get_state() == a.get_state()
    ra, rb = a.update(z[250:]), b.update(z[250:])
    assert ra == rb
    assert a.get_state() == b.get_state()


def test_constructor_stores_arguments_and_name() -> None:
    t = CusumTest(0.25, 7.5)
    assert (t.k, t.h) == (0.25, 7.5)
    assert CusumTest.name == "cusum"
    assert "0.25" in repr(t)


@pytest.mark.parametrize(
    ("k", "h", "word"),
    [
        (-0.1, 4.0, "k"),
        (math.nan, 4.0, "k"),
        (0.5, 0.0, "h"),
        (0.5, -1.0, "h"),
        (0.5, math.inf, "h"),
    ],
)
def test_constructor_rejects_bad_arguments(k: float, h: float, word: str) -> None:
    with pytest.raises(ValueError, match=word):
        CusumTest(k, h)


def test_design_uses_half_the_shift_and_design_h() -> None:
    t = CusumTest.design(arl0=604800.0, min_shift=1.0)
    assert t.k == 0.5
    assert t.h == design_h(604800.0, 0.5)
    # Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory): k = 0.5, h = 4 has two-sided ARL0 168
    assert CusumTest.design(168.0, 1.0).h == pytest.approx(4.0, abs=0.01)
    with pytest.raises(ValueError, match="min_shift"):
        CusumTest.design(1000.0, 0.0)
    with pytest.raises(ValueError, match="arl0"):
        CusumTest.design(1.0, 1.0)


def test_tabular_cusum_rejects_bad_sigma() -> None:
    with pytest.raises(ValueError, match="sigma"):
        tabular_cusum([1.0, 2.0], 0.0, 0.0, 0.5, 4.0)


def test_false_alarm_rate_matches_design_by_simulation() -> None:
    # End-to-end check of CusumTest.design against the ARL calibration by
    # direct simulation (fixed random state): 4000 runs restarted after each
    # trip on one long in-control stream; their mean run length must match
    # the design ARL0 = 100 within four standard errors (~1.6 % each).
    rng = np.random.default_rng(2024)
    t = CusumTest.design(arl0=100.0, min_shift=1.0)
    z = rng.standard_normal(4000 * 100 + 50_000)
    lengths = []
    pos = 0
    while len(lengths) < 4000:
        i = t.update(z[pos:])
        assert i >= 0
        lengths.append(i + 1)
        pos += i + 1
        t.reset()
    mean = float(np.mean(lengths))
    se = float(np.std(lengths, ddof=1)) / math.sqrt(len(lengths))
    assert abs(mean - 100.0) < 4 * se
