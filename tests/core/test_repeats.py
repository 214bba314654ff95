"""A sensor whose readings stopped changing: the stream is flagged (core/repeats.py).

Before, a sensor frozen at (or near) its level tripped no test of the level and nothing
said so: 40 of 40 iid and 40 of 40 AR(1) 0.5 streams frozen at reading 1,500 of 3,000
gave no record and no sign (tests/bench/bench_sensor_faults.py).  These tests failed on
931425f (the engine had no ``repeating`` and its results no ``repeats``).

References outside the project: the probability of a run of one rounded value under
the stream's noise from scipy.stats.norm (the bin probabilities of the rounded normal;
neighbouring pairs taken as independent for the run of a frozen stream, common
practice), the per-reading chance that a run of ``L`` or more equal readings begins,
``sum_j (1 - P_j) P_j^L`` over the bins ``j`` (Feller, An Introduction to Probability
Theory and Its Applications, Vol. I, XIII.7, from memory), and scipy.stats.poisson for
the bound on a count of rare flags.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import signal, stats

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.repeats import REPEAT_RARER, RepeatWatch
from shiftwatch.core.settings import DetectionSettings

N, F, LEVEL, SIG, RES = 3000, 1500, 500.0, 0.4, 0.01
T0 = 1764633600.0


def _noise(kind: str, rng: np.random.RandomState, n: int) -> np.ndarray:
    e = rng.standard_normal(n)
    if kind == "iid":
        return e
    # AR(1) 0.5 of unit marginal variance
    return signal.lfilter([math.sqrt(1 - 0.25)], [1.0, -0.5], e)


def _frozen(kind: str, state: int, at: str) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.RandomState(state)
    x = np.round((LEVEL + SIG * _noise(kind, rng, N)) / RES) * RES
    x[F:] = LEVEL if at == "level" else x[F - 1]
    return T0 + np.arange(N, dtype=float), x


def _feed(eng: StreamEngine, t: np.ndarray, x: np.ndarray, batch: int) -> list:
    spans = []
    for i in range(0, len(t), batch):
        spans.extend(eng.process(t[i:i + batch], x[i:i + batch]).repeats)
    return spans


@pytest.mark.parametrize("kind", ["iid", "ar05"])
@pytest.mark.parametrize("at", ["level", "last"])
def test_a_stream_frozen_at_its_level_is_flagged(kind: str, at: str) -> None:
    """40 numpy random states a case: each frozen stream is flagged within a few readings
    of the freeze, and not before it; the run flagged is improbable under the noise
    before it (scipy.stats.norm: neighbouring readings' difference normal with the
    readings' own sd times sqrt(2), P(|d| < RES / 2) to the power of the repeats,
    common practice)."""
    flagged = 0
    for state in range(1000, 1040):
        t, x = _frozen(kind, state, at)
        eng = StreamEngine("brackenfield/line3/filler/head5/fill", unit="g")
        spans = _feed(eng, t, x, 50)
        starts = [s for s in spans if s.until is None]
        assert all(s.since >= t[F - 1] for s in starts), (state, starts)
        now = eng.repeating
        assert now is not None, (kind, at, state)
        # the run begins at the freeze (or, where the readings just before it held the
        # same value by chance, a reading or two earlier)
        i = round(now.since - T0)
        assert F - 5 <= i <= F and np.all(x[i:] == now.value) and x[i - 1] != now.value, (state, now)
        assert now.flagged_at - t[F] <= 10.0, (state, now)
        assert now.value == x[-1] and now.until is None
        before = x[F - 200:F]
        s = float(np.std(before, ddof=1)) * math.sqrt(2)
        p1 = float(stats.norm.cdf(RES / 2, scale=s) - stats.norm.cdf(-RES / 2, scale=s))
        reps = round(now.flagged_at - now.since)
        assert reps * math.log10(p1) < -6.0, (state, reps, p1)
        flagged += 1
    assert flagged == 40


@pytest.mark.parametrize("res", [0.25, 0.5, 1.0])
def test_a_quantised_stream_is_flagged_no_more_often_than_its_noise_allows(res: float) -> None:
    """Readings of 0.4 noise rounded to a coarse resolution repeat often (a third to
    two thirds of neighbours).  20 random states of 20,000 readings at 1 s with
    ``false_alarm_every`` 600 s (so that false flags are frequent enough to count):
    the flags are within what the noise gives, the per-reading chance that a run of
    the flagged length begins, ``sum_j (1 - P_j) P_j^L`` from the rounded normal's bin
    probabilities (scipy.stats.norm), times the readings (scipy.stats.poisson, 0.999);
    and within the promise, a flag in ``REPEAT_RARER`` times ``false_alarm_every``
    (common practice for a false-alarm budget).  With the repeat share alone, at 0.5
    the runs flagged were 1.8 readings shorter and the flags 224 against the promise's 67."""
    every, n, states = 600.0, 20_000, 20
    flags = 0
    limits = []
    for state in range(5000, 5000 + states):
        rng = np.random.RandomState(state)
        x = np.round(SIG * rng.standard_normal(n) / res) * res
        t = np.arange(n, dtype=float)
        w = RepeatWatch()
        for i in range(0, n, 100):
            out = w.feed(t[i:i + 100], x[i:i + 100], every)
            flags += sum(s.until is None for s in out or ())
        w.count, w.limit = 2, 0  # the limit a run would have now
        limits.append(w._limit(every))
    edges = (np.arange(-12, 13) + 0.5) * res
    p = np.diff(stats.norm.cdf(edges, scale=SIG))
    expected = sum(float(np.sum((1 - p) * p ** lim)) * n for lim in limits)
    promised = n * states / (REPEAT_RARER * every)
    assert flags <= stats.poisson.ppf(0.999, expected), (res, flags, expected)
    assert flags <= stats.poisson.ppf(0.999, promised), (res, flags, promised)


