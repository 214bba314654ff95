"""The young loop's limits on the bank's sums against the divisions they stand for.

``StreamEngine._young_loop`` asks, per sample, whether the bank's statistic (the largest
``C / h``) reaches the split screen's or the calm fraction of the threshold.  With
``engine.YOUNG_LIMITS`` it compares each sum, as the recursion sets it, with the least sum
whose quotient reaches the fraction (``young._least_reaching``); without, it divides (the
reference).  These tests hold the two to each other bit for bit, and the limit itself to
the division it stands for at and around the boundary.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from shiftwatch.core import engine, young
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings

from .batches import mixed_cuts, noise, run_in_batches

T0 = 1_788_000_000.0


def _run(x: np.ndarray, cuts: list[int], settings: DetectionSettings, on: bool) -> dict:
    t = T0 + np.arange(float(x.shape[0]))
    return run_in_batches(StreamEngine("s", settings), t, x, cuts, "YOUNG_LIMITS", on)


@given(h=st.floats(1e-3, 1e3), frac=st.sampled_from([0.1, 0.5, 0.25, 1.0 / 3.0, 0.7]),
       ulps=st.integers(-4, 4))
@hsettings(max_examples=300, deadline=None)
def test_the_least_reaching_sum_decides_as_the_division_does(h: float, frac: float, ulps: int) -> None:
    lim = young._least_reaching(h, frac)
    assert lim / h >= frac
    assert not math.nextafter(lim, -math.inf) / h >= frac
    # Sums around the limit and around frac * h, each decided as the division decides.
    for base in (lim, frac * h):
        c = base
        for _ in range(abs(ulps)):
            c = math.nextafter(c, math.inf if ulps > 0 else -math.inf)
        assert (c >= lim) == (c / h >= frac)
    assert (0.0 >= lim) == (0.0 / h >= frac)


def test_the_limits_are_used_only_for_a_bank_of_four_with_the_switch_on() -> None:
    test = engine.make_test(DetectionSettings(), 3600.0, 1.0, 1e9)
    _, _, khs, thr = engine._small_bank(test)
    terms = engine._four_terms(khs, engine.YOUNG_SPLIT_SCREEN * thr, engine.YOUNG_CALM * thr, True)
    assert terms[-1] is True
    for j, (_, _, k, h) in enumerate(khs):
        k_, h_, s, q = terms[4 * j: 4 * j + 4]
        assert (k_, h_) == (k, h)
        assert s / h >= engine.YOUNG_SPLIT_SCREEN * thr > math.nextafter(s, 0.0) / h
        assert q / h >= engine.YOUNG_CALM * thr > math.nextafter(q, 0.0) / h
    assert engine._four_terms(khs, 0.1, 0.5, False)[-1] is False
    # A calm fraction below the screen's: the loop's nested check would not hold.
    assert engine._four_terms(khs, 0.5, 0.1, True)[-1] is False


def test_the_switch_is_on_by_default() -> None:
    assert engine.YOUNG_LIMITS is True


@pytest.mark.parametrize("kind", ["iid", "ar", "t3", "quantised"])
def test_limits_equal_the_divisions_on_replay_like_histories(kind: str) -> None:
    # New streams (the first warm-up, its split tests) and steps (the young phase after
    # each), batched as replay, a live sender and a trickle feed them.
    rng = np.random.default_rng({"iid": 21, "ar": 22, "t3": 23, "quantised": 24}[kind])
    for _ in range(6):
        n = int(rng.choice([150, 400, 2500, 6000]))
        x = 100.0 + noise(kind, n, rng)
        for at in rng.integers(5, n, size=int(rng.integers(0, 4))):
            x[at:] += float(rng.choice([-1.0, 1.0])) * float(rng.uniform(0.5, 4.0))
        x[rng.random(n) < 0.002] += 9.0
        settings = DetectionSettings(false_alarm_every=float(rng.choice([3600.0, 7 * 86400.0])))
        cuts = mixed_cuts(n, rng)
        assert _run(x, cuts, settings, True) == _run(x, cuts, settings, False)


@st.composite
def _histories(draw: st.DrawFn) -> tuple[np.ndarray, list[int], float]:
    n = draw(st.integers(30, 1600))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    x = 20.0 + 0.5 * noise(draw(st.sampled_from(["iid", "ar", "t3", "quantised"])), n, rng)
    for at in draw(st.lists(st.integers(1, n - 1), max_size=3)):
        x[at:] += draw(st.sampled_from([-3.0, -0.8, 0.6, 1.2, 6.0]))
    for at in draw(st.lists(st.integers(0, n - 1), max_size=3)):
        x[at] += draw(st.sampled_from([-15.0, 15.0]))
    cuts = sorted(set(draw(st.lists(st.integers(1, n - 1), max_size=10))))
    return x, cuts, draw(st.sampled_from([3600.0, 86400.0, 7 * 86400.0]))


@given(_histories())
@hsettings(max_examples=80, deadline=None)
def test_limits_equal_the_divisions_on_random_histories(case: tuple[np.ndarray, list[int], float]) -> None:
    x, cuts, far = case
    settings = DetectionSettings(false_alarm_every=far)
    assert _run(x, cuts, settings, True) == _run(x, cuts, settings, False)


@pytest.mark.parametrize("turn", [0, 1, 2, 3])
def test_limits_equal_the_divisions_with_each_chart_nearest_its_limit(monkeypatch: pytest.MonkeyPatch,
                                                                     turn: int) -> None:
    # The designed bank's charts with the smaller k have the larger sums and the larger h,
    # so one chart's quotient tends to lead.  The young loop writes the four charts out by
    # their place in the bank; with the (k, h) pairs moved round the places, each place in
    # turn holds the leading chart, and its two sums' limits decide.  (Before 2026-12-04
    # this swapped h values in one line, which stored the old value back: the bank was
    # never changed, and the fourth place's limits were not guarded.)
    from shiftwatch.core.multicusum import MultiCusumTest

    made = engine.make_test

    def rotated(settings: DetectionSettings, arl0: float, shift_z: float, n_ref: float = float("inf"), *,
                n_level: float | None = None) -> MultiCusumTest:
        test = made(settings, arl0, shift_z, n_ref, n_level=n_level)
        ks, hs = list(test.ks), list(test.hs)  # type: ignore[attr-defined]
        # the charts' (k, h) pairs moved round by ``turn`` places: the leading chart moves
        # with its k and h to another of the written-out sums' places
        return MultiCusumTest(ks=ks[turn:] + ks[:turn], hs=hs[turn:] + hs[:turn])

    monkeypatch.setattr(engine, "make_test", rotated)
    # Most split tests the screen lets through answer None and change nothing: the window
    # lengths they are asked at are compared too.
    asked: list[tuple[str, tuple[int, ...]]] = []
    screen, evidence = young.split_screen, young.split_evidence

    def screen_spy(values: np.ndarray, lengths: np.ndarray, **kw: float) -> np.ndarray:
        asked.append(("screen", tuple(lengths.tolist())))
        return screen(values, lengths, **kw)

    def evidence_spy(values: np.ndarray, **kw: float) -> object:
        asked.append(("evidence", (values.shape[0],)))
        return evidence(values, **kw)

    # (the young loop's split tests are asked in core/young.py, the warm-up's end in engine.py)
    monkeypatch.setattr(young, "split_screen", screen_spy)
    monkeypatch.setattr(young, "split_evidence", evidence_spy)
    monkeypatch.setattr(engine, "split_evidence", evidence_spy)
    rng = np.random.default_rng(40 + turn)
    for kind in ("iid", "t3", "ar"):
        n = 1500
        x = 20.0 + 0.5 * noise(kind, n, rng)
        x[int(rng.integers(30, 190)):] += 1.0
        x[int(rng.integers(300, n)):] -= 2.0
        cuts = mixed_cuts(n, rng)
        settings = DetectionSettings()
        got = _run(x, cuts, settings, True)
        asked_on = asked[:]
        del asked[:]
        assert got == _run(x, cuts, settings, False)
        assert asked_on == asked
        assert asked  # the histories do reach the split tests
        del asked[:]


def test_limits_stand_aside_for_unusable_charts_or_fractions() -> None:
    # A bank's h is finite and positive (MultiCusumTest checks it); the loop falls back on
    # the divisions rather than look for a limit that does not exist.
    rows = ((0, 4, 0.25, 10.0), (1, 5, 0.5, 8.0), (2, 6, 0.75, 6.0), (3, 7, 1.0, 5.0))
    assert engine._four_terms(rows, 0.1, 0.5, True)[-1] is True
    for screen, calm in ((0.0, 0.5), (0.1, math.inf), (math.nan, 0.5)):
        assert engine._four_terms(rows, screen, calm, True)[-1] is False
    bad = ((0, 4, 0.25, math.inf),) + rows[1:]
    assert engine._four_terms(bad, 0.1, 0.5, True)[-1] is False
    # A product of a fraction and an h that overflows or leaves the normal doubles: a
    # search from there would step through up to 2**52 doubles; the divisions are used.
    for screen, calm in ((1e-310, 0.5), (0.1, 1e308)):
        assert engine._four_terms(rows, screen, calm, True)[-1] is False
    huge = ((0, 4, 0.25, 1e305),) + rows[1:]
    assert engine._four_terms(huge, 0.1, 0.5, True)[-1] is False
