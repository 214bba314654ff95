"""Sensitivity design: from plant terms to test parameters, with the evidence.

``shiftwatch design`` prints what this module computes: the in-control ARL
implied by ``false_alarm_every`` and the sampling interval, the CUSUM's k and
h, the GLR threshold, and a table of run lengths by shift size.  CUSUM run
lengths come from the Brook & Evans Markov chain (exact up to the
discretisation); GLR run lengths come from a simulation with a fixed random
state, so the same inputs always print the same table.

The default test, the multi-chart CUSUM, has no exact run-length formula
(its charts watch the same data).  :func:`bank_run_lengths` bounds it from
above instead: the bank trips no later than its fastest chart, so its ARL
and its median delay after a shift are at most the smallest of its charts'
own figures, each exact from the chain.  In control the bank's joint ARL is
the calibrated one (see :mod:`.multicusum`).  :func:`sensitivity` puts the
chosen settings next to a more and a less sensitive choice for the chart of
``shiftwatch design --chart``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from shiftwatch.core.arl import CHAIN_H_MAX, cusum_arl, cusum_run_length_quantile, design_h
from shiftwatch.core.glr import GlrTest
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.settings import ARL_RANGE

#: Shift sizes (in sigmas) tabulated by default.
DEFAULT_SHIFTS = (0.0, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0)


@dataclass(frozen=True)
class DesignRow:
    """Run-length figures for one shift size (in sigmas)."""

    shift: float
    cusum_arl: float
    cusum_median: float
    glr_median: float | None  # None in control: the calibrated ARL applies instead
    bank_arl: float = float("nan")  # multi_cusum: calibrated in control, an upper bound after a shift
    bank_median: float = float("nan")  # multi_cusum median delay, an upper bound (nan in control)


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
    bank_ks: tuple[float, ...] = ()
    bank_hs: tuple[float, ...] = ()
    #: false_alarm_every / interval, before it was held to ARL_RANGE (as the daemon holds it)
    arl0_asked: float = 0.0

    @property
    def held(self) -> bool:
        """Whether the ARL asked for lay outside ARL_RANGE, and the design is for its edge."""
        return self.arl0 != self.arl0_asked


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
    asked = false_alarm_every / interval
    # Held to the range the tests are calibrated for, exactly as the daemon holds it
    # (DetectionSettings.arl0): the table shows what the daemon would run.
    arl0 = min(max(asked, ARL_RANGE[0]), ARL_RANGE[1])
    k = min_shift_sigma / 2.0
    h = design_h(arl0, k)
    bank = _steady_bank(arl0, min_shift_sigma)
    check_tabulable(min_shift_sigma, arl0, (h, *bank.hs))
    glr = GlrTest.design(arl0, window=glr_window)
    rows = []
    for s, (b_arl, b_med) in zip(shifts, bank_run_lengths(bank.ks, bank.hs, shifts, arl0=arl0)):
        rows.append(DesignRow(
            shift=float(s),
            cusum_arl=cusum_arl(k, h, float(s)),
            cusum_median=cusum_run_length_quantile(k, h, float(s), 0.5),
            glr_median=None if s == 0 else glr_median_delay(glr, float(s), runs=runs),
            bank_arl=b_arl,
            bank_median=b_med,
        ))
    return Design(min_shift_sigma=min_shift_sigma, false_alarm_every=false_alarm_every,
                  interval=interval, arl0=arl0, k=k, h=h, glr_threshold=glr.threshold,
                  glr_window=glr_window, rows=tuple(rows), bank_ks=bank.ks, bank_hs=bank.hs,
                  arl0_asked=asked)


def check_tabulable(min_shift_sigma: float, arl0: float, hs: tuple[float, ...]) -> None:
    """Refuse a design whose charts are too long for the chain to give their figures.

    Beyond ``h = CHAIN_H_MAX`` (300 sigma) the chain's capped nodes no longer
    resolve the run lengths (see :data:`.arl.CHAIN_H_MAX`): the table would be
    finite but wrong, so none is made.  At an ARL of 1e9 that is a
    ``min_shift_sigma`` below about 0.1.

    Examples
    --------
    >>> check_tabulable(0.1, 1e9, (160.0, 242.9))
    >>> check_tabulable(0.03, 1e9, (455.8,))
    Traceback (most recent call last):
    ...
    ValueError: min_shift_sigma 0.03 at an ARL of 1e+09 samples needs charts with h up to 455.8 sigma; the run-length figures are computed only up to h = 300: ask for a larger smallest shift or fewer samples between false alarms
    """
    worst = max(hs)
    if worst > CHAIN_H_MAX:
        raise ValueError(
            f"min_shift_sigma {min_shift_sigma:g} at an ARL of {arl0:.4g} samples needs charts with "
            f"h up to {worst:.1f} sigma; the run-length figures are computed only up to "
            f"h = {CHAIN_H_MAX:g}: ask for a larger smallest shift or fewer samples between false alarms")


def bank_run_lengths(ks: tuple[float, ...], hs: tuple[float, ...], shifts: tuple[float, ...] | list[float],
                     *, arl0: float) -> list[tuple[float, float]]:
    """ARL and median run length of a multi-chart CUSUM, per shift (in test sigmas).

    In control (shift 0) the ARL is ``arl0``, the joint ARL the bank was
    calibrated for, and the median is NaN.  After a shift both figures are
    upper bounds: the smallest ARL and the smallest median over the charts,
    each from the Markov chain of :mod:`.arl`.  The bank's run length is the
    minimum of its charts' run lengths, so ``E[min] <= min E`` and
    ``P(min <= n) >= P(RL_j <= n)`` for every chart ``j``.

    Examples
    --------
    >>> b = MultiCusumTest.design(604800, 1.0)
    >>> [(round(a), m) for a, m in bank_run_lengths(b.ks, b.hs, (0.0, 1.0, 2.0), arl0=604800)][1:]
    [(27, 25.0), (7, 7.0)]
    """
    out: list[tuple[float, float]] = []
    for s in shifts:
        sf = float(s)
        if sf == 0.0:
            out.append((float(arl0), float("nan")))
            continue
        arls = [cusum_arl(k, h, sf) for k, h in zip(ks, hs)]
        meds = [cusum_run_length_quantile(k, h, sf, 0.5) for k, h in zip(ks, hs)]
        # min() skips a nan depending on its place (min(5, nan) is 5, min(nan, 5) nan):
        # a bound taken past a nan would be no bound, so refuse one outright.
        if any(math.isnan(v) for v in (*arls, *meds)):
            raise ArithmeticError(f"a chart's run length at shift {sf} is not a number")
        arl = min(arls)
        med = min(meds)
        out.append((arl, med))
    return out


@dataclass(frozen=True)
class SensitivityCurve:
    """Run lengths of the multi-chart CUSUM by shift size, for one choice of settings."""

    label: str
    min_shift_sigma: float
    false_alarm_every: float
    arl0: float
    shifts: tuple[float, ...]
    arl: tuple[float, ...]  # samples; calibrated at shift 0, an upper bound elsewhere
    median: tuple[float, ...]  # samples, an upper bound (nan at shift 0)


#: Shift sizes of the chart: fine where the curves bend, coarser beyond 1.5 sigma.
CHART_SHIFTS = tuple(0.125 * i for i in range(13)) + tuple(1.75 + 0.25 * i for i in range(10))

#: How far the neighbouring choices of :func:`sensitivity` lie from the chosen one.
SENSITIVITY_FACTOR = 4.0


def sensitivity(min_shift_sigma: float, false_alarm_every: float, interval: float, *,
                factor: float = SENSITIVITY_FACTOR,
                shifts: tuple[float, ...] | None = None) -> list[SensitivityCurve]:
    """The chosen settings next to a more and a less sensitive choice.

    The neighbours keep ``min_shift_sigma`` and move ``false_alarm_every`` by
    ``factor``: divided (more sensitive: faster detection, ``factor`` times
    as many false alarms) and multiplied (less sensitive: slower detection,
    ``factor`` times fewer).  That is the trade the plant decides; the
    smallest shift of interest is a property of the process and stays.

    Examples
    --------
    >>> c = sensitivity(1.0, 7 * 86400.0, 1.0, shifts=(0.0, 1.0))
    >>> [x.label for x in c]
    ['chosen', 'more sensitive', 'less sensitive']
    >>> [round(x.arl0) for x in c]
    [604800, 151200, 2419200]
    >>> c[1].median[1] < c[0].median[1] < c[2].median[1]
    True
    """
    if not factor > 1:
        raise ValueError(f"factor must be above 1, got {factor!r}")
    grid = shifts if shifts is not None else CHART_SHIFTS
    out = []
    for label, every in (("chosen", false_alarm_every), ("more sensitive", false_alarm_every / factor),
                         ("less sensitive", false_alarm_every * factor)):
        arl0 = min(max(every / interval, ARL_RANGE[0]), ARL_RANGE[1])
        bank = _steady_bank(arl0, min_shift_sigma)
        check_tabulable(min_shift_sigma, arl0, bank.hs)
        rl = bank_run_lengths(bank.ks, bank.hs, grid, arl0=arl0)
        out.append(SensitivityCurve(label=label, min_shift_sigma=min_shift_sigma, false_alarm_every=every,
                                    arl0=arl0, shifts=tuple(float(s) for s in grid),
                                    arl=tuple(a for a, _ in rl), median=tuple(m for _, m in rl)))
    return out


def _steady_bank(arl0: float, min_shift_sigma: float) -> MultiCusumTest:
    """The CUSUM bank an established stream runs (see :func:`.engine.steady_test`)."""
    from shiftwatch.core.engine import steady_test
    from shiftwatch.core.settings import DetectionSettings

    bank = steady_test(DetectionSettings(min_shift_sigma=min(min_shift_sigma, 4.0)), min(arl0, 1e9),
                       min_shift_sigma)
    assert isinstance(bank, MultiCusumTest)
    return bank
