"""Two sensor faults are not reported as steps of the level.

Measured from outside on 2026-12-05 (a script replaying generated streams, 40 random
states each, iid and AR(1) 0.5 noise, the fault at sample 1,500 of 3,000 at 1 Hz; the
same records through ``shiftwatch replay``):

- a sensor stuck at a fallback value (0 g on a fill weight of 500 g): 80 of 80 events
  ``confirmed ... stepped down 500 g (1.2e+03 sigma)``: the operator goes looking for
  a nozzle when the sensor failed, and the size in sigmas measures noise that is gone;
- a sensor stuck at its last good value: where that value was away from the level,
  35 of 80 streams ``confirmed ... (2.5 sigma)``, 5 ``undecided`` after 1,000 samples;
- the noise's spread growing threefold with no change of level (a loose sensor, a
  worn bearing): on 40 iid streams 1,263 detections, 265 ``confirmed`` and 169
  ``returned`` "steps"; twofold, 35 and 19.

Now a record whose last readings (nearly) all repeat one value says so
(``repeated_value``, ``repeated_count`` of the last ``repeated_of``) and its summary
says a stuck sensor is possible, with no size in sigmas; an event whose samples show
the spread grew ends ``undecided`` naming it (``spread_ratio``, ``sigma_after``), and
the stream watches on at the new spread.

References, outside the project: that each fault is real, by scipy.stats.levene
(Brown-Forsythe, centre at the median) and scipy.stats.bartlett for the spread, and
for a stuck run its probability under the noise measured before it (two neighbouring
readings of a normal noise rounded to 0.01 are equal with probability
P(|d| < 0.005), d ~ N(0, 2 s^2), scipy.stats.norm; a run of L such repeats about that
to the power L - 1, treating neighbouring pairs as independent: common practice).
The folded-normal correlation the spread test allows for is held to a numerical
integral of scipy.stats.multivariate_normal's density (scipy.integrate.dblquad).
Demo data at the Brackenfield plant, an invented site.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.signal import lfilter

from shiftwatch.core.engine import StreamEngine
from shiftwatch.display import alert_summary

T0 = 1_772_409_600.0
N, F, LEVEL, SIG = 3000, 1500, 500.0, 0.4
STREAM = "brackenfield/line3/filler/head4/fill"


def noise(kind: str, rng: np.random.Generator, n: int = N) -> np.ndarray:
    e = rng.standard_normal(n)
    if kind == "iid":
        return SIG * e
    phi = 0.5
    x, _ = lfilter([math.sqrt(1 - phi * phi)], [1.0, -phi], e, zi=[rng.standard_normal() * phi])
    return SIG * x


def feed(x: np.ndarray, batch: int = 50) -> tuple[list, StreamEngine]:
    t = T0 + np.arange(float(x.shape[0]))
    eng = StreamEngine(STREAM, unit="g")
    recs = []
    for i in range(0, x.shape[0], batch):
        recs += eng.process(t[i:i + batch], x[i:i + batch]).records
    return recs, eng


def run_probability(before: np.ndarray, run: int) -> float:
    """log10 of the probability of ``run`` identical readings under the noise of ``before``
    (readings rounded to 0.01): scipy.stats.norm, neighbouring pairs taken as independent."""
    s = float(np.std(before, ddof=1))
    p1 = stats.norm.cdf(0.005, scale=s * math.sqrt(2)) - stats.norm.cdf(-0.005, scale=s * math.sqrt(2))
    return (run - 1) * math.log10(p1)


@pytest.mark.parametrize("kind", ["iid", "ar05"])
@pytest.mark.parametrize("state", range(4))
def test_a_sensor_stuck_at_a_fallback_value_is_named_and_not_sized_in_sigmas(kind: str, state: int) -> None:
    # (Failed before: "CONFIRMED ... stepped down 500 g (1.2e+03 sigma)", no field said the
    # readings repeat one value.)
    rng = np.random.default_rng(100 + state)
    x = np.round(LEVEL + noise(kind, rng), 2)
    x[F:] = 0.0
    assert run_probability(x[F - 400:F], N - F) < -100  # the frozen run is no noise
    recs, _ = feed(x)
    after = [r for r in recs if r.as_of >= T0 + F]
    assert [r.phase for r in after] == ["detected", "confirmed"]
    for r in after:
        d = r.to_dict()
        frozen = int(r.as_of - (T0 + F)) + 1
        if r.phase == "detected" and "repeated_value" not in d:
            # Two or three readings of 0 are not yet improbable at this resolution (REPEAT_P
            # against the stream's own repeats): the detection came too soon to tell.
            assert frozen <= 3, frozen
            continue
        assert d["repeated_value"] == 0.0
        assert 3 <= d["repeated_count"] <= d["repeated_of"] <= r.n_after
        assert d["repeated_count"] >= 0.9 * d["repeated_of"]
        text = alert_summary(r, "fill weight on filler head4")
        assert "a stuck sensor is possible" in text, text
        assert "sigma" not in text, text
        assert f"{d['repeated_count']} of the last {d['repeated_of']} readings are one value, 0 g" in text


@pytest.mark.parametrize("kind", ["iid", "ar05"])
def test_a_sensor_stuck_at_its_last_value_says_so_in_every_record_after_the_freeze(kind: str) -> None:
    # (Failed before: 35 of 80 such streams confirmed a "step" of 2 to 3 sigma.)
    named = 0
    for state in range(12):
        rng = np.random.default_rng(200 + state)
        x = np.round(LEVEL + noise(kind, rng), 2)
        x[F:] = x[F - 1]
        assert run_probability(x[F - 400:F], N - F) < -100
        recs, _ = feed(x)
        # Records made once the frozen run is long enough to tell (REPEAT_P against the
        # stream's own repeats: a handful of readings at this resolution).
        late = [r for r in recs if r.as_of >= T0 + F + 10]
        for r in late:
            assert r.repeated_value == x[F - 1], (state, r.phase, alert_summary(r))
            assert "sigma" not in alert_summary(r)
            named += 1
    assert named >= 4  # the frozen value was far enough from the level to trip the test


@pytest.mark.parametrize("kind", ["iid", "ar05"])
@pytest.mark.parametrize("ratio", [2.0, 3.0])
def test_a_spread_change_is_not_confirmed_as_a_step(kind: str, ratio: float) -> None:
    # (Failed before: of these 10 streams, 2 to 4 confirmed or returned "steps", and the
    # threefold ones were detected 15 to 40 times each.)
    confirmed = 0
    for state in range(5):
        rng = np.random.default_rng(300 + state)
        base = noise(kind, rng)
        x = LEVEL + base
        x[F:] = LEVEL + ratio * base[F:]
        x = np.round(x, 2)
        a, b = x[F - 300:F], x[F:F + 300]
        assert stats.levene(a, b, center="median").pvalue < 1e-6
        assert stats.bartlett(a, b).pvalue < 1e-6
        recs, eng = feed(x)
        after = [r for r in recs if r.as_of >= T0 + F]
        phases = [r.phase for r in after]
        # A "step" decided on the first few samples after the detection, before their
        # spread could be told (threefold iid noise wanders like a 4-sigma step over a
        # dozen samples), is still confirmed now and then: 2 of 80 streams on 2026-12-05.
        confirmed += "confirmed" in phases or "returned" in phases
        named = [r for r in after if r.spread_ratio is not None]
        assert named and named[0].phase == "undecided", (state, phases)
        # The ratio the record names is near the readings' own over 300 samples either side
        # (numpy's standard deviations): it rests on the 50 or so after the detection (0.63
        # to 1.29 of it in 79 streams of 2026-12-05).
        own = float(np.std(b) / np.std(a))
        assert 0.55 * own <= named[0].spread_ratio <= 1.6 * own, (named[0].spread_ratio, own)
        d = named[0].to_dict()
        assert d["sigma_after"] == pytest.approx(named[0].sigma_after, rel=1e-5)
        text = alert_summary(named[0])
        assert "the noise's spread grew" in text and "no clear step in level" in text, text
        # The stream watches on at the new spread: not detected again and again.
        assert phases.count("detected") <= 3, (state, phases)
        assert eng.sigma is not None and eng.sigma > 1.5 * SIG
    assert confirmed <= 1


@pytest.mark.parametrize("kind", ["iid", "ar05", "quantised"])
def test_real_steps_carry_no_fault_fields(kind: str) -> None:
    # A guard for the two checks: steps of 1 to 3 sigma are confirmed as before, with
    # neither a repeated value (quantised readings repeat often, and their own repeat
    # rate is what a run is held to) nor a spread change.
    for state in range(8):
        rng = np.random.default_rng(400 + state)
        size = (1.0, 1.5, 2.0, 3.0)[state % 4] * (1 if state % 2 else -1)
        e = noise("iid" if kind == "quantised" else kind, rng)
        x = LEVEL + e
        x[F:] += size * SIG
        x = np.round(x / (0.5 * SIG)) * (0.5 * SIG) if kind == "quantised" else np.round(x, 2)
        recs, _ = feed(x)
        ends = [r for r in recs if r.phase in ("confirmed", "returned") and r.as_of >= T0 + F]
        assert ends, (state, [r.phase for r in recs])
        for r in recs:
            assert r.repeated_value is None and r.spread_ratio is None, (state, alert_summary(r))
            assert "repeated_value" not in r.to_dict() and "spread_ratio" not in r.to_dict()


def test_the_moving_ranges_correlation_is_the_folded_normals() -> None:
    # abs_corr against a numerical integral of the bivariate normal density (scipy).
    from shiftwatch.core import sensorcheck

    for rho in (-0.5, -0.25, 0.3):
        pdf = stats.multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).pdf
        e_xy, _ = integrate.dblquad(lambda y, x, pdf=pdf: abs(x) * abs(y) * pdf([x, y]), -8, 8, -8, 8)
        want = (e_xy - 2 / math.pi) / (1 - 2 / math.pi)
        assert sensorcheck.abs_corr(rho) == pytest.approx(want, abs=1e-4)


def test_spread_change_agrees_with_levene_on_independent_samples() -> None:
    # Where Brown-Forsythe's test (scipy.stats.levene, centre at the median) finds a
    # spread two or three times wider beyond doubt, so does spread_change; on samples
    # of one spread it finds none where levene finds none either.
    from shiftwatch.core import sensorcheck

    rng = np.random.default_rng(9)
    agree = twofold = 0
    for i in range(200):
        k = (1.0, 2.0, 3.0)[i % 3]
        after = k * rng.standard_normal(60)
        ref = rng.standard_normal(400)
        s = sensorcheck.spread_change(after, float(np.std(ref, ddof=1)), 0.0, 400, 1e-4)
        p = stats.levene(ref, after, center="median").pvalue
        if k == 1.0:
            assert s is None, (i, p)
        elif k == 3.0 and p < 1e-8:
            assert s is not None, (i, p)
        elif p < 1e-8:
            # Twofold: the capped moving ranges' ratio (SPREAD_RATIO, 1.5) is asked as well
            # as the significance levene alone measures.
            agree += s is not None
            twofold += 1
    assert agree >= 0.8 * twofold


@pytest.mark.parametrize("quantum", [2.0 * SIG, SIG])
def test_quantised_noise_alone_rarely_reads_as_a_stuck_sensor(quantum: float) -> None:
    # Readings quantised at one or two sigmas, the level on a quantum: no fault at all.
    # A look names a stuck sensor when the run it sees has less than REPEAT_P of chance;
    # on noise alone that should happen at about that rate.  The chance that a reading
    # holds the level's own value is 2 Phi(q / 2 sigma) - 1 (scipy.stats.norm: 0.68 at
    # q = 2 sigma), above the share of neighbouring pairs that repeat (the sum of the
    # values' squared shares, 0.52), which the run used to be held to; and a run of all
    # but one in ten is likelier than the same number in a row (binomial tail, common
    # practice).  (Failed before: 3% of looks at q = 2 sigma, 0.1% at q = sigma.)
    from shiftwatch.core import sensorcheck

    shares = stats.norm.cdf(np.arange(-6, 7) * quantum + quantum / 2, scale=SIG) \
        - stats.norm.cdf(np.arange(-6, 7) * quantum - quantum / 2, scale=SIG)
    rng = np.random.default_rng(17)
    x = np.round((LEVEL + SIG * rng.standard_normal(30_300)) / quantum) * quantum
    _, counts = np.unique(x, return_counts=True)
    assert counts.max() / x.shape[0] == pytest.approx(shares.max(), abs=0.01)
    assert float(np.sum(shares ** 2)) < shares.max()
    looks = flags = 0
    for t in range(300, x.shape[0], 1):
        looks += 1
        flags += sensorcheck.repeated_value(x[t - 300:t]) is not None
    assert flags <= 3 * sensorcheck.REPEAT_P * looks, (flags, looks)


def test_after_a_spread_change_the_sigma_comes_to_the_new_spread() -> None:
    # A threefold spread change: the event ends undecided and the stream watches on at a
    # sigma measured on the 60 or so samples after the detection (0.7 to 1.2 of the new
    # spread).  That sigma must give way to the readings that follow, as any baseline's
    # does: 6,000 samples later the engine's sigma is the readings' own (numpy's standard
    # deviation of the samples at the new spread) within 5% (a Huber scale on 6,000
    # normal samples is within about 2%: common practice).  (Failed before: the new sigma
    # kept the old baseline's weight of 6,216 samples and was still 0.88 to 0.96 of the
    # spread 6,000 samples on, 2.64 to 2.88 old sigmas for 3.)
    n, at = 9000, 3000
    for state in range(6):
        rng = np.random.default_rng(300 + state)
        e = rng.standard_normal(n)
        e[at:] *= 3.0
        x = np.round(LEVEL + SIG * e, 2)
        recs, eng = feed(x)
        named = [r for r in recs if r.spread_ratio is not None]
        assert named and named[0].phase == "undecided", (state, [r.phase for r in recs])
        own = float(np.std(x[at:], ddof=1))
        assert eng.sigma == pytest.approx(own, rel=0.05), (state, eng.sigma / SIG, own / SIG)


def test_a_step_confirmed_with_a_spread_change_watches_on_at_the_new_spread() -> None:
    # A real 2-sigma step and the noise's spread doubling at once: where the step stands
    # at the new spread, the event ends confirmed and its record names the spread
    # (spread_ratio, sigma_after).  The stream must then watch on at that spread, as
    # after an undecided spread change (README, A sensor fault, not a step): not detect
    # the wider noise again.  That the spread grew is checked by scipy.stats.levene
    # (Brown-Forsythe) on the 300 readings either side.  (Failed before: in each such
    # stream the engine kept the old sigma, the wider noise was detected again and an
    # event ended undecided naming the same spread change a second time.)
    named = 0
    for state in range(30):
        rng = np.random.default_rng(600 + state)
        e = rng.standard_normal(N)
        e[F:] *= 2.0
        x = np.round(LEVEL + SIG * e, 2)
        x[F:] += 2.0 * SIG
        assert stats.levene(x[F - 300:F], x[F:F + 300], center="median").pvalue < 1e-6
        recs, _ = feed(x)
        after = [r for r in recs if r.as_of >= T0 + F - 5]
        first = next((r for r in after if r.phase == "confirmed"), None)
        if first is None or first.spread_ratio is None:
            continue
        named += 1
        later = [r for r in after if r.as_of > first.as_of]
        assert not [r for r in later if r.spread_ratio is not None], (state, [r.phase for r in later])
        assert [r.phase for r in later].count("detected") <= 1, (state, [r.phase for r in later])
    assert named >= 3
