"""Two sensor faults an event's samples can show, so its records do not call them steps.

A record says a reading's level stepped.  Two faults of the sensor itself look like
steps to a test of the level, and the operator then looks for a nozzle or a
recalibration when the sensor failed:

A stuck sensor (:func:`repeated_value`)
    The readings freeze: the same value again and again (the last good value, or a
    fallback such as 0).  Frozen away from the level it trips the test and its fit
    shows a "step" of many sigmas.  A record whose last readings (nearly) all repeat
    one value says so (``repeated_value``, ``repeated_count`` of the last
    ``repeated_of``) and its summary claims no size in sigmas: the noise they
    measure is gone.  "Nearly all" is :data:`REPEAT_SHARE`; and the run must be
    improbable under the stream's own readings before it: the share of neighbouring
    readings there that repeat (Laplace's estimate), raised to the number of
    repeats, below :data:`REPEAT_P` (a quantised stream whose readings often repeat
    needs a longer run).
A spread change (:func:`spread_change`)
    The noise's standard deviation grows (a loose sensor, a worn bearing) while the
    level stays.  The test, measuring against the old sigma, trips on the wider
    readings again and again, and a fit of one step finds some split: events used
    to end ``confirmed`` or ``returned`` at about one (old) sigma.  The spread of an
    event's samples after its detection is measured by their moving ranges
    ``|x[i] - x[i-1]|`` (the spread estimate of Shewhart's individuals chart, common
    practice), which a step in level moves in one place only (the largest is left
    out), so the fitted split need not be right.  Their mean is compared with the baseline's (that of normal
    AR(1) noise of the baseline's sigma and phi; on a heavy-tailed stream, the
    window's own moving ranges where larger) by Welch's z, at a tenth of
    ``confirm_p_value`` and a ratio of at least :data:`SPREAD_RATIO`.  When the
    spread grew, :func:`step_stands` asks whether the fitted step still shows with
    both its sides at the new spread; where it does not, the engine ends
    the event ``undecided``, names the spread (``spread_ratio``, ``sigma_after``)
    and watches on at the new sigma, so the wider noise is not detected again and
    again.  A trial's verdict waits (up to :data:`SPREAD_WAIT` samples) while the
    spread looks wider but cannot be told yet (:func:`spread_unclear`), unless the
    step would stand even at :data:`SPREAD_UNCLEAR_STAND` times the spread, and an event
    whose spread grew ends no sooner than :data:`SPREAD_SETTLE` samples after its
    detection, so the new sigma rests on that many.

Pure: samples in, numbers out.
"""

from __future__ import annotations

import math
from statistics import NormalDist
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.baseline import HEAVY_TAIL_CLIP, Baseline
from shiftwatch.core.stepfit import StepFit, supf_pvalue

FloatArray = NDArray[np.float64]
_NONE: FloatArray = np.zeros(0)
#: The median of a half-normal of scale 1: the normal's 75% point.
_HALF_NORMAL_MEDIAN = 0.6744897501960817

#: The share of the readings since the shift that must hold the one value repeated.
REPEAT_SHARE = 0.9
#: The fewest readings of the one value for a record to say the readings repeat it.
REPEAT_MIN = 3
#: The fewest readings of the most common value before a run for its share to be the
#: chance a reading repeats it (a quantised stream's; on a fine resolution the most
#: common value's few readings are chance).
REPEAT_MODE_MIN = 30
#: A run is a stuck sensor's when the stream's own repeat rate makes it less likely than this.
REPEAT_P = 1e-4
#: The least ratio of the spreads (after over before) reported as a spread change.
SPREAD_RATIO = 1.5
#: A spread change is judged at this share of the event's ``confirm_p_value``: it ends an
#: event whatever the trial says, so it asks for more than a step does.
SPREAD_P_SHARE = 0.1
#: The samples before the detection that the spread of an event's samples is measured on too.
SPREAD_LEAD = 10
#: A verdict waits while the spread of an event's samples is at least this many times the
#: reference's but not yet clear (at 1.25, real steps waited by chance: DEVELOPERS.md).
SPREAD_UNCLEAR = 1.5
#: While the spread is unclear, a verdict waits unless the step stands at this many times
#: the reference's spread (a burst of three wild readings, 27 sigma, need not wait).
SPREAD_UNCLEAR_STAND = 3.0
#: The fewest samples a spread change is judged on.
SPREAD_MIN = 10
#: Until this many samples after the detection, a verdict waits while the spread looks wider.
SPREAD_WAIT = 60
#: An event whose spread grew ends with at least this many samples after its detection, so
#: the new sigma rests on them (the first significant look overstates it: 3.6 for 2).
SPREAD_SETTLE = 50
#: Moving ranges count for at most this many sigmas of the reference's neighbouring differences.
SPREAD_CAP = 3.0
#: The fewest readings before the detection whose moving ranges may stand for the reference.
SPREAD_REF = 50
#: The largest lag-1 correlation of the moving ranges allowed for.
_MR_CORR_MAX = 0.9


