"""Which readings the engine sets aside as lone spikes (README "Lone spikes").

A sample beyond ``spike_sigma`` is held one sample and set aside only when the
next one does not deviate the same way.  An outside measurement (2026-12-05)
found the first sample of real steps set aside (the next sample had to lie
beyond the band too: 87 of 600 4-sigma steps, whose shift time then came one
sample late with an interval that missed it), and ordinary readings set aside
where the band rested on a spread or level estimated from a few samples.
"""

from __future__ import annotations

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0
HOURLY = DetectionSettings(false_alarm_every=3600.0, min_shift_sigma=1.0)


def _feed(x: np.ndarray, settings: DetectionSettings = HOURLY, batch: int = 4096) -> tuple[list, list[int]]:
    eng = StreamEngine("brackenfield/kiln2/draft", settings)
    t = T0 + np.arange(float(x.shape[0]))
    recs, spikes = [], []
    for a in range(0, x.shape[0], batch):
        r = eng.process(t[a:a + batch], x[a:a + batch])
        recs += r.records
        spikes += [round(q.time - T0) for q in r.rejected if q.reason == "spike"]
    return recs, spikes


@pytest.mark.parametrize("at", [50, 600])  # in the first warm-up, and on an established level
@pytest.mark.parametrize("batch", [1, 7, 4096])
def test_the_first_sample_of_a_step_is_kept_when_the_next_deviates_the_same_way(at: int, batch: int) -> None:
    # The outside tester's reproduction (r2_4sigma_step_at50), rebuilt: a 4-sigma step
    # down whose first sample lies 5.5 sigma below the level and the next 3.3 below.
    # Before the fix the first was set aside as a spike (the next was not beyond
    # spike_sigma too), and shift_at came one sample late with a zero-width interval.
    rng = np.random.default_rng(13)
    x = 50.0 + 2.0 * rng.standard_normal(at + 150)
    x[at:] -= 8.0
    x[at] = 50.0 - 5.5 * 2.0
    x[at + 1] = 50.0 - 3.3 * 2.0
    recs, spikes = _feed(x, batch=batch)
    assert at not in spikes and at + 1 not in spikes
    conf = [r for r in recs if r.phase == "confirmed"]
    assert len(conf) == 1
    assert conf[0].shift_at == T0 + at
    assert conf[0].shift_at_low <= T0 + at <= conf[0].shift_at_high


def test_a_lone_spike_is_still_set_aside_when_the_next_sample_is_ordinary() -> None:
    rng = np.random.default_rng(14)
    x = 50.0 + 2.0 * rng.standard_normal(900)
    x[[40, 300, 700]] += np.array([-14.0, 16.0, -30.0])
    x[[41, 301, 701]] = 50.0 + np.array([-2.0, 2.5, -3.0])  # the same way, within half the spike's deviation
    recs, spikes = _feed(x, batch=1)
    assert spikes == [40, 300, 700]
    assert not recs


def test_first_samples_of_4_sigma_steps_are_kept() -> None:
    # 300 streams, a 4-sigma step at sample 400 (established level).  The rule: the
    # first sample of the step, beyond spike_sigma, is kept whenever the next deviates
    # the same way by half as much.  With true sigma 1 (scipy.stats.norm: P(N(4,1) > 5)
    # = 0.159, P(N(4,1) < 2.5) = 0.067) about 0.159 * 0.067 * 300 = 3 streams may still
    # lose it; before the fix about 0.159 * 0.841 * 300 = 40 did (87 of 600 measured).
    rng = np.random.default_rng(15)
    lost = beyond = exact = near = 0
    for _ in range(300):
        x = 10.0 + rng.standard_normal(520)
        x[400:] += 4.0
        recs, spikes = _feed(x)
        beyond += x[400] - 10.0 > 5.0
        lost += 400 in spikes
        conf = [r for r in recs if r.phase in ("confirmed", "returned") and r.shift_at >= T0 + 390]
        exact += bool(conf) and conf[0].shift_at == T0 + 400
        near += bool(conf) and abs(conf[0].shift_at - (T0 + 400)) <= 1
    print(f"first sample beyond the band {beyond}, set aside {lost}; shift_at exact {exact}, within 1 {near}")
    assert beyond >= 30
    assert lost <= 8
    # The least-squares split of a 4-sigma step is almost always the step itself (the
    # outside tester's ruptures Binseg: 98-100% within +-2 samples; the least-squares
    # split of these 300 series on 200 samples before and 120 after hits it exactly in
    # 289).  The engine's split rests on the few samples up to its decision.
    assert exact >= 265 and near >= 290


def test_ordinary_readings_are_set_aside_no_more_often_than_a_normal_tail() -> None:
    # 100 iid streams of 10,000 samples at 1h (the outside tester's "no step" set, rebuilt
    # with its generator): the engine set 116 samples aside as spikes, all within 4.75
    # sigma of the true level, nearly all while an event of the first warm-up was open
    # (its band centred on the level fitted after the detection, with a sigma from two
    # dozen samples) and in the warm-up (a spread from 5 to 20 samples).  A band of
    # spike_sigma true sigmas sets aside 2 * norm.sf(5) of the samples (scipy.stats.norm:
    # 5.7e-7, 0.57 of a million); with a few estimated levels and spreads, a handful.
    from scipy import stats

    rng = np.random.default_rng(sum(map(ord, "iid")) * 7919)
    total = lost = 0
    far = []
    for _ in range(100):
        z = rng.standard_normal(10_000)
        _, spikes = _feed(100.0 + z)
        total += z.shape[0]
        lost += len(spikes)
        far += [abs(float(z[i])) for i in spikes]
    expected = 2.0 * stats.norm.sf(HOURLY.spike_sigma) * total
    print(f"set aside {lost} of {total} (normal tail {expected:.2f}), |z| {sorted(far)[:20]}")
    assert lost <= stats.poisson.ppf(0.999, expected) + 3


def test_an_open_event_keeps_the_samples_its_after_level_rests_on_in_its_snapshot() -> None:
    # The open event's band allows for the error of the level fitted after the detection
    # (n_after samples); a snapshot carries the count, an older snapshot without it loads
    # with the widest band (1), and a bad count is named.
    rng = np.random.default_rng(16)
    x = 10.0 + rng.standard_normal(700)
    x[600:] += 3.0
    eng = StreamEngine("brackenfield/kiln2/draft", HOURLY)
    t = T0 + np.arange(700.0)
    for i in range(700):
        eng.process(t[i:i + 1], x[i:i + 1])
        if eng.state == "event_open":
            break
    state = eng.get_state()
    assert state["event"]["n_after"] >= 1
    old = {**state, "event": {k: v for k, v in state["event"].items() if k != "n_after"}}
    again = StreamEngine("brackenfield/kiln2/draft", HOURLY)
    again.set_state(old)
    assert again.get_state()["event"]["n_after"] == 1
    bad = {**state, "event": {**state["event"], "n_after": 0}}
    with pytest.raises(ValueError, match="n_after"):
        StreamEngine("brackenfield/kiln2/draft", HOURLY).set_state(bad)
