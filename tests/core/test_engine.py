"""The per-stream engine on real-feed problems: spikes, bad samples, gaps,
quantised readings, autocorrelation, warm-ups that hold a shift, and events
that are confirmed or dismissed.

The data are simulated with fixed random states; the checks are on
behaviour (what is alerted, when, with which estimates), not on stored
outputs.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import RECORD_FIELDS, event_id
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0  # 2026-08-29, an arbitrary epoch for the simulated line


def run(engine: StreamEngine, t: np.ndarray, x: np.ndarray, batch: int = 500) -> tuple[list, list]:
    """Feed in batches; return the records and (sample index, reason) of each rejection."""
    records, rejected = [], []
    for a in range(0, len(t), batch):
        res = engine.process(t[a:a + batch], x[a:a + batch])
        records += res.records
        for r in res.rejected:
            # A sample held from an earlier batch (position -1) is found by its time.
            i = a + r.position if r.position >= 0 else int(np.searchsorted(np.asarray(t, float), r.time))
            rejected.append((i, r.reason))
    return records, rejected


def gaussian(n: int, level: float, sigma: float, seed: int) -> np.ndarray:
    return level + sigma * np.random.default_rng(seed).standard_normal(n)


@pytest.mark.parametrize("test", ["glr", "cusum"])
def test_one_sigma_step_is_detected_then_confirmed(test: str) -> None:
    t = T0 + np.arange(2000.0)
    x = gaussian(2000, 412.0, 0.6, 1)
    x[900:] += 0.6
    eng = StreamEngine("hall-b/filler7/weight", DetectionSettings(test=test), unit="g")
    recs, _ = run(eng, t, x)
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    det, conf = recs
    assert det.id == conf.id == event_id("hall-b/filler7/weight", det.detected_at)
    assert det.detected_at > t[900]
    assert det.detected_at - t[900] < 100  # a 1-sigma step is caught within ~25-40 samples
    assert abs(conf.shift_at - t[900]) <= 6
    assert conf.shift_at_low <= conf.shift_at <= conf.shift_at_high
    assert abs(conf.delta - 0.6) < 0.25
    assert conf.as_of > det.as_of  # decided on samples that came after the trip
    assert eng.level is not None and abs(eng.level - 412.6) < 0.15  # re-baselined on the new level
    d = conf.to_dict()
    assert tuple(d)[: len(RECORD_FIELDS)] == RECORD_FIELDS
    assert d["shift_at"].endswith("Z") and len(d["shift_at"]) == len("2026-08-29T01:23:45.678Z")
    assert d["unit"] == "g" and d["direction"] == "up"
    json.dumps(d)  # the record is plain JSON


def test_batch_splits_do_not_change_the_records() -> None:
    t = T0 + np.arange(3000.0)
    x = gaussian(3000, 10.0, 1.0, 2)
    x[800:] -= 1.2
    x[2100:] += 2.0
    x[[300, 1500, 2600]] += np.array([15.0, -12.0, 20.0])  # lone spikes
    ref = [r.to_dict() for r in run(StreamEngine("s"), t, x, batch=3000)[0]]
    assert len(ref) == 4
    rng = np.random.default_rng(3)
    for _ in range(3):
        cuts = np.sort(rng.choice(np.arange(1, 3000), size=40, replace=False))
        eng = StreamEngine("s")
        got = []
        for a, b in zip(np.r_[0, cuts], np.r_[cuts, 3000]):
            got += [r.to_dict() for r in eng.process(t[a:b], x[a:b]).records]
        assert got == ref
    one_by_one = StreamEngine("s")
    got = []
    for i in range(3000):
        got += [r.to_dict() for r in one_by_one.process(t[i:i + 1], x[i:i + 1]).records]
    assert got == ref


@pytest.mark.parametrize("seed", [4, 15, 16])
def test_lone_spikes_never_open_an_event(seed: int) -> None:
    # The engine on a series with lone spikes must say exactly what it says on
    # the same series with the spikes taken out: they open no event, move no
    # baseline and shift no estimate.
    n = 20000
    t = T0 + np.arange(float(n))
    clean = gaussian(n, 75.0, 0.3, seed)
    clean[12000:] += 0.3  # one real 1-sigma step, so there is something to estimate
    rng = np.random.default_rng(seed + 100)
    where = np.sort(rng.choice(np.arange(200, n, 3), size=200, replace=False))  # never adjacent
    where = np.union1d(where, [999, 1999, 2999])  # at batch boundaries: held one sample
    spiky = clean.copy()
    spiky[where] += rng.choice([-1, 1], size=where.size) * rng.uniform(8, 60, size=where.size) * 0.3
    eng = StreamEngine("press4/torque")
    recs, rejected = run(eng, t, spiky, batch=1000)
    ref = StreamEngine("press4/torque")
    keep = np.setdiff1d(np.arange(n), where)
    ref_recs, _ = run(ref, t[keep], clean[keep], batch=1000)
    assert [r.to_dict() for r in recs] == [r.to_dict() for r in ref_recs]
    assert any(r.phase == "confirmed" for r in recs)
    assert sorted(i for i, r in rejected if r == "spike") == where.tolist()
    assert eng.rejected_total["spike"] == where.size
    assert eng.samples_total == n


def test_a_large_step_is_not_taken_for_a_spike() -> None:
    t = T0 + np.arange(1500.0)
    x = gaussian(1500, 3.0, 0.05, 6)
    x[1000:] += 1.0  # 20 sigma: every sample after it is beyond the spike limit
    recs, rejected = run(StreamEngine("oven1/zone3/temp"), t, x, batch=1000)
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    # Residuals are clipped at 3 sigma before the test, and the first sample is
    # held for the spike check, so even a huge step takes a few samples.
    assert recs[0].detected_at - t[1000] <= 6
    assert recs[1].shift_at == t[1000]
    assert not [i for i, r in rejected if r == "spike" and i >= 1000]


def test_counts_of_one_stream_never_show_in_another() -> None:
    # Engines that have counted nothing share one empty counter; the first
    # count gives the engine its own.
    quiet, noisy = StreamEngine("quiet"), StreamEngine("noisy")
    t = T0 + np.arange(300.0)
    quiet.process(t, gaussian(300, 50.0, 1.0, 3))
    x = gaussian(300, 50.0, 1.0, 4)
    x[10] = np.nan
    noisy.process(t, x)
    assert noisy.rejected_total == {"nan": 1}
    assert quiet.rejected_total == {} and quiet.records_total == {}
    restored = StreamEngine("again")
    restored.set_state(quiet.get_state())
    restored.process(t[-1] + 1.0 + np.arange(2.0), np.array([np.nan, 50.0]))
    assert restored.rejected_total == {"nan": 1}
    assert quiet.rejected_total == {} and StreamEngine("new").rejected_total == {}
    with pytest.raises(TypeError):
        quiet.rejected_total["nan"] += 1  # the shared empty counter refuses to count
    with pytest.raises(TypeError):
        quiet.records_total.update({"detected": 1})


def test_bad_samples_are_rejected_with_reasons_and_good_ones_kept() -> None:
    n = 1500
    t = list(T0 + np.arange(float(n)))
    x: list = list(gaussian(n, 50.0, 1.0, 7))
    for i in range(1000, n):
        x[i] += 1.5
    x[100] = float("nan")
    x[101] = float("inf")
    x[102] = "12.5"
    x[103] = None
    t[200] = t[199]  # duplicate time
    t[300] = t[250] + 0.5  # out of order
    t[350] = t[340]  # a repeat of an accepted time (a message delivered again): a duplicate
    t[400] = float("nan")
    eng = StreamEngine("s")
    recs, rejected = run(eng, np.array(t, dtype=object), np.array(x, dtype=object))
    assert dict(rejected) == {100: "nan", 101: "infinite", 102: "not_a_number", 103: "not_a_number",
                              200: "duplicate_time", 300: "out_of_order", 350: "duplicate_time",
                              400: "bad_time"}
    assert eng.rejected_total["not_a_number"] == 2
    assert eng.rejected_total["duplicate_time"] == 2
    assert eng.samples_total == n - 3  # a time not newer than the newest is not counted again
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    assert abs(recs[1].shift_at - t[1000]) <= 3


def test_coarsely_quantised_readings_keep_sigma_above_zero() -> None:
    # A scale that reads in whole grams while the true noise is 0.2 g: most
    # readings are identical, the moving range is mostly zero.
    n = 4100
    t = T0 + np.arange(float(n))
    raw = gaussian(n, 500.3, 0.2, 8)
    raw[4000:] += 1.0
    x = np.round(raw)
    eng = StreamEngine("scale2/weight")
    recs, _ = run(eng, t[:4000], x[:4000])
    assert recs == []
    assert eng.baseline is not None and eng.baseline.quantum == 1.0
    # The floor for a reading step q is q / sqrt(12) (rounding noise, common practice).
    assert eng.sigma is not None and eng.sigma >= 1.0 / math.sqrt(12.0)
    recs, _ = run(eng, t[4000:], x[4000:])
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    assert recs[1].shift_at == t[4000]
    assert all(math.isfinite(r.delta_sigma) for r in recs)


def test_moderately_quantised_readings_keep_the_false_alarm_rate() -> None:
    # Readings to 0.1 with noise sigma 0.05: half a reading step.  Over 20 streams
    # of 40,000 samples at the default 7d (nominal 1.3 detections in all), the count
    # stays within Poisson limits of the nominal (common practice: mean + 3 sqrt(mean)),
    # and nothing is confirmed.
    n = 40000
    t = T0 + np.arange(float(n))
    det = conf = 0
    for seed in range(17, 37):
        x = np.round(gaussian(n, 12.34, 0.05, seed), 1)
        eng = StreamEngine("dosing/flow")
        recs, _ = run(eng, t, x, batch=2000)
        det += sum(r.phase == "detected" for r in recs)
        conf += sum(r.phase in ("confirmed", "returned") for r in recs)
        assert eng.baseline is not None and eng.baseline.quantum == pytest.approx(0.1)
    nominal = 20 * n / 604800
    assert det <= nominal + 3 * math.sqrt(nominal) and conf == 0


def test_constant_readings_do_not_break_the_engine() -> None:
    t = T0 + np.arange(1000.0)
    x = np.full(1000, 7.0)
    x[700:] = 9.0
    eng = StreamEngine("stuck")
    recs, _ = run(eng, t, x)
    assert eng.sigma is not None and eng.sigma > 0
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    assert recs[1].shift_at == t[700]


def _reviewers_history(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A fresh reviewer's random history (AR(1) noise with phi -0.5, steps, lone spikes and
    runs of them, stoppages, a jittery clock), drawn in the order the reviewer's script drew it."""
    w = rng.standard_normal(n)
    e = np.empty(n)
    e[0] = w[0]
    for i in range(1, n):
        e[i] = -0.5 * e[i - 1] + w[i]
    x = 50.0 + 0.8 * e
    for _ in range(int(rng.integers(0, 5))):
        at = int(rng.integers(100, n))
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.5, 6.0))
    for at in rng.integers(0, n, size=int(rng.integers(0, 25))):
        ln = int(rng.choice([1, 1, 1, 2, 3, 5]))
        alt = rng.random() < 0.5
        sg = float(rng.choice([-1.0, 1.0]))
        for j in range(ln):
            if at + j < n:
                x[at + j] += (sg if not alt or j % 2 == 0 else -sg) * float(rng.uniform(6.0, 30.0))
    dt = np.ones(n)
    for at in rng.integers(1, n, size=int(rng.integers(0, 8))):
        dt[at] = float(rng.choice([2.0, 7.0, 9.99, 10.0, 11.0, 45.0, 3600.0]))
    if rng.random() < 0.3:
        dt *= rng.uniform(0.8, 1.2, n)
    return 1_788_000_000.0 + np.cumsum(dt), x


