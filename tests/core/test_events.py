"""The event layer: one event per real step, no blind spot, alerts from the first samples.

Each test reproduces a defect measured from outside (issue "Events you can
trust") on simulated data with known truth and fixed random states.  The
decision rule is Wald's sequential probability ratio test (Wald 1945, Ann.
Math. Statist. 16:117-186); its error bound ``exp(-bound)`` and expected
sample numbers are checked against Wald's approximations, and the
self-starting transform against scipy's Student-t and normal distributions.
"""

from __future__ import annotations

import json
import math
from itertools import pairwise

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st
from scipy import stats
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.events import NO_STEP, STEP, EventTrial
from shiftwatch.core.selfstart import SelfStart, split_evidence, t_to_normal
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0


def ar1(n: int, phi: float, rng: np.random.Generator) -> np.ndarray:
    """Unit-variance AR(1) noise (scipy's lfilter as the recursion)."""
    return lfilter([1.0], [1.0, -phi], rng.standard_normal(n)) * math.sqrt(1.0 - phi * phi)


def feed(eng: StreamEngine, t: np.ndarray, x: np.ndarray, batch: int = 997) -> list:
    recs = []
    for a in range(0, t.shape[0], batch):
        recs += eng.process(t[a:a + batch], x[a:a + batch]).records
    return recs


# ------------------------------------------------------------ the decision rule
def test_t_to_normal_matches_scipy() -> None:
    # Reference: scipy.stats (t.cdf then norm.ppf), the exact transform that
    # Wallace's approximation stands in for.  Wallace (1959) bounds the error;
    # 0.03 in z over this range is what his bound allows for df >= 10 (from memory).
    for df in (10, 20, 50, 200):
        for t in (-4.0, -2.5, -1.0, 0.3, 1.7, 3.0, 5.0):
            exact = stats.norm.ppf(stats.t.cdf(t, df))
            assert abs(t_to_normal(t, df) - exact) < 0.03, (df, t)


def test_sprt_error_rates_keep_to_walds_bound() -> None:
    # Wald (1945): an SPRT with bound A = log((1 - b) / a) accepts the wrong
    # hypothesis with probability at most about a.  Simulated with N(0, 1)
    # inputs (no step) and N(d, 1) inputs (a step of d); 20,000 trials each
    # give a standard error of 0.0002 at a rate of 0.001, so 0.002 is five
    # standard errors above the bound.
    rng = np.random.default_rng(1)
    for mean, wrong in ((0.0, STEP), (1.0, NO_STEP)):
        errors = 0
        for _ in range(20000):
            tr = EventTrial(+1, 1.0, 0.001, 10_000)
            z = mean + rng.standard_normal(200)
            _, out = tr.feed(z)
            errors += out == wrong
        assert errors / 20000 <= 0.002, (mean, errors)


def test_sprt_sample_numbers_follow_walds_approximation() -> None:
    # Wald's approximation of the expected sample number: bound / drift of the
    # deciding log-likelihood ratio (overshoot neglected, so the simulation
    # lies a little above it).  3 sigma step: drift 2.5, bound 6.9 -> 2.8;
    # no step: drift 0.28 for the "no step" test -> 24.6.
    rng = np.random.default_rng(2)
    for mean, expect in ((3.0, 6.9068 / 2.5), (0.0, 6.9068 / 0.28125)):
        ms = []
        for _ in range(4000):
            tr = EventTrial(+1, 1.0, 0.001, 10_000)
            i, _ = tr.feed(mean + rng.standard_normal(400))
            ms.append(i + 1)
        assert expect <= np.mean(ms) <= expect + 2.5, (mean, np.mean(ms))


