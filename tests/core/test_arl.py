"""Checks of the CUSUM run-length calibration against outside references.

References used below:

* Lucas, J. M. & Crosier, R. B. (1982). Fast initial response for CUSUM
  quality-control schemes. Technometrics 24, 199-205, Table 1 (two-sided
  CUSUM, k = 0.5) and the FIR table.
* Brook, D. & Evans, D. A. (1972). An approach to the probability
  distribution of CUSUM run length. Biometrika 59, 539-549 (one-sided
  k = 0.5, h = 3: ARL 117.59).
* Siegmund, D. (1985). Sequential Analysis, Springer (the h + 1.166
  approximation).
* Direct Monte Carlo simulation of the CUSUM recursion with a fixed random
  state (numpy), vectorised across replications.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import scipy.optimize
import scipy.special

from shiftwatch.core.arl import (
    arl_table,
    brook_evans_arl,
    cusum_arl,
    cusum_run_length_quantile,
    design_h,
    siegmund_arl,
)


def _simulate_run_lengths(
    k: float,
    h: float,
    shift: float,
    reps: int,
    rng: np.random.Generator,
    *,
    sides: int = 2,
    head_start: float = 0.0,
) -> np.ndarray:
    """Run lengths of `reps` independent CUSUMs, all stepped together."""
    rl = np.zeros(reps, dtype=np.int64)
    alive = np.arange(reps)
    cp = np.full(reps, head_start)
    cm = np.full(reps, head_start)
    t = 0
    while alive.size:
        t += 1
        x = rng.standard_normal(alive.size) + shift
        cp = np.maximum(0.0, cp + x - k)
        cm = np.maximum(0.0, cm - x - k)
        hit = cp > h
        if sides == 2:
            hit |= cm > h
        rl[alive[hit]] = t
        keep = ~hit
        alive, cp, cm = alive[keep], cp[keep], cm[keep]
    return rl


# --------------------------------------------------------------------------
# published tables
# --------------------------------------------------------------------------

# Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory): two-sided CUSUM with
# k = 0.5 and no head start.
LUCAS_CROSIER_TABLE_1 = [
    (4.0, 0.0, 168.0),
    (4.0, 0.5, 26.6),
    (4.0, 1.0, 8.38),
    (4.0, 2.0, 3.34),
    (5.0, 0.0, 465.0),
    (5.0, 1.0, 10.4),
]


@pytest.mark.parametrize(("h", "shift", "published"), LUCAS_CROSIER_TABLE_1)
def test_two_sided_arl_matches_lucas_crosier_table_1(
    h: float, shift: float, published: float
) -> None:
    # Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory)
    # (k = 0.5): within 1 %.
    got = cusum_arl(0.5, h, shift)
    assert got == pytest.approx(published, rel=0.01)


def test_one_sided_arl_matches_brook_evans() -> None:
    # Brook & Evans (1972), Biometrika 59: one-sided CUSUM, k = 0.5, h = 3,
    # in-control ARL 117.59.
    assert cusum_arl(0.5, 3.0, 0.0, sides=1) == pytest.approx(117.59, rel=0.005)


def test_fir_head_start_matches_lucas_crosier() -> None:
    # Lucas & Crosier (1982), Technometrics 24, FIR table: two-sided CUSUM
    # with k = 0.5, h = 5 and head start h/2 = 2.5 has in-control ARL 430 and
    # ARL 6.35 at a one-sigma shift (table values reproduced from memory).
    assert cusum_arl(0.5, 5.0, 0.0, head_start=2.5) == pytest.approx(430.0, rel=0.01)
    assert cusum_arl(0.5, 5.0, 1.0, head_start=2.5) == pytest.approx(6.35, rel=0.01)


def test_nystrom_agrees_with_brook_evans_chain_after_richardson() -> None:
    # Brook & Evans (1972): the finite chain has an O(1/states^2) error, so
    # Richardson extrapolation of 200 and 400 states should agree with the
    # Nystrom solution to several digits (independent discretisations).
    for k, h, shift in [(0.5, 3.0, 0.0), (0.5, 5.0, 0.5), (0.25, 8.0, 0.0), (1.0, 2.5, 1.5)]:
        b200 = brook_evans_arl(k, h, shift, states=200)
        b400 = brook_evans_arl(k, h, shift, states=400)
        extrapolated = (4.0 * b400 - b200) / 3.0
        nystrom = cusum_arl(k, h, shift, sides=1)
        assert nystrom == pytest.approx(extrapolated, rel=2e-5)
        # and the raw chain converges towards it from the same side
        assert abs(b400 - nystrom) < abs(b200 - nystrom)


def _decimal_chain_arl(k: float, h: float, shift: float, states: int) -> float:
    """Brook & Evans (1972) chain built with scipy and solved by plain
    Gaussian elimination in 80-digit decimal arithmetic (stdlib decimal)."""
    from decimal import Decimal, getcontext

    from scipy.stats import norm

    getcontext().prec = 80
    n = states
    w = 2.0 * h / (2 * n - 1)

    def prob_between(a: float, b: float) -> float:
        # P(a < Z <= b) without cancellation in either tail
        if a >= 0.0:
            return float(norm.sf(a) - norm.sf(b))
        return float(norm.cdf(b) - norm.cdf(a))

    m = [[Decimal(0)] * n for _ in range(n)]
    for i in range(n):
        to_zero = Decimal(float(norm.cdf((0.5 - i) * w + k - shift)))
        exit_p = Decimal(float(norm.sf(h + k - shift - i * w)))
        row = [to_zero] + [
            Decimal(prob_between((j - i - 0.5) * w + k - shift, (j - i + 0.5) * w + k - shift))
            for j in range(1, n)
        ]
        off = sum((row[j] for j in range(n) if j != i), Decimal(0))
        for j in range(n):
            m[i][j] = -row[j]
        m[i][i] = exit_p + off  # row sums of I - P equal the signal probability
    b = [Decimal(1)] * n
    for p in range(n):
        for r in range(p + 1, n):
            f = m[r][p] / m[p][p]
            for c in range(p, n):
                m[r][c] -= f * m[p][c]
            b[r] -= f * b[p]
    x = [Decimal(0)] * n
    for i in range(n - 1, -1, -1):
        acc = b[i] - sum((m[i][j] * x[j] for j in range(i + 1, n)), Decimal(0))
        x[i] = acc / m[i][i]
    return float(x[0])


@pytest.mark.parametrize(
    ("k", "h", "shift"), [(0.5, 12.0, -2.0), (0.5, 20.0, 0.0), (0.5, 4.0, 1.0)]
)
def test_chain_solver_matches_high_precision_elimination(k: float, h: float, shift: float) -> None:
    # The same Brook & Evans (1972) chain, built independently with scipy.stats
    # and solved by ordinary elimination at 80 significant digits, must match
    # our double-precision subtraction-free solve even where the ARL is 1e9
    # or 1e27 (an ordinary double LU loses every digit there).
    states = 40
    ref = _decimal_chain_arl(k, h, shift, states)
    assert brook_evans_arl(k, h, shift, states=states) == pytest.approx(ref, rel=1e-9)


def test_large_arl_stays_accurate() -> None:
    # For a strongly negative drift the one-sided ARL is astronomically large.
    # Siegmund (1985) gets its logarithm right (the exponential rate is exact),
    # and the Brook & Evans (1972) chain with Richardson extrapolation matches
    # the Nystrom value.
    got = cusum_arl(0.5, 12.0, -2.0, sides=1)
    approx = siegmund_arl(0.5, 12.0, -2.0, sides=1)
    assert math.isfinite(got) and got > 1e25
    assert math.log(got) == pytest.approx(math.log(approx), rel=0.02)
    b200 = brook_evans_arl(0.5, 12.0, -2.0, states=200)
    b400 = brook_evans_arl(0.5, 12.0, -2.0, states=400)
    assert got == pytest.approx((4.0 * b400 - b200) / 3.0, rel=1e-4)
    # the two-sided ARL is then governed by the upper side alone
    assert cusum_arl(0.5, 12.0, 2.0) == pytest.approx(cusum_arl(0.5, 12.0, 2.0, sides=1), rel=1e-12)


# --------------------------------------------------------------------------
# Monte Carlo cross-checks (fixed random state)
# --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("k", "h", "shift", "head_start", "reps"),
    [
        (0.5, 3.0, 0.0, 0.0, 40_000),  # ARL ~ 59
        (0.5, 4.0, 1.0, 0.0, 40_000),  # ARL ~ 8.4
        (0.5, 3.0, 0.5, 1.5, 40_000),  # head start, two-sided combination formula
    ],
)
def test_arl_agrees_with_simulation(
    k: float, h: float, shift: float, head_start: float, reps: int
) -> None:
    # Direct simulation of the recursion, fixed random state; the run length
    # has sd close to its mean, so 40 000 replications give a standard error
    # of about 0.5 %; we allow four standard errors plus 1 % for the
    # approximate two-sided head-start formula.
    rng = np.random.default_rng(20240611)
    rl = _simulate_run_lengths(k, h, shift, reps, rng, head_start=head_start)
    mc = rl.mean()
    se = rl.std(ddof=1) / math.sqrt(reps)
    got = cusum_arl(k, h, shift, head_start=head_start)
    tol = 4.0 * se + (0.01 * got if head_start else 0.0)
    assert abs(got - mc) < tol, (got, mc, se)


@pytest.mark.parametrize(
    ("k", "h", "shift", "q", "sides"),
    [
        (0.5, 3.0, 0.0, 0.5, 1),
        (0.5, 3.0, 0.0, 0.5, 2),
        (0.5, 4.0, 1.0, 0.5, 2),
        (0.5, 4.0, 1.0, 0.9, 2),
        (1.0, 2.5, 2.0, 0.5, 2),
    ],
)
def test_run_length_quantile_agrees_with_simulation(
    k: float, h: float, shift: float, q: float, sides: int
) -> None:
    # Direct simulation (fixed random state).  The empirical q-quantile of
    # 40 000 run lengths is compared with the chain's quantile; the
    # run-length distribution is discrete, so we check that the empirical CDF
    # just below the quantile is < q and at the quantile is >= q, up to a
    # sampling allowance of 4 standard errors (plus 0.01 for the
    # independence approximation of the two sides in control).
    rng = np.random.default_rng(7)
    reps = 40_000
    rl = _simulate_run_lengths(k, h, shift, reps, rng, sides=sides)
    n = cusum_run_length_quantile(k, h, shift, q, sides=sides)
    assert n == int(n) and n >= 1
    se = math.sqrt(q * (1 - q) / reps)
    slack = 4 * se + (0.01 if (sides == 2 and shift == 0.0) else 0.0)
    assert np.mean(rl <= n) >= q - slack
    assert np.mean(rl <= n - 1) < q + slack


def test_quantile_is_monotone_and_matches_geometric_tail_in_control() -> None:
    # Common practice: far out in control the run length is close to
    # geometric, so the median is about ARL * ln 2 (within a few percent
    # for a large ARL).
    k, h = 0.5, design_h(604800.0, 0.5)
    med = cusum_run_length_quantile(k, h, 0.0, 0.5)
    assert med == pytest.approx(604800.0 * math.log(2.0), rel=0.02)
    qs = [cusum_run_length_quantile(0.5, 4.0, 1.0, q) for q in (0.1, 0.25, 0.5, 0.75, 0.9)]
    assert qs == sorted(qs) and qs[0] < qs[-1]


# --------------------------------------------------------------------------
# Siegmund approximation
# --------------------------------------------------------------------------


@pytest.mark.parametrize("h", [4.0, 5.0, 6.0, 8.0])
@pytest.mark.parametrize("shift", [0.0, 0.5, 1.0])
def test_siegmund_close_to_chain(h: float, shift: float) -> None:
    # Siegmund (1985): the corrected Brownian approximation is good to a few
    # percent for moderate h (common practice, e.g. Montgomery's SQC text
    # recommends it for quick calculations).
    assert siegmund_arl(0.5, h, shift) == pytest.approx(cusum_arl(0.5, h, shift), rel=0.03)


def test_siegmund_zero_drift_limit_is_continuous() -> None:
    # Siegmund (1985): with zero drift the formula tends to b^2, b = h + 1.166.
    b = 4.0 + 1.166
    assert siegmund_arl(0.5, 4.0, 0.5, sides=1) == pytest.approx(b * b, rel=1e-12)
    assert siegmund_arl(0.5, 4.0, 0.5 + 1e-7, sides=1) == pytest.approx(b * b, rel=1e-5)


# --------------------------------------------------------------------------
# design_h
# --------------------------------------------------------------------------


@pytest.mark.parametrize("k", [0.25, 0.375, 0.5, 0.75, 1.0, 1.5])
@pytest.mark.parametrize("arl0", [50.0, 370.0, 604800.0, 1e9])
def test_design_h_round_trip(arl0: float, k: float) -> None:
    h = design_h(arl0, k)
    assert cusum_arl(k, h) == pytest.approx(arl0, rel=0.005)


def siegmund_two_sided_in_control(k: float, h: float) -> float:
    """Siegmund (1985), "Sequential Analysis", ch. X: the one-sided CUSUM's ARL with drift
    delta is (exp(-2 delta b) + 2 delta b - 1) / (2 delta**2), b = h + 2 rho, rho =
    -zeta(1/2) / sqrt(2 pi) (formula recalled from memory, the constant from scipy); in
    control delta = -k, and two symmetric sides halve it.  Written here, apart from
    arl.siegmund_arl."""
    rho = -float(scipy.special.zeta(0.5)) / math.sqrt(2.0 * math.pi)
    b = h + 2.0 * rho
    return (math.exp(2.0 * k * b) - 2.0 * k * b - 1.0) / (2.0 * k * k) / 2.0


def test_design_h_one_week_at_one_hertz() -> None:
    # h for k = 0.5 at an in-control ARL of 604,800 (a week at 1 Hz): Siegmund's
    # approximation, solved with scipy's brentq, gives about 12.15; the Brook & Evans
    # Markov chain (checked against an independent chain above) confirms it.
    h_siegmund = scipy.optimize.brentq(lambda h: siegmund_two_sided_in_control(0.5, h) - 604800.0,
                                       5.0, 20.0, xtol=1e-10)
    assert h_siegmund == pytest.approx(12.15, abs=0.005)
    # The approximation is within 1% of the chain's ARL at that h (its error in the far
    # tail of the chain's state space is the overshoot correction's)...
    assert cusum_arl(0.5, h_siegmund) == pytest.approx(604800.0, rel=0.01)
    # ... and design_h, which solves the chain, lands within 0.01 of it.
    h = design_h(604800.0, 0.5)
    assert h == pytest.approx(h_siegmund, abs=0.01)
    assert cusum_arl(0.5, h) == pytest.approx(604800.0, rel=0.005)
    # The module's own siegmund_arl agrees with the formula written here (it rounds 2 rho to
    # 1.166, which moves b by 0.0008 and the ARL by exp(2 k 0.0008) - 1, about 0.08%).
    assert siegmund_arl(0.5, h) == pytest.approx(siegmund_two_sided_in_control(0.5, h), rel=1e-3)


def test_design_h_reproduces_lucas_crosier_h() -> None:
    # Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory): h = 4 and h = 5 at k = 0.5 give
    # in-control ARLs 168 and 465, so design_h must return h ~ 4 and ~ 5.
    assert design_h(168.0, 0.5) == pytest.approx(4.0, abs=0.01)
    assert design_h(465.0, 0.5) == pytest.approx(5.0, abs=0.01)


def test_design_h_is_monotone_and_cached() -> None:
    from shiftwatch.core.arl import _design_h_cached

    hs = [design_h(a, 0.5) for a in (100.0, 1e3, 1e4, 1e5, 1e6)]
    assert all(a < b for a, b in itertools.pairwise(hs))
    hits = _design_h_cached.cache_info().hits
    assert design_h(1e4, 0.5) == hs[2]  # bit-identical ...
    assert _design_h_cached.cache_info().hits == hits + 1  # ... because the cache served it
    # arl0 rounded to 10 significant digits shares the entry.
    assert design_h(1e4 * (1 + 1e-12), 0.5) == hs[2]
    assert _design_h_cached.cache_info().hits == hits + 2


@pytest.mark.parametrize(
    ("arl0", "k", "word"),
    [(1.0, 0.5, "arl0"), (0.5, 0.5, "arl0"), (100.0, 0.0, "k"), (100.0, -1.0, "k"),
     (float("nan"), 0.5, "arl0"), (10.0, 2.0, "arl0")],
)
def test_design_h_rejects_bad_input(arl0: float, k: float, word: str) -> None:
    with pytest.raises(ValueError, match=word):
        design_h(arl0, k)


def test_bad_arguments_raise() -> None:
    with pytest.raises(ValueError, match="sides"):
        cusum_arl(0.5, 4.0, sides=3)
    with pytest.raises(ValueError, match="h"):
        cusum_arl(0.5, -1.0)
    with pytest.raises(ValueError, match="k"):
        cusum_arl(-0.5, 4.0)
    with pytest.raises(ValueError, match="head_start"):
        cusum_arl(0.5, 4.0, head_start=5.0)
    with pytest.raises(ValueError, match="q"):
        cusum_run_length_quantile(0.5, 4.0, 1.0, 1.0)
    with pytest.raises(ValueError, match="states"):
        brook_evans_arl(0.5, 4.0, states=1)


def test_arl_table_rows() -> None:
    # Lucas & Crosier (1982), Technometrics 24:199-205, Table 1 (values recalled from memory), k = 0.5, h = 4 (ARL column).
    rows = arl_table(0.5, 4.0, [0.0, 0.5, 1.0, 2.0])
    assert [r[0] for r in rows] == [0.0, 0.5, 1.0, 2.0]
    for (shift, arl, med), published in zip(rows, [168.0, 26.6, 8.38, 3.34]):
        assert arl == pytest.approx(published, rel=0.01)
        assert med == cusum_run_length_quantile(0.5, 4.0, shift, 0.5)
        # the run length is right-skewed: median below the mean
        assert med <= arl + 1


def test_quick_design_h_is_checked_against_the_chain() -> None:
    # Siegmund's approximation (aimed 6% high) is used for the daemon's
    # designs; the Brook & Evans chain must confirm the ARL it promises, never
    # below the target and at most 7% above, over the range the CUSUM bank
    # uses (k = 0.375 ... 1 for min_shift_sigma 1; smaller k for smaller shifts).
    from shiftwatch.core.arl import quick_design_h

    for arl0 in (1e3, 1e4, 604800.0, 1e7, 1e9):
        for k in (0.1, 0.25, 0.375, 0.5, 0.75, 1.0, 1.5):
            h = quick_design_h(arl0, k)
            ratio = cusum_arl(k, h) / arl0
            assert 1.0 - 1e-6 <= ratio <= 1.07, (arl0, k, h, ratio)
