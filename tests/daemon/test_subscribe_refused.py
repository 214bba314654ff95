"""A subscription the broker refuses is said and tried again until it is taken.

NATS 2.9's MQTT side answers a SUBSCRIBE whose JetStream consumer it could not
create in time with a failure code ("Unable to add JetStream consumer ...
timeout" in its log; seen in the shard tests on the loaded machine, where it
left the tests' viewer without a single alert record).  A daemon that took
that for a subscription would say online and be deaf to the filter.  Here the
refusal is made certain with a NATS permission that denies the filter's
subject, then lifted by a configuration reload.

References outside the project: MQTT 3.1.1 section 3.9.3 (OASIS standard): a
SUBACK return code of 0x80 means the subscription failed; the real
nats-server 2.9 (Debian's package) refuses a subscription its user's
permissions deny with that code and applies new permissions on SIGHUP (both
checked here through paho's SUBACK, before the daemon is judged by them).
Mosquitto 2.0.11 cannot serve here: it grants a subscription its ACL denies
and filters the messages instead.
"""

from __future__ import annotations

import signal
import subprocess
import threading
from pathlib import Path

import pytest

from shiftwatch.broker import port_open, wait_until
from shiftwatch.mqtt import PlainClient

from .conftest import DaemonProcess
from .killrun import metric, scrape
from .natskit import find_nats_server, free_port_block


def _conf(path: Path, port: int, deny: bool) -> None:
    # Every user has explicit publish permissions: nats-server 2.9.10 crashes on a reload
    # while retained messages exist and a user has none (nil permissions in
    # mqttCheckPubRetainedPerms).
    deny_b = ', deny: ["plant.b.>"]' if deny else ""
    perm = f'{{publish: {{allow: [">"]}}, subscribe: {{allow: [">"]{deny_b}}}}}'
    path.write_text(f"server_name: refuser\nlisten: 127.0.0.1:{port}\n"
                    f'jetstream {{ store_dir: "{path.parent / "js"}" }}\n'
                    f"mqtt {{ listen: 127.0.0.1:{port + 1} }}\n"
                    f"authorization {{ users: [ {{user: sw, password: pw, permissions: {perm}}},"
                    ' {user: sensor, password: spw, permissions: {publish: {allow: [">"]}, '
                    'subscribe: {allow: [">"]}}} ] }\n')


def test_a_refused_subscription_is_logged_and_taken_once_the_broker_allows_it(
        tmp_path: Path, shiftwatch_cmd: list[str]) -> None:
    exe = find_nats_server()
    if exe is None:
        pytest.fail("nats-server is not installed (tests/install-and-test.sh installs it)")
    base = free_port_block(3)
    conf = tmp_path / "nats.conf"
    _conf(conf, base, deny=True)
    with open(tmp_path / "nats.log", "wb") as log:
        server = subprocess.Popen([exe, "-c", str(conf)], stdout=log, stderr=subprocess.STDOUT)
    mqtt_url = f"mqtt://127.0.0.1:{base + 1}"
    pw = tmp_path / "daemon.pw"
    pw.write_text("pw\n")
    pw.chmod(0o600)
    cfg = tmp_path / "sw.yaml"
    cfg.write_text(f"broker:\n  url: {mqtt_url}\n  client_id: sw-refused\n  username: sw\n"
                   f"  password_file: {pw}\n  keepalive: 5\n  mqtt_version: \"3.1.1\"\n"
                   "streams:\n  - topic: plant/a/+\n  - topic: plant/b/+\n"
                   f"alerts:\n  topic_prefix: sw\nmetrics:\n  listen: 127.0.0.1:{base + 2}\n"
                   f"state:\n  dir: {tmp_path / 'state'}\n")
    cfg.chmod(0o600)
    d = DaemonProcess(shiftwatch_cmd, cfg, base + 2)
    sensor = None
    try:
        # The reference first: the server refuses plant/b/+ with 0x80 and grants plant/a/+.
        codes: list[tuple[int, bool]] = []
        done = threading.Event()
        probe = PlainClient(mqtt_url, "probe", username="sw", password="pw", mqtt_version="3.1.1")

        def on_subscribe(c: object, u: object, mid: int, reasons: list[object], p: object) -> None:
            codes.extend((int(getattr(r, "value", -1)), bool(getattr(r, "is_failure", False))) for r in reasons)
            if len(codes) >= 2:
                done.set()

        probe.client.on_subscribe = on_subscribe
        assert wait_until(lambda: port_open(base + 1), 30), (tmp_path / "nats.log").read_text()
        probe.start()
        probe.client.subscribe("plant/b/+", qos=1)
        probe.client.subscribe("plant/a/+", qos=1)
        assert done.wait(20), codes
        probe.stop()
        assert codes == [(0x80, True), (1, False)], codes

        d.start(timeout=30)
        assert wait_until(lambda: "refused the subscription to plant/b/+" in d.log_text(), 30), d.log_text()
        assert "refused the subscription to plant/a/+" not in d.log_text()
        sensor = PlainClient(mqtt_url, "sensor-1", username="sensor", password="spw",
                             mqtt_version="3.1.1").start()
        _conf(conf, base, deny=False)
        server.send_signal(signal.SIGHUP)  # nats-server reloads its configuration
        assert wait_until(lambda: "took the subscription to plant/b/+" in d.log_text(), 60), d.log_text()

        def fed() -> bool:
            sensor.publish("plant/b/x", "1.0", qos=1)
            return metric(scrape(base + 2), "shiftwatch_samples_total", stream="plant/b/x") > 0

        assert wait_until(fed, 30, every=0.5), d.log_text()
    finally:
        if sensor is not None:
            sensor.stop()
        if d.proc is not None:
            d.stop()
        server.terminate()
        server.wait(10)