# ------------------------------------------------------ the measured defects
def test_a_real_step_is_detected_once_and_confirmed() -> None:
    # Measured: AR(1) phi 0.6, default settings, steps of 1 sigma (= min_shift)
    # were detected and dismissed again and again (2 to 16 detected records).
    # Now each gives one detected record and ends confirmed within 1,000 samples.
    once = confirmed = 0
    for k in range(40):
        rng = np.random.default_rng(100 + k)
        n = 3000
        x = 50.0 + ar1(n, 0.6, rng)
        x[1500:] += rng.choice([-1.0, 1.0])
        t = T0 + np.arange(float(n))
        recs = [r for r in feed(StreamEngine("s"), t, x) if r.detected_at >= t[1500]]
        det = [r for r in recs if r.phase == "detected"]
        once += len(det) == 1
        confirmed += any(r.phase == "confirmed" and r.as_of <= t[2500] for r in recs)
        assert len(det) <= 2
    assert once >= 39 and confirmed >= 39


def test_a_second_step_soon_after_a_confirmed_one_is_found() -> None:
    # Measured: a second 2-sigma step 50 samples after a confirmed one (half of
    # them back to the old level) was found 0 times in 300: the stream warmed up
    # again, blind.  Now the stream watches on from the next sample.
    found = 0
    for k in range(40):
        rng = np.random.default_rng(200 + k)
        n = 2000
        x = 10.0 + rng.standard_normal(n)
        x[1000:] += 2.0
        back = k % 2 == 0
        x[1050:] += -2.0 if back else 2.0
        t = T0 + np.arange(float(n))
        recs = feed(StreamEngine("s"), t, x)
        ends = [r for r in recs if r.phase in ("confirmed", "returned")]
        second = [r for r in ends if abs(r.shift_at - t[1050]) <= 5]
        found += bool(second) and (second[0].phase == "returned") == back
    assert found >= 38


def test_a_step_during_a_false_event_is_not_thrown_away() -> None:
    # Measured: a real step arriving while a false event was open was dismissed
    # with that event and found again 20 to 35 samples later, or confirmed with
    # the false event's shift time.  Now the false event is dismissed and the
    # step gets its own detection at once, with the right shift time.
    hits = tried = 0
    settings = DetectionSettings(false_alarm_every=600.0)
    for k in range(40):
        rng = np.random.default_rng(300 + k)
        n = 6000
        x = rng.standard_normal(n)
        t = T0 + np.arange(float(n))
        # A false detection on an established stream (after the first warm-up,
        # where the decision is deliberately slower on few samples).
        first = next((r for r in StreamEngine("s", settings).process(t, x).records
                      if r.phase == "detected" and r.detected_at >= t[300]), None)
        if first is None:
            continue
        i = int(np.searchsorted(t, first.detected_at))
        if i + 400 > n:
            continue
        tried += 1
        # The same false detection (records do not depend on batching), then a
        # real step two samples later, while its event is open.
        eng = StreamEngine("s", settings)
        feed(eng, t[: i + 1], x[: i + 1])
        assert eng.state == "event_open"
        y = x.copy()
        y[i + 3:] += 3.0
        ends = [r for r in feed(eng, t[i + 1:], y[i + 1:]) if r.phase in ("confirmed", "returned")]
        # The step is always reported within 15 samples...
        assert ends and ends[0].as_of - t[i + 3] <= 15
        hits += abs(ends[0].shift_at - t[i + 3]) <= 3
    assert tried >= 20
    # ...and dated within 3 samples in most cases.  Left open (measured here:
    # 29 of 40): when the false event's own samples lean towards the step, the
    # fit merges them and dates the step up to 14 samples early.
    assert hits >= 0.7 * tried


def test_large_steps_are_confirmed_within_a_few_samples() -> None:
    # Measured: confirmation always waited 30 samples (median 32-44 for steps of
    # 1 sigma or more).  Target: median detection-to-confirmation <= 10 samples
    # for steps of 1.5 sigma or more.
    waits = []
    for k in range(60):
        rng = np.random.default_rng(400 + k)
        x = rng.standard_normal(1500)
        x[1000:] += [1.5, 2.0, 3.0][k % 3]
        t = T0 + np.arange(1500.0)
        recs = feed(StreamEngine("s"), t, x)
        det = next(r for r in recs if r.phase == "detected" and r.detected_at >= t[1000])
        conf = next(r for r in recs if r.phase == "confirmed" and r.id == det.id)
        waits.append(conf.as_of - det.detected_at)
    assert np.median(waits) <= 10