@pytest.mark.parametrize("kind", ["iid", "ar05"])
def test_a_sound_stream_at_a_fine_resolution_is_never_flagged(kind: str) -> None:
    """40 states of 3,000 sound readings (0.01 on 0.4, the default false_alarm_every of a
    week): no flag.  By the reference (scipy.stats.norm, pairs independent) the chance of
    the shortest run flagged here (5 readings) beginning at a reading is about 1e-9."""
    s = SIG * math.sqrt(2 if kind == "iid" else 1)
    p1 = float(stats.norm.cdf(RES / 2, scale=s) - stats.norm.cdf(-RES / 2, scale=s))
    assert p1 ** 4 < 1e-8
    for state in range(1000, 1040):
        rng = np.random.RandomState(state)
        x = np.round((LEVEL + SIG * _noise(kind, rng, N)) / RES) * RES
        eng = StreamEngine("s")
        assert _feed(eng, T0 + np.arange(N, dtype=float), x, 50) == []
        assert eng.repeating is None


def test_the_flag_ends_when_the_readings_vary_again_and_does_not_depend_on_batches() -> None:
    """The same runs flagged at the same readings, and the same state, however the
    readings are batched (the engine's design rule: decisions on readings, never on batch
    boundaries); fed one reading at a time as the reference."""
    rng = np.random.RandomState(77)
    bad = 0
    for case in range(60):
        n = 3000
        res = float(rng.choice([0.01, 0.1, 0.5, 1.0]))
        x = np.round((500 + SIG * rng.standard_normal(n)) / res) * res
        for _ in range(rng.randint(1, 4)):
            a = rng.randint(0, n)
            x[a:a + rng.randint(1, 300)] = x[a]
        t = np.cumsum(rng.uniform(0.5, 1.5, n))
        every = float(rng.choice([3600.0, 86400.0]))

        def run(sizes: list[int], t: np.ndarray = t, x: np.ndarray = x, every: float = every) -> tuple:
            w = RepeatWatch()
            out, i, k = [], 0, 0
            while i < len(x):
                m = sizes[k % len(sizes)]
                out += w.feed(t[i:i + m], x[i:i + m], every) or []
                i, k = i + m, k + 1
            return out, w.get_state()

        ref = run([1])
        for sizes in ([n], [7], [50], [1, 9, 200], [int(v) for v in rng.randint(1, 100, 20)]):
            bad += run(sizes) != ref
        ends = [s for s in ref[0] if s.until is not None]
        assert all(s.until >= s.flagged_at >= s.since for s in ends)
    assert bad == 0


def test_the_flag_and_the_history_survive_a_snapshot() -> None:
    t, x = _frozen("iid", 1003, "level")
    eng = StreamEngine("s")
    _feed(eng, t[:2000], x[:2000], 50)
    assert eng.repeating is not None
    again = StreamEngine("s")
    again.set_state(json.loads(json.dumps(eng.get_state())))
    assert again.repeating == eng.repeating
    y = x[2000:].copy()
    y[10:] = np.round((LEVEL + SIG * np.random.RandomState(5).standard_normal(990)) / RES) * RES
    a = eng.process(t[2000:], y)
    b = again.process(t[2000:], y)
    assert a.repeats == b.repeats and a.repeats[-1].until == t[2009]
    assert eng.repeating is None and again.repeating is None
    bad = eng.get_state()
    bad["repeats"] = [1.0, 2]
    with pytest.raises(ValueError, match="repeats"):
        StreamEngine("s").set_state(bad)


def test_the_flag_follows_the_plants_false_alarm_every() -> None:
    """A tighter false_alarm_every asks for fewer repeated readings (a week at 1 s: 5
    readings on 0.01 of 0.4 noise; an hour: 4)."""
    spans = {}
    for every in (7 * 86400.0, 3600.0):
        t, x = _frozen("iid", 1001, "level")
        eng = StreamEngine("s", DetectionSettings(false_alarm_every=every))
        _feed(eng, t, x, 50)
        spans[every] = eng.repeating
    assert spans[3600.0].flagged_at <= spans[7 * 86400.0].flagged_at
