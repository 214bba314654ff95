"""Robust estimates of a stream's in-control behaviour.

The baseline is what the sequential tests measure against: the level, the
noise sigma, the lag-1 autocorrelation and the sampling interval.  Robust
estimators keep a lone spike or a heavy tail from inflating sigma, and a floor
tied to the reading resolution keeps sigma from collapsing to zero on
quantised readings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

#: d2 for subgroups of two: E|X1 - X2| = 1.128 sigma for Gaussian noise.
#: A standard SPC constant (common practice).
D2_MOVING_RANGE = 1.128

#: MAD of a standard normal: 1 / Phi^-1(3/4) = 1.4826 (common practice).
MAD_TO_SIGMA = 1.482602218505602


def huber_beta(c: float) -> float:
    """E[clip(Z, -c, c)^2] for Z ~ N(0, 1); the consistency factor of Huber's scale.

    Examples
    --------
    >>> round(huber_beta(3.0), 4)
    0.995
    >>> round(huber_beta(50.0), 6)
    1.0
    """
    phi = math.exp(-0.5 * c * c) / math.sqrt(2.0 * math.pi)
    cdf = 0.5 * math.erfc(-c / math.sqrt(2.0))
    return (2.0 * cdf - 1.0) - 2.0 * c * phi + 2.0 * c * c * (1.0 - cdf)


def moving_range_sigma(x: FloatArray) -> float:
    """Moving-range estimate of sigma: mean |x_t - x_(t-1)| / d2, d2 = 1.128.

    Examples
    --------
    >>> moving_range_sigma(np.array([1.0, 2.0, 1.0, 2.0]))  # doctest: +ELLIPSIS
    0.886...
    """
    if x.shape[0] < 2:
        return 0.0
    return float(np.mean(np.abs(np.diff(x)))) / D2_MOVING_RANGE


def mad_sigma(r: FloatArray) -> float:
    """Median absolute deviation around the median, scaled to sigma for Gaussian noise."""
    if r.shape[0] == 0:
        return 0.0
    return float(np.median(np.abs(r - np.median(r)))) * MAD_TO_SIGMA


def huber_scale(r: FloatArray, c: float, s0: float, iterations: int = 30) -> float:
    """Huber's "proposal 2" scale of residuals ``r`` (already centred).

    Finds s with mean(clip(r/s, -c, c)^2) = E[clip(Z, -c, c)^2], Z ~ N(0, 1):
    the Gaussian sigma for Gaussian noise, and for heavy tails the scale at
    which clipped residuals vary like clipped Gaussian ones, which is what the
    sequential tests were calibrated for.
    """
    if r.shape[0] == 0 or s0 <= 0:
        return s0
    beta = huber_beta(c)
    s = s0
    for _ in range(iterations):
        m2 = float(np.mean(np.clip(r / s, -c, c) ** 2))
        s_new = s * math.sqrt(m2 / beta)
        if s_new <= 0:
            return s
        if abs(s_new - s) <= 1e-9 * s:
            return s_new
        s = s_new
    return s


def lag1_autocorrelation(r: FloatArray) -> float:
    """Lag-1 autocorrelation of centred residuals (0.0 when undefined)."""
    if r.shape[0] < 3:
        return 0.0
    den = float(np.dot(r, r))
    if den <= 0:
        return 0.0
    return float(np.dot(r[1:], r[:-1])) / den


def reading_quantum(x: FloatArray) -> float:
    """The reading resolution, when readings are visibly quantised; else 0.

    Readings count as quantised when they take fewer distinct values than half
    the number of samples.  The resolution is the smallest gap between them.

    Examples
    --------
    >>> round(reading_quantum(np.array([1.0, 1.1, 1.1, 1.0, 1.2, 1.1])), 9)
    0.1
    >>> reading_quantum(np.array([1.0, 1.13, 1.71, 0.2]))
    0.0
    """
    u = np.unique(x)
    if u.shape[0] < 2 or u.shape[0] * 2 > x.shape[0]:
        return 0.0
    return float(np.min(np.diff(u)))


@dataclass(frozen=True)
class Baseline:
    """A stream's in-control reference.

    Attributes
    ----------
    level : robust level (Huber location).
    sigma : marginal noise sigma of the readings.
    phi : lag-1 autocorrelation used for prewhitening (0.0 when not significant).
    innovation_sigma : sigma of the prewhitened residuals x_t - level - phi (x_(t-1) - level).
    interval : median sampling interval in seconds.
    n : number of samples the estimate rests on.
    quantum : reading resolution (0.0 when readings are not quantised).
    """

    level: float
    sigma: float
    phi: float
    innovation_sigma: float
    interval: float
    n: int
    quantum: float
    phi_raw: float = 0.0  # the lag-1 autocorrelation as estimated, before the significance rule
    clip: float = 3.0  # residuals are clipped here (lower for heavy-tailed noise)
    tail_fraction: float = 0.0  # share of residuals beyond TAIL_AT sigmas

    def to_dict(self) -> dict[str, float | int]:
        return {
            "phi_raw": self.phi_raw,
            "clip": self.clip,
            "tail_fraction": self.tail_fraction,
            "level": self.level,
            "sigma": self.sigma,
            "phi": self.phi,
            "innovation_sigma": self.innovation_sigma,
            "interval": self.interval,
            "n": self.n,
            "quantum": self.quantum,
        }


def sigma_floor(level: float, quantum: float, min_sigma: float | None) -> float:
    """The smallest sigma we accept: the configured floor, else one set by the reading resolution.

    Rounding to a step q adds noise of sigma q / sqrt(12) (common practice); with
    no visible resolution a relative floor of 1e-6 of the level (or 1e-9) applies.
    """
    if min_sigma is not None and min_sigma > 0:
        return min_sigma
    if quantum > 0:
        return quantum / math.sqrt(12.0)
    return max(abs(level) * 1e-6, 1e-9)


#: Residuals beyond this many sigmas count as tail samples.
TAIL_AT = 2.5
#: Gaussian noise puts 1.24% beyond 2.5 sigma (common practice); a stream with
#: more than 2.5 times that share is treated as heavy-tailed.
HEAVY_TAIL_FRACTION = 0.031
#: Clipping constant used for heavy-tailed streams.
HEAVY_TAIL_CLIP = 2.0


def choose_clip(tail_fraction: float, clip: float) -> float:
    """The clipping constant for a stream: ``clip``, or 2.0 when its noise is heavy-tailed.

    Clipping at 2 sigma costs some speed on large steps, so it is used only
    where heavy tails would otherwise raise the false-alarm rate.
    """
    return min(clip, HEAVY_TAIL_CLIP) if tail_fraction > HEAVY_TAIL_FRACTION else clip


def estimate_baseline(
    times: FloatArray,
    values: FloatArray,
    *,
    clip: float = 3.0,
    min_sigma: float | None = None,
) -> Baseline:
    """Estimate the baseline, choosing a lower clip for heavy-tailed noise (see :func:`choose_clip`)."""
    b = _estimate_baseline(times, values, clip=clip, min_sigma=min_sigma)
    c = choose_clip(b.tail_fraction, clip)
    if c != clip:
        tail = b.tail_fraction
        b = replace(_estimate_baseline(times, values, clip=c, min_sigma=min_sigma), tail_fraction=tail)
    return b


def _estimate_baseline(
    times: FloatArray,
    values: FloatArray,
    *,
    clip: float = 3.0,
    min_sigma: float | None = None,
) -> Baseline:
    """Estimate the baseline of an in-control stretch of samples.

    Level: median, refined by a Huber step.  Sigma: Huber's proposal-2 scale,
    started from the moving-range estimate (d2 = 1.128).  Autocorrelation: the
    lag-1 autocorrelation of clipped residuals, kept only when it exceeds
    2/sqrt(n) (about a 5% test) in size, and capped at +-0.95.

    Examples
    --------
    >>> rng = np.random.default_rng(3)
    >>> x = 50.0 + 0.2 * rng.standard_normal(400)
    >>> b = estimate_baseline(np.arange(400.0), x)
    >>> round(b.level, 1), round(b.sigma, 2), b.interval, b.phi
    (50.0, 0.2, 1.0, 0.0)
    """
    n = int(values.shape[0])
    if n < 3:
        raise ValueError(f"need at least 3 samples for a baseline, got {n}")
    quantum = reading_quantum(values)
    level = float(np.median(values))
    s0 = max(moving_range_sigma(values), mad_sigma(values))
    floor = sigma_floor(level, quantum, min_sigma)
    s0 = max(s0, floor)
    r = values - level
    # One Huber location step from the median, then the scale.
    level += s0 * float(np.mean(np.clip(r / s0, -clip, clip)))
    r = values - level
    sigma = max(huber_scale(r, clip, s0), floor)
    rc = np.clip(r / sigma, -clip, clip)
    phi_raw = float(np.clip(lag1_autocorrelation(rc), -0.95, 0.95))
    phi = phi_raw if abs(phi_raw) >= 2.0 / math.sqrt(n) else 0.0
    e = r[1:] - phi * r[:-1]
    s_e0 = sigma * math.sqrt(max(1.0 - phi * phi, 0.05))
    innovation_sigma = max(huber_scale(e, clip, s_e0), floor)
    dt = np.diff(times)
    interval = float(np.median(dt)) if dt.shape[0] else 1.0
    if not interval > 0:
        interval = 1.0
    return Baseline(
        level=level,
        sigma=sigma,
        phi=phi,
        innovation_sigma=innovation_sigma,
        interval=interval,
        n=n,
        quantum=quantum,
        phi_raw=phi_raw,
        clip=clip,
        tail_fraction=float(np.mean(np.abs(r) > TAIL_AT * sigma)),
    )


def refine_baseline(b: Baseline, times: FloatArray, values: FloatArray, *, clip: float,
                    floor: float, max_weight: int) -> Baseline:
    """Fold a block of newer in-control samples into the baseline (see :func:`_refine_once`).

    ``clip`` is the configured constant; when the tail share crosses the
    heavy-tail line the clip changes and sigma is re-scaled by one more step
    at the new constant.
    """
    nb = _refine_once(b, times, values, clip=b.clip, floor=floor, max_weight=max_weight)
    c = choose_clip(nb.tail_fraction, clip)
    if c != nb.clip:
        nb = _refine_once(replace(b, clip=c), times, values, clip=c, floor=floor, max_weight=max_weight)
        nb = replace(nb, clip=c)
    return nb


def _refine_once(b: Baseline, times: FloatArray, values: FloatArray, *, clip: float,
                 floor: float, max_weight: int) -> Baseline:
    """Fold a block of newer in-control samples into the baseline, cheaply.

    One Huber step for the level and the scale relative to the current
    baseline (vector operations on the block only), a lag-1 autocorrelation
    of the clipped residuals, then a weighted average with the current
    estimate (its weight capped at ``max_weight`` samples).  The phi kept for
    prewhitening is zeroed unless it exceeds 2/sqrt(n) in size.

    Examples
    --------
    >>> rng = np.random.default_rng(5)
    >>> b = estimate_baseline(np.arange(100.0), 10 + rng.standard_normal(100))
    >>> x = 10 + rng.standard_normal(5000)
    >>> r = refine_baseline(b, np.arange(100.0, 5100.0), x, clip=3.0, floor=1e-9, max_weight=20000)
    >>> r.n, abs(r.level - 10) < 0.05, abs(r.sigma - 1) < 0.05
    (5100, True, True)
    """
    n_blk = int(values.shape[0])
    if n_blk < 3:
        return b
    beta = huber_beta(clip)
    dev = (values - b.level) / b.sigma
    tail_blk = float(np.mean(np.abs(dev) > TAIL_AT))
    u = np.clip(dev, -clip, clip)
    level = b.level + b.sigma * float(np.mean(u))
    sigma = max(b.sigma * math.sqrt(float(np.mean(u * u)) / beta), floor)
    phi_blk = lag1_autocorrelation(u - float(np.mean(u)))
    e = np.clip(u[1:] - b.phi * u[:-1], -clip, clip)
    innov = max(b.sigma * math.sqrt(float(np.mean(e * e)) / beta), floor)
    dt = np.diff(times)
    interval = float(np.median(dt)) if dt.shape[0] else b.interval
    if not interval > 0:
        interval = b.interval
    w_old = min(b.n, max_weight)
    w = w_old + n_blk

    def avg(a: float, c: float) -> float:
        return (a * w_old + c * n_blk) / w

    # The phi in use may be zero (not significant); average the raw estimates.
    phi_raw = float(np.clip(avg(b.phi_raw, phi_blk), -0.95, 0.95))
    n = min(b.n + n_blk, max_weight + n_blk)
    phi = phi_raw if abs(phi_raw) >= 2.0 / math.sqrt(n) else 0.0
    return Baseline(
        level=avg(b.level, level),
        sigma=math.sqrt(avg(b.sigma**2, sigma**2)),
        phi=phi,
        innovation_sigma=math.sqrt(avg(b.innovation_sigma**2, innov**2)),
        interval=avg(b.interval, interval),
        n=n,
        quantum=b.quantum,
        phi_raw=phi_raw,
        clip=clip,
        tail_fraction=avg(b.tail_fraction, tail_blk),
    )


def estimation_adjusted_arl(arl0: float, n: int, k_min: float | None) -> float:
    """The design ARL that keeps the *real* in-control ARL near ``arl0`` when the
    baseline rests on only ``n`` samples.

    With ``a = log(arl0)``, the false-alarm rate of a test on standardised
    residuals behaves like ``exp(-a)``.  Two estimation errors raise it:

    * sigma estimated from ``nu = n - 1`` degrees of freedom scales the
      statistic by ``W = sigma_hat^2 / sigma^2 ~ chi2_nu / nu``; averaging
      ``exp(-a' W)`` over W gives ``(1 + 2 a'/nu)^(-nu/2)``, so the design uses
      ``a' = (nu/2) (exp(2a/nu) - 1)``;
    * for a CUSUM with reference value k, a mean error ``eps ~ N(0, 1/n)``
      changes its drift to ``k -+ eps``; with ``log ARL ~ 2 k H`` (Siegmund's
      approximation, H = h + 1.166) the averaged rate grows by
      ``exp(2 H^2 / n) = exp(a^2 / (2 k^2 n))``, added to ``a'``.

    ``k_min`` is the smallest reference value of the test (None for tests that
    correct for the mean error themselves).  Both terms vanish as n grows.

    Examples
    --------
    >>> round(estimation_adjusted_arl(604800, 10**9, 0.5) / 604800, 3)
    1.0
    >>> 10 < estimation_adjusted_arl(604800, 200, 0.5) / 604800 < 20
    True
    """
    a = math.log(arl0)
    nu = max(n - 1, 2)
    a_adj = 0.5 * nu * math.expm1(2.0 * a / nu) if 2.0 * a / nu < 50 else a + 50.0
    if k_min is not None and k_min > 0:
        a_adj += a * a / (2.0 * k_min * k_min * max(n, 1))
    return float(min(math.exp(min(a_adj, 60.0)), 1e9))