class Repeated(NamedTuple):
    """The value the last ``of`` readings (nearly) all repeat, and how many of them hold it."""

    value: float
    held: int
    of: int


class Spread(NamedTuple):
    """A spread change: the ratio of the spreads after and before, and its z."""

    ratio: float
    z: float


def repeated_value(x: FloatArray) -> Repeated | None:
    """The one value the last readings of ``x`` (nearly) all repeat, when such a run is
    improbable under the readings before it; else None.

    The run is the longest stretch at the end of ``x`` that begins with its last value
    and in which at least :data:`REPEAT_SHARE` of the readings are that value (a stuck
    sensor's odd other reading does not end it); ``held`` of its ``of`` readings are.
    It is improbable when, at a chance per reading of the share of neighbouring readings
    before it that repeat (Laplace's estimate, ``(r + 1) / (n + 1)``) or, where larger,
    the share of the most common value there, ``held - 1`` or more of the run's other
    ``of - 1`` readings repeating its value is less likely than :data:`REPEAT_P`.

    >>> rng = np.random.default_rng(3)
    >>> before = np.round(500 + 0.4 * rng.standard_normal(300), 2)
    >>> repeated_value(np.concatenate((before, np.full(20, 0.0))))
    Repeated(value=0.0, held=20, of=20)
    >>> repeated_value(np.concatenate((before, [7.0, 7.0, 7.5, 7.0, 7.0, 7.0, 7.0, 7.0, 7.0, 7.0, 7.0])))
    Repeated(value=7.0, held=10, of=11)
    >>> repeated_value(np.concatenate((before, np.round(501 + 0.4 * rng.standard_normal(20), 2)))) is None
    True
    """
    n = x.shape[0]
    if n < REPEAT_MIN:
        return None
    v = float(x[-1])
    eq = (x[::-1] == v)
    counts = np.cumsum(eq)
    k = np.arange(1, n + 1)
    ok = np.flatnonzero(eq & (counts >= REPEAT_SHARE * k))
    of = int(ok[-1]) + 1
    count = int(counts[of - 1])
    if count < REPEAT_MIN:
        return None
    before = x[:n - of]
    pairs = max(before.shape[0] - 1, 0)
    repeats = int(np.count_nonzero(before[1:] == before[:-1])) if pairs else 0
    p = repeat_share(repeats, pairs)
    if before.shape[0] >= REPEAT_MODE_MIN:
        # A run of the most common value repeats at that value's own share, not at the
        # share of all neighbouring pairs (sum of the values' squared shares, less): on
        # readings quantised at twice the sigma, 3% of looks named a stuck sensor.  Only
        # a value held often enough for its share to mean something: on finely resolved
        # readings the most common of a few hundred holds a handful by chance.
        top = int(np.unique(before, return_counts=True)[1].max())
        if top >= REPEAT_MODE_MIN:
            p = max(p, top / before.shape[0])
    if p >= 1.0 or _log_tail(count - 1, of - 1, p) >= math.log(REPEAT_P):
        return None
    return Repeated(v, count, of)


