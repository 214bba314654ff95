"""The daemon as a process: systemd notification, reload, stream cap, damaged state, logs, and the demo."""

from __future__ import annotations

import gc
import json
import os
import re
import signal
import socket
import subprocess
import time
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import wait_until

T0 = 1_790_000_000.0


def metric(text: str, name: str, **labels: str) -> float | None:
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items()):
                return float(s.value)
    return None




def test_systemd_notification_ready_watchdog_stopping(daemon_factory, tmp_path: Path, monkeypatch) -> None:
    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    sock.settimeout(15)
    monkeypatch.setenv("NOTIFY_SOCKET", str(sock_path))
    monkeypatch.setenv("WATCHDOG_USEC", "400000")  # ping at least every 0.2 s
    d = daemon_factory("  - topic: a/+\n    format: number\n").start()
    got = []
    try:
        while not any("WATCHDOG=1" in g for g in got):
            got.append(sock.recv(4096).decode())
        assert any("READY=1" in g for g in got)
        d.signal(signal.SIGTERM)
        while not any("STOPPING=1" in g for g in got):
            got.append(sock.recv(4096).decode())
    finally:
        sock.close()
    assert d.stop() == 0


def test_the_daemon_s_threads_carry_their_names_in_the_operating_system(daemon_factory) -> None:
    """Once started, every thread of a real daemon process but the main one shows its
    Python name (cut to Linux's 15 bytes, a fact of the kernel's ``comm``: common practice)
    in ``/proc/<pid>/task/<tid>/comm``, where ``top -H`` and the shard benchmark read it;
    the main thread keeps the process's name.  Before 2026-12-05 each showed the
    process's name only."""
    d = daemon_factory("  - topic: a/+\n    format: number\n").start()
    assert d.proc is not None
    task = Path(f"/proc/{d.proc.pid}/task")
    process_name = (task / str(d.proc.pid) / "comm").read_text().strip()

    def names() -> set[str]:
        out = set()
        for t in task.iterdir():
            try:
                out.add((t / "comm").read_text().strip())
            except OSError:  # (a thread gone meanwhile)
                pass
        return out

    want = {"metrics-render", "metrics-http", "shiftwatch-outb", "paho-mqtt-clien"}
    assert wait_until(lambda: want <= names(), 15), names()
    assert (task / str(d.proc.pid) / "comm").read_text().strip() == process_name
    assert not process_name.startswith(("metrics", "shiftwatch-", "paho"))
    d.signal(signal.SIGTERM)
    assert d.stop() == 0


def test_reload_keeps_streams_that_stay(daemon_factory, publisher) -> None:
    d = daemon_factory("  - topic: line/a/+\n    format: number\n  - topic: line/b/+\n    format: number\n").start()
    for i in range(300):
        publisher.publish("line/a/p1", f"{10 + 0.01 * (i % 7):.3f}")
        publisher.publish("line/b/p1", f"{20 + 0.01 * (i % 5):.3f}")
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="line/b/p1") == 300)
    level_a = metric(d.scrape(), "shiftwatch_level", stream="line/a/p1")
    assert level_a is not None
    # Drop line/b and add line/c; line/a must keep its state.
    text = d.config.read_text().replace("line/b/+", "line/c/+")
    d.config.write_text(text)
    d.signal(signal.SIGHUP)
    assert wait_until(lambda: "configuration reloaded" in d.log_text())
    assert "1 stream(s) kept" in d.log_text() and "1 removed" in d.log_text()
    scrape = d.scrape()
    assert metric(scrape, "shiftwatch_level", stream="line/a/p1") == level_a
    assert metric(scrape, "shiftwatch_samples_total", stream="line/b/p1") is None
    # The reload's line comes before the broker answers the new SUBSCRIBE; messages
    # published before its SUBACK are not delivered (MQTT 3.1.1 section 3.8.4).
    assert wait_until(lambda: "took the subscription to line/c/+" in d.log_text())
    for _ in range(50):
        publisher.publish("line/c/p1", "5.0")
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="line/c/p1") == 50)
    # A broken file is refused and the running configuration stays.
    d.config.write_text("streams: [\n")
    d.signal(signal.SIGHUP)
    assert wait_until(lambda: "reload refused" in d.log_text())
    assert d.proc is not None and d.proc.poll() is None
    assert d.stop() == 0


