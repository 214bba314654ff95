"""``shiftwatch demo``: a private broker, an invented line of sensors, and the daemon.

The line is Brackenfield Bottling's line 2, a plant we made up: three filler
heads report fill weights as JSON, a tunnel oven reports a zone temperature
as SenML, and a capper reports its torque as a plain number.  Sensors sample
ten times a second so the demo moves quickly; three steps are scheduled (a
nozzle swap on filler head 2, a burner retune on the oven, a worn clutch on
the capper) and a few lone spikes are thrown in.  The daemon runs exactly as
``shiftwatch run`` would, and the alerts are shown as they arrive over MQTT.
"""

from __future__ import annotations

import json
import logging
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from typing import Any, TextIO

import numpy as np

from shiftwatch.broker import EmbeddedBroker, MosquittoBroker, find_mosquitto, free_port
from shiftwatch.config import Config, parse_config
from shiftwatch.core.engine import ADVISORY
from shiftwatch.core.timefmt import parse_time
from shiftwatch.daemon import Daemon
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import PlainClient

RATE_HZ = 10.0
PREFIX = "shiftwatch/demo"


@dataclass(frozen=True)
class Sensor:
    label: str  # what an operator calls it
    topic: str
    stream: str  # the stream name the daemon gives it
    fmt: str
    level: float
    sigma: float
    unit: str
    step_at: float | None = None  # seconds after start
    step: float = 0.0
    cause: str = ""


SENSORS = (
    Sensor("filler head 1 fill weight", "brackenfield/line2/filler/head1/fill",
           "brackenfield/line2/filler/head1/fill", "json", 500.4, 0.6, "g"),
    Sensor("filler head 2 fill weight", "brackenfield/line2/filler/head2/fill",
           "brackenfield/line2/filler/head2/fill", "json", 500.1, 0.6, "g",
           step_at=24.0, step=1.3, cause="nozzle swapped"),
    Sensor("filler head 3 fill weight", "brackenfield/line2/filler/head3/fill",
           "brackenfield/line2/filler/head3/fill", "json", 499.8, 0.6, "g"),
    Sensor("tunnel oven zone 3 temperature", "brackenfield/line2/oven/senml",
           "brackenfield/line2/oven/senml/zone3", "senml", 182.0, 0.5, "Cel",
           step_at=38.0, step=-1.4, cause="burner retuned"),
    Sensor("capper torque", "brackenfield/line2/capper/torque",
           "brackenfield/line2/capper/torque", "number", 2.40, 0.05, "N m",
           step_at=52.0, step=0.11, cause="clutch wearing"),
)

CONFIG_TEMPLATE = """\
broker:
  url: {url}
  client_id: shiftwatch-demo
  mqtt_version: "{version}"
streams:
  - topic: brackenfield/line2/filler/+/fill
    format: json
    value: weight_g
    time: ts
    unit: g
    label: "fill weight on filler {{1}}"
  - topic: brackenfield/line2/oven/senml
    format: senml
    label: "tunnel oven {{name}} temperature"
  - topic: brackenfield/line2/capper/torque
    format: number
    unit: N m
    label: capper torque
detection:
  min_shift_sigma: 1.0
  false_alarm_every: 7d
alerts:
  topic_prefix: {prefix}
metrics:
  listen: {listen}
state:
  dir: {state}
  snapshot_every: 10s
"""


def payload_for(sensor: Sensor, t: float, value: float) -> bytes:
    if sensor.fmt == "json":
        return json.dumps({"weight_g": round(value, 2), "ts": int(t * 1000)}).encode()
    if sensor.fmt == "senml":
        return json.dumps([{"bn": "", "bt": round(t, 3), "n": "zone3", "u": sensor.unit,
                            "v": round(value, 2)}]).encode()
    return f"{value:.3f}".encode()


class Line:
    """The simulated sensors, publishing in a thread until stopped."""

    def __init__(self, url: str, version: str, start: float, random_state: int = 2026) -> None:
        self.client = PlainClient(url, "brackenfield-line2-sensors", mqtt_version=version)
        self.start_time = start
        self.rng = np.random.default_rng(random_state)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="demo-line", daemon=True)
        self.sent = 0

    def start(self) -> None:
        self.client.start()
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        self.client.stop()

    def _run(self) -> None:
        k = 0
        while not self._stop.is_set():
            t = self.start_time + k / RATE_HZ
            delay = t - time.time()
            if delay > 0:
                if self._stop.wait(delay):
                    break
            elapsed = t - self.start_time
            for s in SENSORS:
                v = s.level + s.sigma * float(self.rng.standard_normal())
                if s.step_at is not None and elapsed >= s.step_at:
                    v += s.step
                if self.rng.random() < 0.002:  # a lone spike: a bumped sensor, a glitch
                    v += 8 * s.sigma * (1 if self.rng.random() < 0.5 else -1)
                self.client.publish(s.topic, payload_for(s, t, v))
                self.sent += 1
            k += 1


def _clock(start: float) -> str:
    e = max(0.0, time.time() - start)
    return f"{int(e // 60):02d}:{e % 60:04.1f}"


