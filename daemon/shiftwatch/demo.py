"""``shiftwatch demo``: a private broker, an invented line of sensors, and the daemon.

The line is Brackenfield Bottling's line 2, a plant we made up: three filler
heads report fill weights as JSON, a tunnel oven reports a zone temperature
as SenML, and a capper reports its torque as a plain number.  Sensors sample
ten times a second so the demo moves quickly; four steps are scheduled (a
nozzle swap on filler head 2, a burner retune on the oven, a worn clutch on
the capper, and a recipe change on filler head 3) and a few lone spikes are
thrown in.  The recipe change is announced beforehand on the command topic,
as the plant's MES would, so it is recorded as ``planned`` and raises no
alarm, beside the unannounced steps that do.  The daemon runs exactly as
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
from shiftwatch.core.records import ADVISORY
from shiftwatch.core.timefmt import format_time, parse_time
from shiftwatch.daemon import Daemon
from shiftwatch.display import clock, zone_label
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import PlainClient

RATE_HZ = 10.0
PREFIX = "shiftwatch/demo"
#: An announced change is announced this long before its step, for a window from
#: WINDOW_BEFORE before the step to WINDOW_AFTER after it.
ANNOUNCE_AHEAD = 8.0
WINDOW_BEFORE = 4.0
WINDOW_AFTER = 6.0


@dataclass(frozen=True)
class Sensor:
    """One invented sensor.  What an operator calls it is the configuration's ``label``
    (:func:`demo_config`), the same name the alerts use."""

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
    Sensor("brackenfield/line2/filler/head1/fill",
           "brackenfield/line2/filler/head1/fill", "json", 500.4, 0.6, "g"),
    Sensor("brackenfield/line2/filler/head2/fill",
           "brackenfield/line2/filler/head2/fill", "json", 500.1, 0.6, "g",
           step_at=24.0, step=1.3, cause="nozzle swapped"),
    Sensor("brackenfield/line2/filler/head3/fill",
           "brackenfield/line2/filler/head3/fill", "json", 499.8, 0.6, "g"),
    Sensor("brackenfield/line2/oven/senml",
           "brackenfield/line2/oven/senml/zone3", "senml", 182.0, 0.5, "Cel",
           step_at=38.0, step=-1.4, cause="burner retuned"),
    Sensor("brackenfield/line2/capper/torque",
           "brackenfield/line2/capper/torque", "number", 2.40, 0.05, "N m",
           step_at=52.0, step=0.11, cause="clutch wearing"),
)



@dataclass(frozen=True)
class Changeover:
    """A step made on purpose and announced beforehand on the command topic, as the
    plant's MES would: a planned window from WINDOW_BEFORE before the step to
    WINDOW_AFTER after it, announced ANNOUNCE_AHEAD before the step."""

    topic: str
    at: float  # seconds after start
    step: float
    cause: str


CHANGEOVERS = (
    Changeover("brackenfield/line2/filler/head3/fill", 44.0, 2.0, "recipe change: fill target raised"),
)

def demo_config(url: str, version: str, listen: str, state: str, time_zone: str) -> dict[str, Any]:
    """The demo's configuration, as data: written out with ``yaml.safe_dump`` and read back
    by the same validation as any configuration file (an address such as ``[::1]:9650`` is
    quoted as YAML needs it, which formatting text did not do)."""
    return {
        "broker": {"url": url, "client_id": "shiftwatch-demo", "mqtt_version": version},
        "streams": [
            {"topic": "brackenfield/line2/filler/+/fill", "format": "json", "value": "weight_g",
             "time": "ts", "unit": "g", "label": "fill weight on filler {1}"},
            {"topic": "brackenfield/line2/oven/senml", "format": "senml",
             "label": "tunnel oven {name} temperature"},
            {"topic": "brackenfield/line2/capper/torque", "format": "number", "unit": "N m",
             "label": "capper torque"},
        ],
        "detection": {"min_shift_sigma": 1.0, "false_alarm_every": "7d"},
        "alerts": {"topic_prefix": PREFIX},
        "metrics": {"listen": listen},
        "state": {"dir": state, "snapshot_every": "10s"},
        "display": {"time_zone": time_zone},
    }


class DemoError(ValueError):
    """The demo cannot run as asked (``--metrics-listen``): said before anything starts."""


def _metrics_address(listen: str) -> tuple[str, str | None]:
    """``listen`` checked as ``metrics.listen`` is, and tried: the address to use, and why it
    differs (only a port in use moves the demo to a free one; an address nothing can listen
    on is a :class:`DemoError`, its port kept in the message)."""
    import errno
    import socket

    from shiftwatch.config import listen_address

    try:
        host, port = listen_address(listen)
    except ValueError as exc:
        raise DemoError(f"--metrics-listen {listen!r}: {exc}") from None
    if port == 0:
        return listen, None
    bare = host[1:-1] if host.startswith("[") else (host or "127.0.0.1")
    try:
        family, _, _, _, addr = socket.getaddrinfo(bare, port, type=socket.SOCK_STREAM,
                                                   flags=socket.AI_PASSIVE)[0]
        with socket.socket(family, socket.SOCK_STREAM) as probe:
            probe.bind(addr)
    except OSError as exc:
        if exc.errno == errno.EADDRINUSE:
            return f"{host}:{free_port()}", f"port {port} is in use ({exc.strerror or exc})"
        raise DemoError(f"--metrics-listen {listen!r}: cannot listen there: {exc.strerror or exc}") from None
    return listen, None


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
        if self._thread.ident is not None:  # started (a demo whose daemon failed never starts it)
            self._thread.join(timeout=5)
        self.client.stop()

    def _run(self) -> None:
        k = 0
        while not self._stop.is_set():
            t = self.start_time + k / RATE_HZ
            delay = t - time.time()
            if delay > 0 and self._stop.wait(delay):
                break
            elapsed = t - self.start_time
            for s in SENSORS:
                v = s.level + s.sigma * float(self.rng.standard_normal())
                if s.step_at is not None and elapsed >= s.step_at:
                    v += s.step
                v += sum(c.step for c in CHANGEOVERS if c.topic == s.topic and elapsed >= c.at)
                if self.rng.random() < 0.002:  # a lone spike: a bumped sensor, a glitch
                    v += 8 * s.sigma * (1 if self.rng.random() < 0.5 else -1)
                self.client.publish(s.topic, payload_for(s, t, v))
                self.sent += 1
            k += 1


def run_demo(duration: float = 75.0, *, out: TextIO = sys.stdout, metrics_listen: str = "127.0.0.1:9650",
             use_embedded: bool = False, time_zone: str = "UTC") -> int:
    """Run the demo for ``duration`` seconds (Ctrl-C stops it early, cleanly).

    Every time it shows is a clock time in ``time_zone`` (an IANA name), the
    zone the alert summaries use too.  ``--metrics-listen`` that cannot be used raises
    :class:`DemoError` before anything starts; a daemon that cannot start ends the demo
    with its exit status, and no recap.
    """
    metrics_listen, moved = _metrics_address(metrics_listen)  # DemoError before anything starts
    broker: Any
    if not use_embedded and find_mosquitto() is not None:
        broker = MosquittoBroker().start()
        version, kind = "5", "mosquitto"
    else:
        broker = EmbeddedBroker().start()
        version, kind = "3.1.1", "embedded amqtt broker"
    try:  # the broker is stopped however the demo ends
        return _run(broker, version, kind, duration, out, metrics_listen, moved, time_zone)
    finally:
        broker.stop()


def _run(broker: Any, version: str, kind: str, duration: float, out: TextIO, metrics_listen: str,
         moved: str | None, time_zone: str) -> int:
    import yaml

    w = out.write
    state_dir = tempfile.mkdtemp(prefix="shiftwatch-demo-state-")
    cfg: Config = parse_config(yaml.safe_dump(demo_config(broker.url, version, metrics_listen, state_dir,
                                                          time_zone), sort_keys=False),
                               file="the demo's configuration")
    host = metrics_listen.rpartition(":")[0]
    names = {s.stream: cfg.label_for(s.stream) or s.stream for s in SENSORS}
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
            w(f"[{clock(time.time(), time_zone)}] {rec.get('summary', rec['phase'])}\n")
            out.flush()

    w("shiftwatch demo: Brackenfield Bottling, line 2 (an invented plant)\n")
    w(f"  broker   {kind} on {broker.url}\n")
    w("  sensors  3 filler heads (JSON, g), tunnel oven zone3 (SenML, Cel), capper torque (number, N m),\n"
      f"           {RATE_HZ:.0f} samples a second each; the first {cfg.detection.warmup_samples} samples of "
      "each stream teach shiftwatch its normal level\n")
    w(f"  started  {clock(start, time_zone)}; every time shown is a clock time in "
      f"{zone_label(time_zone)}, as in the alerts\n")
    unit_of = {s.topic: s.unit for s in SENSORS}
    steps = sorted([(s.step_at, s.stream, s.step, s.unit, s.cause) for s in SENSORS if s.step_at is not None]
                   + [(c.at, c.topic, c.step, unit_of[c.topic], c.cause + ", announced as a planned change")
                      for c in CHANGEOVERS])
    for at, stream, size, unit, cause in steps:
        w(f"  schedule {clock(start + at, time_zone)} ({at:.0f} s in): {names[stream]} "
          f"steps {'up' if size > 0 else 'down'} {abs(size):g} {unit} ({cause})\n")
    w(f"  alerts   MQTT {PREFIX}/alerts/<stream>; levels {PREFIX}/levels/<stream>; commands "
      f"{PREFIX}/commands/<command>\n")
    w("  sizes    each alert gives the step in the reading's unit and in sigmas: one sigma is the reading's\n"
      "           ordinary noise (its standard deviation), so a 1 sigma step is hard to see by eye on a trend\n")
    w(f"  {ADVISORY}\n\n")
    out.flush()
    def on_message(topic: str, payload: bytes) -> None:
        if topic == f"{PREFIX}/replies":
            on_reply(payload)
        else:
            on_alert(topic, payload)

    def on_reply(payload: bytes) -> None:
        try:
            rep = json.loads(payload)
        except ValueError:
            return
        with lock:
            if rep.get("accepted"):
                win = rep.get("window") or {}
                text = (f"planned window {win.get('id')} accepted for {win.get('target')}, "
                        f"{clock(parse_time(win['start']), time_zone)} to "
                        f"{clock(parse_time(win['end']), time_zone)}: a step inside it raises no alarm"
                        if win.get("end") else "command accepted")
            else:
                text = f"command refused ({rep.get('reason')}): {rep.get('message')}"
            w(f"[{clock(time.time(), time_zone)}] {text}\n")
            out.flush()

    viewer = PlainClient(broker.url, "shiftwatch-demo-viewer",
                         subscribe=[f"{PREFIX}/alerts/#", f"{PREFIX}/replies"],
                         on_message=on_message, mqtt_version=version)
    mes = PlainClient(broker.url, "brackenfield-line2-mes", mqtt_version=version)
    due = sorted(((start + c.at - ANNOUNCE_AHEAD, c) for c in CHANGEOVERS), key=lambda d: d[0])
    line = Line(broker.url, version, start)
    status: list[int] = []
    runner = threading.Thread(target=lambda: status.append(daemon.run(install_signals=False)), name="daemon")
    code = 0
    started = True
    try:
        viewer.start()
        runner.start()
        while daemon.server is None and runner.is_alive():
            time.sleep(0.05)
        if daemon.server is None:
            # It said why (cannot start: ...): no sensors, no recap of a run that never was.
            started = False
            runner.join(timeout=15)
            code = status[0] if status and status[0] else 2
            return code
        if daemon.server is not None:
            why = f"\n           ({moved}, so the demo took a free one; --metrics-listen chooses)" if moved else ""
            base = f"http://{host or '127.0.0.1'}:{daemon.server.port}"
            w(f"  status   {base}/status  (every stream at a glance, in a browser on this machine)\n")
            w(f"  metrics  {base}/metrics{why}\n\n")
        mes.start()
        line.start()
        deadline = start + duration
        while time.time() < deadline and runner.is_alive():
            while due and time.time() >= due[0][0]:
                _, c = due.pop(0)
                with lock:
                    w(f"[{clock(time.time(), time_zone)}] the MES announces a planned change on "
                      f"{names[c.topic]} ({c.cause})\n")
                    out.flush()
                mes.publish(f"{PREFIX}/commands/plan", json.dumps({
                    "target": c.topic, "start": format_time(start + c.at - WINDOW_BEFORE),
                    "end": format_time(start + c.at + WINDOW_AFTER), "note": c.cause,
                    "by": "MES line 2", "ref": "demo-plan"}))
            time.sleep(0.2)
    except KeyboardInterrupt:
        w("\ninterrupted: stopping cleanly\n")
        code = 130
    finally:
        line.stop()
        mes.stop()
        ended = time.time() - start  # the sensors' last sample
        if started:
            time.sleep(0.5)
        daemon.request_stop()
        runner.join(timeout=15)
        viewer.stop()
    w(_recap(results, start, ended, names, time_zone))
    out.flush()
    return code


def _recap(results: dict[str, list[dict[str, Any]]], start: float, ended: float,
           names: dict[str, str], time_zone: str = "UTC") -> str:
    width = max(len(n) for n in names.values()) + 2
    lines = ["\nWhat happened",
             # "found" over the fitted steps' digits (+13.3g), their unit after them
             f"  {'sensor':<{width}}{'scheduled step':>24}{'found':>13}{'':7}{'started':>14}{'alerted':>14}"]
    for s in SENSORS:
        recs = results.get(s.stream, [])
        conf = [r for r in recs if r["phase"] == "confirmed"]
        change = next((c for c in CHANGEOVERS if c.topic == s.topic), None)
        planned = (f"{s.step:+g} {s.unit} at {clock(start + s.step_at, time_zone)}"
                   if s.step_at is not None else
                   f"{change.step:+g} {s.unit} at {clock(start + change.at, time_zone)}"
                   if change is not None else "none")
        name = names[s.stream]
        plan = [r for r in recs if r["phase"] == "planned"]
        if change is not None and change.at >= ended:
            lines.append(f"  {name:<{width}}{planned:>24}{'demo ended first':>20}")
            continue
        if plan and not conf:
            r = plan[-1]
            lines.append(f"  {name:<{width}}{planned:>24}{r['delta']:>+13.3g} {s.unit:<6}"
                         f"{clock(parse_time(r['shift_at']), time_zone):>14}{'no alarm':>14}")
            continue
        if conf:
            r = conf[-1]
            started = clock(parse_time(r["shift_at"]), time_zone)
            alerted = clock(parse_time(r["detected_at"]), time_zone)
            lines.append(f"  {name:<{width}}{planned:>24}{r['delta']:>+13.3g} {s.unit:<6}"
                         f"{started:>14}{alerted:>14}")
        elif any(r["phase"] == "detected" for r in recs) and not any(r["phase"] == "dismissed" for r in recs):
            lines.append(f"  {name:<{width}}{planned:>24}{'detected, undecided':>20}")
        elif s.step_at is not None and s.step_at >= ended:
            lines.append(f"  {name:<{width}}{planned:>24}{'demo ended first':>20}")
        else:
            lines.append(f"  {name:<{width}}{planned:>24}{'no confirmed step':>20}")
    dismissed = sum(r["phase"] == "dismissed" for rs in results.values() for r in rs)
    lines.append(f"  dismissed detections: {dismissed}")
    lines.append("  (an announced change inside its planned window is recorded as 'planned': its step is "
                 "kept,\n   no alarm is raised and the stream is watched from the new level at once)")
    lines.append(f"  (clock times in {zone_label(time_zone)}; 'started' is the fitted shift time, 'alerted' "
                 "the\n   moment the test tripped; 'found' is the step fitted when the shift was confirmed "
                 "(for a\n   planned change, when it was recorded), from the few seconds of samples seen since "
                 "it\n   began, so noise moves it by a fraction of a sigma)\n")
    return "\n".join(lines) + "\n"


__all__ = ["CHANGEOVERS", "SENSORS", "run_demo"]