def test_a_new_stream_can_alert_within_its_first_samples() -> None:
    # Measured: nothing could be found in a stream's first 200 samples.  A 3 sigma
    # step at sample 20 of a new stream is now detected soon after, by sample 30
    # in the median, with no false alarm before it.
    when = []
    for k in range(30):
        rng = np.random.default_rng(500 + k)
        x = 5.0 + rng.standard_normal(300)
        x[20:] += 3.0
        t = T0 + np.arange(300.0)
        recs = StreamEngine("s").process(t, x).records
        if recs:
            assert recs[0].phase == "detected" and recs[0].shift_at >= t[18]
            when.append(int(np.searchsorted(t, recs[0].detected_at)))
    # Every step found is found soon, and nothing false comes before it.  Measured
    # before the split test of the first warm-up: found in 22 of 30 (the rest were
    # absorbed into the young level); now 30 of 30, by sample 57 at the latest (one
    # whose 20 samples before the step look autocorrelated: the split test allows
    # for it and takes longer).
    assert len(when) >= 29 and max(when) <= 60 and np.median(when) <= 30


def test_a_first_step_after_samples_that_look_autocorrelated_is_still_found() -> None:
    # Measured (bench_events, 200 new iid streams, 3 sigma step at sample 20): 2 were
    # never alerted on in 200 samples.  Their 20 samples before the step run in
    # stretches (lag-1 autocorrelation 0.72 after Kendall's correction), so the split
    # test allowed for a wander and then stood aside; the samples after the step,
    # iid, did not count; now they do, at 2 standard errors above their estimate.
    # These are those two series (the bench's own generator).
    series = []
    for state, rep in ((9000, 25), (9001, 12)):
        rng = np.random.default_rng(state)
        for _ in range(rep + 1):
            x = rng.standard_normal(200)
        x[20:] += 3.0
        series.append(x)
    for x in series:
        head = x[:20] - x[:20].mean()
        assert np.dot(head[1:], head[:-1]) / np.dot(head, head) > 0.5  # the run is there
        t = T0 + np.arange(200.0)
        recs = StreamEngine("s").process(t, x).records
        assert recs and recs[0].phase == "detected", "a 3 sigma step at sample 20 was never alerted on"
        assert t[18] <= recs[0].shift_at <= t[21]
        assert recs[0].detected_at <= t[60]  # later than most (the allowance stays until the samples after show little)


def test_the_first_warmup_keeps_the_false_alarm_rate() -> None:
    # The self-starting inputs are N(0, 1) however young the level: over 400 new
    # iid streams of 2,000 samples at false_alarm_every 1h (nominal 2000/3600 =
    # 0.56 detections per stream), the count stays within Poisson limits of the
    # nominal rate (common practice: mean +- 3 sqrt(mean) for a count).
    st_ = DetectionSettings(false_alarm_every=3600.0)
    det = 0
    for k in range(400):
        rng = np.random.default_rng(600 + k)
        recs = StreamEngine("s", st_).process(T0 + np.arange(2000.0), rng.standard_normal(2000)).records
        det += sum(r.phase == "detected" for r in recs)
    nominal = 400 * 2000 / 3600
    assert det <= nominal + 3 * math.sqrt(nominal)


@hsettings(max_examples=60, deadline=None)
@given(
    st.integers(0, 2**31 - 1),
    st.lists(st.tuples(st.integers(20, 1500), st.floats(-4.0, 4.0)), max_size=4),
    st.sampled_from([0.0, 0.6]),
    st.sampled_from(["multi_cusum", "glr"]),
)
def test_records_are_coherent(state: int, steps: list[tuple[int, float]], phi: float, test: str) -> None:
    # Measured: dismissed and confirmed records with a shift time after their own
    # detection.  Every record now has shift_at_low <= shift_at <= shift_at_high
    # <= detected_at <= as_of, and every event ends with exactly one final record.
    rng = np.random.default_rng(state)
    n = 1600
    x = ar1(n, phi, rng) if phi else rng.standard_normal(n)
    for at, size in steps:
        x[at:] += size
    t = T0 + np.arange(float(n))
    recs = feed(StreamEngine("s", DetectionSettings(test=test, false_alarm_every=3600.0)), t, x, batch=173)
    for r in recs:
        assert r.shift_at_low <= r.shift_at <= r.shift_at_high <= r.detected_at <= r.as_of
    ends: dict[str, int] = {}
    for r in recs:
        if r.phase != "detected":
            ends[r.id] = ends.get(r.id, 0) + 1
    assert all(v == 1 for v in ends.values())


