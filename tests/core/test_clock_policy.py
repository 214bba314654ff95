"""Clock jumps: times far from the arrival time are rejected by policy and never corrupt a stream.

The policy (README, "Clock jumps"): a sample stamped more than
``max_time_ahead`` after its arrival is rejected as ``time_ahead``, one more
than ``max_time_behind`` before it as ``time_behind``; neither advances the
stream's clock.  A sample older than the stream's newest accepted time stays
``out_of_order``.  Arrival times are arguments: the core reads no clock.
"""

from __future__ import annotations

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.screen import REASONS, screen_samples
from shiftwatch.core.settings import DetectionSettings

T0 = 1_790_000_000.0
DAY = 86400.0


def feed(seed: int = 3, n: int = 1200, step_at: int = 800) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = T0 + np.arange(float(n))
    x = 50.0 + 0.2 * rng.standard_normal(n)
    x[step_at:] += 0.5  # a 2.5-sigma step
    return t, x


def test_reason_codes_exist_with_a_sentence() -> None:
    assert "ahead" in REASONS["time_ahead"] and "behind" in REASONS["time_behind"]


def test_limits_are_checked_against_each_samples_arrival() -> None:
    t = np.array([0.0, 10.0, 700.0, 30.0, -900.0, 50.0]) + T0
    arrived = np.array([0.0, 10.0, 20.0, 30.0, 40.0, 50.0]) + T0
    s = screen_samples(t, np.ones(6), arrived=arrived, max_ahead=600.0, max_behind=600.0)
    assert s.rejected == [(2, "time_ahead"), (4, "time_behind")]
    assert s.times.tolist() == [T0, T0 + 10, T0 + 30, T0 + 50]
    # No limit, or no arrival time (replay): nothing is rejected for its distance.
    assert screen_samples(t[:3], np.ones(3), arrived=arrived[:3]).rejected == []
    assert screen_samples(t[:3], np.ones(3), max_ahead=1.0).rejected == []
    # A single arrival time for the batch works as well.
    assert screen_samples([T0 + 1000.0], [1.0], arrived=T0, max_ahead=600.0).rejected == [(0, "time_ahead")]
    with pytest.raises(ValueError, match="arrival times"):
        screen_samples(t, np.ones(6), arrived=arrived[:2], max_ahead=1.0)


def test_value_and_time_problems_keep_their_own_reasons() -> None:
    s = screen_samples([T0 + 5000.0, float("nan"), T0 + 1.0], [float("nan"), 1.0, 2.0],
                       arrived=T0, max_ahead=600.0)
    assert s.rejected == [(0, "nan"), (1, "bad_time")]


def test_settings_validate_the_limits() -> None:
    assert DetectionSettings().max_time_ahead == 600.0 and DetectionSettings().max_time_behind is None
    with pytest.raises(ValueError, match="max_time_ahead"):
        DetectionSettings(max_time_ahead=0)
    with pytest.raises(ValueError, match="max_time_behind"):
        DetectionSettings(max_time_behind=float("inf"))
    assert DetectionSettings.from_mapping({"max_time_behind": "2d"}).max_time_behind == 2 * DAY


def run(eng: StreamEngine, t: np.ndarray, x: np.ndarray, arrived: np.ndarray, *, pieces: int = 7) -> list:
    recs = []
    for idx in np.array_split(np.arange(t.size), pieces):
        recs += eng.process(t[idx], x[idx], arrived[idx]).records
    return recs


def test_a_day_forward_and_back_does_not_lock_the_stream_out() -> None:
    # The sender's clock jumps forward by a day for 20 samples, then is set right.
    t, x = feed()
    arrived = t + 0.3
    bad = np.arange(500, 520)
    t_bad = t.copy()
    t_bad[bad] += DAY
    clean = StreamEngine("oven/z1")
    jumped = StreamEngine("oven/z1")
    want = run(clean, np.delete(t, bad), np.delete(x, bad), np.delete(arrived, bad))
    got = run(jumped, t_bad, x, arrived)
    # Exactly the 20 bad samples are rejected; the stream then says what it says without them.
    assert jumped.rejected_total == {"time_ahead": 20}
    assert [r.to_dict() for r in got] == [r.to_dict() for r in want]
    assert [r.phase for r in got] == ["detected", "confirmed"]
    assert jumped.get_state()["times"] == clean.get_state()["times"]


def test_a_jump_within_the_limit_locks_out_for_at_most_that_long() -> None:
    # Forward by 300 s (inside the 600 s limit) and back: the following samples
    # are out of order until the true clock passes the bad time, no longer.
    t, x = feed()
    arrived = t.copy()
    t_bad = t.copy()
    t_bad[500] += 300.0
    eng = StreamEngine("oven/z2")
    run(eng, t_bad, x, arrived)
    assert eng.rejected_total == {"out_of_order": 299, "duplicate_time": 1}
    assert eng.get_state()["last_time"] == t[-1]


def test_a_clock_that_moves_backwards_is_out_of_order_and_harmless() -> None:
    t, x = feed()
    t_back = t.copy()
    t_back[600:650] -= 3600.0  # an hour back for 50 samples, then right again
    eng = StreamEngine("oven/z3")
    ref = StreamEngine("oven/z3")
    got = run(eng, t_back, x, t + 0.1)
    want = run(ref, np.delete(t, np.arange(600, 650)), np.delete(x, np.arange(600, 650)),
               np.delete(t + 0.1, np.arange(600, 650)))
    assert eng.rejected_total == {"out_of_order": 50}
    assert [r.to_dict() for r in got] == [r.to_dict() for r in want]


def test_far_past_is_rejected_when_a_limit_is_set() -> None:
    t, x = feed(n=400)
    t_bad = t.copy()
    t_bad[0] = 0.0  # a sender whose clock restarted at the epoch, on the stream's first sample
    eng = StreamEngine("oven/z4", DetectionSettings(max_time_behind=7 * DAY))
    eng.process(t_bad, x, t + 0.2)
    assert eng.rejected_total == {"time_behind": 1}
    assert eng.state == "watching" and eng.get_state()["times"][0] == t[1]