@pytest.mark.parametrize("batch", [10_000, 260, 1])
def test_a_young_trip_on_too_few_samples_to_fit_waits_for_them(batch: int) -> None:
    """A young level re-anchored after a confirmed step tripped its test 3 samples in, with 4
    samples in the window; opening the event raised ValueError from the step fit (it needs 5),
    though process() must not raise on data.  Now the event opens once the fit can be made:
    the step confirmed at +1,573 s is followed by a return detected at +1,577 s, the same for
    any batching."""
    rng = np.random.default_rng(716)
    assert str(rng.choice(["iid", "ar", "ar_hi", "ar_neg", "t3", "quant", "int", "flat"])) == "ar_neg"
    t, x = _reviewers_history(int(rng.integers(300, 7000)), rng)
    eng = StreamEngine("s", DetectionSettings(min_sigma=0.05, false_alarm_every=3600.0))
    records = []
    for a in range(0, t.shape[0], batch):
        records += eng.process(t[a:a + batch], x[a:a + batch]).records
    seen = [(r.phase, round(r.detected_at - 1_788_000_000.0)) for r in records]
    assert seen[4:8] == [("detected", 1573), ("confirmed", 1573), ("detected", 1577), ("returned", 1577)]
    assert eng.samples_total == t.shape[0]


