"""The trial of an event on a provisional baseline (a new stream's first warm-up).

Such an event is measured from a level fitted on a few dozen samples.  The trial
(``EventTrial`` with ``n_ref``) integrates that level's error out, allows for a phi
estimated low, and weighs steps of d, 2d, 4d and 8d, saying "step" when the largest
of their log-likelihood ratios reaches Wald's bound plus log 4 (the equal mixture, a
martingale, at the bound).  The references:

* Wald (1945), Ann. Math. Statist. 16:117-186: an SPRT with bound log((1 - a) / a)
  confirms an unchanged level with probability at most about a, when the level is
  known; it says nothing for a level estimated from 20 samples.
* Ville (1939), Etude critique de la notion de collectif: a nonnegative martingale
  with mean 1 reaches 1 / a with probability at most a (from memory), which bounds the
  mixture's error rate when the reference's error is drawn from its prior.
* The count bounds below are Poisson upper tails at a rate of a per detection (common
  practice for rare independent events).
"""

from __future__ import annotations

import json
import math
from itertools import pairwise

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.events import LOOK, NO_STEP, PENDING, STEP, EventTrial
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0
ALPHA = 0.001


def _run(tr: EventTrial, z: np.ndarray) -> str:
    """Feed ``z`` to the trial as the engine does: a "look" is taken back (the fit
    is not consulted here) and the trial goes on.  The final outcome, or "" when
    ``z`` ran out."""
    i = 0
    while i < z.shape[0]:
        j, out = tr.feed(z[i:])
        if j < 0:
            return PENDING
        i += j + 1
        if out == LOOK:
            tr.reopen()
            continue
        return out
    return PENDING


def test_a_reference_of_20_samples_keeps_the_mixture_within_villes_bound() -> None:
    # No step; the trial measures from a level estimated on 20 samples (its error is
    # the mean of 20 N(0, 1) draws), d = 1, 600 samples at most.  The plain trial
    # (Wald's, for a known level) confirms far more often than a; the trial that
    # integrates the reference's error out keeps to Ville's bound.  20,000 trials give
    # a standard error of 0.0002 at a rate of 0.001: 0.002 is five above the bound.
    rng = np.random.default_rng(11)
    plain = young = 0
    trials = 20_000
    for _ in range(trials):
        ref_error = rng.standard_normal(20).mean()
        z = rng.standard_normal(600) - ref_error
        plain += _run(EventTrial(+1, 1.0, ALPHA, 600), z) == STEP
        young += _run(EventTrial(+1, 1.0, ALPHA, 600, n_ref=20.0, lam=1.0, n_lam=20.0), z) == STEP
    assert plain / trials > 0.01, plain  # the defect: Wald's bound assumes a known level
    assert young / trials <= 0.002, young


def test_a_large_step_from_20_samples_is_confirmed_not_capped() -> None:
    # The evidence for the design step alone is bounded by about n_ref d^2 / 2 (10 at
    # n_ref = 20, d = 1) whatever the step; with the larger step sizes a 3-sigma step
    # measured from 20 samples is confirmed in every state, within a few samples
    # (Wald's approximation bound / drift: 8.3 / (2 * 3 - 2) ~ 2 samples for the 2d
    # component at full share; the share and the reference's error stretch it).
    rng = np.random.default_rng(12)
    waits = []
    for _ in range(2000):
        ref_error = rng.standard_normal(20).mean()
        z = 3.0 + rng.standard_normal(1000) - ref_error
        tr = EventTrial(+1, 1.0, ALPHA, 1000, n_ref=20.0, lam=1.0, n_lam=20.0)
        assert _run(tr, z) == STEP
        waits.append(tr.m)
    assert np.median(waits) <= 10 and max(waits) <= 60, (np.median(waits), max(waits))


