"""ARL figures for long decision intervals with a large shift (h of 100 to 250 sigma).

``shiftwatch design --min-shift 0.1 --false-alarm-every 10000w`` designs charts
with k of 0.034 to 0.09 and h of 101 to 243.  At 3 and 4 sigma the lower sum of
such a chart never signals in practice: its one-sided ARL is beyond the range
of a float (about exp(2 * 3.05 * 161)), and the chain's elimination once
overflowed on it, printing RuntimeWarnings, a ``nan`` ARL and medians of 4
samples.  The checks here compare with references outside the project.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from shiftwatch.core.arl import (
    CHAIN_H_MAX,
    SIEGMUND_CORRECTION,
    cusum_arl,
    cusum_run_length_quantile,
    siegmund_arl,
)
from shiftwatch.core.design import design, sensitivity

# The charts `design` gives for min_shift 0.1 and ARL 1e9 (the CUSUM, then the bank's four).
# The last is a chart at h = CHAIN_H_MAX, the longest `design` tabulates.
CHARTS = [(0.05, 160.02), (0.034, 242.94), (0.0454, 188.25), (0.068, 131.07), (0.0907, 101.18),
          (0.02, CHAIN_H_MAX)]


def _simulated_run_lengths(k: float, h: float, shift: float, runs: int, rng: np.random.Generator) -> np.ndarray:
    """Run lengths of the two-sided CUSUM recursion itself, many runs at once with numpy."""
    c = np.zeros(runs)
    d = np.zeros(runs)
    rl = np.zeros(runs, dtype=np.int64)
    alive = np.ones(runs, dtype=bool)
    t = 0
    while alive.any():
        t += 1
        x = rng.standard_normal(runs) + shift
        c = np.maximum(0.0, c + x - k)
        d = np.maximum(0.0, d - x - k)
        hit = alive & ((c > h) | (d > h))
        rl[hit] = t
        alive &= ~hit
    return rl


@pytest.mark.parametrize("k,h", CHARTS)
@pytest.mark.parametrize("shift", [1.5, 2.0, 3.0, 4.0])
def test_large_h_arl_is_finite_without_warnings_and_matches_wald_and_siegmund(k: float, h: float,
                                                                             shift: float) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a numpy RuntimeWarning fails the test
        arl = cusum_arl(k, h, shift)
        med = cusum_run_length_quantile(k, h, shift, 0.5)
    assert math.isfinite(arl) and math.isfinite(med)
    # Wald's approximation for a strong drift, ARL ~ (h + 1.166) / (mu - k)
    # (common practice; the formula is given here from memory).
    # Both approximations take the overshoot over h as 1.166, its limit for a
    # small drift; at 4 sigma the mean overshoot is larger, and they fall short
    # by about 1% (h = 101): 1.5% allows for that, and nan or 4 fails it.
    wald = (h + SIEGMUND_CORRECTION) / (shift - k)
    assert arl == pytest.approx(wald, rel=0.015)
    # Siegmund's approximation (Siegmund 1985, Sequential Analysis; as given in
    # Montgomery, Introduction to Statistical Quality Control, ch. 9), two-sided.
    assert arl == pytest.approx(siegmund_arl(k, h, shift), rel=0.015)
    # The run length is nearly symmetric about its mean when the drift is strong.
    assert abs(med - arl) <= 3.0


@pytest.mark.parametrize("k,h,shift", [(0.05, 160.02, 3.0), (0.034, 242.94, 1.5), (0.0907, 101.18, 4.0)])
def test_large_h_median_matches_a_simulation_of_the_recursion(k: float, h: float, shift: float) -> None:
    # Direct simulation of the CUSUM recursion (numpy, 4000 runs): the sample
    # median's standard error is about 1.25 sd / sqrt(runs), under 0.3 sample here.
    rng = np.random.default_rng(20261205)
    rl = _simulated_run_lengths(k, h, shift, 4000, rng)
    sim_median = float(np.median(rl))
    se = 1.2533 * float(rl.std()) / math.sqrt(rl.size)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        med = cusum_run_length_quantile(k, h, shift, 0.5)
        arl = cusum_arl(k, h, shift)
    assert abs(med - sim_median) <= 1.0 + 4.0 * se
    assert abs(arl - float(rl.mean())) <= 4.0 * float(rl.std()) / math.sqrt(rl.size) + 0.5


def test_design_min_shift_0_1_at_arl_1e9_has_finite_figures_and_slow_bank_medians() -> None:
    # The reviewer's reproduction: 10000 weeks at 1 s, held to ARL 1e9.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        d = design(0.1, 10000 * 7 * 86400.0, 1.0, runs=20)
    for r in d.rows:
        assert math.isfinite(r.cusum_arl) and math.isfinite(r.cusum_median)
        if r.shift == 0:
            continue
        assert math.isfinite(r.bank_arl) and math.isfinite(r.bank_median)
        # The bank's fastest chart needs at least min over charts of h / (mu - k)
        # samples to climb to h (Wald, common practice, from memory): a bound
        # from below on its median, not 4 samples.
        climb = min(hh / (r.shift - kk) for kk, hh in zip(d.bank_ks, d.bank_hs))
        assert r.bank_median >= 0.9 * climb
        assert r.cusum_median >= 0.9 * d.h / (r.shift - d.k)


def test_design_refuses_charts_beyond_chain_h_max() -> None:
    # At ARL 1e9 a min_shift of 0.05 needs h above 300 (Siegmund's approximation,
    # Montgomery ch. 9, gives h of about 293 for the CUSUM's k = 0.025 alone and more for
    # the bank's smaller k): beyond what the chain resolves, so no table is made.
    with pytest.raises(ValueError, match="computed only up to h = 300"):
        design(0.05, 10000 * 7 * 86400.0, 1.0, runs=20)
    with pytest.raises(ValueError, match="computed only up to h = 300"):
        sensitivity(0.05, 10000 * 7 * 86400.0, 1.0, shifts=(0.0, 1.0))
