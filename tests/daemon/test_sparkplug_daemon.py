"""Sparkplug B end to end: an edge node publishing through a real Mosquitto to the real daemon.

The edge node of the invented plant (Brackenfield Bottling, line 2: group
``Brackenfield``, edge node ``Line2Edge``, device ``Filler3``) is played by a
plain MQTT client that publishes births, data by alias and deaths built with
the schema of :mod:`shiftwatch.sparkplug`.  The message sequences follow
Sparkplug 3.0 ("Operational Behavior": NBIRTH with seq 0 and bdSeq, then
DBIRTH, then DDATA with seq counting on from the birth and wrapping after
255; recalled from memory).

The last test fuzzes the whole message path in process, as
tests/daemon/test_fuzz.py does for the other formats.
"""

from __future__ import annotations

import logging
import math
import urllib.request
from collections import Counter as Tally
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import MosquittoBroker, wait_until
from shiftwatch.config import parse_config
from shiftwatch.core.timefmt import parse_time
from shiftwatch.daemon import Daemon
from shiftwatch.decode import REASONS as DECODE_REASONS
from shiftwatch.metrics import Metrics
from shiftwatch.sparkplug import REASONS, payload_class

from .faultkit import metric_matching as metric_value
from .fuzz_strategies import PROPERTY, SP_TOPICS
from .test_daemon_mqtt import wait_metric
from .test_fuzz import SHELL_REASONS, deliver, drops, received, samples
from .test_sparkplug import SP_BODIES

P = payload_class()
T0 = 1_790_000_000.0  # 2026-09-21
GROUP, NODE, DEVICE = "Brackenfield", "Line2Edge", "Filler3"
STREAM = f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
# Sparkplug 3.0, "Datatypes" (from memory).
UINT64, DOUBLE, BOOLEAN, STRING = 8, 10, 11, 12
N, STEP = 800, 500
SP_STREAMS = """\
  - topic: 'spBv1.0/Brackenfield/#'
    format: sparkplug_b
    unit: g
    label: '{name} on {node}'
"""


def body(metrics: list[dict[str, Any]], *, seq: int | None, ts_ms: int) -> bytes:
    p = P(timestamp=ts_ms)
    if seq is not None:
        p.seq = seq
    for m in metrics:
        p.metrics.add(**m)
    return bytes(p.SerializeToString())


def topic(kind: str, device: bool = False) -> str:
    return f"spBv1.0/{GROUP}/{kind}/{NODE}" + (f"/{DEVICE}" if device else "")


class EdgeNode:
    """Publishes the edge node's messages with seq counting on (0 to 255, then 0)."""

    def __init__(self, client: Any) -> None:
        self.client = client
        self.seq = 0

    def send(self, kind: str, metrics: list[dict[str, Any]], ts: float, *, device: bool = False) -> None:
        seq = None if kind == "NDEATH" else self.seq
        self.client.publish(topic(kind, device), body(metrics, seq=seq, ts_ms=int(ts * 1000)))
        if kind != "NDEATH":
            self.seq = (self.seq + 1) % 256

    def nbirth(self, ts: float, bd_seq: int = 0) -> None:
        self.seq = 0
        self.send("NBIRTH", [{"name": "bdSeq", "datatype": UINT64, "long_value": bd_seq},
                             {"name": "Line Speed", "alias": 10, "datatype": DOUBLE, "double_value": 240.0}], ts)

    def dbirth(self, ts: float, value: float) -> None:
        self.send("DBIRTH", [
            {"name": "Fill Weight", "alias": 1, "datatype": DOUBLE, "double_value": value, "timestamp": int(ts * 1000)},
            {"name": "Running", "alias": 2, "datatype": BOOLEAN, "boolean_value": True},
            {"name": "Recipe", "alias": 3, "datatype": STRING, "string_value": "still water 0.5 l"}], ts, device=True)


def series(seed: int, level: float, sigma: float, delta: float) -> np.ndarray:
    x = level + sigma * np.random.default_rng(seed).standard_normal(N)
    x[STEP:] += delta
    return np.round(x, 4)


def stale(d: Any, stream: str = STREAM) -> float | None:
    return metric_value(d.scrape(), "shiftwatch_stream_stale", stream=stream)