def test_a_step_inside_the_first_warmup_is_reported_and_the_warmup_goes_on() -> None:
    # The self-starting test watches the first warm-up: a step at sample 60 of
    # a new stream is detected and confirmed at once, and the warm-up goes on
    # from the new level.
    t = T0 + np.arange(1200.0)
    x = gaussian(1200, 20.0, 0.5, 9)
    x[60:] += 2.5
    eng = StreamEngine("s")
    recs, _ = run(eng, t, x)
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    assert abs(recs[1].shift_at - t[60]) <= 2 and recs[0].detected_at <= t[70]
    assert eng.level is not None and abs(eng.level - 22.5) < 0.2


def test_irregular_sampling_and_gaps() -> None:
    rng = np.random.default_rng(10)
    n = 4000
    dt = rng.uniform(0.5, 1.5, size=n)
    dt[2000] = 3600.0  # the line stopped for an hour; a nozzle was swapped meanwhile
    t = T0 + np.cumsum(dt)
    x = gaussian(n, 1.0, 0.01, 11)
    x[2000:] += 0.015
    eng = StreamEngine("nozzle/pressure")
    recs, _ = run(eng, t, x)
    assert [r.phase for r in recs] == ["detected", "confirmed"]
    # The shift sits across the gap; the estimate is within a few samples.
    assert abs(int(np.searchsorted(t, recs[1].shift_at)) - 2000) <= 3
    assert recs[1].shift_at_low <= t[2000] <= recs[1].shift_at_high
    assert eng.baseline is not None and 0.8 < eng.baseline.interval < 1.2


