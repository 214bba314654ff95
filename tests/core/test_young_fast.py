"""The young phase's fast path against the per-sample reference path it stands in for.

A young level (a stream's first warm-up, and the YOUNG_END samples after each
confirmed step) is watched one sample at a time: each sample is standardised
against the samples before it, fed to the test and taken into the level.  The
engine does that in one tight loop (``StreamEngine._watch_young_fast``: the
self-starting arithmetic and the CUSUM bank in plain floats, with no method
call per sample); the original loop stays as the reference
(``engine.FAST_YOUNG = False``).  These tests replay many random series through
both and require the same records, rejections and saved state, bit for bit.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from shiftwatch.core import engine
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .batches import noise, run_in_batches, steps_of

T0 = 1_788_000_000.0


def _series(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    x = noise(kind, n, rng)
    if kind == "t3":
        x[rng.random(n) < 0.01] += rng.choice([-12.0, 12.0])
    x = 20.0 + 0.5 * x
    # Steps: some in the first warm-up, some after it, some two close together.
    for _ in range(int(rng.integers(0, 4))):
        at = int(rng.choice([int(rng.integers(5, 200)), int(rng.integers(200, max(201, n)))]))
        x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.8, 6.0))
    # Lone spikes, and a pair that starts a large step.
    for at in rng.integers(0, n, size=int(rng.integers(0, 5))):
        x[at] += float(rng.choice([-15.0, 15.0]))
    return x


def _run(x: np.ndarray, cuts: list[int], settings: DetectionSettings, fast: bool) -> dict[str, Any]:
    t = T0 + np.arange(float(x.shape[0]))
    return run_in_batches(StreamEngine("s", settings), t, x, cuts, "FAST_YOUNG", fast)


def _cuts(n: int, rng: np.random.Generator) -> list[int]:
    mode = int(rng.integers(0, 4))
    if mode == 0:
        return []
    if mode == 1:  # a few random cuts
        return sorted({int(v) for v in rng.integers(1, n, size=int(rng.integers(1, 8)))})
    if mode == 2:  # small batches throughout
        return steps_of(n, rng, 12)
    return list(range(4096, n, 4096)) or [n // 2]


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_fast_young_path_equals_the_per_sample_path(kind: str) -> None:
    rng = np.random.default_rng({"iid": 1, "ar": 2, "t3": 3, "quantised": 4}[kind])
    for _ in range(12):
        n = int(rng.choice([40, 150, 260, 1500, 3000]))
        x = _series(kind, n, rng)
        cuts = _cuts(n, rng)
        settings = DetectionSettings(false_alarm_every=float(rng.choice([3600.0, 7 * 86400.0])))
        ref = _run(x, cuts, settings, fast=False)
        got = _run(x, cuts, settings, fast=True)
        assert got == ref


@pytest.mark.parametrize("test", ["cusum", "glr"])
def test_fast_young_path_with_other_tests(test: str) -> None:
    rng = np.random.default_rng(11)
    for _ in range(4):
        x = _series(str(rng.choice(["iid", "t3"])), 1500, rng)
        cuts = _cuts(1500, rng)
        settings = DetectionSettings(test=test)
        assert _run(x, cuts, settings, fast=True) == _run(x, cuts, settings, fast=False)


def test_fast_young_path_after_a_restore() -> None:
    # A snapshot taken in the young phase (held samples, a pending spike) carries on
    # the same through either path.
    rng = np.random.default_rng(5)
    x = _series("iid", 2000, rng)
    x[600:] += 3.0
    x[700] += 15.0
    t = T0 + np.arange(2000.0)
    outs = []
    for fast in (False, True):
        saved = engine.FAST_YOUNG
        engine.FAST_YOUNG = fast
        try:
            got: list[Any] = []
            eng = StreamEngine("s")
            for a in range(0, 2000, 50):
                got += [r.to_dict() for r in eng.process(t[a:a + 50], x[a:a + 50]).records]
                st = eng.get_state()
                eng = StreamEngine("s")
                eng.set_state(st)
                got.append(json.dumps(st, sort_keys=True))
            outs.append(got)
        finally:
            engine.FAST_YOUNG = saved
    assert outs[0] == outs[1]


def test_the_reference_flag_is_on_by_default() -> None:
    assert engine.FAST_YOUNG is True


@pytest.mark.parametrize(("margin", "bias"), [(1.0, True), (0.0, False)])
def test_fast_young_path_follows_the_selfstart_switches(monkeypatch: pytest.MonkeyPatch, margin: float,
                                                        bias: bool) -> None:
    # PHI_MARGIN and BIAS_CORRECT are read where the reference reads them.
    from shiftwatch.core import selfstart

    monkeypatch.setattr(selfstart, "PHI_MARGIN", margin)
    monkeypatch.setattr(selfstart, "BIAS_CORRECT", bias)
    rng = np.random.default_rng(13)
    for kind in ("iid", "ar"):
        x = _series(kind, 1500, rng)
        cuts = _cuts(1500, rng)
        settings = DetectionSettings()
        assert _run(x, cuts, settings, fast=True) == _run(x, cuts, settings, fast=False)


def test_a_remembered_design_and_an_adopted_state_equal_the_made_ones() -> None:
    from shiftwatch.core.multicusum import MultiCusumTest

    first = MultiCusumTest.design(123456.0, 0.9)
    again = MultiCusumTest.design(123456.0, 0.9)  # from the memo
    made = MultiCusumTest(ks=list(first.ks), hs=list(first.hs))
    assert (again.ks, again.hs) == (first.ks, first.hs) == (made.ks, made.hs)
    old = MultiCusumTest.design(123456.0, 0.9)
    old.update(np.random.default_rng(2).standard_normal(300) + 0.3)
    by_state, adopted = MultiCusumTest.design(50000.0, 0.9), MultiCusumTest.design(50000.0, 0.9)
    by_state.set_state(old.get_state())
    assert adopted.adopt_state(old)
    assert adopted.get_state() == by_state.get_state()
    assert not MultiCusumTest(ks=[0.5], hs=[5.0]).adopt_state(old)


@st.composite
def _young_histories(draw: st.DrawFn) -> tuple[np.ndarray, list[int], float]:
    """A short history whose young phases hit the loop's rare turns: constant stretches
    (a spread of zero), steps inside the first warm-up and after it, lone spikes and
    pairs of outliers, some of them on a batch's first or last sample."""
    n = draw(st.integers(30, 700))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    kind = draw(st.sampled_from(["iid", "ar", "t3", "quantised", "constant"]))
    x = np.zeros(n) if kind == "constant" else noise(kind, n, rng)
    if kind != "constant" and draw(st.booleans()):
        x[: draw(st.integers(1, n))] = 0.0  # a constant stretch first
    x = 20.0 + 0.5 * x
    for at in draw(st.lists(st.integers(1, n - 1), max_size=3)):
        x[at:] += draw(st.sampled_from([-4.0, -1.5, 1.2, 3.0, 8.0]))
    cuts = sorted(set(draw(st.lists(st.integers(1, n - 1), max_size=12))))
    edges = [c + d for c in cuts for d in (-1, 0) if 0 <= c + d < n]
    for at in draw(st.lists(st.sampled_from(edges or [n - 1]), max_size=4)):
        x[at] += draw(st.sampled_from([-15.0, 15.0]))
        if draw(st.booleans()) and at + 1 < n:
            x[at + 1] += 15.0 if x[at] > 20.0 else -15.0  # a pair: the start of a large step
    far = draw(st.sampled_from([3600.0, 7 * 86400.0]))
    return x, cuts, far