def test_an_event_that_stays_uncertain_ends_undecided_and_the_stream_goes_on() -> None:
    # A step between "none" and the smallest of interest keeps the evidence
    # thin; with a short bound the event ends undecided, and the stream watches
    # on from the level it now has (the same step is not detected again).
    st_ = DetectionSettings(confirm_max_samples=20, false_alarm_every=3600.0)
    rng = np.random.default_rng(7)
    x = rng.standard_normal(6000)
    x[3000:] += 0.5
    t = T0 + np.arange(6000.0)
    recs = feed(StreamEngine("s", st_), t, x)
    after = [r for r in recs if r.detected_at >= t[3000]]
    phases = [r.phase for r in after]
    assert phases.count("detected") <= 2
    assert {"confirmed", "undecided"} & set(phases)
    for r in after:
        if r.phase == "undecided":
            assert r.n_after >= 1 and "undecided" in json.dumps(r.to_dict())


def test_a_snapshot_of_the_earlier_version_still_loads() -> None:
    # Snapshots written before the event layer was rebuilt carry an event with
    # target_inputs and consumed, and no trial; they load, and the event is
    # decided from the next samples.
    rng = np.random.default_rng(8)
    x = rng.standard_normal(1200)
    x[800:] += 2.0
    t = T0 + np.arange(1200.0)
    eng = StreamEngine("s")
    recs = feed(eng, t[:812], x[:812], batch=812)
    assert eng.state == "event_open", [r.phase for r in recs]
    snap = json.loads(json.dumps(eng.get_state()))
    old = dict(snap)
    ev = dict(old["event"])
    for key in ("trial", "level_before"):
        ev.pop(key)
    ev.update(target_inputs=30, consumed=4)
    old["event"] = ev
    for key in ("last_step", "young", "provisional"):
        old.pop(key)
    old["baseline"] = {k: v for k, v in old["baseline"].items() if k != "n_level"}
    old["test"] = {k: v for k, v in old["test"].items() if k != "n_level"}
    back = StreamEngine("s")
    back.set_state(old)
    rest = feed(back, t[812:], x[812:])
    assert [r.phase for r in rest][:1] == ["confirmed"]


@pytest.mark.parametrize("field,value,name", [
    ("pending", [1.0], "pending"),
    ("prev_r", 1e400, "prev_r"),
    ("values", None, "values"),
])
def test_a_damaged_snapshot_entry_names_its_field(field: str, value: object, name: str) -> None:
    eng = StreamEngine("s")
    eng.process(T0 + np.arange(300.0), np.random.default_rng(9).standard_normal(300))
    snap = json.loads(json.dumps(eng.get_state()))
    if field == "values":
        value = [math.nan] * len(snap["values"])
    snap[field] = value
    fresh = StreamEngine("s")
    with pytest.raises(ValueError, match=name):
        fresh.set_state(snap)
    assert fresh.state == "warming_up"


def test_an_open_event_can_be_ended_with_a_record() -> None:
    # A reload that changes a stream's settings, or removes the stream, must not
    # leave a detected record without a follow-up: end_event closes it as undecided.
    rng = np.random.default_rng(10)
    x = rng.standard_normal(1200)
    x[800:] += 2.0
    t = T0 + np.arange(1200.0)
    eng = StreamEngine("s")
    recs = feed(eng, t[:809], x[:809], batch=809)  # detected at sample 806, decided at 811
    assert eng.state == "event_open"
    det = [r for r in recs if r.phase == "detected"][-1]
    end = eng.end_event(float(t[808]))
    assert end is not None and end.phase == "undecided" and end.id == det.id
    assert end.shift_at_high <= end.detected_at <= end.as_of
    assert eng.state == "watching" and eng.end_event(float(t[808])) is None
    assert eng.records_total["undecided"] == 1


