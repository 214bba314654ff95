"""The young phase's state as a class of its own (``young.YoungPhase``), driven directly.

An engine's young phase (the self-starting level while it rests on few samples, whether
the baseline is a provisional stand-in for an event of the first warm-up, the split that
opened that event) lives in one ``YoungPhase`` per engine.  These tests drive it without
an engine: its level's mean and spread are the sample mean and standard deviation of the
samples taken in (Welford's running update, Welford 1962, Technometrics 4(3); compared
with ``statistics.fmean`` and ``statistics.stdev``), a level re-anchored on a provisional
baseline pools its spread over both regimes (the pooled standard deviation
``sqrt(sum of within-regime squares / (n1 - 1 + n2 - 1))``, common practice, e.g. NIST/SEMATECH
e-Handbook of Statistical Methods 7.3.1), and an engine saves and restores its fields under
the names its snapshots always had (``young``, ``provisional``).  That the engine says the
same with it as before it was split off is held by the bit-for-bit guards of tests/core
(test_young_fast.py, test_split_screen.py, test_young_limits.py, test_spike_neighbours.py).
"""

from __future__ import annotations

import json
import math
import statistics

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.selfstart import SelfStart, split_evidence
from shiftwatch.core.young import (
    YoungPhase,
    _SplitCalled,
    provisional_baseline,
    weigh_splits,
    young_split,
)

T0 = 1_788_000_000.0


def test_a_new_phase_has_no_level_and_no_stand_in() -> None:
    yp = YoungPhase()
    assert (yp.level, yp.provisional, yp.split) == (None, False, None)
    assert not hasattr(yp, "__dict__")  # one per engine: slots only, as the engine's own


def test_begin_keeps_a_young_level_and_restart_takes_the_samples() -> None:
    yp = YoungPhase()
    first = yp.begin()
    assert first.sigma is None and first.n == 0
    first.add(3.0)
    assert yp.begin() is first  # the first warm-up goes on with the level it has
    rng = np.random.default_rng(3)
    x = 12.0 + 0.7 * rng.standard_normal(150)
    ys = yp.restart(x)
    assert yp.level is ys and ys.n == 150
    assert ys.mean == pytest.approx(statistics.fmean(x.tolist()), rel=1e-13)
    assert ys.spread() == pytest.approx(statistics.stdev(x.tolist()), rel=1e-12)


def test_take_back_releases_the_held_samples_first_then_adds_the_event_samples() -> None:
    rng = np.random.default_rng(4)
    base = (20.0 + rng.standard_normal(60)).tolist()
    held = [23.1, 23.4]
    event = (20.0 + rng.standard_normal(25)).tolist()
    yp = YoungPhase()
    yp.restart(np.array(base))
    for v in held:
        yp.level.hold(v, 8)  # type: ignore[union-attr]
    yp.take_back(event)
    ys = yp.level
    assert ys is not None and ys.held == []
    every = base + held + event
    assert ys.n == len(every)
    assert ys.mean == pytest.approx(statistics.fmean(every), rel=1e-13)
    assert ys.spread() == pytest.approx(statistics.stdev(every), rel=1e-12)
    assert ys.last == event[-1]


def test_settle_hands_the_level_over_with_its_held_samples_taken_in() -> None:
    yp = YoungPhase()
    yp.restart(np.array([5.0, 6.0, 7.0, 6.0]))
    yp.level.hold(9.0, 8)  # type: ignore[union-attr]
    ys = yp.settle()
    assert yp.level is None
    assert (ys.n, ys.held) == (5, [])
    assert ys.mean == pytest.approx(statistics.fmean([5.0, 6.0, 7.0, 6.0, 9.0]), rel=1e-15)


def test_take_split_hands_the_split_over_once() -> None:
    yp = YoungPhase()
    assert yp.take_split() is None
    ev = object()
    yp.split = ev  # type: ignore[assignment]
    assert yp.take_split() is ev
    assert yp.split is None and yp.take_split() is None


def test_end_leaves_no_level_and_no_stand_in() -> None:
    yp = YoungPhase()
    yp.begin()
    yp.provisional = True
    yp.end()
    assert (yp.level, yp.provisional) == (None, False)


def test_a_re_anchor_on_a_provisional_baseline_pools_the_spread_of_both_regimes() -> None:
    rng = np.random.default_rng(6)
    before = (30.0 + 0.5 * rng.standard_normal(80)).tolist()
    after = (33.0 + 0.5 * rng.standard_normal(40)).tolist()
    yp = YoungPhase()
    yp.restart(np.array(before))
    yp.provisional = True
    ys = yp.reanchor(after, None)
    assert yp.level is ys and yp.provisional is False
    assert ys.sigma is None and ys.n == len(after)
    assert ys.mean == pytest.approx(statistics.fmean(after), rel=1e-13)
    m1, m2 = statistics.fmean(before), statistics.fmean(after)
    pooled = math.sqrt((sum((v - m1) ** 2 for v in before) + sum((v - m2) ** 2 for v in after))
                       / (len(before) - 1 + len(after) - 1))
    assert ys.spread() == pytest.approx(pooled, rel=1e-12)
    # the first warm-up's first event: no level yet, a fresh one of the samples alone
    yp2 = YoungPhase()
    yp2.provisional = True
    ys2 = yp2.reanchor(after, None)
    assert ys2.spread() == pytest.approx(statistics.stdev(after), rel=1e-12)


