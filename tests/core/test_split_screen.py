"""The first warm-up's split tests weighed together, against the test asked one call at a time.

``StreamEngine._watch_young_fast`` notes the window's length at each split test of a
stream's first warm-up and weighs them at once (``selfstart.split_screen``); when one
of them calls a step, the batch is watched again with each test asked as it comes.
The references here are the per-call ``selfstart.split_evidence`` (the screen may only
call None what it calls None) and the engine's per-sample reference loop
(``engine.FAST_YOUNG = False``, the loop tests/core/test_young_fast.py holds the fast
loop to): the same records, rejections, counts and saved state, bit for bit, on many
random series with steps in the first warm-up, spikes, AR(1) noise, quantised values
and gaps in time, cut into batches in many ways.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftwatch.core import engine
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.selfstart import split_evidence, split_screen
from shiftwatch.core.settings import DetectionSettings

from .batches import run_in_batches

T0 = 1_788_000_000.0


def _noise(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    x = rng.standard_normal(n)
    if kind == "ar":
        for i in range(1, n):
            x[i] += 0.7 * x[i - 1]
    elif kind == "quantised":
        x = np.round(x * 2.0) / 2.0
    elif kind == "flat":  # a stuck sensor that moves by one count twice
        x = np.zeros(n)
        x[rng.integers(0, n, 2)] += 1e-3
    return 50.0 + x


@pytest.mark.parametrize("kind", ["iid", "step", "ar", "quantised", "flat"])
def test_screen_calls_none_only_where_split_evidence_does(kind: str) -> None:
    rng = np.random.default_rng({"iid": 1, "step": 2, "ar": 3, "quantised": 4, "flat": 5}[kind])
    screened = asked = 0
    for _ in range(150):
        n = int(rng.integers(7, 300))
        x = _noise("iid" if kind == "step" else kind, n, rng)
        if kind == "step":
            x[int(rng.integers(1, n)):] += float(rng.uniform(0.3, 6.0))
        lengths = np.arange(7, n + 1)
        p_below = float(rng.choice([0.5 / 604_800, 0.5 / 3600, 1e-3, 0.2]))
        sure = split_screen(x, lengths, p_below=p_below)
        for m, none in zip(lengths.tolist(), sure.tolist()):
            asked += 1
            if none:
                screened += 1
                for margin in (0.0, 1.0):
                    assert split_evidence(x[:m], phi_margin=margin, p_below=p_below) is None, (m, p_below)
    if kind in ("iid", "ar", "quantised"):
        assert screened > asked // 2  # the screen settles most of them (else it would not pay)


def test_screen_without_an_early_exit_settles_only_too_short_windows() -> None:
    x = _noise("iid", 40, np.random.default_rng(9))
    sure = split_screen(x, np.arange(1, 41), p_below=1.0)
    assert sure.tolist() == [n < 7 for n in range(1, 41)]
    assert all(split_evidence(x[:n]) is None for n in range(1, 7))


def _series(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    kind = str(rng.choice(["iid", "ar", "quantised", "iid"]))
    x = _noise(kind, n, rng)
    # Steps where the split test looks: in the first warm-up (sample 20 to 200), some small.
    for _ in range(int(rng.integers(0, 3))):
        at = int(rng.integers(15, min(n, 220)))
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.6, 4.0))
    for at in rng.integers(0, n, size=int(rng.integers(0, 4))):
        x[at] += float(rng.choice([-12.0, 12.0]))
    dt = np.ones(n)
    dt[rng.random(n) < 0.02] = float(rng.uniform(5.0, 500.0))  # gaps in time
    return T0 + np.cumsum(dt), x


def _run(t: np.ndarray, x: np.ndarray, cuts: list[int], settings_: DetectionSettings,
         fast: bool) -> dict[str, Any]:
    return run_in_batches(StreamEngine("brackenfield/kiln2/zone3", settings_), t, x, cuts, "FAST_YOUNG", fast)

class _Counted:
    """Counts the batches the fast loop watched again because a noted split test called a step."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.again = 0
        weigh = engine.weigh_splits

        def counted(values: np.ndarray, deferred: list[tuple[int, float]]) -> None:
            try:
                weigh(values, deferred)
            except engine._SplitCalled:
                self.again += 1
                raise

        monkeypatch.setattr(engine, "weigh_splits", counted)


def test_noted_split_tests_give_the_reference_records(monkeypatch: pytest.MonkeyPatch) -> None:
    counted = _Counted(monkeypatch)
    rng = np.random.default_rng(2026)
    for trial in range(120):
        n = int(rng.choice([120, 260, 700]))
        t, x = _series(rng, n)
        mode = trial % 3
        cuts = ([] if mode == 0 else sorted({int(v) for v in rng.integers(1, n, size=int(rng.integers(1, 6)))})
                if mode == 1 else list(range(int(rng.integers(17, 60)), n, 37)))
        s = DetectionSettings(false_alarm_every=float(rng.choice([3600.0, 7 * 86400.0])),
                              test=str(rng.choice(["multi_cusum", "multi_cusum", "cusum", "glr"])))
        assert _run(t, x, cuts, s, fast=True) == _run(t, x, cuts, s, fast=False), trial
    assert counted.again >= 5  # the path that watches a batch again was taken, and agreed


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(30, 400), step_at=st.integers(10, 250),
       step=st.floats(-5.0, 5.0), cut=st.integers(1, 400))
def test_fast_and_reference_paths_agree_on_random_series(seed: int, n: int, step_at: int, step: float,
                                                         cut: int) -> None:
    rng = np.random.default_rng(seed)
    t, x = _series(rng, n)
    x[min(step_at, n - 1):] += step
    cuts = [cut] if cut < n else []
    s = DetectionSettings()
    assert _run(t, x, cuts, s, fast=True) == _run(t, x, cuts, s, fast=False)
