"""Tests of shiftwatch.core.river_adapter against river used directly.

The reference for every trip index is river 0.26.1 itself
(river.drift.PageHinkley and river.drift.ADWIN fed sample by sample), which
is external to the project.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from river import drift

from shiftwatch.core.river_adapter import RiverTest

DAEMON = Path(__file__).resolve().parents[2] / "daemon"


def _series() -> list[np.ndarray]:
    """Deterministic series with steps (fixed random state)."""
    rng = np.random.default_rng(31)
    out = []
    for pre, shift, noise in [(300, 3.0, 1.0), (500, -2.0, 1.0), (200, 1.0, 0.5), (1000, 0.7, 1.0)]:
        z = rng.standard_normal(pre + 600) * noise
        z[pre:] += shift
        out.append(z)
    out.append(np.r_[np.zeros(80), np.full(80, 5.0)])
    return out


def _direct_first_trip(det, z: np.ndarray) -> int:
    for i, v in enumerate(z.tolist()):
        det.update(v)
        if det.drift_detected:
            return i
    return -1


@pytest.mark.parametrize(
    "kind, params, river_cls",
    [
        ("page_hinkley", {}, drift.PageHinkley),
        ("page_hinkley", {"threshold": 15.0}, drift.PageHinkley),
        ("page_hinkley", {"threshold": 25.0, "delta": 0.05, "mode": "up"}, drift.PageHinkley),
        ("adwin", {}, drift.ADWIN),
        ("adwin", {"delta": 0.01, "clock": 8}, drift.ADWIN),
    ],
)
def test_trip_index_matches_river(kind, params, river_cls):
    for z in _series():
        expected = _direct_first_trip(river_cls(**params), z)
        test = RiverTest(kind, **params)
        assert test.update(z) == expected
        # Same answer when the data arrive in uneven batches.
        test.reset()
        got, offset = -1, 0
        for piece in np.array_split(z, [7, 50, 51, 333, 700]):
            k = test.update(piece)
            if k >= 0:
                got = offset + k
                break
            offset += piece.size
        assert got == expected


def test_successive_trips_after_reset_match_river():
    # The engine resets after each trip and feeds the rest; river used
    # directly resets PageHinkley itself on the next update.  Both must see
    # the same trips.
    rng = np.random.default_rng(5)
    z = rng.standard_normal(3000) + np.repeat([0.0, 2.0, -1.0, 1.5, 0.0, 3.0], 500)
    det = drift.PageHinkley(threshold=20.0)
    expected = [i for i, v in enumerate(z.tolist()) if (det.update(v), det.drift_detected)[1]]
    test = RiverTest("page_hinkley", threshold=20.0)
    got, pos = [], 0
    while pos < z.size:
        k = test.update(z[pos:])
        if k < 0:
            break
        got.append(pos + k)
        pos += k + 1
        test.reset()
    assert got == expected and len(got) >= 3


def test_page_hinkley_threshold_statistic_direction():
    test = RiverTest("page_hinkley", threshold=20.0)
    assert test.threshold == 20.0 and test.name == "page_hinkley"
    assert RiverTest("page_hinkley").threshold == 50.0  # river's default lambda
    z = np.r_[np.zeros(100), np.full(100, -2.0)]
    k = test.update(z)
    assert k > 100 and test.direction == -1
    assert test.statistic > test.threshold
    test.reset()
    assert test.statistic == 0.0 and test.direction == 0


def test_adwin_threshold_nan_and_direction():
    test = RiverTest("adwin")
    assert math.isnan(test.threshold) and test.statistic == 0.0 and test.name == "adwin"
    rng = np.random.default_rng(2)
    up = rng.standard_normal(1200) * 0.3
    up[600:] += 2.0
    assert test.update(up) >= 600 and test.direction == 1
    test.reset()
    assert test.update(-up) >= 600 and test.direction == -1


@pytest.mark.parametrize("kind", ["page_hinkley", "adwin"])
def test_state_round_trip_continues_identically(kind):
    rng = np.random.default_rng(8)
    z = rng.standard_normal(1500)
    z[900:] += 1.5
    a = RiverTest(kind)
    assert a.update(z[:700]) == -1
    state = json.loads(json.dumps(a.get_state()))
    b = RiverTest(kind)
    b.set_state(state)
    assert b.update(z[700:]) == a.update(z[700:]) >= 0
    assert b.statistic == a.statistic and b.direction == a.direction


def test_replay_buffer_is_bounded():
    test = RiverTest("page_hinkley", max_replay=100, threshold=1e9)
    test.update(np.zeros(1000))
    assert len(test.get_state()["history"]) == 100


def test_bad_arguments_raise_value_error():
    with pytest.raises(ValueError, match="adwin.*page_hinkley"):
        RiverTest("kswin")
    with pytest.raises(ValueError, match="threshhold"):
        RiverTest("page_hinkley", threshhold=3.0)
    with pytest.raises(ValueError, match="mode"):
        RiverTest("page_hinkley", mode="sideways")
    with pytest.raises(ValueError, match="max_replay"):
        RiverTest("adwin", max_replay=-1)


def test_import_does_not_import_river():
    code = (
        "import sys, shiftwatch.core.river_adapter as m; "
        "assert 'river' not in sys.modules, 'river imported'; "
        "m.RiverTest('adwin'); assert 'river' in sys.modules; print('ok')"
    )
    out = subprocess.run(
        [sys.executable, "-c", code],
        env={"PYTHONPATH": str(DAEMON), "PATH": ""},
        capture_output=True,
        text=True,
        check=False,
    )
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "ok"