def test_a_young_trial_decides_on_the_same_sample_however_batched_or_restored() -> None:
    # The sums (of the inputs, their squares and neighbouring products) are advanced
    # sample by sample on both of feed's paths, so the verdicts and the saved state are
    # the same floats whether the inputs come whole, one at a time, or in random cuts,
    # and through a JSON snapshot.
    rng = np.random.default_rng(13)
    for k in range(60):
        z = 0.5 * (k % 3) + rng.standard_normal(400) * (1.0 + 0.5 * (k % 2))
        kw = {"n_ref": float(rng.integers(15, 80)), "lam": float(rng.uniform(1.0, 3.0)),
              "n_lam": float(rng.integers(15, 80))}
        whole = _verdicts(z, kw, [], False)
        assert whole
        assert _verdicts(z, kw, list(range(1, 400)), False) == whole
        cuts = sorted({int(c) for c in rng.integers(1, 400, 12)})
        assert _verdicts(z, kw, cuts, True) == whole


def _verdicts(z: np.ndarray, kw: dict[str, float], cuts: list[int], restore: bool) -> list[tuple[int, str, dict]]:
    """Every verdict of a young trial fed ``z`` cut at ``cuts`` (each "step" or "look"
    taken back, as the engine does while the fit does not show the step), with the
    count and saved state at each; through a JSON snapshot at each cut if ``restore``."""
    tr = EventTrial(+1, 0.6, ALPHA, z.shape[0], **kw)
    out = []
    a = 0
    for b in [*cuts, z.shape[0]]:
        while a < b:
            j, o = tr.feed(z[a:b])
            if j < 0:
                a = b
                break
            a += j + 1
            out.append((tr.m, o, tr.get_state()))
            if o not in (LOOK, STEP):
                return out
            tr.reopen()
        if restore:
            tr = EventTrial.from_state(json.loads(json.dumps(tr.get_state())))
    return out


def test_a_damaged_young_trial_field_is_refused_by_name() -> None:
    tr = EventTrial(+1, 0.6, ALPHA, 400, n_ref=20.0, lam=1.5, n_lam=20.0)
    tr.feed(np.array([0.1, 0.4, -0.2]))
    for field, value in (("q", -1.0), ("n_lam", "abc"), ("lam", 0.0), ("n_ref", -3.0), ("c", [1.0])):
        state = tr.get_state()
        state[field] = value
        with pytest.raises(ValueError, match=rf"event\.trial\.{field}\b"):
            EventTrial.from_state(state)
    # A snapshot of an earlier version has none of the fields: a settled trial, as before.
    old = {k: v for k, v in tr.get_state().items() if k not in ("n_ref", "lam", "n_lam", "q", "c", "last")}
    assert math.isinf(EventTrial.from_state(old).n_ref)


def test_false_detections_in_a_new_iid_streams_first_warm_up_keep_to_walds_rate() -> None:
    # The set bench_confirm_counts.py's "iid, 600, 1h" row feeds (states 100,000 to
    # 100,999: 600 samples of N(50, 1), false_alarm_every 1 h): the detections within
    # the first 200 samples (before any warm-up can end, so on a provisional baseline)
    # are all false.  At Wald's rate a = 0.001 per detection, a count above 1 in 54
    # detections has a Poisson probability of 0.0014.  Before the trial allowed for
    # its reference's error, 2 of the 54 were confirmed (states 100,041 and 100,663).
    detected = confirmed = 0
    for state in range(100_000, 101_000):
        rng = np.random.default_rng(state)
        x = 50.0 + rng.standard_normal(600)
        recs = StreamEngine("brackenfield/press4/gap", DetectionSettings(false_alarm_every=3600.0)).process(
            T0 + np.arange(600.0), x).records
        early = {r.id for r in recs if r.phase == "detected" and r.detected_at < T0 + 200}
        detected += len(early)
        confirmed += sum(r.phase in ("confirmed", "returned") and r.id in early for r in recs)
    assert detected >= 40, detected
    bound = int(stats.poisson.ppf(0.99, ALPHA * detected))  # 1 for about 54 detections
    assert confirmed <= bound, (confirmed, detected, bound)


