"""Shards behind a NATS cluster: throughput for 1, 2 and 4 shards against as many bare
paho subscribers in the same run, and the cost of cluster state against local state.

    python tests/bench/bench_shards.py [--quick] [--repeat N] [--part throughput|state]
        [--shards 1 2 4] [--payload single batch260] [--streams established|new]
        [--ack-wait 5s] [--max-ack-pending 4096]

For each shard count n, a private 3-server NATS cluster (JetStream, MQTT, the plant
mapped to n partitions; tests/daemon/natskit.py) is started.  The consumers'
sessions are made first (each subscribes once and goes away), then a backlog is
published at QoS 1 and stored by the cluster, then the consumers come back and the
time from the first to the last message taken is measured:

- shards: n ``shiftwatch run --shard k`` daemons (subprocesses), polled through
  ``shiftwatch_samples_total`` on each one's /metrics (samples the engines took:
  copies the broker sent again are not counted; messages = samples / batch);
- bare: n paho clients (MQTT 3.1.1, persistent sessions, QoS 1, automatic acks)
  subscribed to the same partition prefixes, counting messages.

Two payload kinds: single-sample JSON messages ({"v": .., "ts": ..}) and JSON
arrays of 260 samples.  ``--streams established`` (the default) has the shards
take 5 arrays a stream first, live (1,300 samples, past each stream's warm-up and
young level), then stops them (SIGSTOP) while the backlog is stored and lets them
go on (SIGCONT), so the measured backlog meets established streams; ``--streams
new`` measures each stream's first samples, warm-up included (the figures before
2026-12-04).  The NATS servers' MQTT side is set as in config/nats-partitions.conf
(``ack_wait`` 5 s, ``max_ack_pending`` 4,096; --ack-wait, --max-ack-pending).  ``--part state`` runs one shard over the same backlog with
``state.keep: local`` and ``state.keep: cluster`` and reports the ratio.

Ratios only, each against a baseline measured in the same run: the machine
(2 cores) is shared, so absolute rates move from run to run.  With --repeat the
median of the repeats is reported.  Not part of the test suite.
"""

from __future__ import annotations

import argparse
import http.client
import json
import signal
import socket
import statistics
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path
from tempfile import TemporaryDirectory
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "daemon"))

import paho.mqtt.client as paho
from natskit import NatsCluster
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import free_port, wait_until
from shiftwatch.mqtt import PlainClient

CMD = [sys.executable, "-m", "shiftwatch"]
T0 = 1_790_000_000.0
BATCH = 260
WARM_ROUNDS = 5
#: How long the bare subscribers may take a backlog before the repeat is not counted.
BARE_WAIT = 90.0