def _log_tail(k: int, m: int, p: float) -> float:
    """The log of the chance of at least ``k`` repeats in ``m`` readings at ``p`` each (the
    binomial's upper tail): a run that holds all but one in ten is that much likelier than
    ``p ** k``, the chance of ``k`` repeats in a row (``k == m``)."""
    lp, lq = math.log(p), math.log1p(-p)
    terms = [math.lgamma(m + 1) - math.lgamma(j + 1) - math.lgamma(m - j + 1) + j * lp + (m - j) * lq
             for j in range(k, m + 1)]
    top = max(terms)
    return top + math.log(sum(math.exp(t - top) for t in terms))


def repeat_share(repeats: int, pairs: int) -> float:
    """The share of neighbouring readings that repeat, from ``repeats`` among ``pairs``:
    Laplace's estimate ``(r + 1) / (n + 1)`` (never 0, so a run of a stream that never
    repeated is improbable but not impossible).  Used by :func:`repeated_value` for records
    and by :mod:`.repeats` for the flag of a stream whose readings stopped changing.

    >>> repeat_share(0, 99), round(repeat_share(70, 10_000), 5)
    (0.01, 0.0071)
    """
    return (repeats + 1.0) / (pairs + 1.0)


def abs_corr(rho: float) -> float:
    """The correlation of ``|X|`` and ``|Y|`` for a standard bivariate normal pair of
    correlation ``rho``: ``E|X||Y| = (2 / pi) (sqrt(1 - rho^2) + rho asin(rho))`` (from
    memory; the moments of the folded bivariate normal), less ``(E|X|)^2 = 2 / pi``,
    over ``Var|X| = 1 - 2 / pi``.

    >>> round(abs_corr(-0.5), 4), abs_corr(0.0), round(abs_corr(1.0), 6)
    (0.2239, 0.0, 1.0)
    """
    rho = max(-1.0, min(1.0, rho))
    e = (2.0 / math.pi) * (math.sqrt(1.0 - rho * rho) + rho * math.asin(rho))
    return (e - 2.0 / math.pi) / (1.0 - 2.0 / math.pi)


def _capped_mean(s: float, cap: float) -> float:
    """``E[min(|d|, cap)]`` for ``d ~ N(0, s^2)``."""
    u = cap / s
    return s * math.sqrt(2.0 / math.pi) * (1.0 - math.exp(-0.5 * u * u)) + cap * math.erfc(u / math.sqrt(2.0))


def _diff_sigma(sigma: float, phi: float) -> float:
    """The sigma of the difference of two neighbouring readings of AR(1) noise."""
    return sigma * math.sqrt(2.0 * (1.0 - max(-0.99, min(0.99, phi))))


def _reference(before: FloatArray, sigma: float, phi: float, n_ref: int) -> tuple[float, float, float, float, float]:
    """The reference's capped mean moving range and the variance of that mean, the cap,
    the median moving range and the lag-1 correlation of the moving ranges: the normal ones
    from ``sigma`` and ``phi``, or where larger those the readings ``before`` show (when
    more than :data:`SPREAD_REF`), so that noise of heavier tails than the normal's is
    measured against its own moving ranges (one wild reading makes two wide ones)."""
    sd = _diff_sigma(sigma, phi)
    cap = SPREAD_CAP * sd
    ref, ref_var, plain = _capped_mean(sd, cap), sd * sd * (1.0 - 2.0 / math.pi) / max(n_ref, 1), \
        sd * _HALF_NORMAL_MEDIAN
    r = abs_corr(-(1.0 - max(-0.99, min(0.99, phi))) / 2.0)
    if before.shape[0] > SPREAD_REF:
        mr = np.abs(np.diff(before))
        capped = np.minimum(mr, cap)
        m = float(capped.mean())
        if m > ref:
            ref, ref_var, plain = m, float(capped.var(ddof=1)) / capped.shape[0], float(np.median(mr))
        d = capped - m
        den = float(np.dot(d, d))
        if den > 0.0:
            r = min(max(r, float(np.dot(d[1:], d[:-1])) / den), _MR_CORR_MAX)
    return ref, ref_var, cap, plain, r


