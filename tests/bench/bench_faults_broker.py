"""Broker faults, repeated: restarts (SIGTERM), kills (SIGKILL) and freezes (SIGSTOP) of Mosquitto.

Usage, from the repository root with the package installed and mosquitto available::

    python tests/bench/bench_faults_broker.py            # full run, about 5 minutes on 2 cores
    python tests/bench/bench_faults_broker.py --quick    # fewer repetitions, for a smoke check

The real daemon (``shiftwatch run``) runs in a subprocess against a private
Mosquitto with persistence on; publishers send at QoS 1 on persistent
sessions and re-send what the broker did not acknowledge; counts come from
the daemon's /metrics endpoint over HTTP.  The same faults, once each, are
tests in tests/daemon/test_faults_broker.py.  Parts:

1. restarts: the broker is stopped with SIGTERM and started again on the same
   port many times while samples flow (every other time the daemon is held
   with SIGSTOP so it processes in-flight samples while the broker is down).
   Target: no sample lost, none counted twice (``shiftwatch_samples_total``
   equals the samples the broker acknowledged; what it delivered again is
   counted only as ``duplicate_time`` / ``out_of_order``), every alert record
   delivered to a subscriber with a persistent session;
2. kills: the broker is killed with SIGKILL and started again, at two
   ``autosave_interval`` settings, once with the daemon keeping up and once
   with the daemon away (so the broker holds a backlog).  Target: each kill
   loses at most the samples acknowledged within ``autosave_interval + 1`` s
   before it; the measured loss is printed;
3. freezes: the broker is frozen with SIGSTOP for three keepalive periods.
   Target: the daemon reports ``shiftwatch_broker_connected 0``, every scrape
   during the freeze succeeds, it reconnects after SIGCONT and processes new
   samples.  The time to notice and to reconnect is printed.

The script prints one table and exits 0 only when every target is met.
"""

from __future__ import annotations

import argparse
import signal
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "daemon"))

from faultkit import (
    STREAMS_YAML,
    AlertViewer,
    TallyPublisher,
    alert_records_total,
    metric,
    rejected_by_stream,
    scrape,
    settle,
    topic_of,
    wait_until,
)

from conftest import DaemonProcess
from shiftwatch.broker import MosquittoBroker, free_port

sys.path.insert(0, str(HERE.parents[1]))
from tests.conftest import shiftwatch_command


class Rig:
    """A broker, the daemon and a publisher in one temporary directory."""

    def __init__(self, root: Path, name: str, *, autosave: int = 1, keepalive: int = 5,
                 window: int = 400) -> None:
        self.dir = root / name
        self.dir.mkdir(parents=True)
        self.broker = MosquittoBroker(workdir=self.dir / "broker", autosave_interval=autosave).start()
        port = free_port()
        cfg = self.dir / "shiftwatch.yaml"
        cfg.write_text(
            f"broker:\n  url: {self.broker.url}\n  client_id: bench-{name}\n  keepalive: {keepalive}\n"
            f"streams:\n{STREAMS_YAML}"
            f"detection:\n  window_samples: {window}\n"
            f"alerts:\n  topic_prefix: sw\n"
            f"metrics:\n  listen: 127.0.0.1:{port}\n"
            f"state:\n  dir: {self.dir / 'state'}\n  snapshot_every: 5s\n")
        self.daemon = DaemonProcess(shiftwatch_command(), cfg, port).start()
        self.viewer = AlertViewer(self.broker.url, "sw/alerts/#", f"bench-viewer-{name}").start()
        self.pub = TallyPublisher(self.broker.url, f"bench-pub-{name}").start()

    @property
    def port(self) -> int:
        return self.daemon.metrics_port

    def close(self) -> None:
        for part in (self.pub, self.viewer):
            try:
                part.stop()
            except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed stop
                pass
        if self.daemon.proc is not None and self.daemon.proc.poll() is None:
            self.daemon.proc.send_signal(signal.SIGCONT)
            try:
                self.daemon.stop()
            except Exception:  # noqa: BLE001  whatever failed the stop, the daemon is killed
                self.daemon.proc.kill()
        self.broker.stop()


def make_series(streams: int, n: int, seed: int) -> dict[int, np.ndarray]:
    """500 g fill weights, sigma 0.6 g, with a 3-sigma step every 700 samples."""
    rng = np.random.default_rng(seed)
    out = {}
    for h in range(streams):
        x = 500.0 + 0.6 * rng.standard_normal(n)
        for k, at in enumerate(range(500 + 37 * h, n, 700)):
            x[at:] += 1.8 if k % 2 == 0 else -1.8
        out[h + 1] = np.round(x, 4)
    return out


