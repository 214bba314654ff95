"""Exact least-squares fit of a single level shift (step).

The model has three parameters: a constant level before the shift, a
constant level after it, and the shift position (the index of the first
sample at the new level).  For a fixed split the two levels are the segment
means, so the least-squares problem reduces to choosing the split that
maximises the between-segment sum of squares

.. math::

    B_k = \\frac{n}{k (n - k)} D_k^2, \\qquad
    D_k = \\sum_{i < k} (y_i - \\bar y),

which is a function of the first-moment prefix sums only.  All splits are
scored at once with numpy in O(n); the sums of squares of the winning split
are then recomputed two-pass from the segment means, so quantised data and
large levels with tiny noise (level 1e4, sigma 1e-3) keep full accuracy.

Besides the point estimate the fit reports

* standard errors of the two levels,
* a confidence interval for the shift position, by default the convex hull
  of the likelihood-ratio confidence set of Hansen (2000), "Sample splitting
  and threshold estimation", Econometrica 68:575-603 (applied to break
  dates by Eo and Morley 2015, Quantitative Economics 6:463-497), with the
  critical value corrected for the discreteness of the sampled series by
  Siegmund's corrected diffusion approximation (Siegmund 1979, Advances in
  Applied Probability 11:701-719; Siegmund 1985, "Sequential Analysis",
  ch. X); on request the uncorrected LR set or the asymptotic interval of
  Bai (1997), "Estimation of a change point in multiple regression models",
  Review of Economics and Statistics 79:551-563 (homoskedastic case),
* the sup-F statistic over the admissible splits and its approximate
  asymptotic p-value (Andrews 1993, Econometrica 61:821-856; the closed-form
  tail approximation of Hansen 1997 / Estrella 2003 for one parameter).

:class:`StepFitter` keeps growable prefix sums so that a rolling window can
be refitted after ``append``/``drop_front`` without rebuilding its history.

Everything here is pure: numpy and the standard library only, no I/O and no
clock reads.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, replace
from functools import lru_cache
from numbers import Integral, Real
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]

__all__ = [
    "INTERVAL_METHODS",
    "StepFit",
    "StepFitter",
    "anchor_step",
    "bai_cdf",
    "bai_quantile",
    "fit_step",
    "lr_cdf",
    "lr_critical",
    "supf_critical",
    "supf_pvalue",
]

# Splits whose between-segment sum of squares lies within this relative
# distance of the maximum count as tied; the earliest of them is taken.  This
# only resolves rounding noise between exactly tied splits (e.g. quantised
# data) the same way whichever prefix sums were used.
_TIE_RTOL = 1e-12

#: Accepted values of the ``interval`` option (the first is the default).
INTERVAL_METHODS = ("lr", "lr_asymptotic", "bai")

# Siegmund's constant rho = -zeta(1/2) / sqrt(2 pi) for Gaussian increments:
# the expected overshoot correction in P(max_j S_j >= b) ~ exp(-2 mu (b + rho))
# for a unit-variance Gaussian random walk with drift -mu (Siegmund 1985,
# "Sequential Analysis", ch. X; zeta(1/2) = -1.4603545088095868).
_SIEGMUND_RHO = 1.4603545088095868 / math.sqrt(2.0 * math.pi)


# ---------------------------------------------------------------------------
# Distribution of the break-date estimator (Bai 1997) and sup-F p-value
# ---------------------------------------------------------------------------


def _phi_lower(x: float) -> float:
    """Standard normal CDF, Phi(x), via ``math.erfc`` (accurate in the tail)."""
    return 0.5 * math.erfc(-x / math.sqrt(2.0))


def bai_cdf(x: float) -> float:
    """CDF of Z = argmax_s (W(s) - |s|/2), W a two-sided Brownian motion.

    This is the limit law of the rescaled break-date estimator in
    Bai (1997), homoskedastic case: for x > 0

    .. math::

        G(x) = 1 + \\sqrt{x / (2\\pi)}\\, e^{-x/8}
               - \\tfrac12 (x + 5)\\, \\Phi(-\\sqrt{x}/2)
               + \\tfrac32 e^{x}\\, \\Phi(-\\tfrac32 \\sqrt{x}),

    and G(x) = 1 - G(-x) for x < 0.

    Parameters
    ----------
    x : float
        Point at which to evaluate the CDF.

    Returns
    -------
    float
        P(Z <= x).

    Examples
    --------
    >>> round(bai_cdf(0.0), 6)
    0.5
    >>> round(bai_cdf(7.7), 5)
    0.95014
    """
    x = float(x)
    if math.isnan(x):
        raise ValueError("x must be a number, got NaN")
    if x < 0.0:
        return 1.0 - bai_cdf(-x)
    if math.isinf(x):
        return 1.0
    r = math.sqrt(x)
    value = (
        1.0
        + math.sqrt(x / (2.0 * math.pi)) * math.exp(-x / 8.0)
        - 0.5 * (x + 5.0) * _phi_lower(-0.5 * r)
    )
    # exp(x) * Phi(-1.5 sqrt(x)) behaves like exp(-x/8); it is negligible
    # (and exp would overflow) long before x reaches 700.
    if x < 700.0:
        value += 1.5 * math.exp(x) * _phi_lower(-1.5 * r)
    return min(1.0, max(0.0, value))


@lru_cache(maxsize=64)
def bai_quantile(p: float) -> float:
    """Quantile of Z (see :func:`bai_cdf`), found by bisection and cached.

    Parameters
    ----------
    p : float
        Probability in (0, 1).

    Returns
    -------
    float
        q with G(q) = p (negative for p < 0.5).

    Examples
    --------
    >>> round(bai_quantile(0.95), 1)
    7.7
    >>> round(bai_quantile(0.975), 1)
    11.0
    """
    p = float(p)
    if not 0.0 < p < 1.0:
        raise ValueError(f"p must lie strictly between 0 and 1, got {p!r}")
    if p < 0.5:
        return -bai_quantile(1.0 - p)
    if p == 0.5:
        return 0.0
    lo, hi = 0.0, 1.0
    while bai_cdf(hi) < p:
        lo, hi = hi, 2.0 * hi
        if hi > 1e6:  # p indistinguishable from 1 in double precision
            raise ValueError(f"p is too close to 1 to invert, got {p!r}")
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if bai_cdf(mid) < p:
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-12 * max(1.0, hi):
            break
    return 0.5 * (lo + hi)


def lr_cdf(x: float) -> float:
    """CDF of the limit law of the likelihood ratio for the break date.

    Hansen (2000), Econometrica 68:575-603, Theorem 2: the LR statistic at
    the true split converges to xi = max_s (2 W(s) - |s|), W a two-sided
    Brownian motion, with P(xi <= x) = (1 - exp(-x/2))**2 for x >= 0.

    Examples
    --------
    >>> round(lr_cdf(5.94), 3), round(lr_cdf(7.35), 3)
    (0.9, 0.95)
    """
    x = float(x)
    if math.isnan(x):
        raise ValueError("x must be a number, got NaN")
    if x <= 0.0:
        return 0.0
    return (-math.expm1(-0.5 * x)) ** 2


def lr_critical(level: float, shift: float = 0.0) -> float:
    """Critical value of the LR confidence set for the break date.

    With ``shift = 0`` this is Hansen's (2000) asymptotic value
    ``c = -2 log(1 - sqrt(level))``, the ``level`` quantile of
    :func:`lr_cdf` (5.94 at 90%, 7.35 at 95%).

    That limit treats the break as a point of a continuous Brownian motion.
    In a sampled series each side of the LR profile at the true split is a
    Gaussian random walk with drift -d**2 and increment standard deviation
    2 d, where d = |shift| / sigma; by Siegmund's corrected diffusion
    approximation its maximum exceeds x with probability about
    ``exp(-(x + 2 rho d) / 2)``, rho = 0.5826.  The quantile is therefore
    lowered by ``2 rho d`` (and floored at 0).  Without this correction the
    set over-covers for shifts of a sigma or more.  The correction assumes
    independent noise; under positive autocorrelation (with a variance
    factor) the set is conservative.

    Parameters
    ----------
    level : float
        Confidence level in (0, 1).
    shift : float, default 0
        Shift size in noise standard deviations (its absolute value is used).

    Returns
    -------
    float
        The critical value, >= 0.

    Examples
    --------
    >>> round(lr_critical(0.9), 2), round(lr_critical(0.95), 2)
    (5.94, 7.35)
    >>> round(lr_critical(0.9, 1.0), 3)
    4.774
    """
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level!r}")
    d = abs(float(shift))
    if math.isnan(d):
        raise ValueError("shift must be a number, got NaN")
    c = -2.0 * math.log1p(-math.sqrt(level)) - 2.0 * _SIEGMUND_RHO * d
    return max(0.0, c)


def supf_pvalue(f_stat: float, pi0: float) -> float:
    """Approximate asymptotic p-value of the sup-F statistic for one break.

    Uses the closed-form tail approximation for the supremum of a squared
    tied-down Bessel process of order p = 1 over [pi0, 1 - pi0]:

    .. math::

        P(\\sup F > c) \\approx \\frac{\\sqrt{c}\\, e^{-c/2}}{\\sqrt{2\\pi}}
        \\Bigl[(1 - 1/c)\\log\\lambda + 4/c\\Bigr],
        \\qquad \\lambda = \\bigl((1 - \\pi_0)/\\pi_0\\bigr)^2 .

    The approximation is meant for the upper tail.  Below the point where it
    stops decreasing in c (small statistics, where it is not valid) the
    p-value is reported as 1; elsewhere it is clipped to [0, 1].

    Parameters
    ----------
    f_stat : float
        The sup-F statistic (already divided by any variance factor).
    pi0 : float
        Trimming fraction, 0 < pi0 < 0.5.

    Returns
    -------
    float
        Approximate p-value in [0, 1].

    Examples
    --------
    >>> round(supf_pvalue(8.85, 0.15), 3)
    0.05
    >>> supf_pvalue(0.5, 0.15)
    1.0
    """
    pi0 = float(pi0)
    if not 0.0 < pi0 < 0.5:
        raise ValueError(f"pi0 must lie strictly between 0 and 0.5, got {pi0!r}")
    c = float(f_stat)
    if math.isnan(c):
        raise ValueError("f_stat must be a number, got NaN")
    if c == math.inf:
        return 0.0
    if c <= 0.0:
        return 1.0
    log_lam = 2.0 * math.log((1.0 - pi0) / pi0)
    # f(c) is proportional to exp(-c/2) (L sqrt(c) + (4 - L)/sqrt(c)); its
    # derivative has the sign of -(L c^2 - (2L - 4) c + (4 - L)).  Left of
    # the larger root the approximation is still rising: report 1 there.
    a, b, cc = log_lam, -(2.0 * log_lam - 4.0), 4.0 - log_lam
    disc = b * b - 4.0 * a * cc
    if disc >= 0.0:
        peak = (-b + math.sqrt(disc)) / (2.0 * a)
        if c <= peak:
            return 1.0
    value = (
        math.sqrt(c)
        * math.exp(-0.5 * c)
        / math.sqrt(2.0 * math.pi)
        * ((1.0 - 1.0 / c) * log_lam + 4.0 / c)
    )
    return min(1.0, max(0.0, value))


def supf_critical(alpha: float, pi0: float) -> float:
    """The sup-F statistic whose :func:`supf_pvalue` is ``alpha``: the smallest
    statistic (to 1e-9 of itself) above which every statistic has a p-value below
    ``alpha``, found by bisection on the decreasing tail.

    Examples
    --------
    >>> round(supf_critical(0.05, 0.15), 3), round(supf_pvalue(supf_critical(0.05, 0.15), 0.15), 6)
    (8.857, 0.05)
    """
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")
    lo, hi = 0.0, 1.0
    while supf_pvalue(hi, pi0) >= alpha:
        lo, hi = hi, 2.0 * hi
    while hi - lo > 1e-9 * hi:
        mid = 0.5 * (lo + hi)
        if supf_pvalue(mid, pi0) >= alpha:
            lo = mid
        else:
            hi = mid
    return lo


# ---------------------------------------------------------------------------
# Result record
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class StepFit:
    """Result of a single-step least-squares fit.

    Attributes
    ----------
    index : int
        Index (into the fitted window) of the first sample at the new level.
    shift_at : float
        ``times[index]``, the time of the first sample at the new level.
    index_low, index_high : int
        Confidence interval for ``index``, always containing it.  With
        ``interval_method`` "lr" or "lr_asymptotic": the first and last
        admissible split in the likelihood-ratio confidence set
        ``{k : (rss(k) - rss) / (sigma**2 * variance_factor) <= c}``
        (Hansen 2000), c from :func:`lr_critical`: for "lr" with the shift
        in long-run noise sds, d = |delta| / (sigma sqrt(variance_factor)),
        its square cleared of its noise bias, d**2 (1 - 1/f_stat); for
        "lr_asymptotic" with shift 0.  With "bai": Bai (1997)'s interval
        rounded outward to whole samples and clipped to [1, n - 1].
    shift_at_low, shift_at_high : float
        ``times[index_low]`` and ``times[index_high]``.
    interval_level : float
        Confidence level of the interval (e.g. 0.9).
    interval_method : str
        How the interval was computed: "lr", "lr_asymptotic" or "bai".
    halfwidth : float
        For "bai": the unrounded half width in samples,
        ``q * sigma**2 * variance_factor / (delta**2 * (1 - 1/f_stat))``,
        q the (1 + level)/2 quantile of :func:`bai_cdf`; the factor
        ``1 - 1/f_stat`` removes the noise bias of ``delta**2``.  Infinite
        (interval = whole window) when ``f_stat <= 1``.  For the LR methods
        (whose interval need not be symmetric): the larger of
        ``index - index_low`` and ``index_high - index``.
    level_before, level_after : float
        Least-squares levels (segment means).
    level_before_se, level_after_se : float
        Their standard errors, ``sigma * sqrt(variance_factor / n_seg)``.
    delta : float
        ``level_after - level_before``.
    sigma : float
        Pooled residual standard deviation, ``sqrt(rss / (n - 2))`` (one
        degree of freedom for each level; the split itself is not counted,
        as in the usual F statistic for a break).
    delta_sigma : float
        ``delta / sigma`` (+-inf if sigma == 0 and delta != 0, 0 if both are 0).
    n_before, n_after, n : int
        Samples before and after the shift, and in total.
    rss : float
        Residual sum of squares of the step model.
    rss_null : float
        Residual sum of squares of the one-level (no shift) model.
    f_stat : float
        ``(rss_null - rss) / (rss / (n - 2)) / variance_factor``; as the
        best split minimises rss this is the sup-F over the admissible splits.
    p_value : float
        Approximate asymptotic p-value of ``f_stat`` (:func:`supf_pvalue`).
    pi0 : float
        Trimming fraction used for the p-value (``trim``, or
        ``min_segment / n`` when no trim is given).
    variance_factor : float
        The variance correction that was applied.
    """

    index: int
    shift_at: float
    index_low: int
    index_high: int
    shift_at_low: float
    shift_at_high: float
    interval_level: float
    interval_method: str
    halfwidth: float
    level_before: float
    level_after: float
    level_before_se: float
    level_after_se: float
    delta: float
    sigma: float
    delta_sigma: float
    n_before: int
    n_after: int
    n: int
    rss: float
    rss_null: float
    f_stat: float
    p_value: float
    pi0: float
    variance_factor: float

    def to_dict(self) -> dict[str, Any]:
        """Return the fields as a plain dict of Python ints and floats.

        Examples
        --------
        >>> fit = fit_step([0.0, 0.1, 0.0, 1.0, 1.1, 1.0])
        >>> d = fit.to_dict()
        >>> d["index"], round(d["delta"], 6), d["interval_method"]
        (3, 1.0, 'lr')
        """
        return asdict(self)


# ---------------------------------------------------------------------------
# Argument checking and the shared fitting kernel
# ---------------------------------------------------------------------------


def _check_options(
    n: int,
    level: float,
    min_segment: int,
    trim: float | None,
    variance_factor: float,
) -> tuple[int, int, float]:
    """Validate options; return the admissible split range and pi0."""
    if isinstance(level, bool) or not isinstance(level, Real) or not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be a number strictly between 0 and 1, got {level!r}")
    if isinstance(min_segment, bool) or not isinstance(min_segment, Integral) or min_segment < 1:
        raise ValueError(f"min_segment must be an integer >= 1, got {min_segment!r}")
    if (
        isinstance(variance_factor, bool)
        or not isinstance(variance_factor, Real)
        or not math.isfinite(float(variance_factor))
        or float(variance_factor) < 1.0
    ):
        raise ValueError(
            f"variance_factor must be a finite number >= 1, got {variance_factor!r}"
        )
    m = int(min_segment)
    if n < 3 or n < 2 * m + 1:
        raise ValueError(
            f"need at least max(3, 2*min_segment+1) = {max(3, 2 * m + 1)} samples "
            f"(min_segment={m}), got {n}"
        )
    k_lo, k_hi = m, n - m
    if trim is None:
        pi0 = m / n
    else:
        if isinstance(trim, bool) or not isinstance(trim, Real) or not 0.0 < float(trim) < 0.5:
            raise ValueError(
                f"trim must be None or a fraction strictly between 0 and 0.5, got {trim!r}"
            )
        pi0 = float(trim)
        # Same rounding as strucchange's Fstats: from = floor(trim * n),
        # to = floor((1 - trim) * n), counted in samples before the split.
        k_lo = max(k_lo, math.floor(pi0 * n))
        k_hi = min(k_hi, math.floor((1.0 - pi0) * n))
        if k_lo > k_hi:
            raise ValueError(
                f"trim={trim!r} with min_segment={m} leaves no admissible split for n={n}"
            )
    return k_lo, k_hi, pi0


def _check_interval(interval: str) -> str:
    if not isinstance(interval, str) or interval not in INTERVAL_METHODS:
        raise ValueError(f"interval must be one of {INTERVAL_METHODS}, got {interval!r}")
    return interval


def _as_values(values: ArrayLike, name: str = "values") -> FloatArray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite (no NaN or inf)")
    return arr


def _as_times(times: ArrayLike, n: int) -> FloatArray:
    arr = _as_values(times, "times")
    if arr.size != n:
        raise ValueError(f"times must have the same length as values ({n}), got {arr.size}")
    if n > 1 and bool((arr[1:] < arr[:-1]).any()):  # a decrease (np.diff made an array of n floats)
        raise ValueError("times must be non-decreasing")
    return arr


def _fit_window(
    values: FloatArray,
    times: FloatArray,
    csum: FloatArray,
    *,
    level: float,
    k_lo: int,
    k_hi: int,
    pi0: float,
    variance_factor: float,
    interval: str,
) -> StepFit:
    """Fit one step to ``values`` given prefix sums ``csum`` (length n + 1).

    ``csum[j] - csum[0]`` must be the sum of ``values[:j] - ref`` for some
    reference value ``ref`` (any constant; it cancels).
    """
    n = values.size
    c0 = csum[0]
    total = csum[n] - c0
    # between = dev * dev / (ks * (n - ks)), dev = (csum - c0)[k_lo:k_hi + 1] - ks * (total / n):
    # the same operations on the same numbers, in place in three arrays of the splits instead of
    # a new array for each step (a series of 4 million samples took nine, 290 MB).
    ks = np.arange(k_lo, k_hi + 1, dtype=np.float64)
    between = np.subtract(csum[k_lo : k_hi + 1], c0)
    scratch = np.multiply(ks, total / n)
    between -= scratch
    np.multiply(between, between, out=between)
    np.subtract(n, ks, out=scratch)
    np.multiply(ks, scratch, out=scratch)
    del ks
    between /= scratch
    del scratch
    bmax = float(between.max())
    best = int(np.argmax(between >= bmax * (1.0 - _TIE_RTOL)))
    del between
    k = k_lo + best

    # Two-pass sums of squares on the chosen segments: exact to rounding
    # even when the level is large compared with the noise.
    head, tail = values[:k], values[k:]
    mean_before = float(head.mean())
    mean_after = float(tail.mean())
    mean_all = float(values.mean())
    rss = float(_squares_about(head, mean_before) + _squares_about(tail, mean_after))
    rss_null = float(_squares_about(values, mean_all))
    delta = mean_after - mean_before
    explained = k * (n - k) / n * delta * delta  # = rss_null - rss, accurately
    vf = float(variance_factor)

    dof = n - 2
    sigma2 = rss / dof
    sigma = math.sqrt(sigma2)
    if sigma > 0.0:
        delta_sigma = delta / sigma
        f_stat = explained / sigma2 / vf
    else:
        delta_sigma = 0.0 if delta == 0.0 else math.copysign(math.inf, delta)
        f_stat = 0.0 if explained == 0.0 else math.inf
    p_value = supf_pvalue(f_stat, pi0)

    if interval == "bai":
        index_low, index_high, halfwidth = _bai_interval(
            n, k, level, sigma2 * vf, delta, f_stat
        )
    else:
        index_low, index_high = _lr_interval(
            values, mean_all, k, k_lo, k_hi, level, sigma2 * vf, f_stat,
            corrected=interval == "lr",
        )
        halfwidth = float(max(k - index_low, index_high - k))

    return StepFit(
        index=k,
        shift_at=float(times[k]),
        index_low=index_low,
        index_high=index_high,
        shift_at_low=float(times[index_low]),
        shift_at_high=float(times[index_high]),
        interval_level=float(level),
        interval_method=interval,
        halfwidth=halfwidth,
        level_before=mean_before,
        level_after=mean_after,
        level_before_se=sigma * math.sqrt(vf / k),
        level_after_se=sigma * math.sqrt(vf / (n - k)),
        delta=delta,
        sigma=sigma,
        delta_sigma=delta_sigma,
        n_before=k,
        n_after=n - k,
        n=n,
        rss=rss,
        rss_null=rss_null,
        f_stat=f_stat,
        p_value=p_value,
        pi0=pi0,
        variance_factor=vf,
    )


def _squares_about(x: FloatArray, centre: float) -> np.float64:
    """``np.sum((x - centre) ** 2)``, squared in place (one temporary array, not two)."""
    d = x - centre
    np.multiply(d, d, out=d)
    total: np.float64 = np.sum(d)
    return total


def _bai_interval(
    n: int, k: int, level: float, s2: float, delta: float, f_stat: float
) -> tuple[int, int, float]:
    """Bai (1997) interval k -/+ q s2 / delta^2, rounded outward; s2 = vf sigma^2."""
    # The squared shift is estimated without the upward bias of the plug-in
    # delta_hat^2, whose mean at a given split is delta^2 + s2 (1/n1 + 1/n2):
    # delta_hat^2 - s2 n / (n1 n2) = delta_hat^2 (1 - 1/F).  The correction
    # vanishes asymptotically and lifts the small-sample coverage.  F <= 1
    # means the shift cannot be told from noise: the interval is the whole
    # window.
    q = bai_quantile(0.5 * (1.0 + float(level)))
    if f_stat <= 1.0:
        halfwidth = math.inf
    else:
        halfwidth = q * s2 / (delta * delta * (1.0 - 1.0 / f_stat))
    reach = n if halfwidth >= n else math.ceil(halfwidth)
    return max(1, k - reach), min(n - 1, k + reach), halfwidth


def _lr_interval(
    values: FloatArray,
    mean_all: float,
    k: int,
    k_lo: int,
    k_hi: int,
    level: float,
    s2: float,
    f_stat: float,
    *,
    corrected: bool,
) -> tuple[int, int]:
    """Convex hull of the LR confidence set (Hansen 2000); s2 = vf sigma^2.

    rss(j) - rss(k) = B_k - B_j, B the between-segment sum of squares, is
    evaluated for every admissible j at once from prefix sums of the window
    centred on its own mean.  They are rebuilt here (O(n), like the two-pass
    sums of squares) rather than taken from the caller, so that fit_step and
    StepFitter, whose prefix sums are centred differently, give the same set.
    """
    n = values.size
    cl = values - mean_all
    np.cumsum(cl, out=cl)
    dev = cl[k_lo - 1 : k_hi]
    # prof = n * dev * dev / (ks * (n - ks)): the same operations, in place
    prof = np.multiply(n, dev)
    prof *= dev
    del cl, dev
    ks = np.arange(k_lo, k_hi + 1, dtype=np.float64)
    scratch = np.subtract(n, ks)
    np.multiply(ks, scratch, out=scratch)
    del ks
    prof /= scratch
    del scratch
    b_hat = float(prof[k - k_lo])
    if not corrected:
        c = lr_critical(level)
    elif math.isinf(f_stat):
        c = 0.0
    else:
        # Shift in noise sds with the noise bias of its square removed:
        # d^2 (1 - 1/F) = (F - 1) n / (k (n - k)).
        d = math.sqrt(max(0.0, f_stat - 1.0) * n / (k * (n - k)))
        c = lr_critical(level, d)
    # Splits tied with the best one to rounding always belong to the set
    # (this alone decides when sigma == 0).
    inside = (b_hat - prof) <= c * s2 + _TIE_RTOL * b_hat
    low = k_lo + int(np.argmax(inside))
    high = k_hi - int(np.argmax(inside[::-1]))
    return low, high


# ---------------------------------------------------------------------------
# Public entry points
# ---------------------------------------------------------------------------


def anchor_step(fit: StepFit, level_before: float, n_before: int, sigma: float,
                variance_factor: float = 1.0) -> StepFit:
    """The step of ``fit`` measured from a known level before it.

    ``fit`` splits a stretch of samples; ``level_before`` is the level before
    the step known from elsewhere (a settled baseline), resting on ``n_before``
    samples of noise sigma ``sigma``.  The level after and the split stay the
    fit's; the level before, ``delta``, ``delta_sigma`` (over ``sigma``),
    ``sigma``, ``n_before`` and ``level_before_se`` are the known level's, and
    the test is the two-sample z of the level after against it, with both
    means' variances times ``variance_factor`` (the long-run factor of AR(1)
    noise): ``f_stat`` is z squared and ``p_value`` its one-sided normal tail
    in the direction of ``delta``.  Shift-time interval and sums of squares
    stay the fit's.  Where the fit sees few samples before its split (the
    stretch began after the step), its own sup-F cannot show a step that this
    test shows.

    Examples
    --------
    >>> fit = fit_step([0.2, -0.1, 1.1, 0.9, 1.0, 1.2], min_segment=2)
    >>> a = anchor_step(fit, 0.0, 1000, 0.1)
    >>> round(a.delta, 3), a.n_before, a.p_value < 1e-12
    (1.05, 1000, True)
    """
    if not (sigma > 0.0 and math.isfinite(sigma)) or n_before < 1 or fit.n_after < 1:
        raise ValueError("anchor_step needs sigma > 0, n_before >= 1 and a fit with samples after its split")
    vf = float(variance_factor)
    delta = fit.level_after - float(level_before)
    se = sigma * math.sqrt(vf * (1.0 / fit.n_after + 1.0 / n_before))
    z = delta / se
    return replace(
        fit,
        level_before=float(level_before),
        level_before_se=sigma * math.sqrt(vf / n_before),
        delta=delta,
        sigma=float(sigma),
        delta_sigma=delta / sigma,
        n_before=int(n_before),
        f_stat=z * z,
        p_value=0.5 * math.erfc(abs(z) / math.sqrt(2.0)),
        variance_factor=vf,
    )


def fit_step(
    values: ArrayLike,
    times: ArrayLike | None = None,
    *,
    level: float = 0.9,
    min_segment: int = 1,
    trim: float | None = None,
    variance_factor: float = 1.0,
    interval: str = "lr",
    last_split: int | None = None,
    first_split: int | None = None,
) -> StepFit:
    """Fit the exact least-squares single step to a series.

    Every admissible split is scored in O(n) from prefix sums of the data
    centred on its mean; the global optimum is returned (ties go to the
    earliest split).

    Parameters
    ----------
    values : array_like
        The samples, finite, one-dimensional.
    times : array_like, optional
        Non-decreasing sample times; default ``arange(n)`` as floats.
    level : float, default 0.9
        Confidence level of the interval for the shift position.
    min_segment : int, default 1
        Minimum number of samples on each side of the shift.
    trim : float, optional
        If given (0 < trim < 0.5), splits are further restricted to
        ``floor(trim*n) <= index <= floor((1-trim)*n)`` as in strucchange's
        ``Fstats(from=trim)``; the p-value then uses pi0 = trim, otherwise
        pi0 = min_segment / n.
    variance_factor : float, default 1.0
        Long-run variance over marginal variance of the noise (>= 1) for
        autocorrelated data.  Multiplies sigma**2 in the standard errors and
        the interval width and divides the F statistic.
    interval : {"lr", "lr_asymptotic", "bai"}, default "lr"
        Confidence interval for the shift position: the likelihood-ratio
        set of Hansen (2000) with the critical value corrected for the
        sampling of the series (see :func:`lr_critical`), the same set with
        Hansen's uncorrected asymptotic critical value, or Bai (1997)'s
        symmetric asymptotic interval.  The default is the one whose
        simulated coverage stays closest to nominal (see the tests).
    last_split : int, optional
        If given, splits are further restricted to ``index <= last_split``
        (the step of an event, which began at or before its detection).  The
        fit, its levels and its interval are then those of the best split in
        that range; ``f_stat`` is the sup-F over that range, and the p-value
        is still that of the sup over ``[pi0, 1 - pi0]``, which is larger (so
        conservative for the shorter range).
    first_split : int, optional
        If given, splits are further restricted to ``index >= first_split``
        (the step of an event opened after an earlier detection that was not
        this step: it began after that detection); as ``last_split`` for the
        fit, its interval and its p-value.

    Returns
    -------
    StepFit
        The fitted step, its interval, statistic and p-value.

    Raises
    ------
    ValueError
        On non-finite or non-1-D input, mismatched or decreasing times,
        fewer than ``max(3, 2*min_segment+1)`` samples, or options outside
        their accepted ranges.

    Examples
    --------
    >>> fit = fit_step([10.0, 10.2, 9.8, 10.0, 12.1, 11.9, 12.0, 12.0],
    ...                times=[0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5])
    >>> fit.index, fit.shift_at
    (4, 2.0)
    >>> round(fit.level_before, 3), round(fit.level_after, 3), round(fit.delta, 3)
    (10.0, 12.0, 2.0)
    >>> fit.index_low, fit.index_high, fit.interval_method
    (4, 4, 'lr')
    >>> bai = fit_step([10.0, 10.2, 9.8, 10.0, 12.1, 11.9, 12.0, 12.0], interval="bai")
    >>> bai.index_low, bai.index_high
    (3, 5)
    >>> fit.p_value < 0.001
    True
    """
    y = _as_values(values)
    n = y.size
    k_lo, k_hi, pi0 = _check_options(n, level, min_segment, trim, variance_factor)
    _check_interval(interval)
    if last_split is not None:
        if isinstance(last_split, bool) or not isinstance(last_split, Integral) or last_split < k_lo:
            raise ValueError(f"last_split must be an integer >= {k_lo} (the first admissible split), "
                             f"got {last_split!r}")
        k_hi = min(k_hi, int(last_split))
    k_lo = _first_split(first_split, k_lo, k_hi)
    t = np.arange(n, dtype=np.float64) if times is None else _as_times(times, n)
    csum = np.empty(n + 1, dtype=np.float64)
    csum[0] = 0.0
    np.subtract(y, y.mean(), out=csum[1:])  # np.cumsum(y - y.mean()) without the temporary array
    np.cumsum(csum[1:], out=csum[1:])
    return _fit_window(
        y, t, csum, level=level, k_lo=k_lo, k_hi=k_hi, pi0=pi0,
        variance_factor=variance_factor, interval=interval,
    )


def _first_split(first_split: int | None, k_lo: int, k_hi: int) -> int:
    """The first admissible split with ``first_split`` (see :func:`fit_step`)."""
    if first_split is None:
        return k_lo
    if isinstance(first_split, bool) or not isinstance(first_split, Integral) or first_split > k_hi:
        raise ValueError(f"first_split must be an integer <= {k_hi} (the last admissible split), "
                         f"got {first_split!r}")
    return max(k_lo, int(first_split))


class StepFitter:
    """Incremental single-step fitter over a growing or rolling window.

    Keeps the samples, their times and the prefix sums of the samples
    (centred on a reference value) in growable arrays.  ``append`` extends
    them in time proportional to the new samples; ``drop_front`` only moves
    an offset.  When the dropped part is larger than the live window (or
    the arrays must grow) the live part is moved to the front and its prefix
    sums are rebuilt around the window mean, which keeps them small and
    accurate; this costs O(window) and is paid for by the drops or appends
    that triggered it.

    Only first-moment prefix sums are kept: the best split depends on them
    alone, and the sums of squares of the chosen split are recomputed
    two-pass by the shared kernel.  ``fit`` therefore gives the same result
    as :func:`fit_step` on ``(self.values, self.times)``.

    Parameters
    ----------
    values : array_like, optional
        Initial samples.
    times : array_like, optional
        Their times; by default each sample's running count since the
        fitter was created (0.0, 1.0, ...), which still counts dropped ones.
    capacity : int, default 256
        Initial size of the storage arrays.

    Examples
    --------
    >>> f = StepFitter([5.0, 5.1, 4.9, 5.0])
    >>> f.append([7.0, 7.1, 6.9, 7.0])
    >>> len(f), f.fit().index, f.fit().shift_at
    (8, 4, 4.0)
    >>> f.drop_front(2)
    >>> len(f), f.fit().index, f.fit().shift_at
    (6, 2, 4.0)
    """

    _values: FloatArray
    _times: FloatArray
    _csum: FloatArray
    _start: int
    _end: int
    _ref: float
    _count: int

    def __init__(
        self,
        values: ArrayLike | None = None,
        times: ArrayLike | None = None,
        *,
        capacity: int = 256,
    ) -> None:
        if isinstance(capacity, bool) or not isinstance(capacity, Integral) or capacity < 1:
            raise ValueError(f"capacity must be an integer >= 1, got {capacity!r}")
        cap = int(capacity)
        self._values = np.empty(cap, dtype=np.float64)
        self._times = np.empty(cap, dtype=np.float64)
        self._csum = np.zeros(cap + 1, dtype=np.float64)
        self._start = 0
        self._end = 0
        self._ref = 0.0
        self._count = 0  # samples ever appended (default times)
        if values is not None:
            self.append(values, times)
        elif times is not None:
            raise ValueError("times given without values")

    # -- storage ---------------------------------------------------------

    def __len__(self) -> int:
        return self._end - self._start

    @property
    def values(self) -> FloatArray:
        """Read-only view of the samples in the window."""
        view: FloatArray = self._values[self._start : self._end]
        view.flags.writeable = False
        return view

    @property
    def times(self) -> FloatArray:
        """Read-only view of the sample times in the window."""
        view: FloatArray = self._times[self._start : self._end]
        view.flags.writeable = False
        return view

    def _rebuild(self, capacity: int) -> None:
        """Move the live window to the front of (possibly new) arrays and re-centre."""
        n = len(self)
        vals = self._values[self._start : self._end].copy()
        tims = self._times[self._start : self._end].copy()
        if capacity != self._values.size:
            self._values = np.empty(capacity, dtype=np.float64)
            self._times = np.empty(capacity, dtype=np.float64)
            self._csum = np.empty(capacity + 1, dtype=np.float64)
        self._values[:n] = vals
        self._times[:n] = tims
        self._ref = float(vals.mean()) if n else 0.0
        self._csum[0] = 0.0
        if n:
            np.cumsum(vals - self._ref, out=self._csum[1 : n + 1])
        self._start, self._end = 0, n

    def append(self, values: ArrayLike, times: ArrayLike | None = None) -> None:
        """Append samples (and their times) at the end of the window.

        Parameters
        ----------
        values : array_like
            New finite samples (a scalar is accepted).
        times : array_like, optional
            Their times, non-decreasing and not earlier than the last time
            in the window; default the running sample count.

        Raises
        ------
        ValueError
            On non-finite values, mismatched or decreasing times.
        """
        v = _as_values(np.atleast_1d(np.asarray(values, dtype=np.float64)))
        m = v.size
        if m == 0:
            if times is not None and np.asarray(times).size != 0:
                raise ValueError("times must have the same length as values (0)")
            return
        if times is None:
            t = self._count + np.arange(m, dtype=np.float64)
        else:
            t = _as_times(np.atleast_1d(np.asarray(times, dtype=np.float64)), m)
        if len(self) and t[0] < self._times[self._end - 1]:
            raise ValueError("times must not go back before the last appended time")
        self.extend(v, t)

    def extend(self, values: FloatArray, times: FloatArray) -> None:
        """Append float64 arrays the caller has already checked (finite values,
        non-decreasing times not before the last one): :meth:`append` without
        the checks, for the engine's hot path."""
        m = values.shape[0]
        if m == 0:
            return
        need = len(self) + m
        if self._end + m > self._values.size:
            cap = self._values.size
            while cap < 2 * need:
                cap *= 2
            self._rebuild(cap)
        if len(self) == 0:
            self._start = self._end = 0
            self._csum[0] = 0.0
            self._ref = float(values.mean())
        e = self._end
        self._values[e : e + m] = values
        self._times[e : e + m] = times
        cs = self._csum[e + 1 : e + m + 1]
        np.subtract(values, self._ref, out=cs)
        np.cumsum(cs, out=cs)
        cs += self._csum[e]
        self._end = e + m
        self._count += m

    def drop_front(self, n: int) -> None:
        """Forget the ``n`` oldest samples of the window.

        Parameters
        ----------
        n : int
            Number of samples to drop, 0 <= n <= len(self).
        """
        if isinstance(n, bool) or not isinstance(n, Integral) or not 0 <= n <= len(self):
            raise ValueError(f"n must be an integer between 0 and len(self)={len(self)}, got {n!r}")
        self._start += int(n)
        if self._start > len(self):
            self._rebuild(self._values.size)

    def clear(self) -> None:
        """Drop every sample (the default time counter keeps running)."""
        self._start = self._end = 0

    # -- fitting ---------------------------------------------------------

    def fit_from(
        self,
        start: int,
        *,
        level: float = 0.9,
        min_segment: int = 1,
        trim: float | None = None,
        variance_factor: float = 1.0,
        interval: str = "lr",
        first_split: int | None = None,
    ) -> StepFit:
        """Fit one step to the suffix of the window beginning at ``start``.

        Indices in the result (``index``, ``index_low``, ``index_high``)
        count from ``start``.  Options are those of :func:`fit_step`
        (``first_split`` counts from ``start`` too).

        Parameters
        ----------
        start : int
            First window position to include, 0 <= start < len(self).

        Returns
        -------
        StepFit
            Same as ``fit_step(self.values[start:], self.times[start:], ...)``.
        """
        if isinstance(start, bool) or not isinstance(start, Integral) or not 0 <= start <= len(self):
            raise ValueError(f"start must be an integer between 0 and len(self)={len(self)}, got {start!r}")
        a = self._start + int(start)
        b = self._end
        n = b - a
        k_lo, k_hi, pi0 = _check_options(n, level, min_segment, trim, variance_factor)
        _check_interval(interval)
        k_lo = _first_split(first_split, k_lo, k_hi)
        return _fit_window(
            self._values[a:b], self._times[a:b], self._csum[a : b + 1],
            level=level, k_lo=k_lo, k_hi=k_hi, pi0=pi0,
            variance_factor=variance_factor, interval=interval,
        )

    def fit(
        self,
        *,
        level: float = 0.9,
        min_segment: int = 1,
        trim: float | None = None,
        variance_factor: float = 1.0,
        interval: str = "lr",
        first_split: int | None = None,
    ) -> StepFit:
        """Fit one step to the whole window (see :func:`fit_step`).

        Returns
        -------
        StepFit
            Same as ``fit_step(self.values, self.times, ...)``.
        """
        return self.fit_from(
            0, level=level, min_segment=min_segment, trim=trim,
            variance_factor=variance_factor, interval=interval, first_split=first_split,
        )
