"""Steps on a settled baseline are confirmed even when detected late.

``bench_events.py`` (the issue's targets: steps of at least ``min_shift_sigma``
confirmed within 1,000 samples in >= 99% of each noise kind; one ``detected``
record per real step in >= 99%, never more than 2) missed both on AR(1) 0.8
noise once a step had to be shown by the least-squares fit of the event's own
samples before a confirmation (93% confirmed; one step detected three times).
A 1-sigma step on such noise is detected a median 228 samples after it (p90
401, in 150 bench-like streams), so the fit's window of 400 samples before the
detection holds few samples from before the step, or none, and its sup-F does
not show the step while the trial, measured from the settled baseline's level,
does; the event ended ``undecided`` (at the limit, or on the fit's "conflict")
and the stream found the same step again.  Now a settled baseline's level
(two windows of samples or more) stands in for the missing samples
(``stepfit.anchor_step``).

References: the oracle is the textbook two-sided tabular CUSUM on the
prewhitened noise that knows level, sigma and phi (Montgomery, Introduction to
Statistical Quality Control, ch. 9: common practice), k half the prewhitened
step, h from Siegmund's approximation for the engine's in-control ARL (from
memory, as in test_confirm_support.py); the two-sample z test of a mean
against a known one, its variance times the AR(1) long-run factor
(1 + phi) / (1 - phi) (common practice), with scipy.stats.norm as its tail.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .oracle import first_trip, oracle_h

T0 = 1_788_000_000.0
PHI = 0.8
AT = 1500


def _stream(state: int, n: int = 2600) -> tuple[np.ndarray, np.ndarray, float]:
    """AR(1) 0.8 noise of unit variance around 20 (scipy's lfilter, stationary start),
    a 1-sigma step at sample 1,500, up or down."""
    rng = np.random.default_rng(state)
    e = rng.standard_normal(n) * math.sqrt(1.0 - PHI * PHI)
    x, _ = lfilter([1.0], [1.0, -PHI], e, zi=[rng.standard_normal() * PHI])
    sign = float(rng.choice([-1.0, 1.0]))
    x = 20.0 + x
    x[AT:] += sign
    return T0 + np.arange(float(n)), x, sign


def _records(t: np.ndarray, x: np.ndarray) -> list:
    eng = StreamEngine("brackenfield/kiln2/draught")
    out = []
    for a in range(0, t.shape[0], 1024):  # the bench's batches
        out += eng.process(t[a:a + 1024], x[a:a + 1024]).records
    return out


# Random states (of 81,000 to 81,059) whose 1-sigma step the engine at 9963615 did
# not confirm within 1,000 samples, the last detected three times.
MISSED_BEFORE = (81_005, 81_008, 81_020, 81_025, 81_028, 81_031, 81_053)


def test_late_detected_steps_on_a_settled_ar08_baseline_are_confirmed() -> None:
    shift_z = (1.0 - PHI) / math.sqrt(1.0 - PHI * PHI)  # 1 sigma, prewhitened, in innovation sigmas
    h = oracle_h(DetectionSettings().false_alarm_every, shift_z / 2.0)
    for state in MISSED_BEFORE:
        t, x, sign = _stream(state)
        r = x - 20.0  # prewhitened from the known level before the step, known phi
        z = (r[AT:] - PHI * r[AT - 1:-1]) / math.sqrt(1.0 - PHI * PHI)
        found = first_trip(z, h, shift_z / 2.0)
        assert found is not None and found < 1000, (state, found)  # the oracle finds it in time
        recs = [r for r in _records(t, x) if r.detected_at >= t[AT]]
        ends = [r for r in recs if r.phase in ("confirmed", "returned")]
        assert ends and ends[0].delta * sign > 0 and ends[0].as_of <= t[AT + 1000], (
            state, [(r.phase, r.detected_at - T0, r.as_of - T0, r.p_value) for r in recs])
        assert sum(r.phase == "detected" for r in recs) <= 2, state


def test_a_share_of_forty_late_steps_is_confirmed() -> None:
    # 40 further states: the target is 99% of steps >= min_shift_sigma;
    # a true rate of 0.99 gives fewer than 38 of 40 with probability below 0.01
    # (scipy's binomial).  Before: 33 of these 40.
    ok = 0
    for state in range(82_000, 82_040):
        t, x, sign = _stream(state)
        recs = [r for r in _records(t, x) if r.detected_at >= t[AT]]
        ends = [r for r in recs if r.phase in ("confirmed", "returned")]
        ok += bool(ends and ends[0].delta * sign > 0 and ends[0].as_of <= t[AT + 1000])
        assert sum(r.phase == "detected" for r in recs) <= 2, state
    assert stats.binom.cdf(ok, 40, 0.99) >= 0.01, ok


def test_anchor_step_is_the_two_sample_z_test_against_a_known_level() -> None:
    # The fit's level after its split against a known level before: z = delta / se,
    # se^2 = sigma^2 vf (1 / n_after + 1 / n_before); p its one-sided normal tail
    # (scipy.stats.norm), f_stat z^2.
    from shiftwatch.core.stepfit import anchor_step, fit_step  # (new with the fix)

    rng = np.random.default_rng(5)
    v = np.r_[rng.standard_normal(30), 0.8 + rng.standard_normal(70)]
    fit = fit_step(v, np.arange(100.0), min_segment=10)
    a = anchor_step(fit, 0.1, 900, 1.0, 3.0)
    se = math.sqrt(3.0 * (1.0 / fit.n_after + 1.0 / 900))
    zz = (fit.level_after - 0.1) / se
    assert a.delta == fit.level_after - 0.1 and a.level_before == 0.1 and a.n_before == 900
    assert math.isclose(a.p_value, stats.norm.sf(abs(zz)), rel_tol=1e-9)
    assert math.isclose(a.f_stat, zz * zz, rel_tol=1e-12)
    assert math.isclose(a.level_before_se, math.sqrt(3.0 / 900), rel_tol=1e-12)
    assert (a.index, a.level_after, a.n_after, a.shift_at_low) == (fit.index, fit.level_after, fit.n_after,
                                                                     fit.shift_at_low)