class Feeder(threading.Thread):
    """Publishes tick after tick (one sample per stream) at a fixed rate."""

    def __init__(self, pub: TallyPublisher, data: dict[int, np.ndarray], lo: int, hi: int, tick_s: float) -> None:
        super().__init__(daemon=True)
        self.pub, self.data, self.lo, self.hi, self.tick_s = pub, data, lo, hi, tick_s

    def run(self) -> None:
        nxt = time.monotonic()
        for i in range(self.lo, self.hi):
            for h, x in self.data.items():
                self.pub.send(topic_of(h), i, float(x[i]))
            nxt += self.tick_s
            time.sleep(max(0.0, nxt - time.monotonic()))


def outage_records(log: str) -> int:
    """Alert records the daemon logged while it was disconnected from the broker."""
    n, down = 0, False
    for line in log.splitlines():
        if "disconnected from broker" in line:
            down = True
        elif "connected to broker" in line:
            down = False
        elif down and "[id " in line:
            n += 1
    return n


# ----------------------------------------------------------------------------------- parts
def part_restarts(root: Path, restarts: int, streams: int) -> dict[str, Any]:
    tick_s = 0.02
    gap_s = 2.0
    n = int((restarts + 1) * gap_s / tick_s) + 200
    rig = Rig(root, "restarts")
    try:
        data = make_series(streams, n, 1)
        feeder = Feeder(rig.pub, data, 0, n, tick_s)
        feeder.start()
        done = 0
        while feeder.is_alive() and done < restarts:
            time.sleep(gap_s)
            held = done % 2 == 1 and rig.daemon.proc is not None
            if held:
                rig.daemon.signal(signal.SIGSTOP)
                time.sleep(0.3)
            rig.broker.restart()
            if held:
                rig.daemon.signal(signal.SIGCONT)
            done += 1
        feeder.join()
        acked_ok = rig.pub.wait_all_acked(120)
        want = {topic_of(h): len(rig.pub.acked.get(topic_of(h), ())) for h in data}
        got = settle(rig.port, want, timeout=120)
        text = scrape(rig.port)
        made = alert_records_total(text)
        wait_until(lambda: len(rig.viewer.distinct()) >= made, timeout=60)
        res = {
            "restarts": done, "streams": streams, "sent": sum(rig.pub.sent.values()),
            "acked": sum(want.values()), "acked_all": acked_ok, "counted": sum(got.values()),
            "duplicates": sum(rejected_by_stream(text, "duplicate_time").values()),
            "late": sum(rejected_by_stream(text, "out_of_order").values()),
            "records": made, "delivered": len(rig.viewer.distinct()),
            "outage_records": outage_records(rig.daemon.log_text()),
        }
        res["ok"] = acked_ok and res["counted"] == res["acked"] and res["delivered"] == made and done == restarts
        return res
    finally:
        rig.close()


def one_kill(root: Path, name: str, autosave: int, away: bool, streams: int, seed: int) -> dict[str, Any]:
    tick_s = 0.01
    before = int((2 * autosave + 2.5) / tick_s)
    n = before + 300
    rig = Rig(root, name, autosave=autosave, window=2000)
    try:
        data = make_series(streams, n, seed)
        if away:  # the daemon leaves (its session stays): the broker holds a backlog for it
            Feeder(rig.pub, data, 0, 250, tick_s).run()
            settle(rig.port, {topic_of(h): 250 for h in data}, timeout=60)
            assert rig.daemon.stop() == 0
            Feeder(rig.pub, data, 250, before, tick_s).run()
        else:
            Feeder(rig.pub, data, 0, before, tick_s).run()
        rig.pub.drain()
        killed_at = time.monotonic()
        rig.broker.restart(signal.SIGKILL)
        if away:
            rig.daemon.start()
        Feeder(rig.pub, data, before, n, tick_s).run()
        acked_ok = rig.pub.wait_all_acked(120)
        want = {topic_of(h): len(rig.pub.acked.get(topic_of(h), ())) for h in data}
        got = settle(rig.port, want, timeout=120, quiet=5.0)
        text = scrape(rig.port)
        lost = sum(want.values()) - sum(got.values())
        window = [t for t in rig.pub.last_ack_at.values() if t <= killed_at]
        bound = sum(1 for t in window if t >= killed_at - autosave - 1.0)
        rate = sum(1 for t in window if t >= killed_at - 1.0)  # samples acknowledged per second
        late = sum(rejected_by_stream(text, "out_of_order").values())
        return {"autosave": autosave, "away": away, "acked": sum(want.values()), "lost": lost,
                "bound": bound, "lost_s": lost / rate if rate else 0.0, "late": late,
                "duplicates": sum(rejected_by_stream(text, "duplicate_time").values()),
                "ok": acked_ok and 0 <= lost <= bound}
    finally:
        rig.close()


