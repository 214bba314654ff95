"""Faults around the daemon itself: SIGKILL at random moments, a full or read-only state
directory, and sender clocks that jump.  Each test runs the real daemon in a subprocess
against a real Mosquitto of its own; tests/bench/bench_faults_daemon.py repeats them longer.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from shiftwatch.broker import MosquittoBroker, free_port, hold
from shiftwatch.mqtt import PlainClient

from .conftest import Collector
from .killrun import (
    KillRun,
    Piped,
    Plan,
    fsize_limit,
    metric,
    scrape,
    wait_until,
    without_dac_override,
)

T0 = 1_790_000_000.0


def write_config(path: Path, broker: MosquittoBroker, state: Path, port: int, extra: str = "") -> Path:
    path.write_text(
        f"broker:\n  url: {broker.url}\n  client_id: sw-faults\n  keepalive: 5\n"
        "streams:\n  - topic: oven/+/t\n    format: json\n    value: v\n    time: ts\n    unit: C\n"
        f"{extra}"
        "alerts:\n  topic_prefix: sw\n"
        f"metrics:\n  listen: 127.0.0.1:{port}\n"
        f"state:\n  dir: {state}\n  snapshot_every: 0.5s\n")
    return path


def publish_step(pub: PlainClient, topic: str, times: np.ndarray, seed: int = 5) -> None:
    """A 3-sigma step in the middle of a series of oven temperatures."""
    x = 180.0 + 0.5 * np.random.default_rng(seed).standard_normal(times.size)
    x[times.size // 2:] += 1.5
    for t, v in zip(times, x):
        pub.publish(topic, json.dumps({"v": round(float(v), 3), "ts": float(t)}))


# ------------------------------------------------------------------ SIGKILL
def test_sigkill_at_random_moments_loses_nothing_and_alerts_every_shift(tmp_path: Path,
                                                                        shiftwatch_cmd: list[str]) -> None:
    # Three kills at seeded random moments while three fill-weight streams send
    # 150 readings/s with a 3-sigma step every 400 readings.
    run = KillRun(tmp_path, shiftwatch_cmd, plan=Plan(), kills=3, journal=True, kill_seed=11)
    try:
        t = run.run()
    finally:
        run.close()
    log = run.log()
    assert t.kills == 3 and t.snapshots_checked == 3 and t.snapshots_restored >= 1
    assert t.snapshots_corrupt == 0, log
    # Every reading reached the engines exactly once: none lost, none counted twice.
    assert t.lost == 0, (t, log[-3000:])
    assert t.reprocessed <= 20 * t.kills  # at most the one round between its journal entry and its acks
    # Every injected shift is alerted; a shift alerted again after a restart keeps its id.
    assert t.shifts == 6 and t.shifts_missed == 0, t
    assert t.shifts_with_two_ids == 0 and t.records_off_any_shift == 0, t
    assert "Traceback" not in log


def test_alert_records_in_the_outbox_survive_a_kill_while_the_broker_is_down(
        tmp_path: Path, shiftwatch_cmd: list[str]) -> None:
    broker = MosquittoBroker(workdir=tmp_path / "broker").start()
    port = free_port()
    state = tmp_path / "state"
    cfg = write_config(tmp_path / "sw.yaml", broker, state, port)
    d = Piped(shiftwatch_cmd, cfg, port)
    pub = PlainClient(broker.url, "sw-outage-pub").start()
    viewer: Collector | None = None
    try:
        time.sleep(0.3)  # the daemon's SUBSCRIBE settles
        # The daemon is stopped (SIGSTOP) while one batch of 900 readings with a
        # step reaches its socket; the broker then goes away and the daemon
        # resumes: it processes the batch with no broker to publish to.
        x = 180.0 + 0.5 * np.random.default_rng(23).standard_normal(900)
        x[600:] += 1.5
        batch = json.dumps([{"v": round(float(v), 3), "ts": T0 + i} for i, v in enumerate(x)])
        hold(d.proc)
        pub.publish_wait("oven/z3/t", batch)
        time.sleep(0.3)  # the broker hands the message to the stopped daemon's socket
        pub.stop()
        broker.stop()
        d.proc.send_signal(signal.SIGCONT)
        outbox = state / "outbox"
        assert wait_until(lambda: len(list(outbox.glob("*.msg"))) == 2), d.text()
        # Killed once the round is surely over (and acknowledged to a broker that
        # has gone): a snapshot that ends after its records appeared follows it.
        snapshots = metric(scrape(port), "shiftwatch_snapshots_total")
        assert wait_until(lambda: metric(scrape(port), "shiftwatch_snapshots_total") > snapshots), d.text()
        d.proc.send_signal(signal.SIGKILL)
        d.proc.wait()
        kept = sorted(p.name for p in outbox.glob("*.msg"))
        assert len(kept) == 2
        broker.start()
        viewer = Collector(broker.url, "sw/alerts/#", "sw-outage-viewer")
        viewer.client.start()
        d = Piped(shiftwatch_cmd, cfg, port)
        assert viewer.wait_for(lambda items: len(items) >= 2, timeout=60), d.text()
        assert [r["phase"] for r in viewer.records()] == ["detected", "confirmed"]
        assert len({r["id"] for r in viewer.records()}) == 1
        assert "re-sending 2 alert record(s) kept in the outbox" in d.text()
        assert wait_until(lambda: not list(outbox.glob("*.msg")))
        # The batch was acknowledged to a broker that had gone: it is delivered
        # again, and the restored engine sets every reading aside as already seen
        # (the last as a repeated time, the others as older than it).
        assert wait_until(lambda: sum(metric(scrape(port), "shiftwatch_samples_rejected_total", reason=r)
                                      for r in ("out_of_order", "duplicate_time")) == 900), d.text()
        assert len(viewer.records()) == 2
        assert d.stop() == 0
    finally:
        if viewer is not None:
            viewer.client.stop()
        if d.proc.poll() is None:
            d.proc.kill()
        broker.stop()


# ------------------------------------------------------- state directory faults
def _detects_without_its_disk(broker: MosquittoBroker, d: Piped) -> dict[Any, float]:
    """Send a step; the confirmed record must arrive and the failures be counted."""
    viewer = Collector(broker.url, "sw/alerts/#", f"sw-viewer-{d.port}")
    viewer.client.start()
    pub = PlainClient(broker.url, f"sw-pub-{d.port}").start()
    try:
        time.sleep(0.3)
        publish_step(pub, "oven/z1/t", T0 + np.arange(800.0))
        assert viewer.wait_for(lambda items: any(b.get("phase") == "confirmed" for _, b in items)), d.text()
        assert wait_until(lambda: metric(scrape(d.port), "shiftwatch_snapshot_failures_total") >= 2)
        # Every sample taken in, waited for before the publisher disconnects: paho sends at
        # most 20 QoS 1 messages at a time, and a disconnect drops what it still holds (a
        # loaded CI run counted 752 of 800 when the publisher stopped at the confirmation).
        assert wait_until(lambda: metric(scrape(d.port), "shiftwatch_samples_total", stream="oven/z1/t") == 800)
    finally:
        pub.stop()
        viewer.client.stop()
    m = scrape(d.port)
    assert metric(m, "shiftwatch_samples_total", stream="oven/z1/t") == 800
    assert d.proc.poll() is None
    return m


def test_read_only_state_directory(tmp_path: Path, broker: MosquittoBroker, shiftwatch_cmd: list[str]) -> None:
    state = tmp_path / "state"
    state.mkdir()
    state.chmod(0o555)
    port = free_port()
    cfg = write_config(tmp_path / "sw.yaml", broker, state, port)
    d = Piped(shiftwatch_cmd, cfg, port, preexec_fn=without_dac_override if os.geteuid() == 0 else None)
    try:
        m = _detects_without_its_disk(broker, d)
        assert metric(m, "shiftwatch_outbox_failures_total") >= 2  # both records, kept in memory
        text = d.text()
        assert "outbox: directory" in text and "kept in memory only" in text
        assert "snapshot to" in text and "failed: Permission denied; detection carries on" in text
        assert "Traceback" not in text
        assert not any(state.iterdir())
    finally:
        code = d.stop()
        state.chmod(0o755)
    assert code == 0


def test_full_disk(tmp_path: Path, broker: MosquittoBroker, shiftwatch_cmd: list[str]) -> None:
    # Files of the daemon may not grow past 600 bytes: a snapshot of a watched
    # stream, an alert record in the outbox and a round in the journal all fail.
    state = tmp_path / "state"
    port = free_port()
    cfg = write_config(tmp_path / "sw.yaml", broker, state, port)
    d = Piped(shiftwatch_cmd, cfg, port, preexec_fn=fsize_limit(600))
    try:
        m = _detects_without_its_disk(broker, d)
        assert metric(m, "shiftwatch_outbox_failures_total") >= 2
        assert metric(m, "shiftwatch_journal_failures_total") >= 1
        text = d.text()
        assert "File too large; detection carries on" in text
        assert "alert outbox in" in text and "records are still published" in text
        assert "sample journal in" in text
        assert "Traceback" not in text
    finally:
        code = d.stop()
    assert code == 0


# -------------------------------------------------------------- clock jumps
def test_clock_jumps_are_rejected_and_counted_and_the_stream_carries_on(
        daemon_factory: Any, collector: Any, publisher: PlainClient) -> None:
    d = daemon_factory("  - topic: oven/+/t\n    format: json\n    value: v\n    time: ts\n"
                       "    detection: {max_time_ahead: 10m, max_time_behind: 30d}\n").start()
    seen = collector("sw/alerts/#")
    base = time.time() - 1000.0  # readings stamped by the sender's own (correct) clock
    t = base + np.arange(800.0)
    x = 180.0 + 0.5 * np.random.default_rng(8).standard_normal(800)
    x[500:] += 1.5
    topic = "oven/z2/t"

    def send(ts: float, v: float) -> None:
        publisher.publish(topic, json.dumps({"v": round(float(v), 3), "ts": ts}))

    for i in range(300):
        send(t[i], x[i])
    for i in range(20):  # the sender's clock jumps a day ahead, then is set right
        send(t[300] + 86400.0 + i, 180.0)
    for i in range(5):  # a sender whose clock restarted at the epoch
        send(1.0 + i, 180.0)
    for i in range(10):  # an hour back: older than what the stream has accepted
        send(t[299] - 3600.0 + i, 180.0)
    for i in range(300, 800):
        send(t[i], x[i])
    # 835 sent; the 10 stamped an hour back are not newer than the stream's newest,
    # so they are counted among the rejections only.
    assert wait_until(lambda: metric(scrape(d.metrics_port), "shiftwatch_samples_total", stream=topic) == 825)
    assert seen.wait_for(lambda items: any(b.get("phase") == "confirmed" for _, b in items))
    m = scrape(d.metrics_port)
    rejected = {r: metric(m, "shiftwatch_samples_rejected_total", stream=topic, reason=r)
                for r in ("time_ahead", "time_behind", "out_of_order", "duplicate_time")}
    assert rejected == {"time_ahead": 20, "time_behind": 5, "out_of_order": 10, "duplicate_time": 0}
    rec = seen.records("confirmed")[0]
    assert rec["stream"] == topic and rec["n_before"] + rec["n_after"] >= 400
    assert abs(rec["delta"] - 1.5) < 0.5
    assert "time stamp is too far ahead of the receiving clock" in d.log_text()
    assert d.stop() == 0


def test_max_time_limits_are_validated_with_their_key_path(cli: Any, tmp_path: Path) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("streams:\n  - topic: a/+\n    detection:\n      max_time_ahead: soon\n")
    res = cli("check", "--config", str(bad))
    assert res.returncode != 0
    assert "bad.yaml:4: the 1st stream (streams[0]): detection.max_time_ahead: not a duration: 'soon'" in res.stderr


@pytest.fixture
def cli(shiftwatch_cmd: list[str]) -> Callable[..., subprocess.CompletedProcess[str]]:
    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(shiftwatch_cmd + list(args), capture_output=True, text=True, timeout=60,
                              check=False)

    return run
