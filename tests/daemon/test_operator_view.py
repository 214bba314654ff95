"""What an operator and a maintenance engineer read from the real daemon: log lines (text
and JSON), the retained levels, SenML stream names, the caution at start-up.

Each test runs the real `shiftwatch run` in a subprocess against a private Mosquitto.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest


def wait_log(d, needle: str, timeout: float = 30.0) -> str:
    deadline = time.monotonic() + timeout
    while True:
        text = d.log_text()
        if needle in text:
            return text
        assert time.monotonic() < deadline, f"{needle!r} not in the log:\n{text}"
        time.sleep(0.1)


SENML = "  - topic: brackenfield/line4/filler/senml\n    format: senml\n"


def test_a_held_back_line_is_summed_up_within_the_window_though_nothing_follows(
        daemon_factory, publisher) -> None:
    # The first-hour report: a SenML text value within 10 s of another not_a_number
    # was held back, and its "more held back" summary never came, since nothing
    # of that reason followed.
    d = daemon_factory(SENML).start()
    pack = json.dumps([{"n": "fill_volume", "vs": "high"}])
    publisher.publish_wait("brackenfield/line4/filler/senml", pack)
    wait_log(d, "set aside (not_a_number)")
    publisher.publish_wait("brackenfield/line4/filler/senml", pack)
    text = wait_log(d, "1 more like this in the last 10 s, held back")
    summary = [line for line in text.splitlines() if "held back" in line]
    assert len(summary) == 1 and "set aside (not_a_number)" in summary[0]
    assert d.stop() == 0