def part_kills(root: Path, repeats: int, streams: int) -> list[dict[str, Any]]:
    out = []
    k = 0
    for autosave in (1, 5):
        for away in (False, True):
            for _ in range(repeats):
                k += 1
                out.append(one_kill(root, f"kill-{k}", autosave, away, min(streams, 5), 100 + k))
    return out


def part_freezes(root: Path, freezes: int) -> dict[str, Any]:
    keepalive = 2
    rig = Rig(root, "freeze", keepalive=keepalive)
    notice, back, scrapes, failed = [], [], 0, 0
    ok = True
    try:
        topic = topic_of(1)
        x = make_series(1, 300 * (freezes + 1), 7)[1]
        Feeder(rig.pub, {1: x}, 0, 300, 0.002).run()
        ok &= rig.pub.wait_all_acked(60)
        for f in range(freezes):
            t0 = time.monotonic()
            rig.broker.freeze()
            seen_down = None
            while time.monotonic() - t0 < 3 * keepalive or seen_down is None:
                try:
                    up = metric(scrape(rig.port), "shiftwatch_broker_connected")
                    scrapes += 1
                except OSError:
                    failed += 1
                    up = None
                if up == 0 and seen_down is None:
                    seen_down = time.monotonic() - t0
                if time.monotonic() - t0 > 20 * keepalive:
                    break
                time.sleep(0.1)
            rig.broker.thaw()
            t1 = time.monotonic()
            ok &= wait_until(lambda: metric(scrape(rig.port), "shiftwatch_broker_connected") == 1, timeout=60)
            back.append(time.monotonic() - t1)
            notice.append(seen_down if seen_down is not None else float("inf"))
            lo = 300 * (f + 1)
            Feeder(rig.pub, {1: x}, lo, lo + 300, 0.002).run()
            ok &= rig.pub.wait_all_acked(60)
            ok &= settle(rig.port, {topic: lo + 300}).get(topic) == lo + 300
        return {"freezes": freezes, "keepalive": keepalive, "notice": notice, "back": back,
                "scrapes": scrapes, "failed": failed,
                "ok": ok and failed == 0 and all(t <= 3 * keepalive for t in notice)}
    finally:
        rig.close()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="fewer repetitions")
    args = ap.parse_args()
    restarts, kills, freezes, streams = (4, 1, 2, 5) if args.quick else (20, 3, 5, 10)
    with tempfile.TemporaryDirectory(prefix="sw-bench-faults-") as tmp:
        root = Path(tmp)
        r = part_restarts(root, restarts, streams)
        k = part_kills(root, kills, streams)
        f = part_freezes(root, freezes)
    mark = {True: "ok", False: "MISSED"}
    print("\nBroker faults (real daemon, private Mosquitto 2.0, loopback)\n")
    print("| fault | target | measured | |")
    print("|---|---|---|---|")
    print(f"| SIGTERM restart x{r['restarts']}, {r['streams']} streams at 50 samples/s each | "
          f"counted == acked, every record delivered | "
          f"sent {r['sent']}, acked {r['acked']}, counted {r['counted']}, redelivered and recognised "
          f"{r['duplicates'] + r['late']}; records {r['records']} made ({r['outage_records']} "
          f"during outages), {r['delivered']} delivered | {mark[bool(r['ok'])]} |")
    for autosave in (1, 5):
        for away in (False, True):
            rows = [x for x in k if x["autosave"] == autosave and x["away"] == away]
            lost = ", ".join(str(x["lost"]) for x in rows)
            bound = ", ".join(str(x["bound"]) for x in rows)
            secs = max(x["lost_s"] for x in rows)
            dups = sum(x["duplicates"] + x["late"] for x in rows)
            who = "daemon away (backlog at the broker)" if away else "daemon keeping up"
            print(f"| SIGKILL x{len(rows)}, autosave_interval {autosave} s, {who} | "
                  f"lost <= acked in the last {autosave + 1} s | lost {lost} of bounds {bound} "
                  f"(at most {secs:.2f} s of samples); redelivered and recognised {dups} | "
                  f"{mark[all(x['ok'] for x in rows)]} |")
    print(f"| SIGSTOP x{f['freezes']} for {3 * f['keepalive']} s, keepalive {f['keepalive']} s | "
          f"connected 0 within {3 * f['keepalive']} s, metrics served, reconnect after thaw | "
          f"noticed after {min(f['notice']):.1f}-{max(f['notice']):.1f} s, reconnected "
          f"{min(f['back']):.1f}-{max(f['back']):.1f} s after SIGCONT, {f['scrapes']} scrapes during "
          f"freezes, {f['failed']} failed | {mark[bool(f['ok'])]} |")
    all_ok = bool(r["ok"]) and all(x["ok"] for x in k) and bool(f["ok"])
    return 0 if all_ok else 1


if __name__ == "__main__":
    sys.exit(main())
