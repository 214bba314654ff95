"""Sensitivity design: from plant terms to test parameters, with the evidence.

``shiftwatch design`` prints what this module computes: the in-control ARL
implied by ``false_alarm_every`` and the sampling interval, the CUSUM's k and
h, the GLR threshold, and a table of run lengths by shift size.  CUSUM run
lengths come from the Brook & Evans Markov chain (exact up to the
discretisation); GLR run lengths come from a simulation with a fixed random
state, so the same inputs always print the same table.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shiftwatch.core.arl import cusum_arl, cusum_run_length_quantile, design_h
from shiftwatch.core.glr import GlrTest

#: Shift sizes (in sigmas) tabulated by default.
DEFAULT_SHIFTS = (0.0, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0)


@dataclass(frozen=True)
class DesignRow:
    """Run-length figures for one shift size (in sigmas)."""

    shift: float
    cusum_arl: float
    cusum_median: float
    glr_median: float | None  # None in control: the calibrated ARL applies instead


@dataclass(frozen=True)
class Design:
    """The parameters and run-length table for one choice of settings."""

    min_shift_sigma: float
    false_alarm_every: float
    interval: float
    arl0: float
    k: float
    h: float
    glr_threshold: float
    glr_window: int
    rows: tuple[DesignRow, ...]


def glr_median_delay(test: GlrTest, shift: float, *, runs: int = 400, max_len: int = 4000,
                     random_state: int = 20261202) -> float:
    """Median run length of a GLR test started fresh on N(shift, 1) data, by simulation.

    Examples
    --------
    >>> glr_median_delay(GlrTest.design(1000.0), 2.0, runs=200) < 10
    True
    """
    rng = np.random.default_rng(random_state)
    lengths = np.empty(runs)
    block = 64
    for i in range(runs):
        test.reset()
        n = 0
        while n < max_len:
            z = rng.standard_normal(block) + shift
            j = test.update(z)
            if j >= 0:
                n += j + 1
                break
            n += block
        lengths[i] = n
    test.reset()
    return float(np.median(lengths))


def design(min_shift_sigma: float, false_alarm_every: float, interval: float, *,
           shifts: tuple[float, ...] = DEFAULT_SHIFTS, glr_window: int = 400,
           runs: int = 400) -> Design:
    """Compute the design for the given settings.

    Examples
    --------
    >>> d = design(1.0, 7 * 86400.0, 1.0, shifts=(0.0, 1.0), runs=50)
    >>> round(d.arl0), d.k
    (604800, 0.5)
    """
    if not (min_shift_sigma > 0 and false_alarm_every > 0 and interval > 0):
        raise ValueError("min_shift_sigma, false_alarm_every and interval must be positive")
    arl0 = max(false_alarm_every / interval, 50.0)
    k = min_shift_sigma / 2.0
    h = design_h(arl0, k)
    glr = GlrTest.design(arl0, window=glr_window)
    rows = []
    for s in shifts:
        rows.append(DesignRow(
            shift=float(s),
            cusum_arl=cusum_arl(k, h, float(s)),
            cusum_median=cusum_run_length_quantile(k, h, float(s), 0.5),
            glr_median=None if s == 0 else glr_median_delay(glr, float(s), runs=runs),
        ))
    return Design(min_shift_sigma=min_shift_sigma, false_alarm_every=false_alarm_every,
                  interval=interval, arl0=arl0, k=k, h=h, glr_threshold=glr.threshold,
                  glr_window=glr_window, rows=tuple(rows))