@given(_young_histories())
@hsettings(max_examples=120, deadline=None)
def test_fast_young_path_on_random_histories_with_edge_cases(case: tuple[np.ndarray, list[int], float]) -> None:
    # The loop's local copies of the young level's fields are written back at every
    # turn that reads them (a held spike settled, a held sample taken in, a trip, the
    # level settled, a batch's end): checked where those turns are most crowded.
    x, cuts, far = case
    settings = DetectionSettings(false_alarm_every=far)
    assert _run(x, cuts, settings, fast=True) == _run(x, cuts, settings, fast=False)


def test_fast_young_path_with_a_bank_of_three_charts(monkeypatch: pytest.MonkeyPatch) -> None:
    # A bank of other than four charts takes the loop's general recursion over its charts.
    from shiftwatch.core.multicusum import MultiCusumTest

    made = engine.make_test

    def three(settings: DetectionSettings, arl0: float, shift_z: float, n_ref: float = float("inf"), *,
              n_level: float | None = None) -> Any:
        test = made(settings, arl0, shift_z, n_ref, n_level=n_level)
        return MultiCusumTest(ks=list(test.ks[1:]), hs=list(test.hs[1:]))  # type: ignore[attr-defined]

    monkeypatch.setattr(engine, "make_test", three)
    rng = np.random.default_rng(17)
    for kind in ("iid", "t3", "ar"):
        x = _series(kind, 1500, rng)
        cuts = _cuts(1500, rng)
        settings = DetectionSettings()
        assert _run(x, cuts, settings, fast=True) == _run(x, cuts, settings, fast=False)