def _free(port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def names(streams: int) -> list[str]:
    return [f"brackenfield/line{i % 7 + 1}/head{i}/fill" for i in range(streams)]


def payloads(streams: int, rounds: int, batch: int, after: int = 0) -> list[tuple[str, bytes]]:
    """Round-robin over the streams: ``rounds`` messages per stream, ``batch`` samples each
    (1: a single JSON object), one sample a second from ``T0 + after``."""
    out = []
    tops = names(streams)
    for r in range(rounds):
        for i, t in enumerate(tops):
            if batch == 1:
                out.append((t, json.dumps({"v": round(500 + ((r * 7 + i) % 13) * 0.01, 3),
                                           "ts": T0 + after + r}).encode()))
            else:
                base = after + r * batch
                out.append((t, json.dumps([{"v": round(500 + ((base + j + i) % 13) * 0.01, 3),
                                            "ts": T0 + base + j} for j in range(batch)]).encode()))
    return out


def publish_backlog(url: str, msgs: list[tuple[str, bytes]]) -> None:
    pub = PlainClient(url, "bench-publisher", mqtt_version="3.1.1").start()
    try:
        infos = []
        for topic, payload in msgs:
            infos.append(pub.client.publish(topic, payload, qos=1))
            if len(infos) >= 2000:
                for i in infos:
                    i.wait_for_publish(30)
                infos = []
        for i in infos:
            i.wait_for_publish(30)
    finally:
        pub.stop()


class Bare:
    """n bare paho subscribers with persistent sessions, counting messages."""

    def __init__(self, url: str, parts: int, tag: str) -> None:
        host, port = url.split("://")[1].split(":")
        self.host, self.port, self.parts, self.tag = host, int(port), parts, tag
        self.count = 0
        self.first = self.last = 0.0
        self._lock = threading.Lock()
        self.clients: list[paho.Client] = []

    def _client(self, k: int) -> paho.Client:
        c = paho.Client(CallbackAPIVersion.VERSION2, client_id=f"bare-{self.tag}-{k}", clean_session=False,
                        protocol=MQTTProtocolVersion.MQTTv311)
        c.max_inflight_messages_set(1000)

        def on_message(cl: Any, u: Any, m: Any) -> None:
            with self._lock:
                now = time.monotonic()
                if not self.count:
                    self.first = now
                self.count += 1
                self.last = now

        c.on_message = on_message
        return c

    def connect(self, subscribe: bool) -> None:
        self.clients = []
        for k in range(self.parts):
            c = self._client(k)
            c.connect(self.host, self.port, 30)
            c.loop_start()
            if subscribe:
                c.subscribe(f"part/{k}/brackenfield/+/+/fill", qos=1)
            self.clients.append(c)

    def disconnect(self) -> None:
        for c in self.clients:
            c.disconnect()
            c.loop_stop()


def shard_config(path: Path, cluster: NatsCluster, parts: int, keep: str, port: int, tag: str) -> None:
    servers = ", ".join(cluster.urls)
    text = (f"broker:\n  url: {cluster.mqtt_url(0)}\n  client_id: bench-{tag}\n  mqtt_version: \"3.1.1\"\n"
            "streams:\n  - topic: brackenfield/+/+/fill\n    format: json\n    value: v\n    time: ts\n"
            f"alerts:\n  topic_prefix: bench/{tag}\n"
            f"metrics:\n  listen: 127.0.0.1:{port}\n  max_streams: 100000\n"
            f"state:\n  dir: {path.parent / ('state-' + tag)}\n  snapshot_every: 60s\n  keep: {keep}\n"
            f"shard:\n  number: 0\n  of: {parts}\n"
            f"cluster:\n  servers: [{servers}]\n  name: bench{tag}\n  lease: 15s\n  redelivery_wait: 0s\n")
    path.write_text(text)


def taken(ports: list[int]) -> float:
    """Samples the shards' engines took (``shiftwatch_samples_total``): a sample the broker
    sent again and the engine set aside as a duplicate is not counted, so copies of
    messages do not make a backlog look taken.  Only that family is asked for
    (``name[]``): a full scrape renders every series, and 20 of them a second took
    about a third of a core from the shard being measured."""
    n = 0.0
    for p in ports:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{p}/metrics?name[]=shiftwatch_samples_total",
                                        timeout=5) as r:
                text = r.read().decode()
        except (OSError, http.client.HTTPException):  # not serving yet
            continue
        for fam in text_string_to_metric_families(text):
            n += sum(x.value for x in fam.samples if x.name == "shiftwatch_samples_total")
    return n


