"""A sensor whose readings stopped changing, end to end: the real daemon (`shiftwatch run` in a
subprocess) against a private Mosquitto, its /metrics scraped over HTTP.

A fill-weight sensor of the invented Brackenfield plant freezes at its level.  Before,
nothing said so (the stream read ``watching``; 931425f has no such gauge, and this test
failed there waiting for it).  Now ``shiftwatch_stream_repeating`` goes to 1, the status
JSON and ``shiftwatch status`` name the value and since when, one log line says it, and all
of it goes back when the readings vary again.  The readings come one JSON object a
message, so the stream sits in the daemon's pool of calm streams (core/calm.py) while it
freezes: its samples reach the engine in batches, and the flag must come all the same.
"""

from __future__ import annotations

import json
import subprocess
import time
import urllib.request
from typing import Any

import numpy as np

from shiftwatch.mqtt import PlainClient

from .faultkit import metric_matching
from .test_floor import STREAMS  # the Brackenfield fill weights, as JSON objects with a label

TOPIC = "brackenfield/line2/head7/fill"
OTHER = "brackenfield/line2/head8/fill"


def _send(pub: PlainClient, topic: str, t0: float, values: np.ndarray, first: int) -> None:
    vals = values.tolist()
    for i, v in enumerate(vals[:-1]):
        pub.publish(topic, json.dumps({"ts": t0 + first + i, "v": v}))
    pub.publish_wait(topic, json.dumps({"ts": t0 + first + len(vals) - 1, "v": vals[-1]}))


def _wait(d: Any, want: float, timeout: float = 60.0, stream: str = TOPIC) -> str:
    deadline = time.monotonic() + timeout
    while True:
        text = d.scrape()
        v = metric_matching(text, "shiftwatch_stream_repeating", stream=stream)
        if v == want:
            return text
        assert time.monotonic() < deadline, f"shiftwatch_stream_repeating never reached {want} (last {v})"
        time.sleep(0.1)


def _status(d: Any) -> dict[str, Any]:
    with urllib.request.urlopen(f"http://127.0.0.1:{d.metrics_port}/status.json", timeout=5) as r:
        doc = json.loads(r.read())
    return {s["stream"]: s for s in doc["streams"]}


def test_a_frozen_sensor_raises_the_gauge_and_it_falls_when_the_readings_vary_again(
        daemon_factory, publisher, shiftwatch_cmd) -> None:
    rng = np.random.default_rng(42)
    n = 500
    x = np.round((500.0 + 0.4 * rng.standard_normal(2 * n)) / 0.01) * 0.01
    y = np.round((500.0 + 0.4 * rng.standard_normal(2 * n)) / 0.01) * 0.01
    t0 = time.time() - 3000.0
    d = daemon_factory(STREAMS).start()
    try:
        _send(publisher, TOPIC, t0, x[:n], 0)
        _send(publisher, OTHER, t0, y[:n], 0)
        _wait(d, 0.0)
        # (the two topics' messages may be taken in either order: wait for the other's too)
        _wait(d, 0.0, stream=OTHER)
        assert _status(d)[TOPIC]["repeating"] is None
        # The sensor freezes at its level: 40 readings of 500 g, which trip no test of the level.
        _send(publisher, TOPIC, t0, np.full(40, 500.0), n)
        _send(publisher, OTHER, t0, y[n:n + 40], n)
        text = _wait(d, 1.0)
        assert metric_matching(text, "shiftwatch_stream_repeating", stream=OTHER) == 0.0
        assert metric_matching(text, "shiftwatch_alert_records_total", stream=TOPIC) is None  # no record
        rep = _status(d)[TOPIC]["repeating"]
        assert rep["value"] == 500.0 and rep["readings"] >= 3
        assert rep["since"].startswith(time.strftime("%Y-%m-%dT%H:%M", time.gmtime(t0 + n)))
        assert rep["text"].startswith("one value 500 g since ")
        table = subprocess.run([*shiftwatch_cmd, "status", "--config", str(d.config)], capture_output=True,
                               text=True, timeout=60, check=False)
        assert table.returncode == 0, table.stderr
        row = next(line for line in table.stdout.splitlines() if "filler head7" in line)
        assert "(one value 500 g since " in row
        assert "(one value" not in next(line for line in table.stdout.splitlines() if "filler head8" in line)
        # The readings vary again.
        _send(publisher, TOPIC, t0, x[n:n + 100], n + 40)
        _wait(d, 0.0)
        assert _status(d)[TOPIC]["repeating"] is None
    finally:
        assert d.stop() == 0
    log = d.log_text()
    start = [line for line in log.splitlines() if "repeat one value" in line]
    end = [line for line in log.splitlines() if "vary again" in line]
    assert len(start) == 1 and "fill weight on filler head7" in start[0] and "500 g" in start[0], log[-3000:]
    assert "a stuck sensor is possible" in start[0] and "advisory only" in start[0]
    assert len(end) == 1 and "fill weight on filler head7" in end[0], log[-3000:]
    assert "head8" not in " ".join(start + end)


def test_a_frozen_sensor_in_the_pool_of_calm_streams_is_flagged_in_the_round_its_reading_came(tmp_path) -> None:
    """In process, rounds of one sample per stream (no idle time: the pool hands a stream's
    samples to its engine only when it must).  20 calm streams; one freezes at its level.
    Its flag is up in the round of the reading that makes the run improbable, as it is
    for a daemon without the pool (the reference, whose engines take each sample as it
    comes), and down in the round of the first reading that differs; the records of the
    two daemons are the same."""
    from shiftwatch.config import load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics
    from shiftwatch.mqtt import Message

    t0, warm, n = 1_790_000_000.0, 600, 20
    rng = np.random.default_rng(9)
    data = np.round((500.0 + 0.4 * rng.standard_normal((n, warm + 200))) / 0.01) * 0.01
    frozen = slice(warm + 50, warm + 120)
    data[3, frozen] = 500.0
    daemons = {}
    for pool in (True, False):
        path = tmp_path / f"pool{pool}.yaml"
        path.write_text("streams:\n  - {topic: 'brackenfield/line2/+/fill', format: json, value: v, time: ts, "
                        f"unit: g}}\nmetrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / str(pool)}'}}\n")
        d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics(), pool=pool)
        d.restore()
        d.process([Message(f"brackenfield/line2/head{i}/fill",
                           json.dumps([{"v": float(v), "ts": t0 + j} for j, v in enumerate(data[i, :warm])]).encode(),
                           t0 + warm, 0, 0) for i in range(n)])
        daemons[pool] = d
    name = "brackenfield/line2/head3/fill"
    flags: dict[bool, list[bool]] = {True: [], False: []}
    pooled = 0
    for k in range(warm, warm + 200):
        for pool, d in daemons.items():
            d.process([Message(f"brackenfield/line2/head{i}/fill", json.dumps({"v": float(data[i, k]), "ts": t0 + k}).encode(),
                               t0 + k, 0, 0) for i in range(n)])
            flags[pool].append(d.metrics.streams()[name].repeating is not None)
            if pool and d.pool is not None and name in d.pool and d.pool.waiting(name):
                pooled += 1
    assert flags[True] == flags[False]
    up = [k for k, f in zip(range(warm, warm + 200), flags[True]) if f]
    assert up and up[0] < frozen.stop and up[0] - frozen.start <= 10, up
    assert up[-1] == frozen.stop - 1 and len(up) == frozen.stop - up[0]
    assert pooled > 100  # the streams sat in the pool
