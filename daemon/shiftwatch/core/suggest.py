"""Suggested settings for a stream, from its own history.

``shiftwatch design --from CSV`` measures each stream's noise and suggests
``min_shift_sigma`` and ``false_alarm_every`` for it.  This module does the
arithmetic; the command line reads the file.

The rule
--------
1. **Measure.**  The history is cut into 20 blocks (at least :data:`BLOCK`
   readings each, fewer blocks for a short history) and the engine's own
   baseline estimator (:func:`.baseline.estimate_baseline`) runs on each;
   the stream's sigma, lag-1 autocorrelation, sampling interval and reading
   resolution are the medians over the blocks (the innovation sigma follows
   as ``sigma sqrt(1 - phi^2)``).  A step, a
   stoppage or a bad hour moves only the few blocks it falls in, so it does
   not inflate the noise the way one estimate over the whole file would.
2. **False alarms from a plant budget.**  ``false_alarm_every`` is the same
   for every stream: the number of streams in the plant divided by the
   false detections per day the plant accepts, rounded up to a round
   duration (:data:`ROUND_DURATIONS_DAYS`).  It is a time, so a stream
   sampled every minute and one sampled ten times a second alarm equally
   rarely.  An explicit ``false_alarm_every`` replaces the budget.
3. **The smallest step found in time.**  ``min_shift_sigma`` is the
   smallest value on :data:`MIN_SHIFT_GRID` whose step the default test
   (the multi-chart CUSUM, built exactly as the engine builds it for that
   stream) finds within the stated delay, by the median: the bound of
   :func:`.design.bank_run_lengths` on the test's input.  On an
   autocorrelated stream the engine prewhitens, so a step of ``d`` sigma
   reaches the test as ``d sigma (1 - phi) / sigma_innovation`` (the first
   sample carries more, which the bound leaves out, on the safe side).
   Delays count readings from the first one at the new level up to the one
   that trips, times the sampling interval.
4. **Not below the reading resolution.**  A step smaller than one step of
   the readings' resolution is not suggested (``min_shift_sigma`` at least
   resolution / sigma): such readings mostly repeat one value and the
   noise model behind every figure here no longer holds.
5. When no value up to 4 sigma is found in time, 4 is suggested and the
   sentence says how long it takes instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import pairwise

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.baseline import estimate_baseline
from shiftwatch.core.design import bank_run_lengths
from shiftwatch.core.engine import steady_test
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.settings import DetectionSettings
from shiftwatch.core.timefmt import format_duration

FloatArray = NDArray[np.float64]

__all__ = ["BLOCK", "MIN_SHIFT_GRID", "ROUND_DURATIONS_DAYS", "Noise", "Suggestion",
           "budget_false_alarm_every", "duration_setting", "measure_noise", "suggest"]

#: Fewest readings per block of the noise measurement (twice the default warm-up).
BLOCK = 400
#: Blocks the history is cut into when it is long enough.
BLOCKS = 20
#: Fewest readings a suggestion rests on.
MIN_READINGS = 60
#: Values of ``min_shift_sigma`` considered, smallest first.
MIN_SHIFT_GRID = (0.5, 0.75, 1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0, 3.5, 4.0)
#: ``false_alarm_every`` is rounded up to one of these, in days.
ROUND_DURATIONS_DAYS = (1, 2, 3, 7, 14, 30, 60, 90, 180, 365, 730, 1825, 3650)


@dataclass(frozen=True)
class Noise:
    """What a stream's history says about its noise (medians over blocks).

    Attributes
    ----------
    n : usable readings.
    blocks : blocks the medians are taken over.
    level : typical level, in reading units.
    sigma : marginal noise sigma, in reading units.
    innovation_sigma : sigma of the prewhitened residuals.
    phi : lag-1 autocorrelation (0.0 when not significant at about 5%).
    interval : median sampling interval, seconds.
    quantum : reading resolution (0.0 when the readings are not visibly quantised).
    heavy_tailed : whether the engine would clip this stream's residuals at 2 sigma.
    """

    n: int
    blocks: int
    level: float
    sigma: float
    innovation_sigma: float
    phi: float
    interval: float
    quantum: float
    heavy_tailed: bool


def measure_noise(times: FloatArray, values: FloatArray, *, block: int = BLOCK,
                  clip: float = DetectionSettings.clip_sigma) -> Noise:
    """Measure a stream's noise from its history (see the module notes, rule 1), each
    block estimated as the engine estimates a baseline at ``clip`` (its configured clip).

    Non-finite readings are left out; readings are taken in time order.

    Raises
    ------
    ValueError
        With fewer than :data:`MIN_READINGS` usable readings, or readings that never change.

    Examples
    --------
    >>> rng = np.random.default_rng(7)
    >>> x = 500 + 0.6 * rng.standard_normal(4000)
    >>> x[2100:] += 3.0                     # a step does not inflate the noise
    >>> m = measure_noise(np.arange(4000.0), x)
    >>> bool(abs(m.sigma - 0.6) < 0.02), m.phi, m.interval, m.blocks
    (True, 0.0, 1.0, 10)
    """
    t = np.asarray(times, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    good = np.isfinite(v) & np.isfinite(t)
    t, v = t[good], v[good]
    n = int(v.shape[0])
    if n < MIN_READINGS:
        raise ValueError(f"{n} usable readings; at least {MIN_READINGS} are needed to measure the noise")
    if float(np.ptp(v)) == 0.0:
        raise ValueError(f"all {n} readings are {v[0]:g}; a reading that never changes has no noise to measure")
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    nb = max(1, min(BLOCKS, n // block))
    edges = np.linspace(0, n, nb + 1).astype(int)
    parts = [estimate_baseline(t[a:b], v[a:b], clip=clip) for a, b in pairwise(edges)]

    def med(xs: list[float]) -> float:
        return float(np.median(np.asarray(xs)))

    phi_raw = med([p.phi_raw for p in parts])
    phi = phi_raw if abs(phi_raw) >= 2.0 / math.sqrt(n) else 0.0
    sigma = med([p.sigma for p in parts])
    # AR(1): the innovations' sigma is sigma sqrt(1 - phi^2) (what the engine's
    # estimate converges to; blocks whose own phi was not significant would
    # report their marginal sigma instead).
    innov = sigma * math.sqrt(max(1.0 - phi * phi, 0.05))
    return Noise(n=n, blocks=nb, level=med([p.level for p in parts]), sigma=sigma,
                 innovation_sigma=innov, phi=phi, interval=med([p.interval for p in parts]),
                 quantum=med([p.quantum for p in parts]),
                 # heavy-tailed when most blocks were clipped lower, as the engine would
                 heavy_tailed=sum(p.clip < clip for p in parts) * 2 > len(parts))


def budget_false_alarm_every(streams_in_plant: int, plant_false_alarms_per_day: float) -> float:
    """``false_alarm_every`` (seconds) that keeps a plant within its daily false-detection budget.

    Examples
    --------
    >>> budget_false_alarm_every(40, 1.0) / 86400     # 40 days, rounded up to 60
    60.0
    >>> budget_false_alarm_every(500, 5.0) / 86400
    180.0
    """
    if streams_in_plant < 1:
        raise ValueError(f"streams in the plant must be at least 1, got {streams_in_plant}")
    if not plant_false_alarms_per_day > 0:
        raise ValueError(f"false alarms per day must be positive, got {plant_false_alarms_per_day}")
    days = streams_in_plant / plant_false_alarms_per_day
    for d in ROUND_DURATIONS_DAYS:
        if d >= days * (1 - 1e-9):
            return d * 86400.0
    return math.ceil(days / 365.0) * 365.0 * 86400.0


def duration_setting(seconds: float) -> str:
    """A duration written the way the configuration file takes it, in the largest unit
    that gives a whole number or one decimal.

    Examples
    --------
    >>> duration_setting(30 * 86400.0), duration_setting(5400.0), duration_setting(2.5)
    ('30d', '1.5h', '2.5s')
    >>> duration_setting(30 * 86400.0 / 4), duration_setting(7 * 86400.0 / 4), duration_setting(600.0)
    ('7.5d', '42h', '10min')
    """
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        n = seconds / size
        if n >= 1 and abs(n * 10 - round(n * 10)) < 1e-9:
            return f"{round(n * 10) / 10:g}{unit}"
    return f"{seconds:g}s"


@dataclass(frozen=True)
class Suggestion:
    """Suggested settings for one stream, with the figures behind them.

    Attributes
    ----------
    min_shift_sigma, false_alarm_every : the suggestion (seconds for the latter).
    step : ``min_shift_sigma`` in reading units.
    median_delay : median delay for that step, seconds (an upper bound).
    median_delay_samples : the same in readings.
    within : the delay asked for, seconds.
    found_in_time : whether the step is found within ``within``.
    limited_by_resolution : whether rule 4 set the value.
    arl0 : in-control ARL in readings implied by ``false_alarm_every``.
    noise : the measurement.
    streams_in_plant, plant_false_alarms_per_day : the budget, when it set ``false_alarm_every``.
    """

    min_shift_sigma: float
    false_alarm_every: float
    step: float
    median_delay: float
    median_delay_samples: float
    within: float
    found_in_time: bool
    limited_by_resolution: bool
    arl0: float
    noise: Noise
    streams_in_plant: int | None = None
    plant_false_alarms_per_day: float | None = None

    def explain(self, name: str, unit: str | None = None) -> str:
        """One sentence a process engineer can check against what they know of the stream.

        Examples
        --------
        >>> nz = Noise(n=86400, blocks=216, level=500.0, sigma=0.6, innovation_sigma=0.5,
        ...            phi=0.55, interval=1.0, quantum=0.0, heavy_tailed=False)
        >>> s = Suggestion(1.25, 30 * 86400.0, 0.75, 41.0, 41.0, 60.0, True, False, 2592000.0, nz,
        ...                streams_in_plant=30, plant_false_alarms_per_day=1.0)
        >>> print(s.explain("filler head 2 fill weight", "g"))  # doctest: +NORMALIZE_WHITESPACE
        filler head 2 fill weight: noise 0.6 g, readings every 1 s, strongly autocorrelated
        (phi 0.55); min_shift_sigma 1.25 (a step of 0.75 g) is found in a median 41 s or less;
        false_alarm_every 30d keeps the plant's 30 streams to about 1 false detection a day.
        """
        u = f" {unit}" if unit else ""
        nz = self.noise
        parts = [f"{name}: noise {nz.sigma:.2g}{u}, readings every {format_duration(nz.interval)}"]
        parts.append(_autocorrelation_words(nz.phi))
        if nz.quantum > 0:
            parts.append(f"in steps of {nz.quantum:.2g}{u}")
        if nz.heavy_tailed:
            parts.append("heavy-tailed (clipped at 2 sigma, so large steps take a little longer)")
        head = ", ".join(parts)
        shift = f"min_shift_sigma {self.min_shift_sigma:g} (a step of {self.step:.2g}{u})"
        delay = f"{format_duration(self.median_delay)} ({self.median_delay_samples:.0f} readings)"
        if self.found_in_time:
            why = " because the readings resolve nothing finer" if self.limited_by_resolution else ""
            mid = f"{shift} is found in a median {format_duration(self.median_delay)} or less{why}"
        else:
            mid = (f"no step up to 4 sigma is found within {format_duration(self.within)}, so "
                   f"{shift} is suggested and is found in a median {delay} or less")
        every = duration_setting(self.false_alarm_every)
        if self.streams_in_plant is not None and self.plant_false_alarms_per_day is not None:
            per_day = self.streams_in_plant * 86400.0 / self.false_alarm_every
            tail = (f"false_alarm_every {every} keeps the plant's {self.streams_in_plant} streams to "
                    f"about {per_day:.2g} false detection{'' if per_day == 1 else 's'} a day")
        else:
            tail = f"false_alarm_every {every} gives one false detection per {format_duration(self.false_alarm_every)} on this stream"
        return f"{head}; {mid}; {tail}."

    def to_dict(self) -> dict[str, object]:
        nz = self.noise
        return {
            "min_shift_sigma": self.min_shift_sigma,
            "false_alarm_every": duration_setting(self.false_alarm_every),
            "false_alarm_every_s": self.false_alarm_every,
            "step": self.step, "median_delay_s": self.median_delay,
            "median_delay_samples": self.median_delay_samples, "within_s": self.within,
            "found_in_time": self.found_in_time, "limited_by_resolution": self.limited_by_resolution,
            "arl0": self.arl0,
            "noise": {"n": nz.n, "blocks": nz.blocks, "level": nz.level, "sigma": nz.sigma,
                      "innovation_sigma": nz.innovation_sigma, "phi": nz.phi, "interval_s": nz.interval,
                      "quantum": nz.quantum, "heavy_tailed": nz.heavy_tailed},
        }


def _autocorrelation_words(phi: float) -> str:
    a = abs(phi)
    if a == 0.0:
        return "no significant autocorrelation"
    if phi < 0:
        return f"alternating (phi {phi:.2f})"
    word = "mildly autocorrelated" if a < 0.3 else "autocorrelated" if a < 0.5 else "strongly autocorrelated"
    return f"{word} (phi {phi:.2f})"


def test_shift(noise: Noise, min_shift_sigma: float) -> float:
    """A step of ``min_shift_sigma`` sigma as the test sees it after prewhitening (rule 3).

    Examples
    --------
    >>> nz = Noise(1000, 2, 0.0, 1.0, math.sqrt(1 - 0.5**2), 0.5, 1.0, 0.0, False)
    >>> round(test_shift(nz, 1.0), 4)       # sqrt((1 - phi) / (1 + phi)) for AR(1)
    0.5774
    """
    return min_shift_sigma * noise.sigma * (1.0 - noise.phi) / noise.innovation_sigma


test_shift.__test__ = False  # type: ignore[attr-defined]  # not a pytest test


def median_delay_samples(noise: Noise, min_shift_sigma: float, false_alarm_every: float) -> tuple[float, float]:
    """(median delay bound in readings, in-control ARL) for a step of ``min_shift_sigma``.

    The test is the one the engine builds for an established baseline of
    this stream (:func:`.engine.steady_test` with the default test).
    """
    settings = DetectionSettings(min_shift_sigma=min_shift_sigma, false_alarm_every=false_alarm_every)
    arl0 = settings.arl0(noise.interval)
    z = test_shift(noise, min_shift_sigma)
    test = steady_test(settings, arl0, z, noise.phi)
    assert isinstance(test, MultiCusumTest)  # the default test
    [(_, med)] = bank_run_lengths(test.ks, test.hs, (z,), arl0=arl0)
    return med, arl0


def suggest(noise: Noise, *, within: float, false_alarm_every: float | None = None,
            streams_in_plant: int = 1, plant_false_alarms_per_day: float = 1.0) -> Suggestion:
    """Suggest settings for a measured stream (see the module notes for the rule).

    Parameters
    ----------
    noise : from :func:`measure_noise`.
    within : the detection delay asked for, seconds (by the median).
    false_alarm_every : seconds; None to derive it from the plant budget.
    streams_in_plant, plant_false_alarms_per_day : the plant budget.

    Examples
    --------
    >>> nz = Noise(86400, 216, 500.0, 0.6, 0.6, 0.0, 1.0, 0.0, False)
    >>> s = suggest(nz, within=60.0, streams_in_plant=30)
    >>> s.min_shift_sigma, s.false_alarm_every / 86400, s.found_in_time
    (0.75, 30.0, True)
    """
    if not within > 0:
        raise ValueError(f"the delay asked for must be positive, got {within!r}")
    budget = false_alarm_every is None
    every = budget_false_alarm_every(streams_in_plant, plant_false_alarms_per_day) \
        if false_alarm_every is None else float(false_alarm_every)
    floor = noise.quantum / noise.sigma if noise.quantum > 0 else 0.0
    choice = None
    for m in MIN_SHIFT_GRID:
        if m < floor - 1e-9:
            continue
        med, arl0 = median_delay_samples(noise, m, every)
        if med * noise.interval <= within:
            choice = (m, med, arl0, True)
            break
    if choice is None:
        m = MIN_SHIFT_GRID[-1]
        med, arl0 = median_delay_samples(noise, m, every)
        choice = (m, med, arl0, False)
    m, med, arl0, ok = choice
    # Rule 4 decided when it ruled out a smaller value and m is the first value it allows.
    allowed = [x for x in MIN_SHIFT_GRID if x >= floor - 1e-9]
    limited = ok and floor > MIN_SHIFT_GRID[0] and bool(allowed) and m == allowed[0]
    return Suggestion(min_shift_sigma=m, false_alarm_every=every, step=m * noise.sigma,
                      median_delay=med * noise.interval, median_delay_samples=med, within=within,
                      found_in_time=ok, limited_by_resolution=limited, arl0=arl0, noise=noise,
                      streams_in_plant=streams_in_plant if budget else None,
                      plant_false_alarms_per_day=plant_false_alarms_per_day if budget else None)
