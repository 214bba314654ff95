"""A sample beyond the spike band is a lone spike only when neither neighbour follows it.

Before, only the sample after an outlier could show that it was the start of a
step (beyond the band, or beyond ``SPIKE_CONFIRM_SHARE`` of the outlier's own
deviation, the same way); the sample before counted only when it lay beyond the
band itself.  So a 5-sigma step whose first sample lay at 4.86 sigma (inside the
band), its second at 5.73 and its third at 2.84 (just under half of 5.73) lost
its second sample as a "spike" (a status-page test's data).  Now the sample
before counts by the same rule as the sample after (``engine.backed_by_prev``).

References: that a lone outlier is one whose neighbours do not follow it, and
that the samples of a level shift do, is common practice in screening sensor
data (an isolated outlier against a level shift, the two kinds of Fox 1972,
"Outliers in time series", J. R. Statist. Soc. B 34:350-363, from memory).
The rule's own figures (5 sigma, a half) are the project's settings.  The fast
paths are held bit for bit to the reference paths they stand in for.
"""

from __future__ import annotations

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .batches import run_in_batches, split_spikes_with, steps_of

T0 = 1_788_000_000.0


def _stream(n0: int, devs: list[float], seed: int = 1, tail: int = 40) -> tuple[np.ndarray, np.ndarray]:
    """iid noise of sigma 1 around 100; from sample ``n0`` the samples ``devs`` (in sigmas
    above 100), then the noise 5 sigma up."""
    rng = np.random.default_rng(seed)
    x = 100.0 + rng.standard_normal(n0 + len(devs) + tail)
    x[n0:n0 + len(devs)] = 100.0 + np.array(devs)
    x[n0 + len(devs):] += 5.0
    return T0 + np.arange(float(x.shape[0])), x


def _spikes(t: np.ndarray, x: np.ndarray, batch: int | None) -> list[int]:
    eng = StreamEngine("brackenfield/press3/load")
    out: list[int] = []
    step = batch or t.shape[0]
    for a in range(0, t.shape[0], step):
        res = eng.process(t[a:a + step], x[a:a + step])
        out += [int(r.time - T0) for r in res.rejected if r.reason == "spike"]
    return out


@pytest.mark.parametrize("n0", [60, 150, 1000])  # first warm-up (young level twice), settled baseline
def test_a_steps_second_sample_is_kept_when_its_first_deviated_the_same_way(n0: int) -> None:
    # Before: sample n0 + 1 (6.5 sigma, its successor at 2.5, under half of it) was set
    # aside as a spike although its predecessor lay at 4.0, beyond half of it (failed at
    # every n0 and batching).
    t, x = _stream(n0, [4.0, 6.5, 2.5])
    for batch in (None, 1, 7, n0 + 1):  # a cut just before the outlier too
        assert n0 + 1 not in _spikes(t, x, batch), (n0, batch)


@pytest.mark.parametrize("n0", [60, 150, 1000])
def test_lone_spikes_are_still_set_aside(n0: int) -> None:
    # A 9-sigma spike between ordinary samples, and one after a sample beyond half of
    # it the other way, are lone spikes.
    for devs in ([0.3, 9.0, -0.2], [-4.8, 9.0, 0.1], [2.0, -9.0, 0.4]):
        rng = np.random.default_rng(3)
        x = 100.0 + rng.standard_normal(n0 + 60)
        x[n0:n0 + 3] = 100.0 + np.array(devs)
        t = T0 + np.arange(float(x.shape[0]))
        for batch in (None, 1, 7, n0 + 1):
            assert n0 + 1 in _spikes(t, x, batch), (n0, devs, batch)


def _ramps(rng: np.random.Generator, n: int) -> np.ndarray:
    """iid noise with outliers whose predecessor lies near half of them (either side of
    the share), lone spikes, and steps that begin with such a pair."""
    x = rng.standard_normal(n)
    for at in rng.integers(1, n, size=int(rng.integers(1, 10))):
        big = float(rng.choice([-1.0, 1.0])) * float(rng.uniform(5.5, 12.0))
        x[at] = big
        x[at - 1] = big * float(rng.choice([0.3, 0.49, 0.51, 0.8, -0.6]))
        if rng.random() < 0.3:
            x[at + 1:] += big * 0.8  # a step
    return x


def test_sparse_split_equals_the_array_split_with_the_sample_before() -> None:
    # The sparse path's judgement of each outlier's predecessor (within the segment, the
    # window's last sample, a held one) is the array path's, bit for bit.
    rng = np.random.default_rng(123)
    for _ in range(800):
        n = int(rng.integers(1, 120))
        x = 40.0 + 0.2 * _ramps(rng, n + 1)[1:]
        t = T0 + np.arange(float(n))
        before = None if rng.random() < 0.2 else 40.0 + 0.2 * float(rng.choice([0.0, 2.8, -2.8, 4.0, -4.0]))
        pending = None
        if rng.random() < 0.3:
            pending = (T0 - 1.0, 40.0 + 0.2 * float(rng.choice([-6.0, 5.5, 9.0])))
        limit = int(rng.choice([1, 2, max(1, n // 2), n, n + 5]))
        assert split_spikes_with(True, t, x, pending, limit, before=before, t0=T0) == split_spikes_with(
            False, t, x, pending, limit, before=before, t0=T0)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_fast_young_path_equals_the_reference_with_the_sample_before(seed: int) -> None:
    # Steps that begin with an outlier backed by its predecessor, in the first warm-up
    # and after it; lone spikes; batches cut anywhere, down to one sample.
    rng = np.random.default_rng(seed)
    for _ in range(10):
        n = int(rng.choice([120, 400, 1500]))
        x = 20.0 + 0.5 * _ramps(rng, n)
        t = T0 + np.arange(float(n))
        cuts = steps_of(n, rng, 9) if rng.random() < 0.5 else sorted({int(v) for v in rng.integers(1, n, 6)})
        settings = DetectionSettings(false_alarm_every=float(rng.choice([3600.0, 7 * 86400.0])))
        ref = run_in_batches(StreamEngine("s", settings), t, x, cuts, "FAST_YOUNG", False)
        got = run_in_batches(StreamEngine("s", settings), t, x, cuts, "FAST_YOUNG", True)
        assert got == ref


@pytest.mark.parametrize("seed", [4, 5])
def test_the_same_samples_are_set_aside_however_the_stream_is_batched(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for _ in range(8):
        n = int(rng.choice([300, 1500]))
        x = 20.0 + 0.5 * _ramps(rng, n)
        t = T0 + np.arange(float(n))
        whole = run_in_batches(StreamEngine("s"), t, x, [], "FAST_YOUNG", True)
        cut = run_in_batches(StreamEngine("s"), t, x, steps_of(n, rng, 5), "FAST_YOUNG", True)
        assert cut["records"] == whole["records"]
        # (the same samples, for the same reason; one held while an event is open may be
        # reported after a later one)
        assert sorted(r[1:] for r in cut["rejected"]) == sorted(r[1:] for r in whole["rejected"])