def test_split_evidence_matches_a_two_sample_t_test() -> None:
    # Reference: scipy.stats.ttest_ind (pooled variance) at the split found; the
    # split is the least-squares one by definition (every split's within-segment
    # sum of squares enumerated).
    rng = np.random.default_rng(41)
    x = rng.standard_normal(40)
    x[24:] += 2.0
    ev = split_evidence(x, min_segment=3)
    assert ev is not None
    rss = {k: np.sum((x[:k] - x[:k].mean()) ** 2) + np.sum((x[k:] - x[k:].mean()) ** 2) for k in range(3, 38)}
    assert ev.split_at == min(rss, key=rss.__getitem__)
    ref = stats.ttest_ind(x[ev.split_at:], x[: ev.split_at], equal_var=True)
    # No autocorrelation allowance when the samples before show none.
    if ev.phi <= 0.0:
        assert ev.t == pytest.approx(abs(ref.statistic), rel=1e-9)
    # The bound: splits tried times the two-sided t tail (Wallace's normal
    # transform, within 5% of scipy's t tail here).
    splits = 40 - 2 * 3 + 1
    assert ev.p_value == pytest.approx(min(1.0, splits * 2 * stats.t.sf(ev.t, 38)), rel=0.05)


def test_split_evidence_with_a_bound_to_beat_answers_the_same() -> None:
    # p_below only saves work: None only where the full evidence's bound is not below
    # it, the same evidence otherwise (random series with and without steps).
    rng = np.random.default_rng(43)
    for _ in range(300):
        n = int(rng.integers(20, 200))
        x = rng.standard_normal(n)
        if rng.random() < 0.5:
            x[int(rng.integers(5, n - 5)):] += rng.uniform(0.5, 4.0)
        full = split_evidence(x)
        for p_below in (1e-6, 1e-3, 0.05):
            quick = split_evidence(x, p_below=p_below)
            if quick is None:
                assert full is None or full.p_value >= p_below
            else:
                assert quick == full
            if full is not None and full.p_value < p_below:
                assert quick == full


def test_kendall_bias_correction_centres_the_autocorrelation() -> None:
    # Kendall (1954): the lag-1 sample autocorrelation of n AR(1) samples around
    # their own mean falls short of phi by about (1 + 3 phi) / n.  Over 4,000 series
    # of 30 samples at phi 0.6, the corrected estimate's mean is within 0.03 of phi,
    # the raw one's is not.
    rng = np.random.default_rng(42)
    raw, corrected = [], []
    for _ in range(4000):
        e = rng.standard_normal(30)
        x = np.empty(30)
        p = e[0] / math.sqrt(1 - 0.36)
        for i in range(30):
            p = 0.6 * p + e[i]
            x[i] = p
        ys = SelfStart(None)
        for v in x:
            ys.add(float(v))
        r = (ys._c1()) / ys.ss
        raw.append(r)
        corrected.append(ys._phi_raw())
    assert abs(np.mean(corrected) - 0.6) < 0.03
    assert np.mean(raw) < 0.6 - 0.05


def _t3_spikes(state: int, n: int) -> np.ndarray:
    """bench_events' heavy-tailed kind: unit-variance t(3) noise with 0.5% spikes of 6 sigma."""
    rng = np.random.default_rng(state)
    x = rng.standard_t(3, n) / math.sqrt(3.0)
    spikes = rng.random(n) < 0.005
    x[spikes] += rng.choice([-6.0, 6.0], size=int(spikes.sum()))
    return x


