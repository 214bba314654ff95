"""The levels topic gives a stream's level to a tenth of its noise sigma, on readings far
from zero with little noise (outside trial of 2026-12-05).

Before, the retained ``levels`` payload rounded every level to 6 significant digits:
the Brackenfield plant's compressed-air header (an invented site) at 101325.37 Pa
with 0.2 Pa of noise showed 101325.0, two sigmas from the level shiftwatch watched;
a tunnel-oven thermometer at 773.15542 K with 0.001 K of noise showed 773.155.  The
reference is numpy's mean of the readings the level was learned from (the baseline
is a Huber estimate; on normal noise it lies within a fraction of a standard error
of the mean, common practice: Huber's location estimate is 95% efficient there).
The payload is made by the daemon's own LevelBoard, published through a callable
that keeps what it is given (the MQTT link is tested in test_daemon_mqtt.py).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from shiftwatch.core.engine import StreamEngine
from shiftwatch.levels import LevelBoard

T0 = 1_772_409_600.0


@pytest.mark.parametrize(("level", "sigma", "unit"), [(101325.37, 0.2, "Pa"), (773.15542, 0.001, "K"),
                                                     (500.03, 0.5, "g")])
def test_the_levels_payload_keeps_the_level_to_a_tenth_of_sigma(level: float, sigma: float, unit: str) -> None:
    rng = np.random.default_rng(4)
    x = level + sigma * rng.standard_normal(600)
    name = "brackenfield/line2/air/header_abs"
    eng = StreamEngine(name, unit=unit)
    eng.process(T0 + np.arange(600.0), x)
    assert eng.state == "watching" and eng.level is not None and eng.sigma is not None
    sent: list[tuple[str, bytes, bool]] = []

    def publish(topic: str, payload: bytes, retain: bool) -> int:
        sent.append((topic, payload, retain))
        return len(sent)

    board = LevelBoard("sw", {name: eng}, label_for=lambda n: None, publish=publish,
                       linked=lambda: True, connected=lambda: True, clock=lambda: T0 + 600.0)
    body = board.body(name, eng, eng.state)
    # Within a tenth of sigma of the engine's level (it was off by up to 2.5 sigmas).
    assert abs(body["level"] - eng.level) <= eng.sigma / 10
    # And so within a tenth of sigma plus a standard error of numpy's mean of the readings.
    assert abs(body["level"] - float(np.mean(x[:eng.baseline.n]))) <= eng.sigma / 10 + 2 * sigma / np.sqrt(200)
    assert json.loads(json.dumps(body))["level"] == body["level"]
