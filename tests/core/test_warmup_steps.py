"""Steps that begin inside a new stream's first warm-up, against an oracle CUSUM.

The reference is the textbook tabular CUSUM with the in-control mean and sigma
known (Montgomery, Introduction to Statistical Quality Control, ch. 9: common
practice), k = 0.5 (tuned to a 1-sigma step) and h for the plant's in-control
ARL from Siegmund's approximation (Siegmund 1985, Sequential Analysis, as
Montgomery quotes it; the formula from memory):
ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2), b = h + 1.166, D = delta - k, one
sided; the two-sided chart's ARL is half the one-sided one's.  The oracle knows
what a new stream cannot (the level before the step), so it bounds what the
engine can do; scipy's two-sample t test at the true step says each series
holds its step "after the fact".

The engine must find a 1-sigma step that begins after enough samples to learn
the first level in about as many streams as the oracle (the README's "How it
decides", item 1, states the measured figures), and must not raise the
false-alarm count on streams with no step.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import optimize, stats

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .oracle import first_trip, oracle_h, siegmund_arl

T0 = 1_788_000_000.0
N = 1_500


def _streams(seed: int, count: int, at: int | None, size: float) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        x = rng.standard_normal(N)
        if at is not None:
            x[at:] += size * rng.choice([-1.0, 1.0])
        out.append(10.0 + x)
    return out


def _found(x: np.ndarray, at: int) -> bool:
    """A confirmed (or returned) record whose step interval reaches the true step, within 10 samples."""
    recs = StreamEngine("brackenfield/filler2/weight").process(T0 + np.arange(float(N)), x).records
    for r in recs:
        if r.phase in ("confirmed", "returned") and \
                r.shift_at_low - 10 <= T0 + at <= r.shift_at_high + 10:
            return True
    return False


def test_oracle_h_matches_montgomery_table() -> None:
    # Montgomery's table of two-sided ARLs for k = 0.5 (common practice, from memory):
    # h = 4: 168, h = 5: 465; Siegmund's formula gives them within a few per cent.
    assert siegmund_arl(4.0, 0.5, 0.0) / 2.0 == pytest.approx(168, rel=0.03)
    assert siegmund_arl(5.0, 0.5, 0.0) / 2.0 == pytest.approx(465, rel=0.03)


@pytest.mark.parametrize(("at", "size", "share"),
                         [(60, 1.0, 0.9), (100, 1.0, 0.95), (150, 1.0, 0.95), (190, 1.0, 0.95),
                          (40, 1.5, 0.95)])
def test_a_step_in_the_warm_up_is_found_as_by_the_oracle(at: int, size: float, share: float) -> None:
    """A step of ``size`` sigma at sample ``at`` of 1,500: found in at least ``share`` of the
    streams the oracle finds it in (the oracle: all).  Before the fix the warm-up's end dropped
    a step it had not yet reported, or learned a baseline across it, and a step at 60
    to 190 was found in 70% to 90% of streams (this test: 36, 51, 48 and 56 of 60).
    With 60 samples before the step a new stream's split test sees a t of about
    sqrt(60) = 7.7 at most, against the 6.1 its bound needs at the plant's false-alarm
    rate, close to the limit (the README's figures), hence the lower share there
    (measured: 57 of 60 here, 197 of 200 on other samples; 60 of 60 at 100 to 190
    and for the 1.5-sigma step at 40, which 58 of 60 found before).
    """
    count = 60
    arl0 = DetectionSettings().arl0(1.0)
    h = oracle_h(arl0, hi=40.0)
    xs = _streams(1000 + at, count, at, size)
    oracle = 0
    engine_found = 0
    for x in xs:
        # after the fact: the step is there (scipy's two-sample t at the true split)
        assert stats.ttest_ind(x[:at], x[at:]).pvalue < 1e-6
        trip = first_trip(x - 10.0, h)
        if trip is not None and trip >= at:
            oracle += 1
        engine_found += _found(x, at)
    assert oracle >= 0.95 * count
    assert engine_found >= share * oracle, (engine_found, oracle)


def test_no_step_gives_no_more_false_alarms_than_the_plant_chose() -> None:
    """On 200 streams of 1,500 in-control samples (300,000 samples, 0.5 false alarms
    expected at the default 7 days of 1 Hz samples) no more than 4 detections: a
    Poisson(0.5) count reaches 5 with probability 1.7e-4 (scipy)."""
    detected = 0
    for x in _streams(77, 200, None, 0.0):
        recs = StreamEngine("brackenfield/filler2/weight").process(T0 + np.arange(float(N)), x).records
        detected += sum(r.phase == "detected" for r in recs)
    assert stats.poisson.sf(4, 300_000 / DetectionSettings().arl0(1.0)) < 2e-4
    assert detected <= 4


def _bonferroni_gap(t: float, m: int, goal: float) -> float:
    return float((m - 5) * 2.0 * stats.t.sf(t, m - 2)) - goal


def test_every_record_names_the_test_that_tripped_with_its_statistic_over_its_threshold() -> None:
    """A step inside the first warm-up may be tripped by the split test rather than the
    sequential test; the record then names ``warmup_split`` with the split's t and the t
    its bound calls a step above.  Before, such records named the sequential test with
    its statistic below its threshold (``"statistic": 0.885, "threshold": 1.0``).  The
    split test's last look when the warm-up's window is full names ``warmup_end``.  The
    threshold is checked against scipy's exact Student-t tail: Bonferroni over the
    splits tried (n - 5 of them, each two-sided on n - 2 degrees of freedom) at half of
    one over the plant's ARL (the README's "How it decides"); Wallace's approximation,
    which the engine uses, within 2% of it in t."""
    rng = np.random.default_rng(7)
    arl0 = DetectionSettings().arl0(1.0)
    split_records = 0
    ends = 0
    records = 0
    for _ in range(300):
        n = 500
        x = 10.0 + rng.standard_normal(n)
        x[int(rng.integers(15, 300)):] += rng.choice([-3.0, -2.0, -1.5, -1.0, 1.0, 1.5, 2.0, 3.0])
        for r in StreamEngine("brackenfield/capper1/torque").process(T0 + np.arange(float(n)), x).records:
            records += 1
            assert r.statistic >= r.threshold, (r.phase, r.test, r.statistic, r.threshold)
            assert r.test in ("multi_cusum", "warmup_split", "warmup_end")
            if r.test != "multi_cusum" and r.phase == "detected":
                split_records += 1
                m = r.n_before + r.n_after
                # the split test's bound: half of one over the ARL; its last look when the
                # window is full: a tenth of the warm-up's budget, m / ARL
                goal = 0.5 / arl0 if r.test == "warmup_split" else 0.1 * m / arl0
                ends += r.test == "warmup_end"
                exact = optimize.brentq(_bonferroni_gap, 1.0, 50.0, args=(m, goal))
                assert r.threshold == pytest.approx(exact, rel=0.02)
    assert records > 300
    assert split_records >= 10
    assert ends >= 1


def test_a_step_too_early_to_report_is_not_learned_without_a_trace() -> None:
    """A 1-sigma step at sample 40: about 40 samples of the first level give the split test
    a t of about sqrt(40) = 6.3 at most, against the 6.1 its bound needs at the plant's
    rate, so some of these steps cannot be reported (the README's limit).  The warm-up
    then sets the samples before the shift aside with the reason ``warmup_shift`` (counted
    like any sample set aside), instead of learning the new level with no trace.  At most
    12 of 100 streams may have neither a confirmed step nor that trace (measured: 9 of
    200 on other samples); every trace lies before the step (within the step fit's
    interval, 10 samples)."""
    neither = 0
    traced = 0
    for x in _streams(4040, 100, 40, 1.0):
        eng = StreamEngine("brackenfield/labeller1/skew")
        res = eng.process(T0 + np.arange(float(N)), x)
        found = any(r.phase in ("confirmed", "returned") for r in res.records)
        trace = [r.time - T0 for r in res.rejected if r.reason == "warmup_shift"]
        assert eng.rejected_total["warmup_shift"] == len(trace)
        if trace:
            traced += 1
            assert max(trace) < 40 + 10
        neither += not found and not trace
    assert traced >= 1
    assert neither <= 12


def test_a_stretched_warm_up_gives_the_same_records_however_batched_or_restored() -> None:
    """Where the warm-up is stretched and looked at again depends on the window's length
    only: the records and rejections are the same fed whole, in random batches, or saved
    and restored (JSON round trip) mid-stretch."""
    rng = np.random.default_rng(31)
    stretched = 0
    for at in (30, 60, 150, 190):
        x = 10.0 + rng.standard_normal(N)
        x[at:] += 1.0
        t = T0 + np.arange(float(N))
        whole = StreamEngine("s").process(t, x)
        eng = StreamEngine("s")
        recs, rejs = [], []
        i = 0
        while i < N:
            j = min(N, i + int(rng.integers(1, 90)))
            if i < 260 <= j:
                j = 260
            res = eng.process(t[i:j], x[i:j])
            recs += res.records
            rejs += [(r.reason, r.time) for r in res.rejected]
            if j == 260:
                stretched += eng.state == "warming_up"
                saved = json.loads(json.dumps(eng.get_state()))
                eng = StreamEngine("s")
                eng.set_state(saved)
            i = j
        assert recs == whole.records
        assert rejs == [(r.reason, r.time) for r in whole.rejected]
    assert stretched >= 1


def test_a_large_step_on_a_new_stream_is_confirmed_not_left_open_to_the_limit() -> None:
    # A 3-sigma step at sample 20 or 25 of a new iid stream (fed 10 samples a call):
    # a two-sample t test on the 20 samples before and 20 after rejects "no step" at
    # p < 1e-6 (scipy, the reference here), so the event must end confirmed, and soon.
    # A trial whose evidence for its design step is bounded by the reference level's
    # few samples (tried on 2026-12-05 and taken back) left 6 of 40 such steps at
    # sample 20 open for 1,000 samples, a blind spot, ending undecided at sample 1,024.
    for at in (20, 25):
        for state in range(40):
            rng = np.random.default_rng(state)
            x = rng.standard_normal(400)
            x[at:] += 3.0
            assert stats.ttest_ind(x[at:at + 20], x[:at]).pvalue < 1e-6
            t = T0 + np.arange(400.0)
            eng = StreamEngine("s")
            recs = []
            for a in range(0, 400, 10):
                recs += eng.process(t[a:a + 10], x[a:a + 10]).records
            ends = [r for r in recs if r.phase not in ("detected",)]
            assert ends and ends[0].phase == "confirmed", (at, state, [(r.phase, r.as_of - T0) for r in recs])
            assert ends[0].as_of - T0 <= at + 150, (at, state, ends[0].as_of - T0)