def test_no_step_below_min_shift_is_confirmed_on_heavy_tailed_noise() -> None:
    # Measured (bench_events, t(3) noise with 0.5% spikes of 6 sigma, false_alarm_every
    # 1h): an event was confirmed whose least-squares step was -0.23 sigma, because the
    # trial's clipped inputs said "step" where the fit of the samples did not.  Such an
    # event now ends undecided.  The same 500,000 samples: nothing below min_shift
    # (1 sigma) is confirmed, and no confirmed step points against its detection.
    n = 500_000
    x = _t3_spikes(10293, n)
    t = T0 + np.arange(float(n))
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    recs = []
    for a in range(0, n, 1024):
        recs += eng.process(t[a:a + 1024], 50.0 + x[a:a + 1024]).records
    ends = [r for r in recs if r.phase in ("confirmed", "returned")]
    assert all(abs(r.delta_sigma) >= 1.0 for r in ends), [r.delta_sigma for r in ends]
    # These samples once ended 2 of 112 events undecided on that rule; both came after
    # runs of spikes had pulled the follower 0.63 sigma off the level (it was fed
    # readings beyond the spike band as they were).  Held to the band (2026-12-05,
    # tests/core/test_outlier_burst.py) the follower stays within 0.36 sigma, and all
    # 108 detections on this step-free series end dismissed: none is confirmed.
    phases = [r.phase for r in recs]
    assert phases.count("dismissed") + phases.count("undecided") >= phases.count("detected") - 1
    assert not ends


@pytest.mark.parametrize("state", [30, 68, 104])
def test_an_event_whose_trial_and_fit_disagree_ends_undecided_before_the_limit(state: int) -> None:
    # The rule above (a trial's "step" that the refit of the event's samples contradicts:
    # a step the other way, or under half of min_shift) ends the event undecided at once,
    # not at confirm_max_samples (README, the operators' table).  The heavy-tailed series
    # above reached it before the follower was held to the spike band; these new AR(1)
    # 0.5 streams at 1h (scipy's lfilter as the recursion) reach it 166 to 402 samples
    # after a false detection in their first 50 samples.  Nothing is confirmed.
    rng = np.random.default_rng(state)
    x = 500.0 + 0.5 * math.sqrt(0.75) * lfilter([1.0], [1.0, -0.5], rng.standard_normal(1500))
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    recs = []
    for a in range(0, x.size, 64):
        recs += eng.process(T0 + np.arange(a, min(a + 64, x.size), dtype=np.float64), x[a:a + 64]).records
    early = [r for r in recs if r.phase == "undecided"
             and r.as_of - r.detected_at < DetectionSettings().confirm_max_samples - 1]
    assert early, [(r.phase, r.as_of - T0) for r in recs]
    assert not [r for r in recs if r.phase in ("confirmed", "returned")]


def test_heavy_tailed_noise_alarms_at_the_chosen_rate_whatever_its_warmup_showed() -> None:
    # Measured (bench_events, t(3) noise with 0.5% spikes of 6 sigma, 1h): 0.24 of the
    # nominal rate, the mean of streams at two rates.  Most were clipped at 2 sigma and
    # gave about 0.4 (clipped increments reach a threshold designed for Gaussian ones
    # less often); this one's warm-up read 3.0% of its samples beyond 2.5 sigma, under the
    # heavy-tail line of 3.1% on the scale of the clip at 4 (4.3% on the scale at 2), and
    # it stayed at clip 4 for 500,000 samples with 4 times the nominal rate.  Now the
    # line is the same noise (t(8)) on either scale and a clipped stream's test is
    # designed for it.  The target is the (0.5 to 1.5 of nominal); nominal here
    # is 300,000 / 3,600 = 83 detections.
    x, t = _t3_spikes(1001, 1_000_000)[:300_000], T0 + np.arange(300_000.0)
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    det = 0
    for a in range(0, x.size, 1024):
        det += sum(r.phase == "detected" for r in eng.process(t[a:a + 1024], 50.0 + x[a:a + 1024]).records)
        if a == 20 * 1024:
            assert eng.baseline is not None and eng.baseline.clip == 2.0
    assert 0.5 * 83 <= det <= 1.5 * 83, det


