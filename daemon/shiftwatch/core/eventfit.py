"""The step fit of an event's samples, and the noise its decision allows for: the
autocorrelation around a fitted step and the variance of a provisional baseline's trial.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.baseline import Baseline
from shiftwatch.core.stepfit import StepFit

FloatArray = NDArray[np.float64]

#: Standard errors above its bias-corrected estimate at which the decision on an event
#: takes the autocorrelation of a young stream's noise (``residual_phi_bound``).
PHI_BOUND_MARGIN = 2.0
#: Standard errors above its estimate at which the trial of an event on a provisional
#: baseline takes the baseline's phi (``young_variance``).
YOUNG_PHI_MARGIN = 1.0


def residual_phi_bound(values: FloatArray, split: int, margin: float | None = None) -> float:
    """An upper bound on the lag-1 autocorrelation of the noise around a fitted step.

    The residuals about the two fitted levels (``values[:split]`` and
    ``values[split:]``, pairs within a segment only) give the sample
    autocorrelation r; r falls short of phi by about ``(1 + 3 phi) / n`` for
    each mean estimated (Kendall 1954, Marriott & Pope 1954, from memory; the
    correction :mod:`.selfstart` makes for one), and its standard error is about ``1 / sqrt(n)``
    (Bartlett's formula at phi = 0, common practice).  The bound is the
    corrected r plus ``margin`` standard errors, in [0, 0.95].

    >>> round(residual_phi_bound(np.array([0.0, 1, 0, 1, 0, 1, 0, 1]), 4), 3)
    0.0
    """
    head = values[:split] - values[:split].mean() if split > 0 else values[:0]
    tail = values[split:] - values[split:].mean() if split < values.shape[0] else values[:0]
    n = head.shape[0] + tail.shape[0]
    ss = float(head @ head + tail @ tail)
    if n < 3 or not ss > 0.0:
        return 0.0
    c1 = float(head[1:] @ head[:-1]) if head.shape[0] > 1 else 0.0
    c1 += float(tail[1:] @ tail[:-1]) if tail.shape[0] > 1 else 0.0
    r = c1 / ss
    segments = int(head.shape[0] > 0) + int(tail.shape[0] > 0)
    r += segments * (1.0 + 3.0 * r) / n
    up = r + (PHI_BOUND_MARGIN if margin is None else margin) / math.sqrt(n)
    return float(max(0.0, min(0.95, up)))


def young_variance(b: Baseline) -> float:
    """Variance per sample of a trial's inputs (prewhitened at ``b.phi``, over
    ``b.innovation_sigma``) on noise whose phi lies one standard error above ``b.phi``
    (``sqrt((1 - phi^2) / n)`` on ``b.n`` samples, at most 0.95): the long-run variance
    ``(1 - phi)^2 sigma^2 (1 + phi_up) / (1 - phi_up)`` over ``innovation_sigma^2``, and
    at least 1 (a provisional baseline's innovation sigma may carry an allowance
    already)."""
    phi = b.phi
    up = min(0.95, max(phi, 0.0) + YOUNG_PHI_MARGIN * math.sqrt(max(1.0 - phi * phi, 0.0) / max(b.n, 1)))
    if not b.innovation_sigma > 0.0:
        return 1.0
    v = (1.0 - phi) ** 2 * b.sigma * b.sigma * _variance_factor(up) / (b.innovation_sigma * b.innovation_sigma)
    return max(1.0, v) if math.isfinite(v) else 1.0


def _variance_factor(phi: float) -> float:
    """Long-run over marginal variance for AR(1) noise: (1 + phi) / (1 - phi), at least 1."""
    return max(1.0, (1.0 + phi) / (1.0 - phi))


def _fit(values: FloatArray, times: FloatArray, *, level: float, variance_factor: float) -> StepFit | None:
    from shiftwatch.core.stepfit import fit_step

    if values.shape[0] < 5:
        return None
    return fit_step(values, times, level=level, min_segment=2, variance_factor=variance_factor)