def spread_change(after: FloatArray, sigma: float, phi: float, n_ref: int, p_value: float,
                  before: FloatArray | None = None) -> Spread | None:
    """Whether the noise's spread grew in the readings ``after`` against a reference of
    marginal sigma ``sigma`` and lag-1 autocorrelation ``phi`` (the baseline's, resting on
    ``n_ref`` readings): their mean moving range against the reference's, and Welch's z
    of it, when that z is beyond the one-sided ``p_value`` and the ratio at least
    :data:`SPREAD_RATIO`; else None.  None too with fewer than :data:`SPREAD_MIN` readings.

    Under the reference, neighbouring differences are normal with sigma
    ``s = sigma sqrt(2 (1 - phi))`` (AR(1) noise), so a moving range's mean is
    ``s sqrt(2 / pi)`` (a normal's mean absolute value).  The moving ranges are
    capped at :data:`SPREAD_CAP` ``s`` (the reference's mean is then that of the
    capped half-normal), so a heavy-tailed reading or two cannot make a spread
    change.  Their variance is widened by ``1 + 2 r`` for neighbours sharing a
    reading: r is :func:`abs_corr` of the neighbouring differences' correlation
    ``-(1 - phi) / 2``.  The ``ratio`` reported is that of the median moving ranges
    (the normal's is ``0.6745 s``): readings far out are set aside as spikes while an
    event is open, which a mean would feel more.

    >>> rng = np.random.default_rng(5)
    >>> s = spread_change(3 * rng.standard_normal(40), 1.0, 0.0, 400, 0.001)
    >>> 2.3 < s.ratio < 3.7, s.z > 3.09
    (True, True)
    >>> spread_change(rng.standard_normal(40) + 5.0, 1.0, 0.0, 400, 0.001) is None
    True
    """
    if after.shape[0] < SPREAD_MIN or not sigma > 0.0:
        return None
    ref, ref_var, cap, plain, r = _reference(_NONE if before is None else before, sigma, phi, n_ref)
    mr = _moving_ranges(after)
    capped = np.minimum(mr, cap)
    ma, va, na = float(capped.mean()), float(capped.var(ddof=1)), capped.shape[0]
    if ma < SPREAD_RATIO * ref:
        return None
    f = 1.0 + 2.0 * r
    se = math.sqrt(f * (va / na + ref_var))
    z = (ma - ref) / se if se > 0.0 else math.inf
    if z < NormalDist().inv_cdf(1.0 - p_value):
        return None
    return Spread(float(np.median(mr)) / plain if plain > 0.0 else ma / ref, z)


def spread_unclear(values: FloatArray, trip_len: int, b: Baseline) -> Spread | None:
    """Whether the spread of an open event's samples (``values`` past the first
    ``trip_len``, and the :data:`SPREAD_LEAD` before) may have grown but cannot be told
    yet: fewer than :data:`SPREAD_WAIT` samples after the detection, their capped mean
    moving range at least :data:`SPREAD_UNCLEAR` of the reference's (as in
    :func:`spread_change`).  Then the spread a step must stand at not to wait: the ratio
    of those means, at least :data:`SPREAD_UNCLEAR_STAND` (a dozen samples of a threefold
    spread read as 1.5 and wander like a 4-sigma step); else None."""
    lead = max(0, trip_len - SPREAD_LEAD)
    after = values[lead:]
    n = values.shape[0] - trip_len
    if n < 1 or n >= SPREAD_WAIT or after.shape[0] < 4 or not b.sigma > 0.0:
        return None
    before = _shape_ref(values[:lead], b)
    ref, _, cap, _, _ = _reference(_NONE if before is None else before, b.sigma, b.phi, 1)
    ratio = float(np.minimum(_moving_ranges(after), cap).mean()) / ref
    return Spread(max(ratio, SPREAD_UNCLEAR_STAND), 0.0) if ratio >= SPREAD_UNCLEAR else None


def _moving_ranges(x: FloatArray) -> FloatArray:
    """The moving ranges of ``x`` less the largest one: a step in level makes one wide
    moving range, which on a dozen samples would read as a wider spread."""
    mr = np.abs(np.diff(x))
    if mr.shape[0] > 2:
        mr = np.delete(mr, int(np.argmax(mr)))
    return mr