def test_a_heavy_tailed_stream_at_a_short_arl_keeps_running() -> None:
    # Found in review: one reading a minute at false_alarm_every 1h is an ARL of 60
    # samples; the heavy-tail factor took the design to 31.5, below the 50 a test can
    # be designed for, and the stream raised on every batch from then on.
    rng = np.random.default_rng(1)
    x = 50.0 + rng.standard_t(3, 6000) / math.sqrt(3.0)
    t = 1.7e9 + 60.0 * np.arange(6000.0)
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    for a in range(0, 6000, 1000):
        eng.process(t[a:a + 1000], x[a:a + 1000])
    assert eng.baseline is not None and eng.baseline.clip == 2.0
    assert eng.samples_total == 6000 and eng.state in ("watching", "event")


def test_the_clip_does_not_flip_at_every_refinement() -> None:
    # Found in review: a share between the two heavy-tail lines (2.35% on the scale at
    # clip 4, 3.0% at clip 2) was judged at each refinement against the other clip's
    # line, so t(6) noise switched clip (and its test's design) at nearly every
    # refinement: 10 changes at 1,024-sample batch ends over 300,000 samples.
    rng = np.random.default_rng(21)
    n = 300_000
    x = 50.0 + rng.standard_t(6, n) / math.sqrt(1.5)
    t = T0 + np.arange(float(n))
    eng = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    clips = []
    for a in range(0, n, 1024):
        eng.process(t[a:a + 1024], x[a:a + 1024])
        if eng.baseline is not None:
            clips.append(eng.baseline.clip)
    changes = sum(a != b for a, b in pairwise(clips))
    assert changes <= 2, changes


def _pieces(eng: StreamEngine, t: np.ndarray, x: np.ndarray, sizes: list[int]) -> tuple[list[float], list[dict]]:
    spikes: list[float] = []
    recs: list[dict] = []
    pos = 0
    for p in sizes:
        r = eng.process(t[pos:pos + p], x[pos:pos + p])
        pos += p
        spikes += [q.time for q in r.rejected if q.reason == "spike"]
        recs += [q.to_dict() for q in r.records]
    return spikes, recs


def test_spikes_on_a_followed_drift_are_the_same_however_the_stream_is_batched() -> None:
    # Found by review: spikes were judged against the followed level as it stood at
    # the start of a vectorised stretch (up to 65,536 samples), but against the
    # current one sample by sample.  On an 8-sigma drift over 20,000 samples a whole
    # batch rejected 41 ordinary samples as spikes, one at a time none; with real
    # 7-sigma spikes on a drift, different samples were rejected and the records
    # differed.  Now the level spikes are judged against is taken every
    # FOLLOW_RECENTER (4,096) watched samples, the same however the stream is batched.
    rng = np.random.default_rng(1)
    n = 20000
    t = T0 + np.arange(float(n))
    x = rng.normal(size=n) + np.linspace(0.0, 8.0, n)
    whole = _pieces(StreamEngine("s"), t, x, [n])
    assert whole == _pieces(StreamEngine("s"), t, x, [100] * 200)
    # At most a few ordinary samples of the drift are judged spikes (41 before): the
    # level they are judged against may be up to 4,096 samples (1.6 sigma here) old.
    assert len(whole[0]) <= 3
    rng = np.random.default_rng(5)
    n = 6000
    t = T0 + np.arange(float(n))
    x = rng.normal(size=n) + np.linspace(0, 8, n)
    x[rng.integers(300, n, 20)] += rng.choice([-7, 7], 20)
    whole = _pieces(StreamEngine("s"), t, x, [n])
    assert whole == _pieces(StreamEngine("s"), t, x, [1] * n)
    assert len(whole[0]) >= 15


def test_a_damaged_follow_lag_is_refused_by_name() -> None:
    # Found by review: a follow_lag beyond the window was accepted and failed later
    # inside process (IndexError, a broadcasting error) or read stale memory.
    rng = np.random.default_rng(2)
    t = T0 + np.arange(3000.0)
    x = rng.normal(size=3000)
    e = StreamEngine("s")
    e.process(t[:2000], x[:2000])
    good = json.loads(json.dumps(e.get_state()))
    for lag in (len(good["values"]) + 5, 10**6):
        bad = dict(good, follow_lag=lag)
        with pytest.raises(ValueError, match=r"^follow_lag: "):
            StreamEngine("s").set_state(bad)
    ok = StreamEngine("s")
    ok.set_state(good)
    assert ok.process(t[2000:], x[2000:]).records == e.process(t[2000:], x[2000:]).records


