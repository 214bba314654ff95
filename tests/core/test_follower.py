"""The follower's state as a class of its own (``follow.Follower``), driven directly.

An engine's follower of slow change (its offset from the baseline's level, the samples
it has not been fed yet, the centre lone spikes are judged against) lives in one
``Follower`` per engine.  These tests drive it without an engine: what it is fed is
each sample less the level, held within the spike band about its centre; a catch-up
after an event feeds it the event's samples by the exponentially weighted mean's
recursion ``u_i = (1 - lam) u_(i-1) + lam r_i`` (the EWMA's definition, NIST/SEMATECH
e-Handbook of Statistical Methods 6.3.2.4), all but the newest ``delay``; and an
engine saves and restores its fields under the names its snapshots always had
(``follow``, ``follow_lag``, ``center``, ``next_center``).  That the engine says the
same with it as before it was split off is held by the bit-for-bit guards of
tests/core (test_per_call.py, test_batch_path.py, test_follow_path.py, test_calm.py).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.follow import FOLLOW_RECENTER, Follower

T0 = 1_788_000_000.0


def _recursion(r: list[float], u0: float, lam: float) -> float:
    u = u0
    for v in r:
        u = (1.0 - lam) * u + lam * v
    return u


def test_a_new_follower_follows_nothing_yet() -> None:
    f = Follower()
    assert (f.offset, f.lag, f.center, f.next_center) == (0.0, 0, 0.0, FOLLOW_RECENTER)
    assert not hasattr(f, "__dict__")  # one per engine: slots only, as the engine's own


def test_restart_clear_shift_and_recenter() -> None:
    f = Follower()
    f.offset, f.lag, f.center, f.next_center = 0.3, 7, 0.1, 9000
    f.shift(0.25)  # a refinement moved the baseline's level down by 0.25: the followed level stays
    assert (f.offset, f.center) == (0.3 + 0.25, 0.1 + 0.25)
    f.recenter(5000)
    assert (f.center, f.next_center) == (f.offset, 5000 + FOLLOW_RECENTER)
    f.clear()
    assert (f.offset, f.center, f.lag) == (0.0, 0.0, 7)
    f.offset, f.center = 1.0, 2.0
    f.restart()
    assert (f.offset, f.lag, f.center, f.next_center) == (0.0, 0, 0.0, FOLLOW_RECENTER)


def test_input_is_the_samples_less_the_level_held_in_the_band_about_the_centre() -> None:
    rng = np.random.default_rng(5)
    f = Follower()
    f.center = 0.4
    x = 20.0 + rng.standard_normal(500) * 3.0
    got = f.input(x.copy(), 20.0, 5.0)
    want = [min(max(v - 20.0, 0.4 - 5.0), 0.4 + 5.0) for v in x.tolist()]
    assert got.tolist() == want


@pytest.mark.parametrize("lag, trip_len, delay", [(0, 30, 40), (12, 30, 40), (30, 30, 40), (5, 200, 300)])
def test_catch_up_is_the_recursion_over_the_samples_not_yet_fed(lag: int, trip_len: int, delay: int) -> None:
    rng = np.random.default_rng(lag + trip_len)
    lam = 1.0 / 110.0
    vals = 50.0 + rng.standard_normal(1200) * 0.8 + np.linspace(0.0, 2.0, 1200)
    f = Follower()
    f.offset, f.lag = 0.2, lag
    f.catch_up(vals, trip_len, delay, lam, 50.0, 4.0)
    start = trip_len - lag  # the first sample the follower had not been fed
    end = vals.shape[0] - delay  # all but the newest delay
    fed = [min(max(v - 50.0, -4.0), 4.0) for v in vals[start:end].tolist()]
    assert f.offset == pytest.approx(_recursion(fed, 0.2, lam), rel=1e-12, abs=1e-12)
    assert (f.lag, f.center) == (delay, f.offset)


def test_the_engine_saves_and_restores_its_follower_under_the_old_names() -> None:
    rng = np.random.default_rng(8)
    n = 9000
    x = 40.0 + 0.5 * rng.standard_normal(n) + np.linspace(0.0, 1.5, n)  # a slow drift: followed
    t = T0 + np.arange(float(n))
    eng = StreamEngine("brackenfield/kiln2/zone3")
    eng.process(t, x)
    f = eng._follower
    state = eng.get_state()
    assert (state["follow"], state["follow_lag"], state["center"], state["next_center"]) == (
        f.offset, f.lag, f.center, f.next_center)
    assert f.offset != 0.0 and f.lag > 0 and f.next_center > FOLLOW_RECENTER  # followed and recentred
    again = StreamEngine("brackenfield/kiln2/zone3")
    again.set_state(json.loads(json.dumps(state)))
    g = again._follower
    assert (g.offset, g.lag, g.center, g.next_center) == (f.offset, f.lag, f.center, f.next_center)
    assert json.dumps(again.get_state(), sort_keys=True) == json.dumps(state, sort_keys=True)