def test_autocorrelated_noise_is_prewhitened() -> None:
    # AR(1) noise with phi = 0.6 (a slow thermal loop).  Without prewhitening a
    # test calibrated for independent samples would trip many times here.
    n = 60000
    rng = np.random.default_rng(12)
    e = rng.standard_normal(n) * 0.8
    r = np.empty(n)
    r[0] = 0.0
    for i in range(1, n):
        r[i] = 0.6 * r[i - 1] + e[i]
    t = T0 + np.arange(float(n))
    x = 180.0 + r
    eng = StreamEngine("oven2/temp")
    recs, _ = run(eng, t, x, batch=4000)
    assert recs == []
    assert eng.baseline is not None and abs(eng.baseline.phi - 0.6) < 0.08
    # ... and a 1.5-sigma step is still found.
    x2 = x.copy()
    x2[30000:] += 1.5 * 1.0  # marginal sigma is 0.8 / sqrt(1 - 0.36) = 1.0
    recs2, _ = run(StreamEngine("oven2/temp"), t, x2, batch=4000)
    assert [r.phase for r in recs2] == ["detected", "confirmed"]
    # Autocorrelated noise blurs the break date: the estimate is looser than on
    # independent noise, and the interval is widened by the variance correction.
    conf = recs2[1]
    assert abs(conf.shift_at - t[30000]) <= 40
    assert conf.shift_at_high - conf.shift_at_low >= 20