def test_a_re_anchor_on_an_established_baseline_knows_its_sigma() -> None:
    yp = YoungPhase()
    yp.restart(np.array([1.0, 2.0, 3.0]))
    after = [10.0, 10.5, 9.5, 10.2]
    ys = yp.reanchor(after, (0.4, 0.3, 150))
    assert (ys.sigma, ys.phi, ys.follow, ys.n) == (0.4, 0.3, 150, 4)
    assert ys.spread() == 0.4
    assert ys.mean == pytest.approx(statistics.fmean(after), rel=1e-15)


def test_the_engine_saves_and_restores_its_young_phase_under_the_old_names() -> None:
    rng = np.random.default_rng(9)
    n = 1400
    x = 40.0 + 0.5 * rng.standard_normal(n)
    x[700:] += 2.5  # a step after the warm-up: confirmed, then a young level re-anchored on it
    t = T0 + np.arange(float(n))
    eng = StreamEngine("brackenfield/kiln2/zone3")
    phases = [r.phase for r in eng.process(t, x).records]
    assert "confirmed" in phases
    yp = eng._young
    assert yp.level is not None and yp.level.sigma is not None  # young on an established baseline
    state = eng.get_state()
    assert state["young"] == yp.level.get_state() and state["provisional"] is yp.provisional
    again = StreamEngine("brackenfield/kiln2/zone3")
    again.set_state(json.loads(json.dumps(state)))
    assert again._young.level is not None
    assert again._young.level.get_state() == yp.level.get_state()
    assert json.dumps(again.get_state(), sort_keys=True) == json.dumps(state, sort_keys=True)
    # a new stream's first warm-up: the young level has no known sigma yet
    fresh = StreamEngine("brackenfield/kiln2/zone4")
    fresh.process(t[:50], x[:50])
    fs = fresh.get_state()
    assert fs["young"] is not None and fs["young"]["sigma"] is None and fs["provisional"] is False
    assert isinstance(SelfStart.from_state(fs["young"]), SelfStart)


def test_the_provisional_baseline_stands_on_the_young_level_or_on_the_split() -> None:
    rng = np.random.default_rng(12)
    x = (8.0 + 0.3 * rng.standard_normal(60)).tolist()
    dt = rng.choice([1.0, 1.0, 2.0], size=59)
    times = T0 + np.concatenate(([0.0], np.cumsum(dt)))
    yp = YoungPhase()
    ys = yp.restart(np.array(x))
    b = provisional_baseline(ys, None, times, None, 4.0)
    assert b.level == pytest.approx(statistics.fmean(x), rel=1e-13)
    assert b.sigma == pytest.approx(statistics.stdev(x), rel=1e-12)
    assert b.interval == statistics.median(np.diff(times).tolist())  # the sampling interval
    assert (b.n, b.clip, b.quantum) == (60, 4.0, 0.0)
    # innovation sigma: sigma * sqrt(1 - phi^2) (AR(1), Box & Jenkins), times the allowance
    assert b.innovation_sigma == pytest.approx(
        b.sigma * math.sqrt(1.0 - b.phi ** 2) * math.sqrt(ys.variance_factor(2.0) if b.phi == 0.0 else 1.0),
        rel=1e-12)
    # a step in the samples: the split's level before it and its spread
    x2 = np.array(x + (9.5 + 0.3 * rng.standard_normal(40)).tolist())
    ev = split_evidence(x2, phi_margin=0.0)
    assert ev is not None
    b2 = provisional_baseline(yp.restart(x2), ev, T0 + np.arange(100.0), 1e-3, 4.0)
    assert (b2.level, b2.sigma, b2.interval) == (ev.level_before, max(ev.sigma, 1e-3), 1.0)


@pytest.mark.parametrize("step", [0.0, 0.6, 1.5])
def test_noted_split_tests_raise_exactly_when_one_of_them_calls_a_step(step: float) -> None:
    # weigh_splits settles most noted tests by split_screen and must agree with asking
    # young_split (split_evidence and its gate) of each noted prefix in turn.
    rng = np.random.default_rng(int(10 * step) + 1)
    for _ in range(20):
        x = 5.0 + rng.standard_normal(160)
        x[int(rng.integers(25, 120)):] += step
        lengths = sorted({int(v) for v in rng.integers(20, 161, size=12)})
        arl0 = float(rng.choice([600.0, 3600.0]))
        want = any(young_split(x[:n], arl0) is not None for n in lengths)
        deferred = [(n, arl0) for n in lengths]
        try:
            weigh_splits(x, deferred)
            got = False
        except _SplitCalled:
            got = True
        assert got == want
        assert deferred == ([] if not got else [(n, arl0) for n in lengths])