def run_shards(work: Path, cluster: NatsCluster, parts: int, keep: str, msgs: list[tuple[str, bytes]],
               tag: str, warm: list[tuple[str, bytes]] | None = None, per_msg: int = 1) -> float:
    """The shards' rate over the backlog ``msgs``, in messages a second.  With ``warm``,
    the shards first take those messages live, so that the backlog meets established
    streams instead of new ones warming up."""
    cfg = work / f"{tag}.yaml"
    port = free_port()
    while not all(_free(port + k) for k in range(parts)):  # the shards take port, port + 1, ...
        port = free_port()
    shard_config(cfg, cluster, parts, keep, port, tag)

    def start(k: int) -> subprocess.Popen[bytes]:
        log = open(work / f"{tag}-{k}.log", "ab")  # noqa: SIM115  kept open by the child
        return subprocess.Popen(CMD + ["run", "--config", str(cfg), "--shard", str(k)], stdout=log,
                                stderr=subprocess.STDOUT)

    def logs(k: int) -> str:
        return (work / f"{tag}-{k}.log").read_text(errors="replace")

    # Sessions first: start, wait for the subscription (the retained online status), stop.
    seen: dict[str, str] = {}
    viewer = PlainClient(cluster.mqtt_url(1), f"bench-viewer-{tag}", subscribe=[f"bench/{tag}/status/#"],
                         on_message=lambda t, p: seen.__setitem__(t, p.decode()), mqtt_version="3.1.1").start()
    procs = [start(k) for k in range(parts)]
    assert wait_until(lambda: sum(v == "online" for v in seen.values()) >= parts, 90), \
        [logs(k)[-800:] for k in range(parts)]
    ports = [port + k for k in range(parts)]
    base = 0.0
    if warm:
        # Established streams: the shards take the warm-up messages live, then are
        # stopped (SIGSTOP, a few seconds: well inside the keepalive and the lease)
        # while the backlog is stored, and go on (SIGCONT) with their engines as they were.
        publish_backlog(cluster.mqtt_url(2), warm)
        assert wait_until(lambda: taken(ports) >= len(warm) * BATCH, 600, every=0.2), \
            [logs(k)[-800:] for k in range(parts)]
        time.sleep(1.0)  # the last round's acknowledgements
        base = taken(ports)
        for p in procs:
            p.send_signal(signal.SIGSTOP)
        publish_backlog(cluster.mqtt_url(2), msgs)
        for p in procs:
            p.send_signal(signal.SIGCONT)
    else:
        for p in procs:
            p.terminate()
            p.wait(60)
        publish_backlog(cluster.mqtt_url(2), msgs)
        procs = [start(k) for k in range(parts)]
    total = len(msgs) * per_msg
    first = None
    start_count = 0.0
    deadline = time.monotonic() + 600
    done_at = None
    while time.monotonic() < deadline:
        n = taken(ports) - base
        now = time.monotonic()
        if first is None and n > 0:
            first, start_count = now, n
        if n >= total:
            done_at = now
            break
        time.sleep(0.05)
    for p in procs:
        p.terminate()
        p.wait(60)
    viewer.stop()
    if first is None or done_at is None or done_at <= first:
        raise RuntimeError(f"shards did not take the backlog: {[logs(k)[-1500:] for k in range(parts)]}")
    return (total - start_count) / (done_at - first) / per_msg


def run_bare(cluster: NatsCluster, parts: int, msgs: list[tuple[str, bytes]], tag: str) -> float:
    bare = Bare(cluster.mqtt_url(0), parts, tag)
    bare.connect(subscribe=True)
    time.sleep(3.0)  # the cluster makes each session's consumer
    bare.disconnect()
    publish_backlog(cluster.mqtt_url(2), msgs)
    bare.count = 0
    bare.connect(subscribe=False)
    ok = wait_until(lambda: bare.count >= len(msgs), BARE_WAIT, every=0.05)
    bare.disconnect()
    if not ok:
        # NATS's MQTT side sometimes holds a session's deliveries back (README, "Running
        # shards"); such a repeat says nothing about the subscriber's rate.
        raise RuntimeError(f"bare subscribers took {bare.count} of {len(msgs)} messages in {BARE_WAIT:.0f} s")
    return (bare.count - 1) / max(bare.last - bare.first, 1e-9)