def test_a_transient_excursion_is_reported_with_its_return() -> None:
    # 20 samples 2.5 sigma away, then back: the step is confirmed within a few
    # samples, and the return is its own event whose record says "returned",
    # names the excursion's event and when it went back.
    t = T0 + np.arange(3000.0)
    x = gaussian(3000, 0.0, 1.0, 13)
    x[1000:1020] += 2.5
    recs, _ = run(StreamEngine("s"), t, x)
    assert [r.phase for r in recs] == ["detected", "confirmed", "detected", "returned"]
    assert recs[3].excursion_id == recs[0].id and recs[3].excursion_start == recs[1].shift_at
    assert abs(recs[1].shift_at - t[1000]) <= 2 and abs(recs[3].shift_at - t[1020]) <= 2


def test_a_short_blip_that_never_settles_is_dismissed() -> None:
    # Three samples 2.5 sigma away are not a lasting step: the event that
    # opens on them is dismissed once the level is seen to be back.
    t = T0 + np.arange(3000.0)
    x = gaussian(3000, 0.0, 1.0, 13)
    x[1000:1004] += 3.5
    recs, _ = run(StreamEngine("s"), t, x)
    assert [r.phase for r in recs] in (["detected", "dismissed"], [])


def test_state_and_counters_are_reported() -> None:
    t = T0 + np.arange(300.0)
    eng = StreamEngine("s")
    assert eng.state == "warming_up" and eng.level is None and eng.statistic == 0.0
    eng.process(t, gaussian(300, 5.0, 1.0, 14))
    assert eng.state == "watching"
    assert eng.threshold > 0 and math.isfinite(eng.statistic)
    assert eng.samples_total == 300


@pytest.mark.parametrize("test", ["glr", "cusum"])
def test_a_restored_snapshot_carries_on_exactly(test: str) -> None:
    # Snapshots taken in every state (warm-up, watching, event open), passed
    # through JSON as the daemon stores them, give the same records as an
    # engine that never stopped.
    n = 4000
    t = T0 + np.arange(float(n))
    x = gaussian(n, 61.0, 0.7, 18)
    x[1500:] += 0.9
    x[2900:] -= 1.4
    x[[700, 2000]] += 9.0
    settings = DetectionSettings(test=test)
    ref_recs = run(StreamEngine("s", settings), t, x, batch=250)[0]
    ref = [r.to_dict() for r in ref_recs]
    # The second step goes back to within half the first step of the old level:
    # its record is "returned" (the end of an excursion).
    assert [d["phase"] for d in ref] == ["detected", "confirmed", "detected", "returned"]
    assert ref[3]["excursion_id"] == ref[0]["id"]
    # Cut once inside each event (the sample after its detection) besides the warm-up
    # and a spike held for the spike check.
    inside = [int(np.searchsorted(t, r.detected_at)) + 1 for r in ref_recs if r.phase == "detected"]
    cuts = sorted({60, 700, 3500, *inside})
    eng = StreamEngine("s", settings)
    got, states = [], set()
    for a, b in zip([0] + cuts, cuts + [n]):
        got += [r.to_dict() for r in eng.process(t[a:b], x[a:b]).records]
        snap = json.loads(json.dumps(eng.get_state()))
        states.add(snap["state"])
        eng = StreamEngine("s", settings)
        eng.set_state(snap)
    assert states == {"warming_up", "watching", "event_open"}
    assert got == ref
    assert eng.samples_total == n and eng.rejected_total["spike"] == 2


def test_a_malformed_snapshot_is_refused_cleanly() -> None:
    eng = StreamEngine("s")
    eng.process(T0 + np.arange(300.0), gaussian(300, 1.0, 0.1, 19))
    snap = eng.get_state()
    for broken in ({}, {**snap, "state": "sleeping"}, {**snap, "baseline": None},
                   {**snap, "times": [1.0, 2.0], "values": [1.0]}, {**snap, "test": {"name": "adwin"}}):
        fresh = StreamEngine("s")
        with pytest.raises(ValueError):
            fresh.set_state(broken)
        assert fresh.state == "warming_up"  # left clean, ready to warm up


