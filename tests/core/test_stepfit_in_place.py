"""The step fit's scan and interval computed in place give the results of the plain formulas
bit for bit.

``fit_step`` on a series of 4 million samples held about nine arrays of its length at once
(290 MB): the scan over the splits made a new array for each step of
``dev * dev / (ks * (n - ks))``, and so did the sums of squares and the interval.  It now
works in place in three.  The plain formulas below are the code before that change (the
exact least-squares split from prefix sums, two-pass sums of squares, the convex hull of
Hansen's LR set); the figures they give are held to other references in test_stepfit.py
(strucchange, statsmodels).  Here they are the yardstick for the rewrite only: every field
must be the same double (compared by ``float.hex``), on series chosen to reach the corners
(a flat series, ties, a level of 1e9 with small noise, heavy tails, trimming, the three
interval kinds, the incremental fitter).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from shiftwatch.core.stepfit import _TIE_RTOL, StepFitter, fit_step, lr_critical


def _plain_split(y: np.ndarray, k_lo: int, k_hi: int) -> int:
    n = y.size
    csum = np.empty(n + 1)
    csum[0] = 0.0
    np.cumsum(y - y.mean(), out=csum[1:])
    c = csum - csum[0]
    total = c[n]
    ks = np.arange(k_lo, k_hi + 1, dtype=np.float64)
    dev = c[k_lo:k_hi + 1] - ks * (total / n)
    between = dev * dev / (ks * (n - ks))
    bmax = float(between.max())
    return k_lo + int(np.argmax(between >= bmax * (1.0 - _TIE_RTOL)))


def _plain_sums(y: np.ndarray, k: int) -> tuple[float, float]:
    head, tail = y[:k], y[k:]
    rss = float(np.sum((head - float(head.mean())) ** 2) + np.sum((tail - float(tail.mean())) ** 2))
    return rss, float(np.sum((y - float(y.mean())) ** 2))


def _plain_lr(y: np.ndarray, k: int, k_lo: int, k_hi: int, level: float, s2: float, f_stat: float,
              corrected: bool) -> tuple[int, int]:
    n = y.size
    cl = np.cumsum(y - float(y.mean()))
    ks = np.arange(k_lo, k_hi + 1, dtype=np.float64)
    dev = cl[k_lo - 1:k_hi]
    prof = n * dev * dev / (ks * (n - ks))
    b_hat = float(prof[k - k_lo])
    if not corrected:
        c = lr_critical(level)
    elif math.isinf(f_stat):
        c = 0.0
    else:
        c = lr_critical(level, math.sqrt(max(0.0, f_stat - 1.0) * n / (k * (n - k))))
    inside = (b_hat - prof) <= c * s2 + _TIE_RTOL * b_hat
    return k_lo + int(np.argmax(inside)), k_hi - int(np.argmax(inside[::-1]))


def _series() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(2026)
    n = 6000
    step = np.where(np.arange(n) >= 3700, 1.3, 0.0)
    ar = np.empty(n)
    ar[0] = 0.0
    e = rng.standard_normal(n)
    for i in range(1, n):
        ar[i] = 0.6 * ar[i - 1] + e[i]
    return {
        "normal with a step": 500.0 + rng.standard_normal(n) + step,
        "no step": 20.0 + 0.3 * rng.standard_normal(n),
        "AR(1) with a step": 71.5 + ar + 2 * step,
        "t(3) with a step": 12.0 + rng.standard_t(3, n) + step,
        "level 1e9, noise 1e-3": 1e9 + 1e-3 * rng.standard_normal(n) + 1e-3 * step,
        "whole grams (ties)": np.round(499.0 + 2 * rng.standard_normal(n) + step),
        "flat": np.full(n, 499.5),
        "flat then a step": np.where(np.arange(n) >= 1000, 2.0, 1.0),
        "short": np.array([10.0, 10.2, 9.8, 10.0, 12.1, 11.9, 12.0, 12.0]),
    }


def _hex(fit: object) -> dict[str, object]:
    return {k: (v.hex() if isinstance(v, float) else v) for k, v in dataclasses.asdict(fit).items()}


@pytest.mark.parametrize("name", list(_series()))
@pytest.mark.parametrize(("interval", "min_segment", "trim"), [("lr", 1, None), ("lr", 2, None),
                                                               ("lr_asymptotic", 1, None), ("bai", 1, None),
                                                               ("lr", 1, 0.15)])
def test_the_fit_is_that_of_the_plain_formulas_bit_for_bit(name: str, interval: str, min_segment: int,
                                                           trim: float | None) -> None:
    y = _series()[name]
    n = y.size
    times = 1772431200.0 + 0.5 * np.arange(n)
    fit = fit_step(y, times, level=0.9, min_segment=min_segment, trim=trim, interval=interval)
    k_lo, k_hi = min_segment, n - min_segment
    if trim is not None:
        k_lo, k_hi = max(k_lo, math.floor(trim * n)), min(k_hi, math.floor((1 - trim) * n))
    k = _plain_split(y, k_lo, k_hi)
    rss, rss_null = _plain_sums(y, k)
    assert (fit.index, fit.rss.hex(), fit.rss_null.hex()) == (k, rss.hex(), rss_null.hex())
    if interval != "bai":
        s2 = fit.sigma ** 2 * fit.variance_factor
        assert (fit.index_low, fit.index_high) == _plain_lr(y, k, k_lo, k_hi, 0.9, s2, fit.f_stat,
                                                             interval == "lr")
    # the incremental fitter shares the scan: the same fit
    fitter = StepFitter(y[:n // 2], times[:n // 2])
    fitter.append(y[n // 2:], times[n // 2:])
    if trim is None and interval == "lr" and min_segment == 1:
        assert _hex(fitter.fit(level=0.9)) == _hex(fit)