@pytest.mark.parametrize("phi", [0.0, 0.5])
def test_a_3_sigma_step_in_the_first_warm_up_is_confirmed_not_left_open(phi: float) -> None:
    # A 3-sigma step at sample 20 or 40 of a new stream (iid, and AR(1) 0.5 by scipy's
    # lfilter from a stationary start), fed 10 samples a call through its first 400
    # samples, 1,400 in all: where anything is detected, the step is confirmed (its
    # shift time within 10 samples, within 400 samples of its detection; a two-sample
    # t test on the 20 samples either side rejects "no step" at p < 1e-3: scipy, the
    # reference), and no event ends undecided or is still open (at the 1,000-sample
    # limit: the blind spot of a trial weighing its design step alone).
    # Some AR(1) 0.5 steps this early are not detected at all (the warm-up sets the
    # samples before them aside as `warmup_shift`): the first warm-up's limit, outside
    # this test; at least half are detected.
    detected = 0
    for at in (20, 40):
        for state in range(40):
            rng = np.random.default_rng(50_000 + 1000 * at + state)
            n = 1_400
            if phi == 0.0:
                e = rng.standard_normal(n)
            else:
                e, _ = lfilter([1.0], [1.0, -phi], rng.standard_normal(n) * math.sqrt(1 - phi * phi),
                               zi=[rng.standard_normal() * phi])
            x = 10.0 + np.asarray(e)
            x[at:] += 3.0
            assert stats.ttest_ind(x[at:at + 20], x[at - 20:at]).pvalue < 1e-3
            t = T0 + np.arange(float(n))
            eng = StreamEngine("brackenfield/oven2/temp")
            recs = []
            for a, b in pairwise([*range(0, 400, 10), 400, n]):  # 10 a call through the warm-up
                recs += eng.process(t[a:b], x[a:b]).records
            if not recs:
                continue
            detected += 1
            seen = [(r.phase, r.as_of - T0, r.shift_at - T0) for r in recs]
            assert eng.state != "event_open" and not any(r.phase == "undecided" for r in recs), (at, state, seen)
            conf = [r for r in recs if r.phase == "confirmed" and abs(r.shift_at - t[at]) <= 10]
            assert conf and conf[0].as_of - conf[0].detected_at <= 400, (at, state, seen)
    assert detected >= 40, detected


def test_a_young_non_provisional_reference_keeps_the_plain_trial() -> None:
    # bench_events.py's step-free AR(1) 0.6 stream in state 10,101 (scipy's lfilter,
    # false_alarm_every 7 d): a false detection at sample 367, on the baseline the
    # warm-up left (264 samples).  A trial allowing for the reference's error there put
    # it off for 97 samples and confirmed it at a fitted 0.97 sigma, a confirmed
    # in-control event below min_shift (the benchmark's target is none).  The
    # allowance applies on provisional baselines only; this event keeps the plain
    # trial.  No confirmed record on this step-free stream is below min_shift_sigma.
    phi = 0.6
    rng = np.random.default_rng(10_101)
    e = rng.standard_normal(500_000) * math.sqrt(1 - phi * phi)
    x, _ = lfilter([1.0], [1.0, -phi], e, zi=[rng.standard_normal() * phi])
    n = 1_500
    eng = StreamEngine("brackenfield/kiln1/draft", DetectionSettings(false_alarm_every=604800.0))
    recs = []
    for a in range(0, n, 1024):
        recs += eng.process(T0 + np.arange(float(a), float(min(a + 1024, n))), 50.0 + x[a:min(a + 1024, n)]).records
    assert any(r.phase == "detected" for r in recs)
    small = [(r.phase, round(r.delta_sigma, 2)) for r in recs
             if r.phase in ("confirmed", "returned") and abs(r.delta_sigma) < 1.0]
    assert small == [], small


def test_no_step_is_still_dismissed_on_a_provisional_baseline() -> None:
    # The allowance weighs the evidence for a step only: an event on a level of 20
    # samples whose inputs show no step ends "no step" as Wald's approximation has it
    # (bound / drift 6.9 / 0.28 ~ 25 samples, the overshoot on top).
    rng = np.random.default_rng(14)
    ms = []
    for _ in range(2000):
        tr = EventTrial(+1, 1.0, ALPHA, 1000, n_ref=20.0, lam=1.0, n_lam=20.0)
        assert _run(tr, rng.standard_normal(1000)) in (NO_STEP, STEP)
        ms.append(tr.m)
    assert 20 <= np.median(ms) <= 40, np.median(ms)