def test_stream_cap_holds(daemon_factory, publisher) -> None:
    d = daemon_factory("  - topic: many/+\n    format: number\n")
    d.config.write_text(d.config.read_text().replace("metrics:\n", "metrics:\n  max_streams: 3\n"))
    d.start()
    for k in range(6):
        for _i in range(10):
            publisher.publish(f"many/s{k}", "1.0")
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_messages_dropped_total", reason="stream_cap") == 30)
    scrape = d.scrape()
    assert metric(scrape, "shiftwatch_streams") == 3
    assert "stream limit of 3 reached" in d.log_text()
    assert d.stop() == 0


def test_damaged_snapshot_is_moved_aside(daemon_factory, tmp_path: Path) -> None:
    d = daemon_factory("  - topic: a/+\n    format: number\n")
    snap_dir = tmp_path / "state" / "snapshots"
    snap_dir.mkdir(parents=True)
    (snap_dir / "streams.json.gz").write_bytes(b"\x1f\x8b this is not a snapshot")
    d.start()
    assert d.proc is not None and d.proc.poll() is None
    assert any(p.name.startswith("streams.json.gz.corrupt") for p in snap_dir.iterdir())
    assert d.stop() == 0
    assert (snap_dir / "streams.json.gz").exists()  # a good one written at shutdown


def test_json_log_lines(daemon_factory, tmp_path: Path, shiftwatch_cmd) -> None:
    d = daemon_factory("  - topic: a/+\n    format: number\n")
    proc = subprocess.Popen(shiftwatch_cmd + ["run", "--config", str(d.config), "--log-format", "json"],
                            stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stderr.readline()  # type: ignore[union-attr]
        rec = json.loads(line)
        assert rec["level"] == "info" and "message" in rec
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=20)
    assert proc.returncode == 0


def test_demo_runs_and_reports(shiftwatch_cmd) -> None:
    # 32 s covers the first scheduled step (filler head 2 at 24 s).  The port asked for is
    # taken, so the demo says why it moves to another.
    env = dict(os.environ)
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        res = subprocess.run(shiftwatch_cmd + ["demo", "--duration", "32s", "--metrics-listen",
                                               f"127.0.0.1:{port}"],
                             capture_output=True, check=False, text=True, timeout=120, env=env)
    assert res.returncode == 0, res.stderr
    out = res.stdout
    assert "Brackenfield Bottling, line 2 (an invented plant)" in out
    assert "Advisory only" in out and "local codes and licensed practice" in out
    assert f"(port {port} is in use (Address already in use), so the demo took a free one" in out
    # The display shows each record's summary, naming the stream by its label, and the
    # time it arrived on the same clock as the summary (UTC by default):
    # "[06:00:25Z] CONFIRMED fill weight on filler head2 stepped up 1.3 g (2.2 sigma) at 06:00:24Z, ..."
    assert re.search(r"\[\d\d:\d\d:\d\dZ\] CONFIRMED fill weight on filler head2 stepped up [\d.]+ g "
                     r"\([\d.]+ sigma\) at \d\d:\d\d:\d\dZ, detected [\d.]+ s later: [\d.]+ -> [\d.]+ g",
                     out), out
    assert not re.search(r"\[\d\d:\d\d\.\d\]", out)  # no relative clock beside the clock times
    assert "What happened" in out
    recap = out.split("What happened")[1]
    # The recap names each sensor as the alerts do.
    head2 = next(line for line in recap.splitlines() if "fill weight on filler head2" in line)
    assert re.search(r"\+1\.3 g at \d\d:\d\d:\d\dZ", head2), head2
    assert "filler head 2" not in out
    # The oven's step (planned at 38 s) lies past the 32 s run: said so, not "no confirmed step".
    oven = next(line for line in recap.splitlines() if "tunnel oven zone3 temperature" in line)
    assert "demo ended first" in oven


