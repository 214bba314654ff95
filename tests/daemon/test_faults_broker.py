"""Broker faults: the real daemon against a real Mosquitto that is restarted, killed or frozen.

Publishers send at QoS 1 on persistent sessions and re-send what the broker
has not acknowledged, as a real QoS 1 publisher does.  What the daemon
processed is read from its real /metrics endpoint over HTTP.  The plant is
the invented Brackenfield bottling line.  Longer runs of the same faults are
in tests/bench/bench_faults_broker.py.
"""

from __future__ import annotations

import signal
import threading
import time
from pathlib import Path

import numpy as np

from .faultkit import (STREAMS_YAML, AlertViewer, TallyPublisher, alert_records_total, metric, metric_values,
                       rejected_by_stream, scrape, settle, topic_of, wait_until)

HEADS = (1, 2, 3)


def series(seed: int, n: int, step: int | None = None, delta: float = 0.0) -> np.ndarray:
    x = 500.0 + 0.6 * np.random.default_rng(seed).standard_normal(n)
    if step is not None:
        x[step:] += delta
    return np.round(x, 4)


def test_broker_restarts_lose_no_sample_and_count_none_twice(broker, daemon_factory) -> None:
    d = daemon_factory(STREAMS_YAML).start()
    viewer = AlertViewer(broker.url, "sw/alerts/#", "faults-alert-viewer").start()
    pub = TallyPublisher(broker.url, "faults-publisher").start()
    n = 900
    data = {h: series(h, n, step=600 if h == 1 else None, delta=1.5) for h in HEADS}
    done = threading.Event()

    def feed() -> None:
        for i in range(n):
            for h in HEADS:
                pub.send(topic_of(h), i, float(data[h][i]))
            time.sleep(0.008)
        done.set()

    feeder = threading.Thread(target=feed)
    feeder.start()
    restarts = 0
    try:
        while not done.is_set() and restarts < 3:
            time.sleep(1.5)
            broker.restart()  # SIGTERM, then the same port and data directory
            restarts += 1
    finally:
        feeder.join()
    assert restarts == 3
    assert pub.wait_all_acked(60)
    want = {topic_of(h): len(pub.acked[topic_of(h)]) for h in HEADS}
    assert want == {topic_of(h): n for h in HEADS}
    got = settle(d.metrics_port, want)
    assert got == want  # nothing lost, nothing counted twice
    text = scrape(d.metrics_port)
    # Every sample reached the engine in order: none was set aside as late.
    assert rejected_by_stream(text, "out_of_order") == {}
    assert sum(metric_values(text, "shiftwatch_samples_rejected_total").values()) == \
        sum(rejected_by_stream(text, "duplicate_time").values())
    assert metric(text, "shiftwatch_broker_connected") == 1
    # Every alert record the daemon made reached the persistent subscriber.
    made = alert_records_total(text)
    assert made >= 2
    assert wait_until(lambda: len(viewer.distinct()) == made, timeout=30)
    assert d.log_text().count("disconnected from broker") >= restarts
    pub.stop()
    viewer.stop()
    assert d.stop() == 0