def test_heavy_tailed_noise_gets_a_lower_clip() -> None:
    rng = np.random.default_rng(20)
    t = T0 + np.arange(3000.0)
    heavy = StreamEngine("s")
    heavy.process(t, 5.0 + rng.standard_t(3, 3000))
    light = StreamEngine("s")
    light.process(t, 5.0 + rng.standard_normal(3000))
    assert heavy.baseline is not None and heavy.baseline.clip == 2.0
    assert light.baseline is not None and light.baseline.clip == 4.0
    # Gaussian noise puts 1.24% of samples beyond 2.5 sigma (common practice).
    assert light.baseline.tail_fraction == pytest.approx(0.0124, abs=0.006)


@pytest.mark.parametrize("test", ["glr", "cusum"])
def test_false_alarm_rate_holds_while_the_baseline_is_young(test: str) -> None:
    # Right after a warm-up the baseline rests on 200 samples; errors in its
    # level and sigma raise the false-alarm rate unless the design allows for
    # them.  Design for an ARL of 20,000 samples and count alarms in the
    # first 3,000 samples after each of 300 warm-ups: 45 expected if the ARL
    # held exactly from the first sample.  (Measured when this test was
    # written: GLR 31, CUSUM 42; with the allowance switched off the CUSUM
    # gave 56.)
    settings = DetectionSettings(test=test, false_alarm_every=20000.0, warmup_samples=200)
    rng = np.random.default_rng(21)
    runs, after = 300, 3000
    alarms = 0
    for _ in range(runs):
        n = 200 + after
        eng = StreamEngine("s", settings)
        res = eng.process(T0 + np.arange(float(n)), rng.standard_normal(n))
        alarms += sum(r.phase == "detected" for r in res.records)
    expected = runs * after / 20000.0
    # Alarms are rare and independent across runs: a Poisson count, sd sqrt(45) = 6.7.
    assert alarms <= expected + math.sqrt(expected)  # one Poisson sd above
    # And it still watches: the allowance makes a young baseline's test more cautious
    # (31 of 45 measured for the GLR), but not silent; 0.4 of 45 is 18, more than two Poisson
    # sds (sqrt(31) = 5.6) below the lowest count measured.
    assert alarms >= 0.4 * expected


def test_events_near_baseline_refinements_never_stall_the_engine() -> None:
    # Regression: an event whose tripping sample was exactly the sample at
    # which the baseline was due for a refinement, and which was then
    # dismissed, left the engine unable to take another sample.  Slide a
    # short excursion across the first refinement points so that trips land
    # on, just before and just after them; every series must be processed
    # whole (the engine raises instead of spinning if it stalls).
    settings = DetectionSettings(false_alarm_every=3000.0)
    base = np.random.default_rng(22).standard_normal(900)
    t = T0 + np.arange(900.0)
    tripped = 0
    for start in range(300, 480):
        x = base.copy()
        x[start:start + 4] += 2.8
        eng = StreamEngine("s", settings)
        recs = eng.process(t, x).records
        assert eng.samples_total == 900
        tripped += any(r.phase == "detected" for r in recs)
    assert tripped > 100


@pytest.mark.parametrize("test", ["multi_cusum", "glr"])
def test_spike_pairs_and_steps_give_the_same_records_in_any_batches(test: str) -> None:
    # Lone spikes, pairs of same-side outliers (the start of a big step or a
    # double glitch) and real steps, fed whole, sample by sample and in
    # random pieces: the records must not depend on where batches end.
    rng = np.random.default_rng(24)
    settings = DetectionSettings(test=test)
    for _ in range(12):
        n = 1500
        x = rng.standard_normal(n)
        for where in rng.choice(np.arange(250, n - 2), size=8, replace=False):
            x[where] += rng.choice([-9.0, 9.0])
            if rng.random() < 0.5:
                x[where + 1] += 9.0 * np.sign(x[where])
        x[int(rng.integers(400, 1200)):] += rng.choice([-1.5, 1.5])
        t = T0 + np.arange(float(n))
        whole = [r.to_dict() for r in StreamEngine("s", settings).process(t, x).records]
        one = StreamEngine("s", settings)
        by_one = []
        for i in range(n):
            by_one += [r.to_dict() for r in one.process(t[i:i + 1], x[i:i + 1]).records]
        assert by_one == whole
        cuts = np.sort(rng.choice(np.arange(1, n), size=30, replace=False))
        pieces = StreamEngine("s", settings)
        got = []
        for a, b in zip(np.r_[0, cuts], np.r_[cuts, n]):
            got += [r.to_dict() for r in pieces.process(t[a:b], x[a:b]).records]
        assert got == whole