def event_spread(values: FloatArray, trip_len: int, b: Baseline, p_value: float) -> Spread | None:
    """:func:`spread_change` of an open event's samples after the detection (the window's
    first ``trip_len`` samples are before it) and the :data:`SPREAD_LEAD` before it,
    against the baseline ``b``.  The moving ranges hardly move with a step in level
    (one of them takes it), so neither the fitted split nor the step's start is asked;
    the samples that led to the detection are as wide as the event's when the spread
    grew (without them a twofold spread change was dismissed again and again, each
    event decided on a dozen samples)."""
    lead = max(0, trip_len - SPREAD_LEAD)
    return spread_change(values[lead:], b.sigma, b.phi, b.n, SPREAD_P_SHARE * p_value,
                         _shape_ref(values[:lead], b))


def _shape_ref(before: FloatArray, b: Baseline) -> FloatArray | None:
    """The readings whose moving ranges may stand for the reference: those before the
    detection on a stream whose noise has heavy tails (the baseline clips its residuals
    at HEAVY_TAIL_CLIP), where the normal's moving range is too small; else None (the
    window may hold an earlier event's wider readings, which would hide the change)."""
    return before if b.clip <= HEAVY_TAIL_CLIP else None


def step_at_spread(delta: float, n_before: int, n_after: int, sigma_before: float, sigma_after: float,
                   variance_factor: float) -> float:
    """Welch's z squared of a fitted step whose two sides have noise sigmas
    ``sigma_before`` and ``sigma_after`` (marginal; ``variance_factor`` the long-run
    over marginal variance of the noise): compare it with the sup-F's distribution.

    >>> round(step_at_spread(1.0, 100, 100, 1.0, 3.0, 1.0), 3)
    10.0
    """
    se2 = variance_factor * (sigma_before ** 2 / max(n_before, 1) + sigma_after ** 2 / max(n_after, 1))
    return delta * delta / se2 if se2 > 0.0 else math.inf


def step_stands(fit: StepFit, sigma: float, spread: Spread, variance_factor: float, p_value: float) -> bool:
    """Whether ``fit``'s step shows at ``p_value`` with both its sides at the new spread
    (``sigma`` times the spread's ratio; the fit's window may hold wider readings before
    the split too, after an earlier event): :func:`step_at_spread` against the sup-F's
    distribution at the fit's trimming (the split was chosen, as in the fit's own p)."""
    wide = sigma * spread.ratio
    z2 = step_at_spread(fit.delta, fit.n_before, fit.n_after, wide, wide, variance_factor)
    return supf_pvalue(z2, fit.pi0) < p_value


def fit_fields(values: FloatArray | None, fit: StepFit, trip_len: int, phase: str, baseline: Baseline | None,
               p_value: float) -> dict[str, Any]:
    """The fields a record of ``fit`` over the event's samples ``values`` carries for the two
    faults: ``repeated_value`` and ``repeated_count`` when the readings since the split
    (nearly) all repeat one value; for a final record, ``spread_ratio`` and
    ``sigma_after`` when the event's samples show the spread grew."""
    out: dict[str, Any] = {}
    if values is None:
        return out
    n = min(fit.index + fit.n_after, values.shape[0])
    rep = repeated_value(values[:n])
    if rep is not None:
        out["repeated_value"] = rep.value
        out["repeated_count"] = rep.held
        out["repeated_of"] = rep.of
    if phase != "detected" and baseline is not None and trip_len > 0:
        spread = event_spread(values[:max(n, trip_len)], trip_len, baseline, p_value)
        if spread is not None:
            out["spread_ratio"] = spread.ratio
            out["sigma_after"] = baseline.sigma * spread.ratio
    return out


def record_fields(rec: Any) -> dict[str, Any]:
    """The JSON of a record's fault fields (those it has)."""
    out: dict[str, Any] = {}
    if rec.repeated_value is not None:
        out["repeated_value"] = rec.repeated_value
        out["repeated_count"] = rec.repeated_count
        out["repeated_of"] = rec.repeated_of
    if rec.spread_ratio is not None:
        out["spread_ratio"] = round(rec.spread_ratio, 2)
        out["sigma_after"] = float(f"{rec.sigma_after:.6g}")
    return out