def test_the_demo_shows_times_in_the_zone_asked_for_and_refuses_a_duration_without_unit(
        shiftwatch_cmd) -> None:
    res = subprocess.run(shiftwatch_cmd + ["demo", "--duration", "30"], capture_output=True,
                         check=False, text=True, timeout=60)
    assert res.returncode == 2 and "--duration: '30' has no unit (use a number with a unit" in res.stderr
    res = subprocess.run(shiftwatch_cmd + ["demo", "--time-zone", "Mars/Olympus"], capture_output=True,
                         check=False, text=True, timeout=60)
    assert res.returncode == 2 and "--time-zone: unknown time zone 'Mars/Olympus'" in res.stderr
    res = subprocess.run(shiftwatch_cmd + ["demo", "--duration", "29s", "--time-zone", "Asia/Kolkata",
                                           "--metrics-listen", "127.0.0.1:0"],
                         capture_output=True, check=False, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    # Kolkata has no daylight saving time: IST all year.
    assert re.search(r"\[\d\d:\d\d:\d\d IST\] DETECTED fill weight on filler head2 stepped up [\d.]+ g "
                     r"\([\d.]+ sigma\) at \d\d:\d\d:\d\d IST", res.stdout), res.stdout
    assert "every time shown is a clock time in Asia/Kolkata" in res.stdout


def test_demo_stops_cleanly_on_ctrl_c(shiftwatch_cmd) -> None:
    proc = subprocess.Popen(shiftwatch_cmd + ["demo", "--duration", "60s", "--metrics-listen", "127.0.0.1:0"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(6)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "interrupted: stopping cleanly" in out and "What happened" in out
    assert "Traceback" not in err


def test_demo_runs_on_the_embedded_broker(shiftwatch_cmd) -> None:
    # The fallback for machines without Mosquitto: amqtt, MQTT 3.1.1.
    res = subprocess.run(shiftwatch_cmd + ["demo", "--embedded-broker", "--duration", "32s",
                                           "--metrics-listen", "127.0.0.1:0"],
                         capture_output=True, check=False, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "broker   embedded amqtt broker" in res.stdout
    assert "CONFIRMED fill weight on filler head2 stepped up" in res.stdout


def test_alerts_made_while_the_broker_is_down_arrive_after_it(broker, tmp_path: Path) -> None:
    # The real Daemon in this process against a real Mosquitto that is
    # stopped while an event is produced: the records wait in the on-disk
    # outbox and reach a subscriber once the broker is back.
    import numpy as np

    from shiftwatch.config import parse_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics
    from shiftwatch.mqtt import Message

    from .conftest import Collector

    cfg = parse_config(
        f"broker: {{url: '{broker.url}', client_id: sw-outage, keepalive: 5}}\n"
        "streams:\n  - {topic: 'oven/+/t', format: json, value: v, time: ts}\n"
        "alerts: {topic_prefix: sw}\nmetrics: {listen: '127.0.0.1:0'}\n"
        f"state: {{dir: '{tmp_path / 'state'}'}}\n")
    daemon = Daemon(cfg, metrics=Metrics())
    daemon.start()
    # What start-up left alive is out of the cyclic collector's way (gc.freeze),
    # so no full collection walks it in front of an alert.
    assert gc.get_freeze_count() > 0
    try:
        assert wait_until(lambda: daemon.link is not None and daemon.link.connected)
        broker.stop()
        assert wait_until(lambda: daemon.link is not None and not daemon.link.connected)
        x = 180.0 + 0.5 * np.random.default_rng(23).standard_normal(900)
        x[600:] += 1.0
        msgs = [Message(topic="oven/z3/t", payload=json.dumps({"v": float(v), "ts": T0 + i}).encode(),
                        arrived=time.time(), mid=0, qos=0) for i, v in enumerate(x)]
        daemon.process(msgs)
        assert daemon.records_published == 2 and len(daemon.outbox) == 2
        broker.start()
        seen = Collector(broker.url, "sw/alerts/#", "outage-viewer")
        seen.client.start()
        try:
            # paho re-sends the queued records once its reconnect (1 s backoff, growing) succeeds
            assert seen.wait_for(lambda items: len(items) >= 2, timeout=60)
            assert [b["phase"] for _, b in seen.items] == ["detected", "confirmed"]
            assert wait_until(lambda: len(daemon.outbox) == 0, timeout=20)
        finally:
            seen.client.stop()
    finally:
        daemon.request_stop()
        daemon.shutdown()
    # Delivered records leave no file behind: the outbox thread deletes them
    # after the broker's acknowledgement (paho's thread never waits for the disk).
    assert sorted(p.name for p in daemon.outbox.directory.glob("*.msg")) == []