def test_engines_form_no_reference_cycles() -> None:
    # The daemon exempts long-lived objects from the cyclic garbage collector
    # (gc.freeze) and relies on reference counting to free a dropped engine:
    # an engine through warm-up, watching, an event and its decision must
    # leave no cycle behind when it is dropped.
    import gc

    t = T0 + np.arange(1300.0)
    x = gaussian(1300, 10.0, 1.0, 9)
    x[800:] += 2.0
    gc.collect()
    was = gc.isenabled()
    gc.disable()
    try:
        engines = [StreamEngine(f"s{i}") for i in range(20)]
        for e in engines:
            for a in range(0, 1300, 7):
                e.process(t[a:a + 7], x[a:a + 7], t[a:a + 7])
            e.get_state()
        assert any(e.records_total["confirmed"] for e in engines)
        del engines, e
        assert gc.collect() == 0
    finally:
        if was:
            gc.enable()


def test_a_detection_settled_by_the_next_sample_says_so_in_as_of() -> None:
    # The first sample of a large step lies beyond spike_sigma: it is kept
    # only because the next one deviates the same way (a lone spike is
    # held, then dropped).  When the test trips on it, the detection was
    # complete only once that next sample came in, and the detected record's
    # as_of says so; detected_at still names the first sample of the step.
    t = T0 + np.arange(900.0)
    x = 10.0 + np.random.default_rng(12).standard_normal(900)
    x[590:600] += 2.0  # a drift inside spike_sigma charges the test...
    x[600:] += 12.0  # ...and the first sample of the jump, an outlier, trips it
    for batch in (1, 7, 900):
        eng = StreamEngine("s")
        recs, _ = run(eng, t, x, batch=batch)
        det = [r for r in recs if r.phase == "detected"]
        assert len(det) == 1
        assert det[0].detected_at == t[600]
        assert det[0].as_of == t[601]
    # A step small enough to stay inside spike_sigma trips on a sample that
    # settles itself.
    y = gaussian(900, 10.0, 1.0, 12)
    y[600:] += 2.0
    det = [r for r in run(StreamEngine("s"), t, y, batch=1)[0] if r.phase == "detected"]
    assert det and det[0].as_of == det[0].detected_at


def test_a_warm_up_spike_found_when_a_held_sample_fills_the_window_is_not_taken_for_a_stall() -> None:
    # Found by test_young_fast's random histories (2026-12-05): a constant stream with one
    # lone outlier early and an outlier pair at its end, the last sample alone in its batch.
    # That sample confirms the held one before it (both deviate the same way), which fills
    # the warm-up window; the lone outlier is then set aside and the window is one short
    # again, with the new sample not yet taken.  The state looked as before the call, and
    # the engine raised "made no progress" (the batch was lost in the daemon as an
    # internal error) though a sample had moved in and a spike out.  (Failed before.)
    settings = DetectionSettings(false_alarm_every=3600.0)
    n = settings.warmup_samples + 1
    x = np.full(n, 20.0)
    x[2] = -10.0
    x[-2:] = 5.0
    t = T0 + np.arange(float(n))
    whole = StreamEngine("s", settings).process(t, x)
    eng = StreamEngine("s", settings)
    first = eng.process(t[:-1], x[:-1])
    last = eng.process(t[-1:], x[-1:])
    # batched as in one call: the same records and the same set-asides
    assert [r.to_dict() for r in first.records + last.records] == [r.to_dict() for r in whole.records]
    assert [(r.reason, r.time) for r in first.rejected + last.rejected] == \
        [(r.reason, r.time) for r in whole.rejected]
    assert [(r.reason, r.time) for r in whole.rejected] == [("spike", float(t[2]))]
    assert eng.samples_total == n
