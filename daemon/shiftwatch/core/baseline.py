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

    def to_dict(self) -> dict[str, float | int]:
        return {
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


def estimate_baseline(
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
    phi = lag1_autocorrelation(rc)
    if abs(phi) < 2.0 / math.sqrt(n):
        phi = 0.0
    phi = float(np.clip(phi, -0.95, 0.95))
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
    )


def merge_baselines(old: Baseline, new: Baseline, max_weight: int) -> Baseline:
    """Combine an earlier estimate with one from newer in-control samples.

    A weighted average by sample counts, with the older estimate's weight
    capped at ``max_weight`` samples so the baseline can follow a very slow
    drift without forgetting quickly.
    """
    w_old = min(old.n, max_weight)
    w_new = new.n
    w = w_old + w_new

    def avg(a: float, b: float) -> float:
        return (a * w_old + b * w_new) / w

    return replace(
        old,
        level=avg(old.level, new.level),
        sigma=math.sqrt(avg(old.sigma**2, new.sigma**2)),
        phi=avg(old.phi, new.phi),
        innovation_sigma=math.sqrt(avg(old.innovation_sigma**2, new.innovation_sigma**2)),
        interval=avg(old.interval, new.interval),
        n=min(old.n + new.n, max_weight + new.n),
        quantum=max(old.quantum, new.quantum),
    )
