"""Tests of the exact single-step least-squares fit (shiftwatch.core.stepfit).

References used (outside the project):

* Nile annual flow at Aswan, 1871-1970, as shipped in statsmodels
  (``statsmodels.datasets.nile``; Cobb 1978, Biometrika 65:243-251).  The
  least-squares break, its levels, RSS and sup-F agree with the output of
  the R package strucchange (``breakpoints(Nile ~ 1)``, ``Fstats(Nile ~ 1,
  from = 0.15)``, ``confint``) as printed in its documentation examples;
  the figures are quoted from memory.
* Bai (1997), Review of Economics and Statistics 79:551-563, for the
  limit law of the break-date estimator (its closed form recalled from
  memory and evaluated in the test with scipy's normal CDF; a simulation
  of the Brownian argmax checks it too).
* Andrews (1993), Econometrica 61:821-856, Table 1 (p = 1, pi0 = 0.15)
  critical values of sup-F, from memory.
* Hansen (2000), "Sample splitting and threshold estimation", Econometrica
  68:575-603: the limit law P(xi <= x) = (1 - exp(-x/2))**2 of the
  likelihood ratio for the split and its Table 1 critical values (4.50,
  5.94, 7.35, 10.59 at 80, 90, 95, 99%), from memory and checked against
  the formula.  Eo and Morley (2015), Quantitative Economics 6:463-497,
  apply the same set to structural-break dates.
* Siegmund (1979), Advances in Applied Probability 11:701-719, and
  Siegmund (1985), "Sequential Analysis", ch. X: corrected diffusion
  approximation for the maximum of a Gaussian random walk with drift,
  rho = -zeta(1/2)/sqrt(2 pi) = 0.5826 (from memory; zeta(1/2) is taken
  from scipy.special.zeta here).
* Brute force: numpy loop over every split, and scipy.optimize.brute over
  the split with scipy.linalg.lstsq solving each two-level regression.
* Monte-Carlo simulations with a fixed random state.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
import scipy.special
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftwatch.core.stepfit import (
    INTERVAL_METHODS,
    StepFit,
    StepFitter,
    bai_cdf,
    bai_quantile,
    fit_step,
    lr_cdf,
    lr_critical,
    supf_pvalue,
)

# Siegmund's constant, computed independently of the module.
RHO = -float(scipy.special.zeta(0.5)) / math.sqrt(2.0 * math.pi)

# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------


def brute_rss(y: np.ndarray, k_lo: int, k_hi: int) -> np.ndarray:
    """RSS of the two-level model for every split k in [k_lo, k_hi], by loop."""
    out = []
    for k in range(k_lo, k_hi + 1):
        a, b = y[:k], y[k:]
        out.append(float(np.sum((a - a.mean()) ** 2) + np.sum((b - b.mean()) ** 2)))
    return np.array(out)


def vectorised_supf(y: np.ndarray, k_lo: int, k_hi: int) -> np.ndarray:
    """sup-F over splits k_lo..k_hi for each row of y (independent of stepfit)."""
    _r, n = y.shape
    yc = y - y.mean(axis=1, keepdims=True)
    c = np.cumsum(yc, axis=1)
    k = np.arange(k_lo, k_hi + 1)
    d = c[:, k - 1]
    explained = n * d * d / (k * (n - k))
    rss_null = np.sum(yc * yc, axis=1, keepdims=True)
    f = explained / ((rss_null - explained) / (n - 2))
    return np.asarray(f.max(axis=1))


# ---------------------------------------------------------------------------
# Bai (1997) break-date distribution
# ---------------------------------------------------------------------------


def bai_g(x: float) -> float:
    """Bai (1997)'s closed form of G for x >= 0 (recalled from memory), evaluated with scipy's
    normal CDF: G(x) = 1 + sqrt(x/(2 pi)) e^(-x/8) - (x + 5)/2 Phi(-sqrt(x)/2)
    + 3/2 e^x Phi(-3 sqrt(x)/2).  test_bai_cdf_against_simulated_brownian_argmax checks the
    law by simulation, so a wrongly recalled formula would show there."""
    from scipy.stats import norm

    r = math.sqrt(x)
    return float(1.0 + math.sqrt(x / (2.0 * math.pi)) * math.exp(-x / 8.0)
                 - 0.5 * (x + 5.0) * norm.cdf(-r / 2.0) + 1.5 * math.exp(x) * norm.cdf(-1.5 * r))


def test_bai_cdf_known_values() -> None:
    # G from the published closed form, computed here with scipy (see bai_g).
    for x in (0.5, 4.7, 7.7, 11.0, 20.0):
        assert bai_cdf(x) == pytest.approx(bai_g(x), abs=1e-12)
        assert bai_cdf(-x) == pytest.approx(1.0 - bai_g(x), abs=1e-12)
    # The density integrates to one over the line (quad over the symmetric halves).
    import scipy.integrate

    h = 1e-5
    dens = lambda x: (bai_g(x + h) - bai_g(max(x - h, 0.0))) / (x + h - max(x - h, 0.0))
    half, _ = scipy.integrate.quad(dens, 0.0, 200.0, limit=200)
    assert 2 * half == pytest.approx(1.0, abs=1e-4)
    # Symmetry, centre and monotonicity of a CDF of a symmetric law.
    assert bai_cdf(0.0) == pytest.approx(0.5, abs=1e-15)
    xs = np.linspace(-50, 50, 401)
    g = np.array([bai_cdf(float(x)) for x in xs])
    assert np.all(np.diff(g) >= -1e-15)
    assert np.allclose(g + g[::-1], 1.0, atol=1e-14)
    assert bai_cdf(1000.0) == 1.0


def test_bai_quantile_matches_commonly_quoted_values() -> None:
    # Commonly quoted quantiles used with Bai's interval (common practice):
    # 7.7 for a 90% interval (0.95 quantile), 11.0 for 95% (0.975 quantile).
    assert bai_quantile(0.95) == pytest.approx(7.7, abs=0.05)
    assert bai_quantile(0.975) == pytest.approx(11.0, abs=0.05)
    for p in (0.6, 0.9, 0.95, 0.99):
        assert bai_cdf(bai_quantile(p)) == pytest.approx(p, abs=1e-10)
    assert bai_quantile(0.05) == pytest.approx(-bai_quantile(0.95))


def test_bai_cdf_against_simulated_brownian_argmax() -> None:
    # Monte Carlo of Z = argmax (W(s) - |s|/2) on a grid of step 0.02 over
    # [-60, 60] (fixed random state).  P(|Z| <= 7.7) should be close to
    # 2 G(7.7) - 1 = 0.9003; grid discretisation and truncation at +-60 (G(60)
    # is 1 to 1e-6) leave a small bias, so allow 2 points.
    rng = np.random.default_rng(20240601)
    dt, half, reps = 0.02, 60.0, 2000
    m = int(half / dt)
    s = dt * np.arange(1, m + 1)
    right = np.cumsum(rng.standard_normal((reps, m)) * math.sqrt(dt), axis=1) - s / 2
    left = np.cumsum(rng.standard_normal((reps, m)) * math.sqrt(dt), axis=1) - s / 2
    r_max, l_max = right.max(axis=1), left.max(axis=1)
    z = np.where(
        np.maximum(r_max, l_max) <= 0.0,
        0.0,
        np.where(r_max >= l_max, s[right.argmax(axis=1)], -s[left.argmax(axis=1)]),
    )
    assert np.mean(np.abs(z) <= 7.7) == pytest.approx(2 * bai_cdf(7.7) - 1, abs=0.02)
    assert np.mean(z <= 2.0) == pytest.approx(bai_cdf(2.0), abs=0.025)


# ---------------------------------------------------------------------------
# Likelihood-ratio set for the break date (Hansen 2000, Siegmund correction)
# ---------------------------------------------------------------------------


def test_lr_critical_matches_hansen_table() -> None:
    # Hansen (2000) Table 1 (from memory): 4.50, 5.94, 7.35, 10.59 at 80,
    # 90, 95 and 99%.  The formula -2 log(1 - sqrt(level)) gives 4.497,
    # 5.939, 7.352, 10.592.
    for level, c in ((0.8, 4.50), (0.9, 5.94), (0.95, 7.35), (0.99, 10.59)):
        assert lr_critical(level) == pytest.approx(c, abs=0.005)
        assert lr_cdf(lr_critical(level)) == pytest.approx(level, abs=1e-12)
    assert lr_cdf(0.0) == 0.0 and lr_cdf(-1.0) == 0.0 and lr_cdf(math.inf) == 1.0
    # The corrected value is lowered by 2 rho d and never negative.
    assert lr_critical(0.9, 1.0) == pytest.approx(lr_critical(0.9) - 2 * RHO, abs=1e-12)
    assert lr_critical(0.9, -1.0) == lr_critical(0.9, 1.0)
    assert lr_critical(0.9, 50.0) == 0.0
    with pytest.raises(ValueError, match="level"):
        lr_critical(1.0)


def test_lr_cdf_against_simulated_brownian_motion() -> None:
    # xi = max_s (2 W(s) - |s|) on a grid of step dt = 0.01 over [-40, 40]
    # (fixed random state, 2000 replications).  On the grid each side is a
    # Gaussian random walk with drift -dt and increment sd 2 sqrt(dt), so its
    # maximum is lowered by Siegmund's 2 rho sqrt(dt) = 0.117 against the
    # continuous limit: P(xi_grid <= x) ~ lr_cdf(x + 0.117).  Measured: 0.427
    # at x = 2 (lr_cdf(2) = 0.400, lr_cdf(2.117) = 0.426) and 0.904 at 5.94.
    rng = np.random.default_rng(41)
    dt, half, reps = 0.01, 40.0, 2000
    m = int(half / dt)
    s = dt * np.arange(1, m + 1)
    sides = [
        np.cumsum(2.0 * math.sqrt(dt) * rng.standard_normal((reps, m)), axis=1) - s
        for _ in range(2)
    ]
    xi = np.maximum(0.0, np.maximum(sides[0].max(axis=1), sides[1].max(axis=1)))
    for x in (2.0, 5.94):
        assert np.mean(xi <= x) == pytest.approx(lr_cdf(x + 2 * RHO * math.sqrt(dt)), abs=0.02)


def test_siegmund_corrected_critical_value_on_sampled_random_walks() -> None:
    # With the levels and sigma known, the LR at the true split of a sampled
    # series is max(0, max_j S_j, max_j S'_j), S and S' independent Gaussian
    # random walks with drift -d**2 and increment sd 2 d.  Its level-quantile
    # is Hansen's value lowered by 2 rho d (Siegmund's corrected diffusion
    # approximation).  Fixed random state, 20000 replications.  Measured
    # P(LR <= corrected c): 0.9035 / 0.8988 / 0.9038 at d = 0.5 / 1 / 2 (90%);
    # with Hansen's uncorrected c instead: 0.927 / 0.943 / 0.968, which is
    # (1 - exp(-(c + 2 rho d)/2))**2 = 0.925 / 0.944 / 0.968.
    rng = np.random.default_rng(5)
    reps = 20000
    for d in (0.5, 1.0, 2.0):
        m = int(60 / d**2) + 20  # drift -60 by the end: the max is reached
        walks = [
            np.cumsum(2 * d * rng.standard_normal((reps, m)) - d * d, axis=1).max(axis=1)
            for _ in range(2)
        ]
        lr = np.maximum(0.0, np.maximum(*walks))
        assert np.mean(lr <= lr_critical(0.9, d)) == pytest.approx(0.90, abs=0.008)
        plain = np.mean(lr <= lr_critical(0.9))
        expected = (1 - math.exp(-(lr_critical(0.9) + 2 * RHO * d) / 2)) ** 2
        assert plain == pytest.approx(expected, abs=0.008)
        assert plain > 0.92


# ---------------------------------------------------------------------------
# sup-F p-value
# ---------------------------------------------------------------------------


def test_supf_pvalue_at_andrews_critical_values() -> None:
    # Andrews (1993) Econometrica 61, Table 1, p = 1, pi0 = 0.15 (from
    # memory): 7.17 (10%), 8.85 (5%), 12.35 (1%).
    assert supf_pvalue(7.17, 0.15) == pytest.approx(0.10, abs=0.006)
    assert supf_pvalue(8.85, 0.15) == pytest.approx(0.05, abs=0.002)
    assert supf_pvalue(12.35, 0.15) == pytest.approx(0.01, abs=0.0005)


def test_supf_pvalue_is_a_decreasing_tail_probability() -> None:
    for pi0 in (0.01, 0.05, 0.15, 0.3, 0.45):
        cs = np.linspace(0.0, 60.0, 601)
        p = np.array([supf_pvalue(float(c), pi0) for c in cs])
        assert p[0] == 1.0
        assert np.all((p >= 0.0) & (p <= 1.0))
        assert np.all(np.diff(p) <= 1e-15)
    assert supf_pvalue(math.inf, 0.15) == 0.0


def test_supf_pvalue_against_simulated_gaussian_series() -> None:
    # Monte Carlo (fixed random state): 4000 Gaussian white-noise series of
    # length 400, sup-F over [0.15 n, 0.85 n].  The simulated 5% critical
    # value should be within 10% of Andrews' 8.85 (finite n and the discrete
    # grid make it slightly smaller), and the approximate p-value at the
    # simulated 5% and 10% points should be near 0.05 and 0.10.  Measured:
    # critical values 8.64 (5%) and 7.20 (10%), p-values there 0.055 and
    # 0.104, rejection rate of fit_step's p-value < 0.05: 0.045.
    rng = np.random.default_rng(7)
    n, reps = 400, 4000
    y = rng.standard_normal((reps, n))
    k_lo, k_hi = int(0.15 * n), int(0.85 * n)
    supf = vectorised_supf(y, k_lo, k_hi)
    # The vectorised reference agrees with fit_step on a few replications.
    for i in range(5):
        assert fit_step(y[i], trim=0.15).f_stat == pytest.approx(supf[i], rel=1e-9)
    crit5 = float(np.quantile(supf, 0.95))
    crit10 = float(np.quantile(supf, 0.90))
    assert crit5 == pytest.approx(8.85, rel=0.10)
    assert supf_pvalue(crit5, 0.15) == pytest.approx(0.05, abs=0.015)
    assert supf_pvalue(crit10, 0.15) == pytest.approx(0.10, abs=0.025)
    # Rejection rate of fit_step's p-value on the first 600 series.
    pv = np.array([fit_step(row, trim=0.15).p_value for row in y[:600]])
    assert np.mean(pv < 0.05) == pytest.approx(0.05, abs=0.025)


# ---------------------------------------------------------------------------
# Nile (Cobb 1978) against strucchange's published output
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def nile() -> tuple[np.ndarray, np.ndarray]:
    from statsmodels.datasets import nile as nile_ds

    data = nile_ds.load_pandas().data
    return data["volume"].to_numpy(float), data["year"].to_numpy(float)


def test_nile_break_levels_rss_and_supf(nile: tuple[np.ndarray, np.ndarray]) -> None:
    y, years = nile
    assert y.size == 100 and years[0] == 1871.0 and years[-1] == 1970.0
    fit = fit_step(y, years, trim=0.15, level=0.95)
    # strucchange breakpoints(Nile ~ 1): breakpoint at observation 28, i.e.
    # 1898 is the last year of the old regime, so the first new year is 1899.
    assert fit.index == 28
    assert fit.shift_at == 1899.0
    # Segment means 1097.75 and 849.97, RSS 1,597,457 (strucchange coef()
    # and RSS of the one-break fit; Cobb 1978 discusses the same change).
    assert fit.level_before == pytest.approx(1097.75, abs=0.01)
    assert fit.level_after == pytest.approx(849.97, abs=0.01)
    assert fit.rss == pytest.approx(1597457, abs=1)
    assert fit.delta == pytest.approx(849.97 - 1097.75, abs=0.02)
    # sctest(Fstats(Nile ~ 1, from = 0.15), type = "supF"): sup.F = 75.93.
    assert fit.f_stat == pytest.approx(75.93, abs=0.01)
    assert fit.p_value < 1e-10
    assert fit.n_before == 28 and fit.n_after == 72


def test_nile_break_interval_bai(nile: tuple[np.ndarray, np.ndarray]) -> None:
    y, years = nile
    fit = fit_step(y, years, trim=0.15, level=0.95, interval="bai")
    assert fit.interval_method == "bai"
    # strucchange confint(breakpoints(Nile ~ 1)) gives a 95% interval for the
    # break (last old year) of 1895 .. 1902.  strucchange lets the error
    # variance differ on the two sides by default; with the smaller
    # variance after 1898 the right-hand half is longer there.  Our interval
    # assumes one common variance, so it is symmetric in samples: the lower
    # end agrees (last old year 1895, i.e. first new year 1896) and the upper
    # end lies within one year of strucchange's.
    assert fit.shift_at_low == 1896.0
    assert fit.shift_at_high in (1902.0, 1903.0)
    assert fit.index_low == 25
    assert fit.index - fit.index_low == fit.index_high - fit.index


def test_nile_break_interval_lr(nile: tuple[np.ndarray, np.ndarray]) -> None:
    # No published LR set for the Nile is at hand, so the set is checked
    # against its definition with the RSS profile from brute_rss, and
    # compared with strucchange's 95% interval for the break (last old year
    # 1895 .. 1902, quoted from memory as above).  The shift is about 1.94
    # sigma, so the discreteness correction lowers the 95% critical value
    # from 7.35 to about 5.1.  Measured (last old years): 1897 .. 1898 at
    # 95% and 1898 alone at 90% ("lr"); 1896 .. 1899 at both levels with
    # Hansen's uncorrected values ("lr_asymptotic"); Bai 1895 .. 1901.
    y, years = nile
    n = y.shape[0]
    # The LR profile by its definition (Hansen 2000, eq. 8): LR(k) = (RSS(k) - RSS(k_hat)) /
    # sigma_hat**2 with sigma_hat**2 = RSS(k_hat) / (n - 2), each RSS(k) from scipy's least
    # squares on the two-level design matrix (independent of stepfit and of brute_rss).
    def lstsq_rss(k: int) -> float:
        design = np.zeros((n, 2))
        design[:k, 0] = 1.0
        design[k:, 1] = 1.0
        _, res, _, _ = scipy.linalg.lstsq(design, y)
        return float(res) if np.ndim(res) == 0 else float(res[0])

    rss = np.array([lstsq_rss(k) for k in range(15, 86)])
    k_hat = int(np.argmin(rss)) + 15
    assert k_hat == 28  # strucchange's break, last old year 1898 (from memory, as above)
    assert rss.min() == pytest.approx(1597457, rel=1e-5)  # strucchange's RSS (from memory)
    lr_profile = (rss - rss.min()) / (rss.min() / (n - 2))
    assert np.allclose(brute_rss(y, 15, 85), rss, rtol=1e-10)  # the two RSS routes agree
    assert lr_profile[28 - 15] == 0.0 and np.all(lr_profile >= 0)
    last_old = {}
    for level in (0.9, 0.95):
        for method in ("lr", "lr_asymptotic"):
            fit = fit_step(y, years, trim=0.15, level=level, interval=method)
            assert fit.interval_method == method and fit.index == 28
            if method == "lr":
                shift = abs(fit.delta_sigma) * math.sqrt(1 - 1 / fit.f_stat)
                crit = lr_critical(level, shift)
            else:
                crit = lr_critical(level)
            inside = np.flatnonzero(lr_profile <= crit) + 15
            assert (fit.index_low, fit.index_high) == (inside.min(), inside.max())
            # Contains the published break (last old year 1898) and lies
            # inside strucchange's 95% interval 1895 .. 1902.
            lo, hi = years[fit.index_low - 1], years[fit.index_high - 1]
            assert 1895.0 <= lo <= 1898.0 <= hi <= 1902.0
            last_old[(level, method)] = (lo, hi)
    assert last_old[(0.95, "lr")] == (1897.0, 1898.0)
    assert last_old[(0.9, "lr")] == (1898.0, 1898.0)
    assert last_old[(0.95, "lr_asymptotic")] == (1896.0, 1899.0)
    assert last_old[(0.9, "lr_asymptotic")] == (1896.0, 1899.0)


# ---------------------------------------------------------------------------
# Exactness against brute force
# ---------------------------------------------------------------------------

finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)


@st.composite
def series(draw: st.DrawFn) -> tuple[np.ndarray, int]:
    n = draw(st.integers(3, 40))
    kind = draw(st.sampled_from(["free", "ties", "offset"]))
    if kind == "ties":
        vals = draw(st.lists(st.sampled_from([0.0, 0.1, 1.0, -2.5]), min_size=n, max_size=n))
        y = np.array(vals)
    elif kind == "offset":
        vals = draw(st.lists(st.floats(-1.0, 1.0), min_size=n, max_size=n))
        y = 1e4 + 1e-3 * np.array(vals)
    else:
        y = np.array(draw(st.lists(finite, min_size=n, max_size=n)))
    m = draw(st.integers(1, (n - 1) // 2))
    return y, m


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(series())
def test_exact_fit_equals_brute_force_loop(case: tuple[np.ndarray, int]) -> None:
    # Brute force: explicit loop over every admissible split, two-pass RSS.
    y, m = case
    n = y.size
    fit = fit_step(y, min_segment=m)
    rss_all = brute_rss(y, m, n - m)
    best = float(rss_all.min())
    scale = float(np.sum((y - y.mean()) ** 2))
    # Plus the rounding of segment means of a constant series (e.g. four
    # times 0.1: the mean of three of them is not 0.1 exactly).
    tol = 1e-9 * scale + 1e-28 * n * float(np.max(y * y)) + 1e-300
    assert fit.rss <= best + tol
    assert rss_all[fit.index - m] == pytest.approx(fit.rss, rel=1e-9, abs=tol)
    # Earliest of the (numerically) tied optimal splits.
    assert fit.index == m + int(np.argmax(rss_all <= best + tol)) or rss_all[
        fit.index - m
    ] <= best + tol
    assert fit.level_before == pytest.approx(y[: fit.index].mean(), rel=1e-12, abs=1e-12)
    assert fit.level_after == pytest.approx(y[fit.index :].mean(), rel=1e-12, abs=1e-12)
    assert fit.rss_null == pytest.approx(scale, rel=1e-12, abs=1e-300)
    assert m <= fit.index <= n - m
    assert 1 <= fit.index_low <= fit.index <= fit.index_high <= n - 1
    # The LR set from the brute-force profile: its ends are in the set and
    # no split outside the hull is (up to rounding).
    assert m <= fit.index_low and fit.index_high <= n - m
    d = math.sqrt(max(0.0, fit.f_stat - 1) * n / (fit.index * (n - fit.index)))
    crit = 0.0 if math.isinf(fit.f_stat) else lr_critical(0.9, d)
    excess = rss_all - fit.rss - crit * fit.sigma**2
    assert excess[fit.index_low - m] <= tol and excess[fit.index_high - m] <= tol
    assert np.all(excess[: fit.index_low - m] > -tol)
    assert np.all(excess[fit.index_high - m + 1 :] > -tol)
    assert fit.sigma == pytest.approx(math.sqrt(fit.rss / (n - 2)), rel=1e-12, abs=1e-300)
    assert 0.0 <= fit.p_value <= 1.0


def _lstsq_rss(k: float, y: np.ndarray) -> float:
    """RSS of the two-level regression with the split at k (scipy.linalg.lstsq)."""
    ki = round(float(np.atleast_1d(k)[0]))
    n = y.size
    x = np.zeros((n, 2))
    x[:ki, 0] = 1.0
    x[ki:, 1] = 1.0
    beta = scipy.linalg.lstsq(x, y)[0]
    r = y - x @ beta
    return float(r @ r)


@pytest.mark.parametrize(
    ("level", "sigma", "step", "n_before", "n_after"),
    [
        (0.0, 1.0, 1.5, 25, 35),
        (1e4, 1e-3, 5e-3, 40, 20),  # large level, small noise
        (-3e6, 0.5, -0.8, 10, 50),
    ],
)
def test_exact_fit_equals_scipy_brute(
    level: float, sigma: float, step: float, n_before: int, n_after: int
) -> None:
    # scipy.optimize.brute over the integer split (finish=None), each split
    # solved as a two-column least-squares problem by scipy.linalg.lstsq.
    rng = np.random.default_rng(11)
    y = level + sigma * rng.standard_normal(n_before + n_after)
    y[n_before:] += step
    n = y.size
    k_best, rss_best, _, _ = scipy.optimize.brute(
        _lstsq_rss, (slice(1, n, 1),), args=(y,), finish=None, full_output=True
    )
    fit = fit_step(y)
    assert fit.index == round(float(np.atleast_1d(k_best)[0]))
    assert fit.rss == pytest.approx(rss_best, rel=1e-7)
    # And the two-pass RSS is accurate, not just consistent: direct sum.
    direct = brute_rss(y, fit.index, fit.index)[0]
    assert fit.rss == pytest.approx(direct, rel=1e-12)


def test_large_level_small_noise_accuracy() -> None:
    # Level 1e4 with sigma 1e-3: naive sums of squares would lose every digit
    # (1e8 * n against 1e-6 * n).  Compare with a fit of the same data after
    # subtracting the level exactly.
    rng = np.random.default_rng(3)
    noise = 1e-3 * rng.standard_normal(200)
    noise[120:] += 4e-3
    big = fit_step(1e4 + noise)
    small = fit_step(noise)
    assert big.index == small.index == 120
    assert big.sigma == pytest.approx(small.sigma, rel=1e-6)
    assert big.delta == pytest.approx(small.delta, rel=1e-6)
    assert big.f_stat == pytest.approx(small.f_stat, rel=1e-5)
    assert big.sigma == pytest.approx(1e-3, rel=0.15)


def test_quantised_data_keeps_positive_sigma() -> None:
    # Readings at level 1e4 rounded to 0.1 with noise well below the
    # resolution: nearly every value is equal, yet a few differ, so the
    # residual sd must be positive and equal to the direct computation.
    rng = np.random.default_rng(5)
    y = np.round(1e4 + 0.03 * rng.standard_normal(300), 1)
    y[200:] = np.round(y[200:] + 0.5, 1)
    assert np.unique(y[:200]).size > 1
    fit = fit_step(y)
    assert fit.index == 200
    assert fit.sigma > 0.0
    direct = brute_rss(y, 200, 200)[0]
    assert fit.rss == pytest.approx(direct, rel=1e-12)
    assert fit.sigma == pytest.approx(math.sqrt(direct / 298), rel=1e-12)
    # Exact ties between splits are resolved to the earliest one.
    tie = fit_step(np.array([0.0, 1.0, 0.0, 1.0, 0.0]))
    assert tie.index == 1


def test_perfect_step_and_constant_series() -> None:
    perfect = fit_step([2.0, 2.0, 2.0, 5.0, 5.0])
    assert perfect.index == 3 and perfect.sigma == 0.0
    assert perfect.delta_sigma == math.inf and perfect.f_stat == math.inf
    assert perfect.p_value == 0.0
    assert (perfect.index_low, perfect.index_high) == (3, 3)
    flat = fit_step([1.5] * 6, times=[10, 11, 12, 13, 14, 15])
    assert flat.delta == 0.0 and flat.f_stat == 0.0 and flat.p_value == 1.0
    assert (flat.index_low, flat.index_high) == (1, 5)
    assert (flat.shift_at_low, flat.shift_at_high) == (11.0, 15.0)
    for method in INTERVAL_METHODS:
        p = fit_step([2.0, 2.0, 2.0, 5.0, 5.0], interval=method)
        f = fit_step([1.5] * 6, interval=method)
        assert (p.index_low, p.index_high) == (3, 3)
        assert (f.index_low, f.index_high) == (1, 5)


# ---------------------------------------------------------------------------
# Coverage of the break-date interval (Monte Carlo)
# ---------------------------------------------------------------------------


def vectorised_intervals(
    y: np.ndarray, level: float
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """(index_low, index_high) of every method for each row of y (min_segment 1).

    An independent, vectorised implementation of the three intervals from
    the RSS profile RSS(k) = rss_null - n D_k**2 / (k (n - k)), checked
    against fit_step on part of every simulation below.
    """
    r, n = y.shape
    rows = np.arange(r)
    yc = y - y.mean(axis=1, keepdims=True)
    k = np.arange(1, n)
    d = np.cumsum(yc, axis=1)[:, :-1]
    between = n * d * d / (k * (n - k))
    kh = between.argmax(axis=1)
    bmax = between[rows, kh]
    khat = kh + 1
    s2 = (np.sum(yc * yc, axis=1) - bmax) / (n - 2)
    f = bmax / s2
    lr = (bmax[:, None] - between) / s2[:, None]
    c0 = -2.0 * math.log(1.0 - math.sqrt(level))  # Hansen (2000)
    shift = np.sqrt(np.maximum(f - 1.0, 0.0) * n / (khat * (n - khat)))
    out = {}
    for method, crit in (
        ("lr", np.maximum(c0 - 2.0 * RHO * shift, 0.0)),
        ("lr_asymptotic", np.full(r, c0)),
    ):
        inside = lr <= crit[:, None]
        out[method] = (inside.argmax(axis=1) + 1, n - 1 - inside[:, ::-1].argmax(axis=1))
    delta2 = bmax * n / (khat * (n - khat))
    with np.errstate(divide="ignore"):
        hw = np.where(f > 1.0, bai_quantile(0.5 + 0.5 * level) * s2 / (delta2 * (1 - 1 / f)), np.inf)
    reach = np.ceil(np.minimum(hw, n))
    out["bai"] = (np.maximum(1, khat - reach).astype(int), np.minimum(n - 1, khat + reach).astype(int))
    return out


_COVERAGE_REPS = 40000
_CHECKED_ROWS = 150


@pytest.fixture(scope="module")
def coverage_table() -> dict[tuple[int, int, float], dict[str, float]]:
    """Coverage of the 90% interval, every method, 40000 replications per case.

    Gaussian noise, fixed random state, simulated in blocks of 10000.  The
    first rows of each case are also fitted with fit_step, which must give
    the same interval as the vectorised reference.
    """
    table = {}
    for i, (n1, n2, step) in enumerate(
        [(30, 30, 1.0), (60, 60, 1.0), (30, 200, 1.0), (200, 30, 1.0), (60, 60, 0.75), (60, 60, 2.0)]
    ):
        rng = np.random.default_rng(1000 + i)
        hits = dict.fromkeys(INTERVAL_METHODS, 0)
        for block in range(_COVERAGE_REPS // 10000):
            y = rng.standard_normal((10000, n1 + n2))
            y[:, n1:] += step
            ints = vectorised_intervals(y, 0.9)
            for method, (lo, hi) in ints.items():
                hits[method] += int(np.sum((lo <= n1) & (n1 <= hi)))
            if block == 0:
                for j in range(_CHECKED_ROWS):
                    for method, (lo, hi) in ints.items():
                        fit = fit_step(y[j], level=0.9, interval=method)
                        assert (fit.index_low, fit.index_high) == (lo[j], hi[j]), (method, j)
        table[(n1, n2, step)] = {m: h / _COVERAGE_REPS for m, h in hits.items()}
    return table


# Measured coverage of the 90% interval (40000 replications each; Monte-Carlo
# standard error 0.0015):
#
#   step  n1/n2     lr      lr_asymptotic  bai
#   1     30/30     0.8911  0.9421         0.8481
#   1     60/60     0.9093  0.9502         0.8877
#   1     30/200    0.9119  0.9513         0.8876
#   1     200/30    0.9098  0.9516         0.8845
#   0.75  60/60     0.9069  0.9440         0.8430
#   2     60/60     0.9031  0.9657         0.9535
#
# Bai's interval undercovers small shifts on short segments; Hansen's LR set
# with the continuous-time critical value overcovers (its limit ignores
# that the series is sampled, worth 1.2 points of critical value per sigma
# of shift).  The corrected LR set ("lr", the default) stays within 1.2
# points of 90% in every case (other random states gave 0.903 .. 0.910 for
# the 2-sigma case).


@pytest.mark.parametrize(
    "case",
    [(30, 30, 1.0), (60, 60, 1.0), (30, 200, 1.0), (200, 30, 1.0), (60, 60, 0.75), (60, 60, 2.0)],
)
def test_default_interval_coverage_within_5_points(
    coverage_table: dict[tuple[int, int, float], dict[str, float]],
    case: tuple[int, int, float],
) -> None:
    # Product requirement: for a 1-sigma step with at least 30 samples on
    # each side the 90% interval covers 85% .. 95%; checked here also for
    # 0.75 and 2 sigma at 60/60.
    assert fit_step(np.arange(9.0)).interval_method == "lr"
    cov = coverage_table[case]["lr"]
    assert 0.85 <= cov <= 0.95
    assert cov == pytest.approx(0.90, abs=0.02)


def test_alternative_intervals_miss_nominal_coverage(
    coverage_table: dict[tuple[int, int, float], dict[str, float]],
) -> None:
    # Why the default is "lr": Bai's interval undercovers a 1-sigma step on
    # 30/30 samples and a 0.75-sigma step on 60/60; the uncorrected LR set
    # overcovers and leaves the 85 .. 95% band on unbalanced 1-sigma splits.
    assert coverage_table[(30, 30, 1.0)]["bai"] < 0.86
    assert coverage_table[(60, 60, 0.75)]["bai"] < 0.85
    assert coverage_table[(30, 200, 1.0)]["lr_asymptotic"] > 0.95
    assert coverage_table[(200, 30, 1.0)]["lr_asymptotic"] > 0.95
    assert min(v["lr_asymptotic"] for v in coverage_table.values()) > 0.94


def test_variance_factor_scales_errors_interval_and_f() -> None:
    rng = np.random.default_rng(9)
    y = rng.standard_normal(80)
    y[50:] += 1.2
    a = fit_step(y, interval="bai")
    b = fit_step(y, variance_factor=2.5, interval="bai")
    assert b.index == a.index and b.sigma == a.sigma
    assert b.f_stat == pytest.approx(a.f_stat / 2.5, rel=1e-12)
    assert b.level_before_se == pytest.approx(a.level_before_se * math.sqrt(2.5), rel=1e-12)
    assert b.level_after_se == pytest.approx(a.level_after_se * math.sqrt(2.5), rel=1e-12)
    q = bai_quantile(0.95)
    expected = q * a.sigma**2 * 2.5 / (a.delta**2 * (1 - 1 / b.f_stat))
    assert b.halfwidth == pytest.approx(expected, rel=1e-12)
    assert b.index_high - b.index_low >= a.index_high - a.index_low
    assert b.p_value >= a.p_value
    # The LR set divides the RSS profile by sigma**2 * variance_factor and
    # uses the shift in long-run sds: the set can only grow.
    for method in ("lr", "lr_asymptotic"):
        la = fit_step(y, interval=method)
        lb = fit_step(y, variance_factor=2.5, interval=method)
        assert lb.index_low <= la.index_low <= la.index <= la.index_high <= lb.index_high
        assert lb.f_stat == pytest.approx(b.f_stat, rel=1e-12)


def test_variance_factor_is_honest_for_ar1_noise() -> None:
    # AR(1) noise with phi = 0.5 and unit marginal variance has long-run
    # variance (1 + phi) / (1 - phi) = 3 times the marginal one (textbook
    # fact, common practice).  With variance_factor = 3 the sup-F test keeps
    # its size and the break interval its coverage; without it both fail.
    # Fixed random state; series made with scipy.signal.lfilter.  Measured
    # here (2000 replications): null rejection at 5% 0.037 with the factor,
    # 0.478 without.  Coverage of the 90% interval (60/60, step of one
    # long-run sd), with / without the factor, and mean width in samples
    # with it: Bai 0.902 / 0.761 (16.8), "lr" 0.956 / 0.747 (13.7),
    # "lr_asymptotic" 0.976 / 0.831 (16.7).  The LR set over-covers under
    # positive autocorrelation although it is narrower than Bai's interval:
    # the discreteness correction of lr_critical assumes independent noise.
    # A vectorised run with 20000 replications gave "lr" 0.931 / 0.952 /
    # 0.991 at phi = 0.3 / 0.5 / 0.8 and 0.880 at phi = -0.3 (Bai 0.898 /
    # 0.907 / 0.958 and 0.881).
    import scipy.signal

    phi, vf, reps = 0.5, 3.0, 2000
    rng = np.random.default_rng(31)
    e = rng.standard_normal((reps, 400))
    x = scipy.signal.lfilter([1.0], [1.0, -phi], e, axis=1)[:, 200:] * math.sqrt(1 - phi**2)
    assert np.var(x) == pytest.approx(1.0, abs=0.03)
    p_corr = np.array([fit_step(r, trim=0.15, variance_factor=vf).p_value for r in x])
    p_raw = np.array([fit_step(r, trim=0.15).p_value for r in x])
    assert 0.02 <= np.mean(p_corr < 0.05) <= 0.08
    assert np.mean(p_raw < 0.05) > 0.3
    y = x[:, :120].copy()
    y[:, 60:] += math.sqrt(vf)
    cov = {}
    for method in ("bai", "lr"):
        for factor in (vf, 1.0):
            fits = [fit_step(r, variance_factor=factor, interval=method) for r in y]
            cov[method, factor] = np.mean([f.index_low <= 60 <= f.index_high for f in fits])
    assert 0.85 <= cov["bai", vf] <= 0.95
    assert cov["bai", 1.0] < 0.82
    assert 0.85 <= cov["lr", vf] <= 0.97  # conservative, see above
    assert cov["lr", 1.0] < 0.82


# ---------------------------------------------------------------------------
# StepFitter
# ---------------------------------------------------------------------------


def _assert_same_fit(a: StepFit, b: StepFit, value_scale: float = 0.0) -> None:
    scale = max(a.rss_null, b.rss_null, 1e-300)
    if a.index != b.index:
        # Only a numerical tie between splits may be resolved differently.
        # The fitter's prefix sums are centred on a reference of the order
        # of value_scale (the largest |value| in its window), so splits
        # whose sums of squares differ by less than its rounding are ties
        # too (e.g. 0, 0, 3.6e-65 after a 1.0).
        slack = 1e-20 * a.n**2 * value_scale**2
        assert a.rss == pytest.approx(b.rss, rel=1e-9, abs=1e-9 * scale + slack)
        return
    for name in ("index", "index_low", "index_high", "n_before", "n_after", "n"):
        assert getattr(a, name) == getattr(b, name), name
    for name in ("shift_at", "shift_at_low", "shift_at_high"):
        assert getattr(a, name) == getattr(b, name), name
    for name in ("level_before", "level_after", "delta", "rss", "rss_null", "sigma"):
        assert getattr(a, name) == pytest.approx(getattr(b, name), rel=1e-9, abs=1e-9), name
    assert a.p_value == pytest.approx(b.p_value, rel=1e-6, abs=1e-12)


ops = st.lists(
    st.one_of(
        st.tuples(
            st.just("append"),
            st.lists(st.floats(-1e3, 1e3), min_size=1, max_size=30),
            st.sampled_from([0.0, 1e4, -1e6]),
        ),
        st.tuples(st.just("drop"), st.integers(0, 40), st.just(0.0)),
    ),
    min_size=1,
    max_size=25,
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ops, st.integers(1, 3), st.integers(1, 8))
def test_stepfitter_matches_fit_step(
    operations: list[tuple[str, object, float]], min_segment: int, capacity: int
) -> None:
    fitter = StepFitter(capacity=capacity)
    vals: list[float] = []
    times: list[float] = []
    clock = 100.0
    for kind, arg, shift in operations:
        if kind == "append":
            assert isinstance(arg, list)
            chunk = [float(v) + shift for v in arg]
            ts = [clock + 0.5 * i for i in range(len(chunk))]
            clock = ts[-1] + 0.5
            fitter.append(chunk, ts)
            vals += chunk
            times += ts
        else:
            assert isinstance(arg, int)
            k = min(arg, len(vals))
            fitter.drop_front(k)
            del vals[:k]
            del times[:k]
        assert len(fitter) == len(vals)
        assert np.array_equal(fitter.values, np.array(vals, dtype=float))
        assert np.array_equal(fitter.times, np.array(times, dtype=float))
        if len(vals) >= max(3, 2 * min_segment + 1):
            _assert_same_fit(
                fitter.fit(min_segment=min_segment),
                fit_step(vals, times, min_segment=min_segment),
                value_scale=float(np.max(np.abs(vals))),
            )
            start = len(vals) // 3
            if len(vals) - start >= 3:
                _assert_same_fit(
                    fitter.fit_from(start),
                    fit_step(vals[start:], times[start:]),
                    value_scale=float(np.max(np.abs(vals))),
                )


def test_stepfitter_rolling_window_long_run() -> None:
    # A long rolling window with a drifting level exercises compaction and
    # re-centring of the prefix sums; results must match fit_step throughout.
    rng = np.random.default_rng(13)
    fitter = StepFitter(capacity=16)
    data = np.concatenate([5e5 + rng.standard_normal(3000), 5e5 + 3 + rng.standard_normal(3000)])
    t = np.arange(data.size) * 0.1 + 1e9
    window = 400
    straddling = []
    for i in range(0, data.size, 37):
        fitter.append(data[i : i + 37], t[i : i + 37])
        extra = len(fitter) - window
        if extra > 0:
            fitter.drop_front(extra)
        lo = max(0, i + 37 - window)
        hi = min(data.size, i + 37)
        if i % 370 == 0:
            _assert_same_fit(fitter.fit(), fit_step(data[lo:hi], t[lo:hi]))
        if lo + 100 <= 3000 <= hi - 100:
            fit = fitter.fit(min_segment=10)
            _assert_same_fit(fit, fit_step(data[lo:hi], t[lo:hi], min_segment=10))
            straddling.append(abs(lo + fit.index - 3000))
    assert len(fitter) == window
    # The 3-sigma shift at sample 3000 is found by every window that holds
    # at least 100 samples on each side of it.
    assert len(straddling) >= 4 and max(straddling) <= 3


def test_stepfitter_default_times_and_views() -> None:
    f = StepFitter([1.0, 1.0, 1.1])
    f.append(4.0)
    f.append([4.1, 3.9])
    assert list(f.times) == [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]
    f.drop_front(2)
    f.append([4.0])
    assert list(f.times) == [2.0, 3.0, 4.0, 5.0, 6.0]
    assert f.fit().shift_at == 3.0
    with pytest.raises(ValueError):
        f.values[0] = 7.0
    f.clear()
    assert len(f) == 0
    with pytest.raises(ValueError, match="samples"):
        f.fit()


# ---------------------------------------------------------------------------
# Argument checking and serialisation
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"values": [1.0, 2.0]}, "samples"),
        ({"values": [1.0, 2.0, 3.0, 4.0], "min_segment": 2}, "samples"),
        ({"values": [1.0, 2.0, 3.0], "min_segment": 0}, "min_segment"),
        ({"values": [1.0, 2.0, 3.0], "min_segment": 1.5}, "min_segment"),
        ({"values": [1.0, 2.0, 3.0], "level": 1.0}, "level"),
        ({"values": [1.0, 2.0, 3.0], "level": 0.0}, "level"),
        ({"values": [1.0, 2.0, 3.0], "variance_factor": 0.5}, "variance_factor"),
        ({"values": [1.0, 2.0, 3.0], "variance_factor": math.inf}, "variance_factor"),
        ({"values": [1.0, 2.0, 3.0], "trim": 0.5}, "trim"),
        ({"values": [1.0, 2.0, 3.0], "trim": 0.0}, "trim"),
        ({"values": [1.0, 2.0, 3.0], "trim": -0.1}, "trim"),
        ({"values": [1.0, math.nan, 3.0]}, "values"),
        ({"values": [[1.0, 2.0, 3.0]]}, "values"),
        ({"values": [1.0, 2.0, 3.0], "times": [0.0, 1.0]}, "times"),
        ({"values": [1.0, 2.0, 3.0], "times": [0.0, 2.0, 1.0]}, "times"),
        ({"values": [1.0, 2.0, 3.0], "interval": "hansen"}, "interval"),
        ({"values": [1.0, 2.0, 3.0], "interval": None}, "interval"),
    ],
)
def test_bad_arguments_raise(kwargs: dict[str, object], match: str) -> None:
    values = kwargs.pop("values")
    with pytest.raises(ValueError, match=match):
        fit_step(values, **kwargs)  # type: ignore[arg-type]


def test_stepfitter_bad_arguments_raise() -> None:
    with pytest.raises(ValueError, match="capacity"):
        StepFitter(capacity=0)
    f = StepFitter([1.0, 2.0, 3.0, 4.0], [0.0, 1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="times"):
        f.append([5.0], [2.5])
    with pytest.raises(ValueError, match="n must"):
        f.drop_front(5)
    with pytest.raises(ValueError, match="start"):
        f.fit_from(-1)
    with pytest.raises(ValueError, match="interval"):
        f.fit(interval="BAI")
    with pytest.raises(ValueError, match="values"):
        f.append([math.inf])
    with pytest.raises(ValueError, match="pi0"):
        supf_pvalue(3.0, 0.5)
    with pytest.raises(ValueError, match="p must"):
        bai_quantile(1.0)


def test_to_dict_is_json_ready() -> None:
    fit = fit_step([0.0, 0.2, -0.1, 0.1, 2.0, 2.1, 1.9, 2.0], times=np.arange(8) * 2.0)
    d = fit.to_dict()
    assert d["index"] == 4 and d["shift_at"] == 8.0
    assert set(d) >= {
        "index", "shift_at", "index_low", "index_high", "shift_at_low", "shift_at_high",
        "interval_level", "level_before", "level_after", "level_before_se",
        "level_after_se", "delta", "sigma", "delta_sigma", "n_before", "n_after",
        "rss", "rss_null", "f_stat", "p_value",
    }
    assert d["interval_method"] == "lr"
    assert all(type(v) in (int, float) for k, v in d.items() if k != "interval_method")
    assert json.loads(json.dumps(d)) == d