def part_throughput(args: argparse.Namespace, work: Path) -> list[str]:
    rows = []
    streams = 500 if args.quick else 2000
    single_rounds = 10 if args.quick else 20
    batch_rounds = 3 if args.quick else 4
    # Established streams: each first takes WARM_ROUNDS arrays (1,300 samples: past the
    # warm-up of 200 and the young level's 1,000 after it), not measured.
    warm = payloads(streams, WARM_ROUNDS, BATCH) if args.streams == "established" else None
    after = WARM_ROUNDS * BATCH if warm else 0
    for parts in args.shards:
        with NatsCluster(3, parts, base=work / f"nats{parts}", ack_wait=args.ack_wait,
                         max_ack_pending=args.max_ack_pending) as cluster:
            for kind, batch, rounds in (("single", 1, single_rounds), ("batch260", BATCH, batch_rounds)):
                if kind not in args.payload:
                    continue
                msgs = payloads(streams, rounds, batch, after)
                rs, rb = [], []
                for rep in range(args.repeat):
                    tag = f"{kind}{parts}r{rep}"
                    try:
                        b = run_bare(cluster, parts, msgs, tag)
                    except RuntimeError as exc:
                        print(f"  repeat {rep + 1}: not counted ({exc})", flush=True)
                        continue
                    rb.append(b)
                    rs.append(run_shards(work, cluster, parts, "cluster", msgs, tag, warm, batch))
                    print(f"  repeat {rep + 1}: shards {rs[-1]:,.0f} msg/s, bare {rb[-1]:,.0f} msg/s, "
                          f"ratio {rs[-1] / rb[-1]:.2f}", flush=True)
                if not rs:
                    continue
                shard_rate, bare_rate = statistics.median(rs), statistics.median(rb)
                rows.append(f"| {parts} | {kind} | {args.streams} | {len(msgs):,} | {shard_rate:,.0f} msg/s, "
                            f"{shard_rate * batch:,.0f} samples/s | {bare_rate:,.0f} msg/s | "
                            f"{shard_rate / bare_rate:.2f} | {', '.join(f'{s / b:.2f}' for s, b in zip(rs, rb))} |")
                print(rows[-1], flush=True)
    head = ("| shards | payload | streams | messages | shards took | bare subscribers took | ratio (median) | "
            "ratio per repeat |")
    return [head, "|---|---|---|---|---|---|---|---|", *rows]


def part_state(args: argparse.Namespace, work: Path) -> list[str]:
    streams = 500 if args.quick else 2000
    msgs = payloads(streams, 10 if args.quick else 20, 1)
    local, clus = [], []
    with NatsCluster(3, 1, base=work / "nats-state", ack_wait=args.ack_wait,
                     max_ack_pending=args.max_ack_pending) as cluster:
        for rep in range(args.repeat):
            local.append(run_shards(work, cluster, 1, "local", msgs, f"local{rep}"))
            clus.append(run_shards(work, cluster, 1, "cluster", msgs, f"clus{rep}"))
    lm, cm = statistics.median(local), statistics.median(clus)
    return ["| state | messages | one shard took (median) | per repeat |", "|---|---|---|---|",
            f"| local state.dir | {len(msgs):,} | {lm:,.0f} msg/s | {', '.join(f'{x:,.0f}' for x in local)} |",
            (f"| cluster (R3 journal per stream per round) | {len(msgs):,} | {cm:,.0f} msg/s | "
             f"{', '.join(f'{x:,.0f}' for x in clus)} |"),
            f"| cluster / local | | {cm / lm:.2f} | |"]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--part", choices=("throughput", "state"), action="append")
    ap.add_argument("--shards", type=int, nargs="+", default=[1, 2, 4], help="shard counts (default 1 2 4)")
    ap.add_argument("--payload", choices=("single", "batch260"), nargs="+", default=["single", "batch260"])
    ap.add_argument("--streams", choices=("established", "new"), default="established",
                    help="established (default): the streams are past their warm-up before the measured "
                         "backlog; new: the backlog is each stream's first samples, warm-up included")
    ap.add_argument("--ack-wait", default="5s",
                    help="the NATS servers' mqtt ack_wait (default 5s, as config/nats-partitions.conf)")
    ap.add_argument("--max-ack-pending", type=int, default=4096,
                    help="the NATS servers' mqtt max_ack_pending (default 4096, as config/nats-partitions.conf)")
    args = ap.parse_args()
    parts = args.part or ["throughput", "state"]
    with TemporaryDirectory(prefix="bench-shards-") as tmp:
        work = Path(tmp)
        out = []
        if "throughput" in parts:
            out += part_throughput(args, work) + [""]
        if "state" in parts:
            out += part_state(args, work)
    print("\n".join(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
