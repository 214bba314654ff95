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


T0 = 1_790_000_000.0  # 2026-09-21T14:13:20Z, a Monday


def step_series(seed: int, n: int = 800, step: int = 500) -> list[float]:
    import numpy as np

    x = 72.4 + 0.3 * np.random.default_rng(seed).standard_normal(n)
    x[step:] += 0.5
    return [float(v) for v in x]


FILLER = """\
  - topic: brackenfield/line4/+/fill
    format: json
    value: v
    time: ts
    unit: ml
    label: "fill volume on {1}"
"""


def test_json_log_lines_carry_time_stream_event_and_phase_and_the_caution_comes_first(
        daemon_factory, collector, publisher) -> None:
    from shiftwatch.core.records import ADVISORY

    d = daemon_factory(FILLER, extra="display:\n  time_zone: Europe/Berlin\n")
    d.run_args = ["--log-format", "json"]
    d.start()
    alerts = collector("sw/alerts/#")
    topic = "brackenfield/line4/head1/fill"
    for i, v in enumerate(step_series(11)):
        publisher.publish(topic, json.dumps({"v": v, "ts": int((T0 + i) * 1000)}))
    assert alerts.wait_for(lambda items: any(b.get("phase") == "confirmed" for _, b in items))
    text = wait_log(d, '"phase": "confirmed"')
    lines = [json.loads(line) for line in text.splitlines() if line.startswith("{")]
    # The caution is the first thing a reader of the journal sees.
    assert ADVISORY in lines[0]["message"]
    # Every line has its time, in the display time zone (Berlin: +01:00 or +02:00).
    assert all(line["time"][23:] in ("+01:00", "+02:00") for line in lines), lines[0]
    new = [line for line in lines if line["message"].startswith("new stream")]
    assert new and new[0]["stream"] == topic
    records = {r["phase"]: r for r in alerts.records()}
    logged = [line for line in lines if "phase" in line]
    assert [(line["stream"], line["event_id"], line["phase"]) for line in logged] == \
        [(topic, records[p]["id"], p) for p in ("detected", "confirmed")]
    # The summary shows the shift time in Berlin's time (CEST in September, UTC+2) with the
    # date, since the samples are stamped 2026-09-21 and the records are made today.
    conf = records["confirmed"]
    assert conf["shift_at"].endswith("Z")  # records stay UTC
    assert " CEST" in conf["summary"] and "2026-09-21 16:" in conf["summary"], conf["summary"]
    assert conf["label"] == "fill volume on head1" and conf["summary"] == logged[1]["message"].split(" [")[0]
    assert d.stop() == 0


def test_retained_levels_have_a_label_rounded_numbers_and_say_offline_after_a_stop(
        daemon_factory, collector, publisher) -> None:
    d = daemon_factory(FILLER).start()
    topic = "brackenfield/line4/head2/fill"
    x = step_series(12, n=300)
    for i, v in enumerate(x):
        publisher.publish(topic, json.dumps({"v": v, "ts": int((T0 + i) * 1000)}))
    levels = collector(f"sw/levels/{topic}")
    assert levels.wait_for(lambda items: any(isinstance(b, dict) for _, b in items))
    body = [b for _, b in levels.items if isinstance(b, dict)][-1]
    assert body["label"] == "fill volume on head2" and body["state"] == "watching" and body["unit"] == "ml"
    for key in ("level", "sigma"):
        digits = str(body[key]).replace("-", "").replace(".", "").lstrip("0")
        assert len(digits) <= 6, body  # 6 significant digits, as in alert records
    assert d.stop() == 0
    assert levels.wait_for(lambda items: isinstance(items[-1][1], dict) and items[-1][1]["state"] == "offline")
    last = levels.items[-1][1]
    assert last["level"] == body["level"] and "not being watched" in last["note"]


def test_senml_streams_get_readable_names_and_state_saved_under_the_old_name_carries_over(
        tmp_path: Path, daemon_factory, collector, publisher) -> None:
    import numpy as np

    from shiftwatch.core.engine import StreamEngine
    from shiftwatch.core.settings import DetectionSettings
    from shiftwatch.statestore import StateStore

    topic = "brackenfield/line4/filler/senml"
    old = f"{topic}/urn:brackenfield:l4:filler:fill_volume"  # the name releases before this one gave
    new = f"{topic}/l4/filler/fill_volume"
    # A snapshot as an earlier release left it: the stream warmed up under its old name.
    eng = StreamEngine(old, DetectionSettings(), unit="ml")
    x = np.asarray(step_series(13, n=700, step=600))
    eng.process(T0 + np.arange(300.0), x[:300])
    level = eng.level
    StateStore(tmp_path / "state" / "snapshots").save(
        {old: eng.get_state()}, {"saved_at": T0, "journal": "none", "filters": {old: topic}})
    d = daemon_factory(SENML.replace("format: senml\n", "format: senml\n    label: 'filler {name}'\n"))
    d.start()
    log = d.log_text()
    assert f"stream {old} is now named {new}" in log and "restored 1 stream(s)" in log
    alerts = collector("sw/alerts/#")
    for i in range(300, 700):
        pack = [{"bn": "urn:brackenfield:l4:filler:", "bt": T0 + i, "n": "fill_volume", "u": "ml",
                 "v": float(x[i])}]
        publisher.publish(topic, json.dumps(pack))
    assert alerts.wait_for(lambda items: any(b.get("phase") == "confirmed" for _, b in items))
    conf = alerts.records("confirmed")[0]
    assert conf["stream"] == new and alerts.items[-1][0] == f"sw/alerts/{new}"
    assert conf["label"] == "filler l4/filler/fill_volume"
    # No second warm-up: the new name carried on from the old name's baseline.
    assert "new stream" not in d.log_text()
    assert conf["level_before"] == pytest.approx(level, abs=0.1)
    assert d.stop() == 0