def test_a_snapshot_from_before_the_follower_gets_the_test_designed_for_it() -> None:
    # Found by review: a snapshot without the follower's fields restored the test it
    # had (designed for a fixed level) while the follower started at once, so the
    # false-alarm rate ran high until the next redesign (12,975 samples later in the
    # reviewer's run).  Now the test is redesigned on restore.
    rng = np.random.default_rng(3)
    t = T0 + np.arange(20000.0)
    x = rng.normal(size=20000)
    e = StreamEngine("s")
    e.process(t, x)
    state = json.loads(json.dumps(e.get_state()))
    for k in ("follow", "follow_lag", "center", "next_center", "unfolded_follow"):
        state.pop(k)
    state["test"]["arl0"] = 604800.0  # as the earlier version designed it
    del state["test"]["rules"]  # which it did not record
    old = StreamEngine("s")
    old.set_state(state)
    assert old._test_arl0 == pytest.approx(e._test_arl0)
    assert old._test_arl0 > 2 * 604800.0


def test_a_snapshot_made_under_earlier_design_rules_gets_its_test_designed_again() -> None:
    # Found in review: a snapshot of the version before the ARL-dependent follower factor
    # (2.4 at every ARL) restored its test as designed then, and an established stream
    # is redesigned only when its sample count grows by 5%, which a capped count never
    # does: the upgraded daemon kept 0.56 of the nominal rate at 1h.  Snapshots now say
    # which rules designed their test; one that does not is designed again on load,
    # keeping the evidence it holds.  One that does is restored as it was (a restart
    # must not change what a stream says).
    rng = np.random.default_rng(4)
    t = T0 + np.arange(30000.0)
    e = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    e.process(t, rng.normal(size=30000))
    state = json.loads(json.dumps(e.get_state()))
    assert state["test"]["rules"] == 2
    same = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    same.set_state(state)
    assert same._test_arl0 == e._test_arl0 and same.get_state() == state
    state["test"]["arl0"] = 8395.69  # what 2.4 times 3,600 samples, and the estimate, gave
    del state["test"]["rules"]
    older = StreamEngine("s", DetectionSettings(false_alarm_every=3600.0))
    older.set_state(state)
    assert older._test_arl0 == pytest.approx(e._test_arl0)
    assert older._test.get_state() == e._test.get_state()  # the evidence is kept


@pytest.mark.parametrize("field,value", [
    ("step_from", "abc"),   # text where a count belongs
    ("m", 1.5),             # a count with a fraction: was read as 1
    ("limit", True),        # a JSON true is not a count
    ("d", "abc"),           # text where a number belongs
    ("bound", None),
    ("s", [1.0]),
])
def test_a_damaged_trial_field_in_a_snapshot_is_refused_by_name(field: str, value: object) -> None:
    # An open event's trial saved in a snapshot, one field damaged: set_state refuses
    # it with a ValueError that names the field (the daemon logs it and counts the
    # stream's state as damaged), never a bare "invalid literal" or a count rounded down.
    rng = np.random.default_rng(8)
    x = rng.standard_normal(812)
    x[800:] += 2.0
    eng = StreamEngine("s")
    feed(eng, T0 + np.arange(812.0), x, batch=812)
    assert eng.state == "event_open"
    snap = json.loads(json.dumps(eng.get_state()))
    snap["event"]["trial"][field] = value
    with pytest.raises(ValueError, match=rf"event\.trial\.{field}\b"):
        StreamEngine("s").set_state(snap)


def test_a_trial_field_missing_from_a_snapshot_is_refused_by_name() -> None:
    rng = np.random.default_rng(8)
    x = rng.standard_normal(812)
    x[800:] += 2.0
    eng = StreamEngine("s")
    feed(eng, T0 + np.arange(812.0), x, batch=812)
    snap = json.loads(json.dumps(eng.get_state()))
    del snap["event"]["trial"]["bound"]
    with pytest.raises(ValueError, match=r"event\.trial\.bound\b.*missing"):
        StreamEngine("s").set_state(snap)