def test_edge_node_births_aliases_step_death_and_rebirth(daemon_factory, collector, publisher) -> None:
    d = daemon_factory(SP_STREAMS).start()
    alerts = collector("sw/alerts/#")
    commands = collector("spBv1.0/+/NCMD/#")
    edge = EdgeNode(publisher)
    # Data before any birth: set aside and counted; no rebirth request (off by default).
    edge.seq = 17
    edge.send("DDATA", [{"alias": 1, "double_value": 500.0}], T0 - 10, device=True)
    wait_metric(d, "shiftwatch_messages_dropped_total", 1, reason="sparkplug_no_birth")

    edge.nbirth(T0 - 2)
    edge.dbirth(T0 - 1, 500.0)
    x = series(1, 500.0, 0.6, 0.9)
    for i, v in enumerate(x):  # by alias only, each with its own time stamp; seq wraps three times
        edge.send("DDATA", [{"alias": 1, "double_value": float(v), "timestamp": int((T0 + i) * 1000)},
                            {"alias": 2, "boolean_value": True}], T0 + i + 0.5, device=True)
    assert alerts.wait_for(lambda items: any(isinstance(b, dict) and b.get("phase") == "confirmed"
                                             for _, b in items))
    conf = alerts.records("confirmed")[0]
    assert conf["stream"] == STREAM and conf["label"] == f"{DEVICE}/Fill Weight on {NODE}"
    assert conf["unit"] == "g" and conf["direction"] == "up"
    assert abs(parse_time(conf["shift_at"]) - (T0 + STEP)) <= 3  # the metrics' own time stamps
    assert f"on {NODE}" in conf["summary"]
    assert any(t == f"sw/alerts/{STREAM}" for t, _ in alerts.items)
    text = wait_metric(d, "shiftwatch_samples_total", N + 1, stream=STREAM)  # the DBIRTH's value too
    assert metric_value(text, "shiftwatch_samples_total", stream=f"{GROUP}/{NODE}/Line Speed") == 1
    assert metric_value(text, "shiftwatch_stream_stale", stream=STREAM) == 0
    assert metric_value(text, "shiftwatch_sparkplug_metrics_skipped_total", kind="boolean") == N + 1
    assert metric_value(text, "shiftwatch_sparkplug_metrics_skipped_total", kind="string") == 1
    assert metric_value(text, "shiftwatch_sparkplug_messages_total", type="DDATA") == N
    assert metric_value(text, "shiftwatch_sparkplug_seq_gaps_total") == 0

    # A gap in seq: counted and logged, the message used.
    edge.seq = (edge.seq + 3) % 256
    edge.send("DDATA", [{"alias": 1, "double_value": 500.9, "timestamp": int((T0 + N) * 1000)}], T0 + N,
              device=True)
    wait_metric(d, "shiftwatch_sparkplug_seq_gaps_total", 1)
    wait_metric(d, "shiftwatch_samples_total", N + 2, stream=STREAM)

    # DDEATH: the device's streams are stale; its next DBIRTH makes them live again.
    edge.send("DDEATH", [], T0 + N + 1, device=True)
    wait_metric(d, "shiftwatch_stream_stale", 1, stream=STREAM)
    assert stale(d, f"{GROUP}/{NODE}/Line Speed") == 0  # the node lives on
    # The status page says so too.
    import json
    import urllib.parse
    import urllib.request

    url = f"http://127.0.0.1:{d.metrics_port}/status/stream.json?name={urllib.parse.quote(STREAM)}"
    with urllib.request.urlopen(url, timeout=5) as resp:
        assert json.loads(resp.read())["status"]["stale"] is True
    edge.dbirth(T0 + N + 2, 501.0)
    wait_metric(d, "shiftwatch_stream_stale", 0, stream=STREAM)

    # NDEATH (the will, bdSeq of the birth): node and device streams stale.
    edge.send("NDEATH", [{"name": "bdSeq", "datatype": UINT64, "long_value": 0}], T0 + N + 3)
    wait_metric(d, "shiftwatch_stream_stale", 1, stream=f"{GROUP}/{NODE}/Line Speed")
    assert stale(d) == 1

    # Nothing was written to the edge node: the marker is the only command seen.
    publisher.publish(topic("NCMD"), b"marker")
    assert commands.wait_for(lambda items: any(b == b"marker" for _, b in items))
    assert [b for _, b in commands.items] == [b"marker"]
    assert d.stop() == 0
    log = d.log_text()
    assert "before its NBIRTH" in log and "set rebirth_requests: true" in log
    assert "has seq" in log and "DDEATH of device Brackenfield/Line2Edge/Filler3" in log
    assert "NDEATH of edge node Brackenfield/Line2Edge" in log