def run_demo(duration: float = 75.0, *, out: TextIO = sys.stdout, metrics_listen: str = "127.0.0.1:9650",
             use_embedded: bool = False) -> int:
    """Run the demo for ``duration`` seconds (Ctrl-C stops it early, cleanly)."""
    w = out.write
    broker: Any
    if not use_embedded and find_mosquitto() is not None:
        broker = MosquittoBroker().start()
        version, kind = "5", "mosquitto"
    else:
        broker = EmbeddedBroker().start()
        version, kind = "3.1.1", "embedded amqtt broker"
    host, _, port = metrics_listen.rpartition(":")
    if port != "0":
        try:
            import socket

            with socket.socket() as probe:
                probe.bind((host, int(port)))
        except OSError:
            metrics_listen = f"{host}:{free_port()}"
    state_dir = tempfile.mkdtemp(prefix="shiftwatch-demo-state-")
    cfg: Config = parse_config(CONFIG_TEMPLATE.format(url=broker.url, version=version, prefix=PREFIX,
                                                      listen=metrics_listen, state=state_dir))
    log = logging.getLogger("shiftwatch.demo.daemon")
    log.setLevel(logging.WARNING)
    daemon = Daemon(cfg, logger=log, metrics=Metrics())
    start = time.time()
    results: dict[str, list[dict[str, Any]]] = {}
    lock = threading.Lock()

    def on_alert(topic: str, payload: bytes) -> None:
        try:
            rec = json.loads(payload)
        except ValueError:
            return
        with lock:
            results.setdefault(rec["stream"], []).append(rec)
            w(f"[{_clock(start)}] {rec.get('summary', rec['phase'])}\n")
            out.flush()

    w("shiftwatch demo: Brackenfield Bottling, line 2 (an invented plant)\n")
    w(f"  broker   {kind} on {broker.url}\n")
    w("  sensors  3 filler heads (JSON, g), tunnel oven zone 3 (SenML, Cel), capper torque (number, N m),\n"
      f"           {RATE_HZ:.0f} samples a second each; the first {cfg.detection.warmup_samples} samples of "
      "each stream teach shiftwatch its normal level\n")
    for s in SENSORS:
        if s.step_at is not None:
            w(f"  planned  {s.step_at:4.0f} s: {s.label} steps {'up' if s.step > 0 else 'down'} "
              f"{abs(s.step):g} {s.unit} ({s.cause})\n")
    w(f"  alerts   MQTT {PREFIX}/alerts/<stream>; levels {PREFIX}/levels/<stream>\n")
    w(f"  {ADVISORY}\n\n")
    out.flush()
    viewer = PlainClient(broker.url, "shiftwatch-demo-viewer", subscribe=[f"{PREFIX}/alerts/#"],
                         on_message=on_alert, mqtt_version=version)
    line = Line(broker.url, version, start)
    runner = threading.Thread(target=daemon.run, kwargs={"install_signals": False}, name="daemon")
    code = 0
    try:
        viewer.start()
        runner.start()
        while daemon.server is None and runner.is_alive():
            time.sleep(0.05)
        if daemon.server is not None:
            w(f"  metrics  http://{host or '127.0.0.1'}:{daemon.server.port}/metrics\n\n")
        line.start()
        deadline = start + duration
        while time.time() < deadline and runner.is_alive():
            time.sleep(0.2)
    except KeyboardInterrupt:
        w("\ninterrupted: stopping cleanly\n")
        code = 130
    finally:
        line.stop()
        ended = time.time() - start  # the sensors' last sample
        time.sleep(0.5)
        daemon.request_stop()
        runner.join(timeout=15)
        viewer.stop()
        broker.stop()
    w(_recap(results, start, ended))
    out.flush()
    return code


def _recap(results: dict[str, list[dict[str, Any]]], start: float, ended: float) -> str:
    lines = ["\nWhat happened", f"  {'sensor':<32}{'planned step':>16}{'found':>22}{'started':>10}{'alerted':>10}"]
    for s in SENSORS:
        recs = results.get(s.stream, [])
        conf = [r for r in recs if r["phase"] == "confirmed"]
        planned = f"{s.step:+g} {s.unit} @{s.step_at:.0f}s" if s.step_at is not None else "none"
        if conf:
            r = conf[-1]
            started = parse_time(r["shift_at"]) - start
            alerted = parse_time(r["detected_at"]) - start
            lines.append(f"  {s.label:<32}{planned:>16}{r['delta']:>+15.3g} {s.unit:<6}"
                         f"{started:>9.1f}s{alerted:>9.1f}s")
        elif s.step_at is not None and s.step_at >= ended:
            lines.append(f"  {s.label:<32}{planned:>16}{'demo ended first':>22}")
        else:
            lines.append(f"  {s.label:<32}{planned:>16}{'no confirmed step':>22}")
    dismissed = sum(r["phase"] == "dismissed" for rs in results.values() for r in rs)
    lines.append(f"  dismissed detections: {dismissed}")
    lines.append("  (times are seconds after the demo started; 'alerted' is when the test tripped;\n"
                 "   'found' is the step fitted when the shift was confirmed, from the few seconds of\n"
                 "   samples seen since it began, so noise moves it by a fraction of a sigma)\n")
    return "\n".join(lines) + "\n"


__all__ = ["run_demo", "SENSORS"]
