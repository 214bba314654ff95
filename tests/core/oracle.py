"""The oracle the event-layer tests measure the engine against: the textbook
two-sided tabular CUSUM with the in-control mean and sigma known (Montgomery,
Introduction to Statistical Quality Control, ch. 9: common practice), its h for
an in-control ARL from Siegmund's approximation (Siegmund 1985, Sequential
Analysis, as Montgomery quotes it; the formula from memory):
ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2), b = h + 1.166, D = delta - k, one
sided; the two-sided chart's ARL is half the one-sided one's.
``tests/core/test_warmup_steps.py`` checks it against Montgomery's table."""

from __future__ import annotations

import math

import numpy as np


def siegmund_arl(h: float, k: float, delta: float) -> float:
    """One-sided CUSUM ARL by Siegmund's approximation (Montgomery ch. 9)."""
    b = h + 1.166
    d = delta - k
    if d == 0.0:
        return b * b
    return (math.exp(-2.0 * d * b) + 2.0 * d * b - 1.0) / (2.0 * d * d)


def oracle_h(arl0_two_sided: float, k: float = 0.5, hi: float = 200.0) -> float:
    """h of the two-sided chart whose in-control ARL is ``arl0_two_sided``
    (bisection between 0.5 and ``hi``)."""
    lo = 0.5
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        if siegmund_arl(mid, k, 0.0) / 2.0 < arl0_two_sided:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def first_trip(z: np.ndarray, h: float, k: float = 0.5) -> int | None:
    """Index of the first trip of the two-sided tabular CUSUM on standardised ``z``
    (None: it never trips)."""
    cp = cm = 0.0
    for i, v in enumerate(z.tolist()):
        cp = max(0.0, cp + v - k)
        cm = max(0.0, cm - v - k)
        if cp > h or cm > h:
            return i
    return None