def test_rebirth_request_when_allowed(daemon_factory, collector, publisher) -> None:
    d = daemon_factory(SP_STREAMS + "    rebirth_requests: true\n").start()
    commands = collector("spBv1.0/+/NCMD/#")
    edge = EdgeNode(publisher)
    edge.seq = 40
    for k in range(3):  # three messages before the birth: one request (at most one per 30 s)
        edge.send("DDATA", [{"alias": 1, "double_value": 500.0}], T0 + k, device=True)
    assert commands.wait_for(lambda items: len(items) >= 1)
    wait_metric(d, "shiftwatch_messages_dropped_total", 3, reason="sparkplug_no_birth")
    t, payload = commands.items[0]
    assert t == topic("NCMD")
    m = P.FromString(payload).metrics[0]
    # Sparkplug 3.0, "Node Control/Rebirth": a Boolean metric set to true (from memory).
    assert (m.name, m.datatype, m.boolean_value) == ("Node Control/Rebirth", BOOLEAN, True)
    assert metric_value(d.scrape(), "shiftwatch_sparkplug_rebirth_requests_total") == 1
    # The edge node answers with its births; its data is used from then on.
    edge.nbirth(T0 + 5)
    edge.dbirth(T0 + 6, 500.0)
    edge.send("DDATA", [{"alias": 1, "double_value": 500.1, "timestamp": int((T0 + 7) * 1000)}], T0 + 7,
              device=True)
    wait_metric(d, "shiftwatch_samples_total", 2, stream=STREAM)
    publisher.publish(topic("NCMD"), b"marker")
    assert commands.wait_for(lambda items: any(b == b"marker" for _, b in items))
    assert len(commands.items) == 2  # still one request
    assert d.stop() == 0
    assert "asked Sparkplug edge node Brackenfield/Line2Edge for its births again" in d.log_text()


# ---------------------------------------------------------------------------
# Fuzz of the message path (as tests/daemon/test_fuzz.py does for the other formats)

@pytest.fixture(scope="module")
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[MosquittoBroker]:
    try:
        b = MosquittoBroker(workdir=tmp_path_factory.mktemp("sp-broker")).start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test broker: {exc}")
    yield b
    b.stop()


@contextmanager
def live_daemon(broker: MosquittoBroker, state: Path) -> Iterator[Daemon]:
    cfg = parse_config(
        f"broker: {{url: '{broker.url}', client_id: sp-fuzz, keepalive: 5}}\n"
        "streams:\n  - {topic: 'spBv1.0/#', format: sparkplug_b, rebirth_requests: true}\n"
        "detection: {warmup_samples: 20, window_samples: 60, baseline_guard: 10, confirm_min_samples: 10}\n"
        "alerts: {topic_prefix: spfz}\n"
        "metrics: {listen: '127.0.0.1:0', max_streams: 30}\n"
        f"state: {{dir: '{state}'}}\n")
    log = logging.getLogger("shiftwatch.test.sp-fuzz")
    log.propagate = False
    daemon = Daemon(cfg, metrics=Metrics(), logger=log)
    daemon.start()
    try:
        assert wait_until(lambda: daemon.link is not None and daemon.link.connected)
        yield daemon
    finally:
        daemon.request_stop()
        daemon.shutdown()


def used(d: Daemon) -> float:
    total = 0.0
    for fam in d.metrics.sparkplug().messages.collect():
        total += sum(s.value for s in fam.samples if s.name.endswith("_total"))
    return total


def test_fuzz_the_sparkplug_message_path(mosquitto: MosquittoBroker, tmp_path: Path) -> None:
    with live_daemon(mosquitto, tmp_path / "state") as d:
        tally: Tally[str] = Tally()

        @settings(PROPERTY, max_examples=150)
        @given(msgs=st.lists(st.tuples(SP_TOPICS, SP_BODIES), min_size=1, max_size=6))
        def prop(msgs: list[tuple[str, bytes]]) -> None:
            before_r, before_d, before_u, before_s = received(d), drops(d), used(d), samples(d)
            for i, (t, p) in enumerate(msgs):
                deliver(d, t.encode("utf-8", "surrogatepass"), p, mid=i + 1)
            while len(d.inbox):
                d.round(timeout=0.0)
            after = drops(d)
            delta = {k: v - before_d.get(k, 0.0) for k, v in after.items() if v != before_d.get(k, 0.0)}
            tally.update({k: int(v) for k, v in delta.items()})
            assert "internal_error" not in delta, delta
            assert set(delta) <= set(REASONS) | set(DECODE_REASONS) | SHELL_REASONS, delta
            assert received(d) - before_r == len(msgs)
            # Every message was taken in (counted by type) or has a reason counted.
            assert used(d) - before_u + sum(delta.values()) >= len(msgs)
            assert samples(d) >= before_s  # the engines only ever take samples in

        prop()
        assert d.link is not None and d.link.connected
        assert len(d.engines) <= 30
        with urllib.request.urlopen(f"http://127.0.0.1:{d.server.port}/metrics", timeout=10) as r:  # type: ignore[union-attr]
            families = list(text_string_to_metric_families(r.read().decode("utf-8")))
        stale_streams = {s.labels["stream"] for f in families for s in f.samples
                         if s.name == "shiftwatch_stream_stale" and s.value == 1}
        assert all(math.isfinite(s.value) for f in families for s in f.samples)
        assert stale_streams == set(d.sparkplug.stale)  # the gauge and the daemon's flags agree
        assert all(d.stale_since(x) is not None for x in stale_streams)
        assert d.stale_since("spBv1.0/no/such/stream") is None
        for reason in ("sparkplug_invalid", "sparkplug_not_data", "sparkplug_no_birth"):
            assert tally[reason] > 0, (reason, tally)
