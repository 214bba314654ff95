"""Benchmark of the daemon (`shiftwatch run`) against baselines measured in the same run.

Usage, from the repository root with the package installed and mosquitto available::

    python tests/bench/bench_daemon.py            # full run, about 8 to 15 minutes on 2 cores
    python tests/bench/bench_daemon.py --quick    # smaller loads, for a smoke check
    python tests/bench/bench_daemon.py --part memory   # only the parts named (repeatable)
    python tests/bench/bench_daemon.py --part batch --against ../old/daemon   # batched ingest, paired with other code

Everything runs on this machine over loopback: a private mosquitto per part,
the real daemon in a subprocess (``shiftwatch run --config``), and publisher
and subscriber helpers that are this same script started with ``--role``.
Targets:

1. ingest: single-sample JSON messages on several hundred streams, published
   at QoS 1 as fast as two publisher processes can; the daemon's receive rate
   is at least 80% of a bare paho subscriber's (QoS 1, auto-ack, the same
   MQTT 5 Receive Maximum as the daemon's default) under the
   same publisher load on a fresh broker; three bare/daemon pairs, the
   figure being the median of the pairs' ratios;
2. alert latency: at 1,000 messages/s over 50 streams with scheduled steps,
   p99 of (receipt of the 'detected' record on <prefix>/alerts/#) minus
   (publication of the sample that completed the detection, the record's
   as_of) is 20 ms or less,
   over at least 50 alerts; the baseline is the broker round trip of the
   same samples to a plain subscriber.  as_of is the tripping sample
   (detected_at) unless that sample lay beyond spike_sigma and was kept
   only because the next one deviated the same way: no detector holding
   lone spikes back can alert before that next sample, so the figure
   counted from detected_at (printed too) includes one sampling interval
   for those detections;
5. alert latency under scrape load (``--part scrape``): the latency run of 2
   with 9,900 more streams made first (about 1.3 MB a scrape), without and
   then with 8 threads in a process of their own scraping the full /metrics
   back to back; p99 with the scrapers is at most 3 times the p99 without
   them (at least 50 ms);
3. memory: RSS of the daemon with 10,000 live streams past warm-up is
   150 MB or less (the idle daemon's RSS is printed alongside);
4. start-up: median time from spawning `shiftwatch run` to its retained
   status turning "online" is 1.5 s or less over 5 runs (a bare paho
   process doing the same is the baseline), and river is never imported;
6. batched ingest (``--part batch``): 500 streams each sending JSON arrays
   of 260 samples at QoS 1 as fast as two publishers can, rounds after the
   first four (the streams' warm-up) measured.  The daemon shares the two
   cores with the broker and the publishers, so its samples a second are
   shown against a bare paho subscriber's (messages x 260) in the same run,
   and the target is on the daemon's own CPU: at least 1,000,000 samples per
   CPU-second of the daemon process (user and system time from /proc over
   the measured rounds), the per-shard figure of the sizing guide for a
   daemon with a core of its own.

The script prints one table and exits 0 only when every target is met.
Every wait is bounded and every process it starts is stopped on the way out.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import random
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Any

T0_MS = 1_788_000_000_000  # synthetic sample times of the ingest and memory parts (epoch ms)
INGEST_TARGET = 0.80
LATENCY_TARGET_MS = 20.0
MEMORY_TARGET_MB = 150.0
BATCH_TARGET = 1_000_000  # samples per CPU-second of the daemon, JSON arrays of 260
BATCH_WARM_ROUNDS = 4  # rounds of 260 samples a stream before the measured ones (1,040 > the young level's 1,000)
STARTUP_TARGET_S = 1.5


# ======================================================================
# Helper processes (this script started with --role ...)
# ======================================================================
def _die_with_parent() -> None:
    """preexec_fn: the child gets SIGTERM when the bench process dies (Linux)."""
    try:
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG
    except Exception:  # noqa: BLE001, S110  best effort: without it the clean-up below still runs
        pass


def _paho_client(client_id: str, v5: bool) -> Any:
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion

    return paho.Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id=client_id,
                       protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311)


def _connect(c: Any, port: int, deadline: float, receive_maximum: int = 0) -> None:
    up = threading.Event()
    prev = c.on_connect

    def on_connect(client: Any, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        if prev is not None:
            prev(client, userdata, flags, reason, props)
        if not reason.is_failure:
            up.set()

    c.on_connect = on_connect
    props = None
    if receive_maximum:
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        props = Properties(PacketTypes.CONNECT)
        props.ReceiveMaximum = receive_maximum
    c.connect("127.0.0.1", port, keepalive=60, properties=props)
    c.loop_start()
    if not up.wait(max(0.1, deadline - time.monotonic())):
        raise SystemExit("helper: no connection to the broker")


class RawPublisher:
    """A minimal MQTT 3.1.1 QoS 1 publisher on a plain socket.

    paho spends tens of microseconds of Python per publication, so two paho
    publishers on a 2-core machine cap the flow below what a bare subscriber
    can take, and the baseline would measure the publishers.  Encoding the
    PUBLISH packets by hand and writing them in blocks costs a few
    microseconds each.  A reader thread counts the broker's PUBACKs; at most
    ``window`` publications are unacknowledged at any time.
    """

    def __init__(self, port: int, client_id: str, window: int, deadline: float) -> None:
        import socket

        self.sock = socket.create_connection(("127.0.0.1", port), timeout=30)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        cid = client_id.encode()
        var = b"\x00\x04MQTT\x04\x02\x00\x00" + len(cid).to_bytes(2, "big") + cid  # clean, no keepalive
        self.sock.sendall(b"\x10" + self._varint(len(var)) + var)
        ack = self._recv_exact(4)
        if ack[0] != 0x20 or ack[3] != 0:
            raise SystemExit(f"helper: CONNACK refused: {ack!r}")
        self.window = window
        self.deadline = deadline
        self.sent = 0
        self.acked = 0
        self._pid = 0
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    @staticmethod
    def _varint(n: int) -> bytes:
        out = bytearray()
        while True:
            n, d = divmod(n, 128)
            out.append(d | (128 if n else 0))
            if not n:
                return bytes(out)

    def _recv_exact(self, n: int) -> bytes:
        buf = b""
        while len(buf) < n:
            chunk = self.sock.recv(n - len(buf))
            if not chunk:
                raise SystemExit("helper: broker closed the connection")
            buf += chunk
        return buf

    def _read(self) -> None:
        # The socket blocks: a broker that is busy for a second (the daemon
        # has paused its reading and the broker is queueing) must slow the
        # sender, not fail it. The reader waits in select, not on a timeout.
        import select

        self.sock.settimeout(None)
        rest = b""
        while time.monotonic() < self.deadline:
            try:
                if not select.select([self.sock], [], [], 1.0)[0]:
                    continue
                chunk = self.sock.recv(65536)
            except (OSError, ValueError) as exc:
                if self.sock.fileno() < 0 or isinstance(exc, ConnectionError):
                    return
                continue
            if not chunk:
                return
            rest += chunk
            n = len(rest) // 4  # only PUBACKs (4 bytes each) come back to a publisher
            self.acked += n
            rest = rest[n * 4:]

    def packet(self, topic: bytes, payload: bytes) -> bytes:
        self._pid = self._pid % 65535 + 1
        body = len(topic).to_bytes(2, "big") + topic + self._pid.to_bytes(2, "big") + payload
        return b"\x32" + self._varint(len(body)) + body

    def send(self, packets: list[bytes]) -> None:
        while self.sent + len(packets) - self.acked > self.window and time.monotonic() < self.deadline:
            time.sleep(0.0002)
        self.sock.sendall(b"".join(packets))
        self.sent += len(packets)

    def finish(self) -> None:
        while self.acked < self.sent and time.monotonic() < self.deadline:
            time.sleep(0.005)
        try:
            self.sock.sendall(b"\xe0\x00")  # DISCONNECT
            self.sock.close()
        except OSError:
            pass


def batch_variants(rng: random.Random, b: int, batch: int) -> list[bytes]:
    """The payloads of publishing round ``b`` in mode 'batch': 8 JSON arrays of ``batch``
    samples (value about 100 with sigma 1, time in epoch milliseconds, a second apart),
    stream i sending the (i mod 8)th.  bench_batch_path.py makes the same ones."""
    variants = []
    for _ in range(8):
        items = ",".join(f'{{"v":{100.0 + rng.gauss(0.0, 1.0):.3f},'
                         f'"ts":{T0_MS + (b * batch + q) * 1000}}}'
                         for q in range(batch))
        variants.append(("[" + items + "]").encode())
    return variants


def role_pub(a: argparse.Namespace) -> int:
    """Publish at QoS 1 as fast as possible over streams [a.first, a.last).

    mode 'single': a.count messages of one JSON sample each, round-robin over
    the streams; mode 'batch': a.batches rounds of one message per stream,
    each a JSON array of a.batch samples.  Waits for 'go' on stdin after
    connecting and prints one JSON line: sent, acknowledged, first and last
    publish times.
    """
    deadline = time.monotonic() + a.timeout
    c = RawPublisher(a.port, f"bench-pub-{a.first}-{os.getpid()}", 4000 if a.mode == "single" else 200,
                     deadline)
    rng = random.Random(a.first)
    streams = list(range(a.first, a.last))
    topics = [f"{a.prefix}/{s:05d}/v".encode() for s in streams]
    print("ready", flush=True)
    if sys.stdin.readline().strip() != "go":
        return 1
    t_first = time.time()
    if a.mode == "single":
        values = [f"{100.0 + rng.gauss(0.0, 1.0):.3f}" for _ in range(997)]
        ns = len(streams)
        block: list[bytes] = []
        for j in range(a.count):
            k, i = divmod(j, ns)
            payload = b'{"v": %s, "ts": %d}' % (values[j % 997].encode(), T0_MS + k * 1000)
            block.append(c.packet(topics[i], payload))
            if len(block) >= 100:
                c.send(block)
                block = []
            if time.monotonic() > deadline:
                break
        if block:
            c.send(block)
    else:
        for b in range(a.batches):
            variants = batch_variants(rng, b, a.batch)
            for i, topic in enumerate(topics):
                c.send([c.packet(topic, variants[i % 8])])
                if time.monotonic() > deadline:
                    break
    t_last = time.time()
    c.finish()
    print(json.dumps({"sent": c.sent, "acked": c.acked, "t_first": t_first, "t_last": t_last}), flush=True)
    return 0


def role_sub(a: argparse.Namespace) -> int:
    """A bare paho subscriber (MQTT 5, QoS 1, paho's automatic acks) that only counts messages.

    It asks the broker for the same Receive Maximum as the daemon does by
    default, so both may have as many unacknowledged messages in flight.
    """
    deadline = time.monotonic() + a.timeout
    c = _paho_client(f"bench-bare-{os.getpid()}", v5=True)
    state = {"n": 0, "first": 0.0, "last": 0.0}
    done = threading.Event()
    subscribed = threading.Event()

    def on_message(client: Any, userdata: Any, msg: Any) -> None:
        now = time.time()
        if state["n"] == a.skip:  # the first message timed (--skip: the warm-up's are not)
            state["first"] = now
        state["n"] += 1
        state["last"] = now
        if state["n"] >= a.count:
            done.set()

    def on_connect(client: Any, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        client.subscribe(a.filter, qos=1)

    c.on_message = on_message
    c.on_connect = on_connect
    c.on_subscribe = lambda *args: subscribed.set()
    from shiftwatch.config import BrokerConfig

    _connect(c, a.port, deadline, receive_maximum=BrokerConfig().receive_maximum)
    if not subscribed.wait(max(0.1, deadline - time.monotonic())):
        return 1
    print("ready", flush=True)
    last_n, last_change = -1, time.monotonic()
    while not done.is_set() and time.monotonic() < deadline:
        done.wait(0.2)
        if state["n"] != last_n:
            last_n, last_change = state["n"], time.monotonic()
        elif state["n"] > 0 and time.monotonic() - last_change > a.idle:
            break
    print(json.dumps({"count": state["n"], "t_first": state["first"], "t_last": state["last"]}), flush=True)
    c.disconnect()
    c.loop_stop()
    return 0


def role_status(a: argparse.Namespace) -> int:
    """Start-up baseline: import paho, connect (MQTT 5), subscribe, publish a retained "online"."""
    deadline = time.monotonic() + a.timeout
    c = _paho_client(f"bench-status-{os.getpid()}", v5=True)

    def on_connect(client: Any, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        client.subscribe(a.filter, qos=1)
        client.publish(f"{a.prefix}/status", b"online", qos=1, retain=True)

    c.on_connect = on_connect
    _connect(c, a.port, deadline)
    while time.monotonic() < deadline:
        time.sleep(0.05)
    return 0


def role_paced(a: argparse.Namespace) -> int:
    """Publish at a.rate messages/s round-robin over a.streams streams, with scheduled steps.

    Sample time ts = publication time in epoch ms.  Stream i is at 100 + noise
    (sigma 1) and moves by a.step at warmup + r * a.round_s + i * a.stagger for
    round r (up in even rounds, back down in odd ones).  Writes
    [[stream, ts_ms, t_publish], ...] to a.out.
    """
    deadline = time.monotonic() + a.timeout
    c = _paho_client(f"bench-paced-{os.getpid()}", v5=False)
    c.max_inflight_messages_set(1000)
    c.max_queued_messages_set(0)
    _connect(c, a.port, deadline)
    rng = random.Random(7)
    topics = [f"{a.prefix}/{s:05d}/v" for s in range(a.streams)]
    total = int(a.rate * a.duration)
    log: list[tuple[int, int, float]] = []
    t_start = time.time() + 0.2
    period = 1.0 / a.rate
    for j in range(total):
        if time.monotonic() > deadline:
            break
        target = t_start + j * period
        now = time.time()
        if target > now:
            # Sleep (releasing the interpreter lock) rather than spin: a
            # spinning loop starves paho's network thread, the messages queue
            # up inside the publisher and the "latency" measures that queue.
            time.sleep(target - now)
        i = j % a.streams
        rel = target - t_start - a.warmup - i * a.stagger
        rounds_done = 0 if rel < 0 else min(a.rounds, int(rel // a.round_s) + 1)
        level = 100.0 + (a.step if rounds_done % 2 == 1 else 0.0)
        value = level + rng.gauss(0.0, 1.0)
        t_pub = time.time()
        ts_ms = round(t_pub * 1000.0)
        c.publish(topics[i], f'{{"v": {value:.3f}, "ts": {ts_ms}}}', qos=1)
        log.append((i, ts_ms, t_pub))
    time.sleep(0.5)
    Path(a.out).write_text(json.dumps(log))
    c.disconnect()
    c.loop_stop()
    print(json.dumps({"sent": len(log)}), flush=True)
    return 0


def role_scrape(a: argparse.Namespace) -> int:
    """a.streams threads that each scrape the full /metrics of port a.port back to back for
    a.duration seconds (after "go" on stdin); prints the counts as JSON."""
    import urllib.request

    wait_go = sys.stdin.readline()  # noqa: F841
    end = time.monotonic() + a.duration
    counts = {"scrapes": 0, "failed": 0, "bytes": 0}
    lock = threading.Lock()

    def loop() -> None:
        while time.monotonic() < end:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{a.port}/metrics", timeout=30) as r:
                    n = len(r.read())
                with lock:
                    counts["scrapes"] += 1
                    counts["bytes"] += n
            except OSError:
                with lock:
                    counts["failed"] += 1
                time.sleep(0.05)

    threads = [threading.Thread(target=loop, daemon=True) for _ in range(a.streams)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(a.duration + 60)
    print(json.dumps(counts), flush=True)
    return 0


# ======================================================================
# The orchestrating side
# ======================================================================
class Bench:
    """Owns the temporary directory, the brokers and every process started."""

    def __init__(self) -> None:
        self.tmp = Path(tempfile.mkdtemp(prefix="shiftwatch-bench-daemon-"))
        self.procs: list[subprocess.Popen[Any]] = []
        self.brokers: list[Any] = []
        self.clients: list[Any] = []
        self.notes: list[str] = []
        self._n = 0

    # ------------------------------------------------------------ cleanup
    def close(self) -> None:
        for c in self.clients:
            try:
                c.stop()
            except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed stop
                pass
        for p in self.procs:
            if p.poll() is None:
                try:
                    p.terminate()
                    p.wait(timeout=20)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait(timeout=10)
                except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed stop
                    pass
        for b in self.brokers:
            try:
                b.stop()
            except Exception:  # noqa: BLE001, S110  clean-up goes on past a failed stop
                pass
        shutil.rmtree(self.tmp, ignore_errors=True)

    # ------------------------------------------------------------ pieces
    def uid(self) -> int:
        self._n += 1
        return self._n

    def broker(self) -> Any:
        from shiftwatch.broker import MosquittoBroker

        b = MosquittoBroker(workdir=self.tmp / f"broker-{self.uid()}").start()
        self.brokers.append(b)
        return b

    def stop_broker(self, b: Any) -> None:
        b.stop()
        self.brokers.remove(b)

    def helper(self, *args: str) -> subprocess.Popen[str]:
        p = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), *args],
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                             preexec_fn=_die_with_parent)  # noqa: PLW1509  a prctl call only, no locks
        self.procs.append(p)
        return p

    def watcher(self, broker: Any, filt: str, on: Callable[[str, bytes, float], None]) -> Any:
        from shiftwatch.mqtt import PlainClient

        c = PlainClient(broker.url, f"bench-watch-{self.uid()}", subscribe=[filt],
                        on_message=lambda t, p: on(t, p, time.time()))
        c.start()
        self.clients.append(c)
        return c

    def daemon_config(self, broker: Any, prefix: str, *, filt: str = "bench/+/v") -> tuple[Path, int]:
        from shiftwatch.broker import free_port

        n = self.uid()
        port = free_port()
        cfg = self.tmp / f"daemon-{n}.yaml"
        cfg.write_text(
            f"broker:\n  url: {broker.url}\n  client_id: bench-daemon-{n}\n  keepalive: 30\n"
            f"streams:\n  - topic: {filt}\n    format: json\n    value: v\n    time: ts\n"
            f"alerts:\n  topic_prefix: {prefix}\n"
            f"metrics:\n  listen: 127.0.0.1:{port}\n  max_streams: 10000\n"
            f"state:\n  dir: {self.tmp / f'state-{n}'}\n  snapshot_every: 1d\n")
        return cfg, port

    def spawn_daemon(self, cfg: Path, *, python_args: tuple[str, ...] = ()) -> subprocess.Popen[bytes]:
        if python_args:
            cmd = [sys.executable, *python_args, "-m", "shiftwatch"]
        else:
            cmd = shiftwatch_command()
        with open(cfg.with_suffix(".log"), "ab") as log:
            p = subprocess.Popen(cmd + ["run", "--config", str(cfg)], stdout=log,
                                 stderr=subprocess.STDOUT,
                                 preexec_fn=_die_with_parent)  # noqa: PLW1509  a prctl call only
        self.procs.append(p)
        return p

    def start_daemon(self, broker: Any, prefix: str) -> tuple[subprocess.Popen[bytes], int, Path]:
        """Spawn the daemon and wait for its retained status "online"."""
        cfg, port = self.daemon_config(broker, prefix)
        online = threading.Event()
        w = self.watcher(broker, f"{prefix}/status",
                         lambda t, p, now: online.set() if p == b"online" else None)
        p = self.spawn_daemon(cfg)
        if not online.wait(30):
            raise RuntimeError(f"daemon did not come online: {cfg.with_suffix('.log').read_text()[-2000:]}")
        self.stop_client(w)
        return p, port, cfg

    def stop_client(self, c: Any) -> None:
        c.stop()
        self.clients.remove(c)

    def stop_proc(self, p: subprocess.Popen[Any], timeout: float = 60.0) -> tuple[int | None, float]:
        t = time.monotonic()
        if p.poll() is None:
            p.terminate()
            try:
                p.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(timeout=10)
        if p in self.procs:
            self.procs.remove(p)
        return p.returncode, time.monotonic() - t


def shiftwatch_command() -> list[str]:
    exe = shutil.which("shiftwatch", path=str(Path(sys.executable).parent) + os.pathsep + os.environ.get("PATH", ""))
    return [exe] if exe else [sys.executable, "-m", "shiftwatch"]


def scrape(port: int, names: tuple[str, ...] = ()) -> dict[str, float]:
    """Metric samples of the daemon, summed over labels unless the label set is kept in the key."""
    q = "?" + "&".join(f"name[]={n}" for n in names) if names else ""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics{q}", timeout=30) as r:
        text = r.read().decode()
    out: dict[str, float] = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        key, _, val = line.rpartition(" ")
        name = key.split("{", 1)[0]
        try:
            v = float(val)
        except ValueError:
            continue
        out[name] = out.get(name, 0.0) + v
        if "{" in key:
            out[key] = v
    return out


def by_reason(m: dict[str, float], metric: str) -> str:
    """A scrape's ``metric`` counters summed per reason label, as "reason n, ..." (empty when none)."""
    out: dict[str, float] = {}
    for key, v in m.items():
        if key.startswith(metric + "{") and 'reason="' in key:
            reason = key.split('reason="', 1)[1].split('"', 1)[0]
            out[reason] = out.get(reason, 0.0) + v
    return ", ".join(f"{r} {v:,.0f}" for r, v in sorted(out.items()) if v)


def messages_processed(port: int) -> float:
    """Messages the daemon has processed: one series, so a poll costs the daemon little
    (polling the per-stream counters 4 times a second took about 7% of its samples in a
    py-spy profile of the ingest part, a cost no bare subscriber pays)."""
    return scrape(port, ("shiftwatch_messages_processed_total",)).get("shiftwatch_messages_processed_total", 0.0)


def processed(port: int) -> float:
    """Samples the engines have processed (the per-stream counters are updated after each stream's batch;
    shiftwatch_messages_received_total moves in steps of up to 2,000 messages before processing)."""
    return scrape(port, ("shiftwatch_samples_total",)).get("shiftwatch_samples_total", 0.0)


def rss_kb(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of a process in kB."""
    vals = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(("VmRSS:", "VmHWM:")):
            k, v = line.split(":", 1)
            vals[k] = int(v.split()[0])
    return vals["VmRSS"], vals["VmHWM"]


def read_json_line(p: subprocess.Popen[str], timeout: float) -> dict[str, Any]:
    """The next JSON line a helper prints (bounded in time)."""
    box: list[str] = []

    def read() -> None:
        assert p.stdout is not None
        for line in p.stdout:
            if line.startswith("{"):
                box.append(line)
                return

    th = threading.Thread(target=read, daemon=True)
    th.start()
    th.join(timeout)
    if not box:
        raise RuntimeError("a helper process gave no result in time")
    return dict(json.loads(box[0]))


def wait_line(p: subprocess.Popen[str], text: str, timeout: float) -> None:
    box: list[bool] = []

    def read() -> None:
        assert p.stdout is not None
        for line in p.stdout:
            if line.strip() == text:
                box.append(True)
                return

    th = threading.Thread(target=read, daemon=True)
    th.start()
    th.join(timeout)
    if not box:
        raise RuntimeError(f"a helper process did not say {text!r} in time")


# ---------------------------------------------------------------- part 1
N_PUBLISHERS = 2
# Metrics poll interval while the daemon ingests (one filtered scrape).  Each
# scrape renders every stream's families, and at 20 polls a second on 500
# streams the probe alone took about a third of the daemon's CPU time.  A
# coarser poll can only make the measured rate lower (the last poll comes up to
# one interval after the last sample), by at most 0.25 s over a run of 15 s
# or more.
INGEST_POLL_S = 0.25
#: Bare/daemon pairs of the ingest part (the figure is the median pair ratio).
INGEST_PAIRS = 3


def start_publishers(bench: Bench, broker: Any, streams: int, count: int, *, mode: str = "single",
                     batch: int = 1, batches: int = 1, timeout: float = 300) -> list[subprocess.Popen[str]]:
    pubs = []
    per = streams // N_PUBLISHERS
    for k in range(N_PUBLISHERS):
        first, last = k * per, (k + 1) * per if k < N_PUBLISHERS - 1 else streams
        n = count // N_PUBLISHERS if mode == "single" else 0
        p = bench.helper("--role", "pub", "--port", str(broker.port), "--prefix", "bench",
                         "--first", str(first), "--last", str(last), "--count", str(n), "--mode", mode,
                         "--batch", str(batch), "--batches", str(batches), "--timeout", str(timeout))
        pubs.append(p)
    for p in pubs:
        wait_line(p, "ready", 30)
    return pubs


def go(pubs: list[subprocess.Popen[str]]) -> None:
    for p in pubs:
        assert p.stdin is not None
        p.stdin.write("go\n")
        p.stdin.flush()


def finish_publishers(bench: Bench, pubs: list[subprocess.Popen[str]], timeout: float) -> dict[str, float]:
    res = [read_json_line(p, timeout) for p in pubs]
    for p in pubs:
        bench.stop_proc(p, 10)
    sent = sum(r["sent"] for r in res)
    t0 = min(r["t_first"] for r in res)
    t1 = max(r["t_last"] for r in res)
    return {"sent": sent, "acked": sum(r["acked"] for r in res), "rate": sent / max(t1 - t0, 1e-9)}


def ingest_bare(bench: Bench, streams: int, n: int) -> dict[str, float]:
    b = bench.broker()
    try:
        sub = bench.helper("--role", "sub", "--port", str(b.port), "--filter", "bench/+/v",
                           "--count", str(n), "--idle", "15", "--timeout", "300")
        wait_line(sub, "ready", 30)
        pubs = start_publishers(bench, b, streams, n)
        go(pubs)
        pub = finish_publishers(bench, pubs, 300)
        r = read_json_line(sub, 300)
        bench.stop_proc(sub, 10)
        rate = (r["count"] - 1) / max(r["t_last"] - r["t_first"], 1e-9)
        return {"rate": rate, "count": r["count"], "pub_rate": pub["rate"], "sent": pub["sent"],
                "seconds": r["t_last"] - r["t_first"]}
    finally:
        bench.stop_broker(b)


def ingest_daemon(bench: Bench, streams: int, n: int) -> dict[str, float]:
    b = bench.broker()
    try:
        d, port, _cfg = bench.start_daemon(b, "swi")
        pubs = start_publishers(bench, b, streams, n)
        go(pubs)
        # Poll the daemon's processed-messages counter (one sample each): first poll that
        # sees messages, and the first that sees all of them (or the last progress before
        # 15 s idle).
        poll = INGEST_POLL_S
        t1 = c1 = None
        t2, c2 = None, 0.0
        last_change = time.monotonic()
        deadline = time.monotonic() + 400
        prev = -1.0
        while time.monotonic() < deadline:
            c = messages_processed(port)
            now = time.time()
            if c > 0 and t1 is None:
                t1, c1 = now, c
            if c != prev:
                prev, last_change = c, time.monotonic()
                t2, c2 = now, c
            if c >= n or (c > 0 and time.monotonic() - last_change > 15):
                break
            time.sleep(poll)
        pub = finish_publishers(bench, pubs, 60)
        m = scrape(port)
        rate = (c2 - (c1 or 0.0)) / max((t2 or 0.0) - (t1 or 0.0), 1e-9)
        code, stop_s = bench.stop_proc(d)
        return {"rate": rate, "count": c2, "pub_rate": pub["rate"], "sent": pub["sent"],
                "seconds": (t2 or 0.0) - (t1 or 0.0),
                "samples": m.get("shiftwatch_samples_total", 0.0),
                "dropped": m.get("shiftwatch_messages_dropped_total", 0.0),
                "dropped_by": by_reason(m, "shiftwatch_messages_dropped_total"),
                "rejected_by": by_reason(m, "shiftwatch_samples_rejected_total"),
                "streams": m.get("shiftwatch_streams", 0.0), "exit": float(code or 0), "stop_s": stop_s}
    finally:
        bench.stop_broker(b)


def cpu_seconds(pid: int) -> float:
    """User and system CPU time of a process so far (/proc/<pid>/stat, fields 14 and 15)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def batch_bare(bench: Bench, streams: int, batch: int, rounds: int) -> dict[str, float]:
    """A bare subscriber taking the batched load: samples a second over the rounds after the
    warm-up ones (messages x batch; it decodes nothing)."""
    b = bench.broker()
    try:
        n = streams * rounds
        skip = streams * BATCH_WARM_ROUNDS
        sub = bench.helper("--role", "sub", "--port", str(b.port), "--filter", "bench/+/v",
                           "--count", str(n), "--idle", "15", "--skip", str(skip), "--timeout", "300")
        wait_line(sub, "ready", 30)
        pubs = start_publishers(bench, b, streams, 0, mode="batch", batch=batch, batches=rounds, timeout=300)
        go(pubs)
        finish_publishers(bench, pubs, 300)
        r = read_json_line(sub, 300)
        bench.stop_proc(sub, 10)
        rate = (r["count"] - skip - 1) * batch / max(r["t_last"] - r["t_first"], 1e-9)
        return {"rate": rate, "count": r["count"], "expected": n}
    finally:
        bench.stop_broker(b)


def batch_daemon(bench: Bench, streams: int, batch: int, rounds: int) -> dict[str, float]:
    """The daemon taking the batched load: samples a second and samples per CPU-second of the
    daemon process, from the first poll past the warm-up rounds to the last sample.

    Polled through the one-series ``shiftwatch_messages_processed_total`` times the batch
    (every message carries ``batch`` samples), as the ingest part is: rendering the 500
    per-stream ``shiftwatch_samples_total`` series 4 times a second took about 2.7% of the
    daemon's CPU (py-spy, 2026-12-04), a cost of the bench, not of ingest.  The per-stream
    counters are read once at the end and must agree."""
    b = bench.broker()
    try:
        d, port, _cfg = bench.start_daemon(b, "swb")
        pubs = start_publishers(bench, b, streams, 0, mode="batch", batch=batch, batches=rounds, timeout=300)
        total = streams * batch * rounds
        warm = streams * batch * BATCH_WARM_ROUNDS
        go(pubs)
        t1 = c1 = cpu1 = None
        t2, c2, cpu2 = 0.0, 0.0, 0.0
        last, last_change = -1.0, time.monotonic()
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            c = messages_processed(port) * batch
            now, cpu = time.monotonic(), cpu_seconds(d.pid)
            if t1 is None and c >= warm:
                t1, c1, cpu1 = now, c, cpu
            if c != last:
                last, last_change = c, now
                t2, c2, cpu2 = now, c, cpu
            if c >= total or now - last_change > 15:
                break
            time.sleep(INGEST_POLL_S)
        finish_publishers(bench, pubs, 60)
        m = scrape(port)
        code, stop_s = bench.stop_proc(d)
        if t1 is None or c1 is None or cpu1 is None or c2 <= c1:
            return {"rate": 0.0, "per_cpu": 0.0, "samples": c2, "expected": total, "cpu_share": 0.0,
                    "dropped": m.get("shiftwatch_messages_dropped_total", 0.0), "exit": float(code or 0)}
        if m.get("shiftwatch_samples_total", 0.0) != c2:  # a message of another size
            raise RuntimeError(f"the engines took {m.get('shiftwatch_samples_total', 0.0):,.0f} samples, "
                               f"{c2:,.0f} = messages processed x {batch} expected")
        return {"rate": (c2 - c1) / max(t2 - t1, 1e-9), "per_cpu": (c2 - c1) / max(cpu2 - cpu1, 1e-9),
                "cpu_share": (cpu2 - cpu1) / max(t2 - t1, 1e-9), "samples": c2, "expected": total,
                "measured": c2 - c1, "seconds": t2 - t1,
                "dropped": m.get("shiftwatch_messages_dropped_total", 0.0),
                "rejected_by": by_reason(m, "shiftwatch_samples_rejected_total"),
                "exit": float(code or 0), "stop_s": stop_s}
    finally:
        bench.stop_broker(b)


def batch_pairs(bench: Bench, against: str, runs: int, streams: int, batch: int, rounds: int) -> list[str]:
    """``--against DIR``: the batched load taken by the daemon imported from DIR (another
    checkout's ``daemon/`` directory, first on PYTHONPATH) and by this checkout's, one after
    the other in each run, which goes first alternating; samples per daemon CPU-second."""
    here = str(Path(__file__).resolve().parents[2] / "daemon")
    sides = {"against": against, "this": here}
    got: dict[str, list[float]] = {"against": [], "this": []}
    saved = os.environ.get("PYTHONPATH")
    try:
        for k in range(runs):
            for side in (("against", "this") if k % 2 == 0 else ("this", "against")):
                os.environ["PYTHONPATH"] = sides[side] + (os.pathsep + saved if saved else "")
                d = batch_daemon(bench, streams, batch, rounds)
                ok = d["samples"] >= d["expected"]
                got[side].append(d["per_cpu"] if ok else math.nan)
                print(f"  run {k + 1}, {side}: {d['per_cpu']:,.0f} samples per daemon CPU-s, on "
                      f"{d['cpu_share']:.2f} of a core ({d['samples']:,.0f}/{d['expected']:,} samples)",
                      file=sys.stderr, flush=True)
    finally:
        if saved is None:
            os.environ.pop("PYTHONPATH", None)
        else:
            os.environ["PYTHONPATH"] = saved
    out = []
    for side in ("against", "this"):
        xs = got[side]
        med = statistics.median(xs) if xs else math.nan
        out.append(f"{side} ({sides[side]}): median {med:,.0f} samples per daemon CPU-s "
                   f"({1e6 / med:.3f} us a sample); runs " + ", ".join(f"{x:,.0f}" for x in xs))
    return out


# ---------------------------------------------------------------- part 2
def parse_ms(text: str) -> int:
    return round(datetime.fromisoformat(text).timestamp() * 1000.0)


def latency(bench: Bench, rounds: int, *, extra_streams: int = 0, scrapers: int = 0) -> dict[str, Any]:
    """Alert latency at 1,000 msg/s on 50 stepping streams; with ``extra_streams`` more
    streams made first (so each scrape is large) and ``scrapers`` threads scraping the
    full /metrics back to back, in a process of their own, while the steps come."""
    streams, rate = 50, 1000.0
    # Steps start once every stream has left its warm-up (120 samples plus the
    # checks at its end take about 200 samples at 20 Hz per stream).
    warmup, round_s, stagger = 12.0, 10.0, 0.1
    duration = warmup + rounds * round_s + 1.0
    b = bench.broker()
    try:
        d, port, _cfg = bench.start_daemon(b, "swl")
        alerts: list[tuple[float, dict[str, Any]]] = []
        raw: dict[tuple[str, int], float] = {}
        lock = threading.Lock()

        def on_alert(topic: str, payload: bytes, now: float) -> None:
            with lock:
                alerts.append((now, json.loads(payload)))

        def on_raw(topic: str, payload: bytes, now: float) -> None:
            # Baseline: the same samples straight from the broker to a plain subscriber.
            ts = int(payload.rsplit(b":", 1)[1].strip(b" }"))
            raw[(topic, ts)] = now

        bench.watcher(b, "swl/alerts/#", on_alert)
        if extra_streams:
            from shiftwatch.mqtt import PlainClient

            filler = PlainClient(b.url, f"bench-filler-{bench.uid()}").start()
            ms = int(time.time() * 1000)
            infos = [filler.client.publish(f"bench/z{i:05d}/v", f'{{"v": 1.0, "ts": {ms}}}', qos=1)
                     for i in range(extra_streams)]
            for info in infos:
                info.wait_for_publish(60)
            filler.stop()
            deadline = time.monotonic() + 120
            while scrape(port, ("shiftwatch_streams",)).get("shiftwatch_streams", 0) < extra_streams:
                if time.monotonic() > deadline:
                    raise RuntimeError("the extra streams did not all arrive")
                time.sleep(0.5)
        bench.watcher(b, "bench/+/v", on_raw)
        scraping = None
        if scrapers:
            scraping = bench.helper("--role", "scrape", "--port", str(port), "--streams", str(scrapers),
                                    "--duration", str(duration))
            assert scraping.stdin is not None
            scraping.stdin.write("go\n")
            scraping.stdin.flush()
        out = bench.tmp / "paced.json"
        p = bench.helper("--role", "paced", "--port", str(b.port), "--prefix", "bench",
                         "--streams", str(streams), "--rate", str(rate), "--duration", str(duration),
                         "--warmup", str(warmup), "--round-s", str(round_s), "--stagger", str(stagger),
                         "--rounds", str(rounds), "--step", "3.0", "--out", str(out),
                         "--timeout", str(duration + 60))
        read_json_line(p, duration + 90)
        bench.stop_proc(p, 10)
        scraped = read_json_line(scraping, 120) if scraping is not None else {}
        time.sleep(1.0)
        log = json.loads(out.read_text())
        pub = {(f"bench/{i:05d}/v", ts): t for i, ts, t in log}
        span = log[-1][2] - log[0][2]
        lat, lat_trip, unmatched = [], [], []
        with lock:
            got = list(alerts)
        for now, rec in got:
            if rec.get("phase") != "detected":
                continue
            # From the sample that completed the detection (as_of), which is the
            # tripping sample itself unless that one was an outlier kept on the word
            # of the next sample (then the daemon cannot know before that one).
            key = (rec["stream"], parse_ms(rec["as_of"]))
            trip = (rec["stream"], parse_ms(rec["detected_at"]))
            if key in pub and trip in pub:
                lat.append((now - pub[key]) * 1000.0)
                lat_trip.append((now - pub[trip]) * 1000.0)
            else:
                unmatched.append(key)
        base = sorted((raw[k] - t) * 1000.0 for k, t in pub.items() if k in raw)
        bench.stop_proc(d)
        settled_later = sum(a != b for a, b in zip(lat, lat_trip))
        lat.sort()
        lat_trip.sort()
        phases = {ph: sum(1 for _, r in got if r.get("phase") == ph) for ph in ("detected", "confirmed", "dismissed")}
        return {"lat": lat, "lat_trip": lat_trip, "settled_later": settled_later, "base": base, "unmatched": unmatched, "phases": phases,
                "scraped": scraped,
                "pub_rate": len(log) / max(span, 1e-9), "raw_missing": len(pub) - len(base)}
    finally:
        bench.stop_broker(b)


def pct(xs: list[float], q: float) -> float:
    if not xs:
        return math.nan
    k = (len(xs) - 1) * q
    lo, hi = math.floor(k), math.ceil(k)
    return xs[lo] + (xs[hi] - xs[lo]) * (k - lo)


# ---------------------------------------------------------------- part 3
def memory(bench: Bench, streams: int, batch: int, batches: int) -> dict[str, float]:
    b = bench.broker()
    try:
        d, port, _cfg = bench.start_daemon(b, "swm")
        time.sleep(1.0)
        idle_rss, _ = rss_kb(d.pid)
        n_msgs = streams * batches
        t0 = time.monotonic()
        pubs = start_publishers(bench, b, streams, 0, mode="batch", batch=batch, batches=batches, timeout=600)
        go(pubs)
        deadline = time.monotonic() + 600
        last, last_change = -1.0, time.monotonic()
        n_samples = streams * batch * batches
        while time.monotonic() < deadline:
            time.sleep(2.0)
            c = processed(port)
            if c != last:
                last, last_change = c, time.monotonic()
            if c >= n_samples or time.monotonic() - last_change > 30:
                break
        feed_s = time.monotonic() - t0
        finish_publishers(bench, pubs, 60)
        time.sleep(1.0)
        rss, hwm = rss_kb(d.pid)
        m = scrape(port)
        watching = sum(v for k, v in m.items() if k.startswith("shiftwatch_stream_info{")
                       and 'state="warming_up"' not in k)
        time.sleep(1.0)
        scraped_rss, _ = rss_kb(d.pid)  # after one full scrape (Prometheus scrapes all the time)
        code, stop_s = bench.stop_proc(d, 120)
        return {"idle_mb": idle_rss / 1024, "rss_mb": rss / 1024, "hwm_mb": hwm / 1024,
                "scraped_mb": scraped_rss / 1024,
                "received": m.get("shiftwatch_messages_received_total", 0.0), "expected": n_msgs, "streams": m.get("shiftwatch_streams", 0.0),
                "past_warmup": watching, "samples": m.get("shiftwatch_samples_total", 0.0),
                "dropped": m.get("shiftwatch_messages_dropped_total", 0.0), "feed_s": feed_s,
                "stop_s": stop_s, "exit": float(code or 0)}
    finally:
        bench.stop_broker(b)


# ---------------------------------------------------------------- part 4
def startup(bench: Bench, runs: int) -> dict[str, Any]:
    b = bench.broker()
    try:
        seen: dict[str, float] = {}
        ev = threading.Condition()

        def on_status(topic: str, payload: bytes, now: float) -> None:
            if payload == b"online":
                with ev:
                    seen.setdefault(topic.split("/")[0], now)
                    ev.notify_all()

        bench.watcher(b, "+/status", on_status)

        def wait_online(prefix: str, timeout: float = 30) -> float | None:
            with ev:
                ev.wait_for(lambda: prefix in seen, timeout)
                return seen.get(prefix)

        times, base, river_maps = [], [], []
        for i in range(runs):
            prefix = f"sws{i}"
            cfg, _ = bench.daemon_config(b, prefix)
            t0 = time.time()
            p = bench.spawn_daemon(cfg)
            t1 = wait_online(prefix)
            if t1 is not None:
                times.append(t1 - t0)
                maps = Path(f"/proc/{p.pid}/maps").read_text() if p.poll() is None else ""
                river_maps.append("river" in maps)
            bench.stop_proc(p)
            prefix = f"swbase{i}"
            t0 = time.time()
            p2 = bench.helper("--role", "status", "--port", str(b.port), "--prefix", prefix,
                              "--filter", "bench/+/v", "--timeout", "30")
            t1 = wait_online(prefix)
            if t1 is not None:
                base.append(t1 - t0)
            bench.stop_proc(p2, 10)
        # One run under -X importtime: river must never be imported.
        prefix = "swimp"
        cfg, _ = bench.daemon_config(b, prefix)
        p = bench.spawn_daemon(cfg, python_args=("-X", "importtime"))
        ok = wait_online(prefix) is not None
        bench.stop_proc(p)
        text = cfg.with_suffix(".log").read_text()
        imports = [ln for ln in text.splitlines() if ln.startswith("import time:")]
        river_imported = any(ln.rsplit("|", 1)[-1].strip().split(".")[0] == "river" for ln in imports)
        return {"times": times, "base": base, "river_maps": any(river_maps), "importtime_ok": ok and bool(imports),
                "river_imported": river_imported, "n_imports": len(imports)}
    finally:
        bench.stop_broker(b)


# ---------------------------------------------------------------- main
PARTS = ("startup", "ingest", "latency", "memory", "scrape", "batch")
#: Alert latency p99 with 8 parallel scrapers of 10,000 streams, as a multiple of the
#: same run's p99 without them (at least SCRAPE_FLOOR_MS).
SCRAPE_LATENCY_FACTOR = 3.0
SCRAPE_FLOOR_MS = 50.0


def main_bench(quick: bool, parts: tuple[str, ...] = PARTS, against: str | None = None) -> int:
    rows: list[tuple[str, str, str, str, bool]] = []
    extra: list[str] = []
    bench = Bench()
    budget = 480 if quick else 1200

    def on_alarm(signum: int, frame: Any) -> None:
        raise TimeoutError(f"the benchmark ran past its {budget} s budget")

    signal.signal(signal.SIGALRM, on_alarm)
    signal.signal(signal.SIGTERM, lambda s, f: sys.exit(143))
    signal.alarm(budget)
    t_start = time.monotonic()
    try:
        # 4. start-up first, while the machine is quiet.
        if "startup" in parts:
            s = startup(bench, 5)
            med = statistics.median(s["times"]) if len(s["times"]) == 5 else math.inf
            bmed = statistics.median(s["base"]) if s["base"] else math.nan
            rows.append(("start-up to subscribed (median of 5)", f"{med:.3f} s", f"{bmed:.3f} s bare paho",
                         f"<= {STARTUP_TARGET_S} s", med <= STARTUP_TARGET_S))
            no_river = s["importtime_ok"] and not s["river_imported"] and not s["river_maps"]
            rows.append(("river not imported by `run`", "not imported" if no_river else "IMPORTED/unknown",
                         f"{s['n_imports']} modules", "never", no_river))
            extra.append("start-up runs (s): " + ", ".join(f"{x:.3f}" for x in s["times"])
                         + "; bare: " + ", ".join(f"{x:.3f}" for x in s["base"]))
            print(f"[{time.monotonic() - t_start:5.0f} s] start-up done", file=sys.stderr, flush=True)

        # 1. ingest.
        if "ingest" in parts:
            # Pairs of runs, bare then daemon, each pair back to back: on a noisy
            # machine one pair's ratio moves by 20% or more, so the figure is the
            # median of the pairs' ratios (one pair with --quick).
            streams, n = 500, (50_000 if quick else 200_000)
            pairs = []
            for k in range(1 if quick else INGEST_PAIRS):
                bare = ingest_bare(bench, streams, n)
                print(f"[{time.monotonic() - t_start:5.0f} s] ingest bare {k + 1}: {bare}", file=sys.stderr, flush=True)
                dmn = ingest_daemon(bench, streams, n)
                print(f"[{time.monotonic() - t_start:5.0f} s] ingest daemon {k + 1}: {dmn}", file=sys.stderr,
                      flush=True)
                pairs.append((bare, dmn, dmn["rate"] / bare["rate"] if bare["rate"] > 0 else 0.0))
            ratios = sorted(r for _, _, r in pairs)
            ratio = statistics.median(ratios)
            bare, dmn, _ = min(pairs, key=lambda p: abs(p[2] - ratio))  # the median pair, shown in full
            complete = all(d["count"] >= n and b["count"] >= n for b, d, _ in pairs)
            rows.append((f"ingest, {n:,} single-sample msgs / {streams} streams",
                         f"{dmn['rate']:,.0f} msg/s ({ratio:.0%})", f"{bare['rate']:,.0f} msg/s bare sub",
                         f">= {INGEST_TARGET:.0%} of bare", ratio >= INGEST_TARGET and complete))
            extra.append(f"ingest: median of {len(pairs)} pairs' ratios; the pairs: "
                         + ", ".join(f"{d['rate']:,.0f}/{b['rate']:,.0f} = {r:.0%}" for b, d, r in pairs))
            extra.append(f"ingest, the median pair: publishers {bare['pub_rate']:,.0f} msg/s (bare run), "
                         f"{dmn['pub_rate']:,.0f} msg/s "
                         f"(daemon run); daemon received {dmn['count']:,.0f}/{n:,}, samples_total "
                         f"{dmn['samples']:,.0f}, dropped {dmn['dropped']:,.0f}"
                         f"{' (' + dmn['dropped_by'] + ')' if dmn['dropped_by'] else ''}, samples rejected "
                         f"{dmn['rejected_by'] or 'none'}, streams {dmn['streams']:.0f}; "
                         f"bare received {bare['count']:,.0f}/{n:,}; daemon drained in {dmn['seconds']:.1f} s, "
                         f"bare in {bare['seconds']:.1f} s; daemon stop {dmn['stop_s']:.1f} s exit {dmn['exit']:.0f}")

        # 6. batched ingest; with --against, old and new code paired instead.
        if "batch" in parts and against:
            n_runs = 2 if quick else 6
            paired = batch_pairs(bench, against, n_runs, 500, 260, 16 if quick else 40)
            rows.append(("ingest, JSON arrays of 260, paired", "see below", "", "", True))
            extra += [f"batch, {n_runs} runs each: " + line for line in paired]
        elif "batch" in parts:
            streams, batch, rounds = 500, 260, (16 if quick else 40)
            runs = []
            for k in range(1 if quick else 3):
                bare = batch_bare(bench, streams, batch, rounds)
                dmn = batch_daemon(bench, streams, batch, rounds)
                print(f"[{time.monotonic() - t_start:5.0f} s] batch {k + 1}: bare {bare}, daemon {dmn}",
                      file=sys.stderr, flush=True)
                runs.append((bare, dmn))
            per_cpu = statistics.median(d["per_cpu"] for _, d in runs)
            rate = statistics.median(d["rate"] for _, d in runs)
            bare_rate = statistics.median(b["rate"] for b, _ in runs)
            complete = all(d["samples"] >= d["expected"] and b["count"] >= b["expected"] for b, d in runs)
            rows.append((f"ingest, JSON arrays of {batch} / {streams} streams",
                         f"{per_cpu:,.0f} samples per daemon CPU-s",
                         f"{rate:,.0f} samples/s ({rate / bare_rate:.0%} of bare sub {bare_rate:,.0f})"
                         if bare_rate > 0 else "bare sub took nothing",
                         f">= {BATCH_TARGET:,} per CPU-s", per_cpu >= BATCH_TARGET and complete))
            extra.append("batch: per run, daemon samples/s, per daemon CPU-second, its share of a core, and the "
                         "bare subscriber's samples/s: "
                         + "; ".join(f"{d['rate']:,.0f}, {d['per_cpu']:,.0f}, {d['cpu_share']:.2f}, {b['rate']:,.0f}"
                                     f" ({d['samples']:,.0f}/{d['expected']:,} samples taken,"
                                     f" {b['count']:,.0f}/{b['expected']:,} messages)" for b, d in runs))

        # 2. alert latency.
        if "latency" in parts:
            lt = latency(bench, 2 if quick else 3)
            p50, p99 = pct(lt["lat"], 0.5), pct(lt["lat"], 0.99)
            b50, b99 = pct(lt["base"], 0.5), pct(lt["base"], 0.99)
            enough = len(lt["lat"]) >= 50
            rows.append((f"alert latency, 1,000 msg/s, {len(lt['lat'])} alerts",
                         f"p50 {p50:.1f} / p99 {p99:.1f} ms", f"p50 {b50:.2f} / p99 {b99:.2f} ms broker",
                         f"p99 <= {LATENCY_TARGET_MS:.0f} ms, n >= 50", enough and p99 <= LATENCY_TARGET_MS))
            extra.append(f"latency: paced publisher at {lt['pub_rate']:,.0f} msg/s; records {lt['phases']}; "
                         f"max {max(lt['lat'], default=math.nan):.1f} ms; detected records not matching a "
                         f"published sample: {len(lt['unmatched'])}; {lt['settled_later']} detections settled "
                         f"by the sample after the tripping one; counted from the tripping sample "
                         f"(detected_at) instead: p50 {pct(lt['lat_trip'], 0.5):.1f} / p99 "
                         f"{pct(lt['lat_trip'], 0.99):.1f} ms")
            print(f"[{time.monotonic() - t_start:5.0f} s] latency done", file=sys.stderr, flush=True)

        # 5. alert latency under scrape load.
        if "scrape" in parts:
            quiet = latency(bench, 2, extra_streams=9_900, scrapers=0)
            loaded = latency(bench, 2, extra_streams=9_900, scrapers=8)
            q99, l99 = pct(quiet["lat"], 0.99), pct(loaded["lat"], 0.99)
            goal = max(SCRAPE_LATENCY_FACTOR * q99, SCRAPE_FLOOR_MS)
            sc = loaded["scraped"]
            ok = len(loaded["lat"]) >= 50 and l99 <= goal and sc.get("scrapes", 0) > 0
            rows.append((f"alert latency, 10,000 streams, 8 scrapers, {len(loaded['lat'])} alerts",
                         f"p50 {pct(loaded['lat'], 0.5):.1f} / p99 {l99:.1f} ms",
                         f"p50 {pct(quiet['lat'], 0.5):.1f} / p99 {q99:.1f} ms unscraped",
                         f"p99 <= {goal:.0f} ms", ok))
            extra.append(f"scrape load: {sc.get('scrapes', 0)} full scrapes in {len(loaded['lat'])} alerts' "
                         f"run ({sc.get('bytes', 0) / max(sc.get('scrapes', 1), 1) / 1e6:.2f} MB each), "
                         f"{sc.get('failed', 0)} failed; max latency {max(loaded['lat'], default=math.nan):.1f} ms "
                         f"(unscraped {max(quiet['lat'], default=math.nan):.1f} ms)")
            print(f"[{time.monotonic() - t_start:5.0f} s] scrape load done", file=sys.stderr, flush=True)

        # 3. memory.
        if "memory" in parts:
            batch, batches = (260, 1) if quick else (650, 2)
            mm = memory(bench, 10_000, batch, batches)
            live = mm["streams"] >= 10_000 and mm["past_warmup"] >= 10_000
            rows.append((f"RSS, 10,000 streams x {batch * batches} samples", f"{mm['rss_mb']:.1f} MB",
                         f"{mm['idle_mb']:.1f} MB idle", f"<= {MEMORY_TARGET_MB:.0f} MB",
                         live and mm["rss_mb"] <= MEMORY_TARGET_MB))
            extra.append(f"memory: streams {mm['streams']:.0f}, past warm-up {mm['past_warmup']:.0f}, "
                         f"messages {mm['received']:,.0f}/{mm['expected']:,}, samples {mm['samples']:,.0f}, "
                         f"dropped {mm['dropped']:,.0f}; peak RSS {mm['hwm_mb']:.1f} MB; "
                         f"RSS after a full scrape {mm['scraped_mb']:.1f} MB; "
                         f"{(mm['rss_mb'] - mm['idle_mb']) * 1024 / 10_000:.1f} kB per stream; fed in "
                         f"{mm['feed_s']:.0f} s; daemon stop {mm['stop_s']:.1f} s exit {mm['exit']:.0f}")
    except BaseException as exc:  # noqa: BLE001  an aborted run (Ctrl-C too) still prints its table
        rows.append(("benchmark", f"aborted: {exc!r}"[:60], "", "", False))
    finally:
        signal.alarm(0)
        bench.close()
    w = [max(len(r[i]) for r in rows + [("target", "measured", "baseline", "goal", True)]) for i in range(4)]
    head = ("target", "measured", "baseline", "goal")
    print("  ".join(h.ljust(w[i]) for i, h in enumerate(head)) + "  result")
    for r in rows:
        print("  ".join(r[i].ljust(w[i]) for i in range(4)) + "  " + ("ok" if r[4] else "MISSED"))
    for e in extra:
        print("  " + e)
    print(f"  total {time.monotonic() - t_start:.0f} s ({'quick' if quick else 'full'} run)")
    return 0 if rows and all(r[4] for r in rows) else 1


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller loads, for a smoke check")
    ap.add_argument("--role", choices=("pub", "sub", "status", "paced", "scrape"), help=argparse.SUPPRESS)
    for opt, typ, default in (("--port", int, 0), ("--prefix", str, "bench"), ("--first", int, 0),
                              ("--last", int, 0), ("--count", int, 0), ("--mode", str, "single"),
                              ("--batch", int, 1), ("--batches", int, 1), ("--filter", str, "bench/+/v"),
                              ("--idle", float, 15.0), ("--skip", int, 0), ("--timeout", float, 300.0), ("--streams", int, 50),
                              ("--rate", float, 1000.0), ("--duration", float, 30.0), ("--warmup", float, 9.0),
                              ("--round-s", float, 10.0), ("--stagger", float, 0.1), ("--rounds", int, 2),
                              ("--step", float, 3.0), ("--out", str, "")):
        ap.add_argument(opt, type=typ, default=default, help=argparse.SUPPRESS)
    ap.add_argument("--part", action="append", choices=PARTS,
                    help="run only this part (repeatable; default: all)")
    ap.add_argument("--against", metavar="DIR",
                    help="batch part only: pair this checkout's daemon with the one imported from DIR (another "
                         "checkout's daemon/ directory, e.g. a `git worktree add` of main): 6 runs each (2 with "
                         "--quick), which goes first alternating, samples per daemon CPU-second; no bare subscriber")
    a = ap.parse_args()
    if a.role:
        return {"pub": role_pub, "sub": role_sub, "status": role_status, "paced": role_paced,
                "scrape": role_scrape}[a.role](a)
    if a.against and not Path(a.against, "shiftwatch", "__init__.py").is_file():
        ap.error(f"--against {a.against}: no shiftwatch package there (give a checkout's daemon/ directory)")
    return main_bench(a.quick, tuple(a.part or PARTS), a.against)


if __name__ == "__main__":
    sys.exit(main())
