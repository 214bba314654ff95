"""Screening of float batches that carry arrival times (the daemon's batches).

The daemon hands every engine call the samples' arrival times, and the default
settings limit how far a time may lie ahead of its arrival, so every live batch
used to take screen_samples' full path (validity masks, per-check arrays).  A
float batch is now checked on its arrays as they are, the arrival limits on the
lags' smallest and largest.  These tests hold that path to the full one
(``screen.ARRIVAL_FAST = False``) and to the per-value path an object batch
takes: the same kept samples and the same rejections, bit for bit.
"""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest

from shiftwatch.core import screen
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.screen import screen_samples
from shiftwatch.core.settings import DetectionSettings

T0 = 1_788_000_000.0


def _screen_both(t: np.ndarray, x: np.ndarray, last: float, arrived: object, ahead: float | None,
                 behind: float | None) -> tuple[screen.Screened, screen.Screened]:
    fast = screen_samples(t, x, last, arrived=arrived, max_ahead=ahead, max_behind=behind)
    screen.ARRIVAL_FAST = False
    try:
        full = screen_samples(t, x, last, arrived=arrived, max_ahead=ahead, max_behind=behind)
    finally:
        screen.ARRIVAL_FAST = True
    return fast, full


def _same(a: screen.Screened, b: screen.Screened) -> None:
    assert a.rejected == b.rejected
    assert np.asarray(a.kept).tolist() == np.asarray(b.kept).tolist()
    assert np.asarray(a.times, dtype=np.float64).tobytes() == np.asarray(b.times, dtype=np.float64).tobytes()
    assert np.asarray(a.values, dtype=np.float64).tobytes() == np.asarray(b.values, dtype=np.float64).tobytes()


def test_float_batches_with_arrivals_screen_as_the_full_path_does() -> None:
    # Batches of 9 to 400 samples (past the plain-float check of SMALL_BATCH), with NaN,
    # infinities, values past 1e150, repeated and earlier times, and arrivals that put some
    # samples beyond either limit; the arrival given as one float, as one per sample, as an
    # integer and as an array of the wrong length (which the full path refuses).
    rng = np.random.default_rng(61)
    specials = [np.nan, np.inf, -np.inf, 1e200, -1e200, 1e150, -np.nextafter(1e150, np.inf)]
    taken = 0
    for _ in range(3000):
        n = int(rng.integers(9, 400))
        x = 50.0 + rng.standard_normal(n)
        t = T0 + np.cumsum(np.ones(n))
        if rng.random() < 0.3:
            for at in rng.integers(0, n, size=int(rng.integers(1, 4))):
                x[at] = specials[int(rng.integers(0, len(specials)))]
        if rng.random() < 0.2:
            t = T0 + np.cumsum(rng.choice([1.0, 1.0, 1.0, 0.0, -2.0], size=n))
        if rng.random() < 0.05:
            t[int(rng.integers(0, n))] = float(rng.choice([np.nan, np.inf, -np.inf]))
        last = float(rng.choice([-np.inf, T0 - 1.0, T0 + 3.0]))
        ahead = float(rng.choice([600.0, 5.0])) if rng.random() < 0.8 else None
        behind = float(rng.choice([600.0, 5.0])) if rng.random() < 0.5 else None
        kind = int(rng.integers(0, 5))
        arrived: object
        if kind == 0:
            arrived = float(t[-1]) + float(rng.choice([0.5, 700.0, -700.0]))
        elif kind == 1:
            arrived = t + rng.choice([0.1, 700.0, -700.0], size=n, p=[0.9, 0.05, 0.05])
        elif kind == 2:
            arrived = np.full(n, float(t[-1]) + float(rng.choice([0.5, 10.0, -10.0])))
        elif kind == 3:
            arrived = int(T0) + n
        else:
            arrived = np.full(n + 1, float(t[-1]))
        if kind == 4 and (ahead is not None or behind is not None):
            with pytest.raises(ValueError, match="differ in length"):
                screen_samples(t, x, last, arrived=arrived, max_ahead=ahead, max_behind=behind)
            continue
        fast, full = _screen_both(t, x, last, arrived, ahead, behind)
        _same(fast, full)
        obj = screen_samples(t.astype(object), x.astype(object), last, arrived=arrived, max_ahead=ahead,
                             max_behind=behind)
        _same(fast, obj)
        taken += not fast.rejected
    assert taken > 300  # a clean batch takes the fast path: it was compared hundreds of times


@pytest.mark.parametrize("settings", [DetectionSettings(), DetectionSettings(max_time_behind=30.0),
                                      DetectionSettings(test="cusum")])
def test_an_engine_fed_with_arrivals_gives_the_same_records(settings: DetectionSettings) -> None:
    # Streams with steps, spikes and late or early stamps, fed in batches of 1 to 299 samples
    # with each batch's arrival time (as the daemon feeds them): the same records,
    # rejections and saved state after every batch with the fast screen and without it.
    rng = np.random.default_rng(62)
    for seed in range(6):
        n = int(rng.integers(2500, 5000))
        t = T0 + np.arange(float(n))
        x = 20.0 + 0.5 * rng.standard_normal(n)
        for at in rng.integers(300, n, size=3):
            x[at:] += float(rng.choice([-1.5, 1.0, 2.0]))
        x[rng.integers(0, n, size=8)] += 6.0
        arrival = t + 0.2
        arrival[rng.integers(0, n, size=10)] -= 900.0  # stamped 15 minutes ahead of arrival
        arrival[rng.integers(0, n, size=10)] += 60.0  # late by a minute
        cuts = [0]
        while cuts[-1] < n:
            cuts.append(min(n, cuts[-1] + int(rng.integers(1, 300))))
        out = []
        for fast in (True, False):
            screen.ARRIVAL_FAST = fast
            try:
                eng = StreamEngine(f"s{seed}", settings)
                got = []
                for a, b in itertools.pairwise(cuts):
                    res = eng.process(t[a:b], x[a:b], arrival[a:b])
                    got.append(([r.to_dict() for r in res.records], [tuple(r) for r in res.rejected],
                                json.dumps(eng.get_state(), sort_keys=True)))
                out.append(got)
            finally:
                screen.ARRIVAL_FAST = True
        assert out[0] == out[1]
        assert any(rej for _, rej, _ in out[0])  # some samples were set aside
