"""Shards behind a NATS cluster: throughput for 1, 2 and 4 shards against as many bare
paho subscribers in the same run, and the cost of cluster state against local state.

    python tests/bench/bench_shards.py [--quick] [--repeat N] [--part throughput|state]
        [--shards 1 2 4] [--payload single batch260] [--streams established|new]
        [--ack-wait 5s] [--max-ack-pending 4096] [--against DIR] [--spy DIR] [--poll 0.05]

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

Where the CPU goes: over each measured interval (the cluster storing a backlog,
the bare subscribers taking it, the shards taking it) the CPU time (user +
system) of each shard (its threads' run times in nanoseconds, /proc/<pid>/task/*/schedstat),
of each nats-server and of this process (the publisher, the bare subscribers, the
/metrics poller; psutil from /proc, in ticks of 10 ms), and the
machine's busy time from /proc/stat, whose rest is other work sharing the
machine.  Reported: samples per CPU-second of the shard process itself (and
without its two /metrics threads, which serve the poller), the shard's CPU by
thread (names from ``py-spy dump`` when py-spy is installed, else the names the
daemon gives its threads in /proc), how the shard's
main thread spent the interval (on a core, runnable but waiting for a core,
asleep: the kernel's schedstat), the NATS servers' CPU-seconds per million
samples, each one's share of the machine's cores, and the load average.

``--against DIR`` runs the shards of each repeat twice over the same cluster, on DIR's
code (another checkout's ``daemon/`` directory, first on their PYTHONPATH) and on this
checkout's, which goes first alternating, and reports both and the ratio of their
samples per shard CPU-second per repeat.  ``--spy DIR`` runs ``py-spy record`` (raw
stacks per thread, not stopping the shard) on each shard while it takes the backlog.
``--poll`` sets the seconds between the polls of the shards' /metrics (0.05 by default;
``bench_daemon.py`` polls every 0.25 s): each poll costs the shard a render in its
metrics threads, which the figure without those threads leaves out.

Ratios only, each against a baseline measured in the same run: the machine
(2 cores) is shared, so absolute rates move from run to run.  With --repeat the
median of the repeats is reported.  A repeat in which the shards take no sample
for 60 s (samples set aside, e.g. copies NATS sent again after newer ones after a
reconnection, never arrive) is reported as not counted, with the shard's log.
Not part of the test suite.
"""

from __future__ import annotations

import argparse
import http.client
import json
import math
import os
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import threading
import time
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path
from tempfile import TemporaryDirectory
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "daemon"))

import paho.mqtt.client as paho
import psutil
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
#: How long the shards may take no sample of the backlog before the repeat is not counted
#: (samples set aside, e.g. copies NATS sent again after newer ones, never arrive).
STALL = 60.0
#: Seconds between two polls of the shards' /metrics while they take the backlog (--poll): each
#: poll costs the shard a render of ``shiftwatch_samples_total`` in its metrics threads.
POLL = 0.05
#: The machine's cores, the denominator of each process group's share.
CORES = psutil.cpu_count() or 1
#: The shard's threads that answer the benchmark's /metrics polls (metrics.py): what they
#: spend is the benchmark's, not the shard's work, and is also shown left out.
POLL_THREADS = ("metrics-render", "metrics-http")


@dataclass
class CpuReading:
    """CPU seconds (user + system) spent so far by each group of processes, by each
    thread of the shards, and by the whole machine (all cores, busy time only)."""

    at: float
    groups: dict[str, float]
    threads: dict[int, float]
    #: The shards' main threads: seconds on a core and seconds runnable but waiting for one.
    ran: float
    queued: float
    busy: float
    load: float


@dataclass
class CpuSpent:
    """What was spent between two readings, and the samples taken meanwhile."""

    wall: float
    samples: float
    groups: dict[str, float]
    #: The shards' threads (by thread id), and which of them are their main threads.
    threads: dict[int, float]
    mains: list[int]
    ran: float
    queued: float
    busy: float
    load: float
    #: Thread names by thread id, when py-spy could tell them.
    names: dict[int, str] = field(default_factory=dict)

    def share(self, cpu: float) -> float:
        """``cpu`` seconds as a share of all the machine's cores over the interval."""
        return cpu / (self.wall * CORES)

    @property
    def others(self) -> float:
        """The machine's busy time that none of the measured groups spent (other work)."""
        return max(self.busy - sum(self.groups.values()), 0.0)

    def thread_cpu(self) -> dict[str, float]:
        """The shards' CPU seconds by thread name (by id when py-spy was not there; the
        MQTT client's thread without its client id)."""
        total: dict[str, float] = {}
        for tid, cpu in self.threads.items():
            name = self.names.get(tid, "MainThread" if tid in self.mains else f"thread {tid}")
            if name.startswith("paho-mqtt-client-"):
                name = "paho-mqtt-client"
            total[name] = total.get(name, 0.0) + cpu
        return total

    def main_split(self) -> tuple[float, float, float]:
        """The shards' main threads' wall time (per shard) as parts: on a core, runnable but
        waiting for a core (the machine too busy), asleep (waiting for messages or for the
        cluster's acknowledgements)."""
        wall = self.wall * max(len(self.mains), 1)
        ran, queued = self.ran / wall, self.queued / wall
        return ran, queued, max(1.0 - ran - queued, 0.0)

    @property
    def polling(self) -> float:
        """The shards' CPU in the threads that answer the benchmark's /metrics polls."""
        return sum(c for n, c in self.thread_cpu().items() if n in POLL_THREADS)

    def by_thread(self) -> str:
        """The shards' CPU by thread, as parts of the shards' CPU, largest first."""
        shard = self.groups["shard"] or 1.0
        per = 1e6 / max(self.samples, 1.0)
        return ", ".join(f"{n} {c / shard:.0%} ({c * per:.3f} us a sample)"
                         for n, c in sorted(self.thread_cpu().items(), key=lambda x: -x[1]) if c / shard >= 0.005)


class CpuMeter:
    """Reads the CPU time of named groups of processes from the kernel (psutil, from
    /proc/<pid>/stat), of each thread of the processes in ``threads`` (the shards, from
    /proc/<pid>/task/<tid>/schedstat), and the machine's from /proc/stat.  A process that
    has ended counts as what it had spent at the last reading.

    A group made only of processes in ``threads`` (the shards) counts the sum of their
    threads' time on a core, in nanoseconds (the kernel's ``sum_exec_runtime``, user and
    system time together); /proc/<pid>/stat counts in ticks of 10 ms, and a repeat's
    shard spends about half a second, so the ticks alone moved a repeat's figure by up
    to 4% and a small thread's by a whole tick, 0.027 microseconds a sample (since
    2026-12-05; before, both came from the ticks)."""

    def __init__(self, groups: dict[str, list[int]], threads: list[int] | None = None) -> None:
        self.procs = {name: [psutil.Process(pid) for pid in pids] for name, pids in groups.items()}
        self.threaded = [psutil.Process(pid) for pid in threads or []]
        self.mains = list(threads or [])
        self.by_threads = {name: list(pids) for name, pids in groups.items() if pids and set(pids) <= set(self.mains)}
        self._of: dict[int, int] = {}  # thread id -> its process
        self._last: dict[int, float] = {}
        self._last_threads: dict[int, float] = {}
        self._last_sched: dict[int, tuple[float, float]] = {}

    def _cpu(self, p: psutil.Process) -> float:
        try:
            t = p.cpu_times()
            self._last[p.pid] = t.user + t.system
        except psutil.NoSuchProcess:
            pass
        return self._last.get(p.pid, 0.0)

    def _threads(self) -> dict[int, float]:
        for p in self.threaded:
            task = Path(f"/proc/{p.pid}/task")
            try:
                tids = [int(t.name) for t in task.iterdir()]
            except OSError:  # the process has ended
                continue
            for tid in tids:
                try:
                    self._last_threads[tid] = int((task / str(tid) / "schedstat").read_text().split()[0]) / 1e9
                    self._of[tid] = p.pid
                except (OSError, IndexError, ValueError):  # the thread has ended
                    pass
        return dict(self._last_threads)

    def _sched(self) -> tuple[float, float]:
        """The main threads' time on a core and runnable on a run queue, from the kernel's
        /proc/<pid>/task/<pid>/schedstat (nanoseconds; psutil does not read it)."""
        ran = queued = 0.0
        for pid in self.mains:
            try:
                fields = Path(f"/proc/{pid}/task/{pid}/schedstat").read_text().split()
                self._last_sched[pid] = (int(fields[0]) / 1e9, int(fields[1]) / 1e9)
            except (OSError, IndexError, ValueError):
                pass
            r, q = self._last_sched.get(pid, (0.0, 0.0))
            ran, queued = ran + r, queued + q
        return ran, queued

    def read(self) -> CpuReading:
        m = psutil.cpu_times()
        busy = m.user + m.nice + m.system + m.irq + m.softirq + m.steal  # guest time is in user
        threads = self._threads()
        groups = {k: sum(self._cpu(p) for p in ps) for k, ps in self.procs.items()}
        for k, pids in self.by_threads.items():
            groups[k] = sum(c for tid, c in threads.items() if self._of.get(tid) in pids)
        return CpuReading(time.monotonic(), groups, threads, *self._sched(), busy, os.getloadavg()[0])

    def spent(self, a: CpuReading, b: CpuReading, samples: float) -> CpuSpent:
        return CpuSpent(b.at - a.at, samples, {k: b.groups[k] - a.groups[k] for k in a.groups},
                        {t: c - a.threads.get(t, 0.0) for t, c in b.threads.items()}, self.mains,
                        b.ran - a.ran, b.queued - a.queued, b.busy - a.busy, max(a.load, b.load))


def thread_names(pid: int) -> dict[int, str]:
    """Thread id to Python thread name in process ``pid``, from ``py-spy dump`` when py-spy is
    installed beside this Python or on PATH; otherwise the names the daemon gives its threads
    in the operating system (``/proc/<pid>/task/<tid>/comm``, cut to 15 bytes: e.g.
    ``metrics-render``, ``shiftwatch-nats``, ``paho-mqtt-clien``; since 2026-12-05, see
    ``daemon.name_os_threads``).  A thread that still has the process's name is shown by id."""
    spy = py_spy()
    if spy is None:
        task = Path(f"/proc/{pid}/task")
        names: dict[int, str] = {}
        try:
            process_name = (task / str(pid) / "comm").read_text().strip()
            for t in task.iterdir():
                name = (t / "comm").read_text().strip()
                if int(t.name) != pid and name != process_name:
                    names[int(t.name)] = name
        except OSError:  # the process or a thread gone meanwhile
            pass
        return names
    try:
        out = subprocess.run([spy, "dump", "--pid", str(pid)], capture_output=True, text=True,
                             timeout=30, check=False).stdout
    except (OSError, subprocess.SubprocessError):
        return {}
    return {int(m[1]): m[2] for m in re.finditer(r'^Thread (\d+) \([^)]*\): "([^"]*)"', out, re.MULTILINE)}


def nats_pids(cluster: NatsCluster) -> list[int]:
    return [s.proc.pid for s in cluster.servers if s.proc is not None]


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


def py_spy() -> str | None:
    """py-spy beside this Python or on PATH (None: not installed)."""
    exe = Path(sys.executable).with_name("py-spy")
    return str(exe) if exe.exists() else shutil.which("py-spy")


def run_shards(work: Path, cluster: NatsCluster, parts: int, keep: str, msgs: list[tuple[str, bytes]],
               tag: str, warm: list[tuple[str, bytes]] | None = None,
               per_msg: int = 1, code: str | None = None,
               spy: Path | None = None) -> tuple[float, CpuSpent, CpuSpent]:
    """The shards' rate over the backlog ``msgs``, in messages a second, with the CPU
    spent while they took it and while the cluster stored it.  With ``warm``, the
    shards first take those messages live, so that the backlog meets established
    streams instead of new ones warming up.  ``code``: a ``daemon/`` directory whose
    package the shards run (first on their PYTHONPATH; None: this checkout's, as
    imported here).  ``spy``: a directory where ``py-spy record`` (raw, per thread,
    not stopping the shard) writes what each shard did while it took the backlog."""
    env = dict(os.environ)
    if code is not None:
        env["PYTHONPATH"] = code + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    cfg = work / f"{tag}.yaml"
    port = free_port()
    while not all(_free(port + k) for k in range(parts)):  # the shards take port, port + 1, ...
        port = free_port()
    shard_config(cfg, cluster, parts, keep, port, tag)

    def start(k: int) -> subprocess.Popen[bytes]:
        log = open(work / f"{tag}-{k}.log", "ab")  # noqa: SIM115  kept open by the child
        return subprocess.Popen(CMD + ["run", "--config", str(cfg), "--shard", str(k)], stdout=log,
                                stderr=subprocess.STDOUT, env=env)

    def logs(k: int) -> str:
        return (work / f"{tag}-{k}.log").read_text(errors="replace")

    # Sessions first: start, wait for the subscription (the retained online status), stop.
    seen: dict[str, str] = {}
    viewer = PlainClient(cluster.mqtt_url(1), f"bench-viewer-{tag}", subscribe=[f"bench/{tag}/status/#"],
                         on_message=lambda t, p: seen.__setitem__(t, p.decode()), mqtt_version="3.1.1").start()
    procs = [start(k) for k in range(parts)]
    if not wait_until(lambda: sum(v == "online" for v in seen.values()) >= parts, 90):
        # (a cluster busy past its timeouts, e.g. after an overload: the repeat is not counted)
        for p in procs:
            p.terminate()
            p.wait(60)
        viewer.stop()
        raise RuntimeError(f"the shards did not say they were online within 90 s: {[logs(k)[-800:] for k in range(parts)]}")
    ports = [port + k for k in range(parts)]
    base = 0.0
    if warm:
        # Established streams: the shards take the warm-up messages live, then are
        # stopped (SIGSTOP, a few seconds: well inside the keepalive and the lease)
        # while the backlog is stored, and go on (SIGCONT) with their engines as they were.
        publish_backlog(cluster.mqtt_url(2), warm)
        last_n, moved = -1.0, time.monotonic()
        while (n := taken(ports)) < len(warm) * BATCH:
            if n != last_n:
                last_n, moved = n, time.monotonic()
            elif time.monotonic() - moved > STALL:
                for p in procs:
                    p.terminate()
                    p.wait(60)
                viewer.stop()
                raise RuntimeError(f"shards took {n:,.0f} of the {len(warm) * BATCH:,} warm-up samples, none "
                                   f"for {STALL:.0f} s: {[logs(k)[-1500:] for k in range(parts)]}")
            time.sleep(0.2)
        time.sleep(1.0)  # the last round's acknowledgements
        base = taken(ports)
        for p in procs:
            p.send_signal(signal.SIGSTOP)
        store = publish_measured(cluster, msgs, per_msg)
        spies = start_spies(spy, tag, [p.pid for p in procs])
        for p in procs:
            p.send_signal(signal.SIGCONT)
    else:
        for p in procs:
            p.terminate()
            p.wait(60)
        store = publish_measured(cluster, msgs, per_msg)
        procs = [start(k) for k in range(parts)]
        spies = start_spies(spy, tag, [p.pid for p in procs])
    pids = [p.pid for p in procs]
    meter = CpuMeter({"shard": pids, "nats": nats_pids(cluster), "bench": [os.getpid()]}, threads=pids)
    total = len(msgs) * per_msg
    first: CpuReading | None = None
    done: CpuReading | None = None
    start_count = 0.0
    deadline = time.monotonic() + 600
    last_n, moved = -1.0, time.monotonic()
    while time.monotonic() < deadline and time.monotonic() - moved < STALL:
        n = taken(ports) - base
        now = meter.read()
        if n != last_n:
            last_n, moved = n, now.at
        if first is None and n > 0:
            first, start_count = now, n
        if n >= total:
            done = now
            break
        time.sleep(POLL)
    for sp in spies:
        sp.send_signal(signal.SIGINT)  # py-spy writes its file and ends
    for sp in spies:
        try:
            sp.wait(60)
        except subprocess.TimeoutExpired:
            sp.kill()
    names: dict[int, str] = {}
    if done is not None:
        for p in procs:
            names.update(thread_names(p.pid))
    for p in procs:
        p.terminate()
        p.wait(60)
    viewer.stop()
    if first is None or done is None or done.at <= first.at:
        raise RuntimeError(f"shards took {max(last_n, 0):,.0f} of {total:,} samples, none for {STALL:.0f} s or more: "
                           f"{[logs(k)[-1500:] for k in range(parts)]}")
    take = meter.spent(first, done, total - start_count)
    take.names = names
    return (total - start_count) / take.wall / per_msg, take, store


def start_spies(spy: Path | None, tag: str, pids: list[int]) -> list[subprocess.Popen[bytes]]:
    """``py-spy record`` on each shard, until SIGINT (nothing without ``spy`` or py-spy)."""
    exe = py_spy() if spy is not None else None
    if exe is None or spy is None:
        return []
    spy.mkdir(parents=True, exist_ok=True)
    return [subprocess.Popen([exe, "record", "--pid", str(pid), "--rate", "200", "--format", "raw", "--threads",
                              "--nonblocking", "--output", str(spy / f"{tag}-{k}.txt")],
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            for k, pid in enumerate(pids)]


def publish_measured(cluster: NatsCluster, msgs: list[tuple[str, bytes]], per_msg: int) -> CpuSpent:
    """Publishes the backlog (the publisher is a thread of this process) and returns the
    CPU spent while the cluster stored it."""
    meter = CpuMeter({"shard": [], "nats": nats_pids(cluster), "bench": [os.getpid()]})
    a = meter.read()
    publish_backlog(cluster.mqtt_url(2), msgs)
    return meter.spent(a, meter.read(), len(msgs) * per_msg)


def run_bare(cluster: NatsCluster, parts: int, msgs: list[tuple[str, bytes]], tag: str,
             per_msg: int = 1) -> tuple[float, CpuSpent, CpuSpent]:
    """The bare subscribers' rate over the backlog, in messages a second, with the CPU spent
    while they took it (they are threads of this process) and while the cluster stored it."""
    bare = Bare(cluster.mqtt_url(0), parts, tag)
    bare.connect(subscribe=True)
    time.sleep(3.0)  # the cluster makes each session's consumer
    bare.disconnect()
    store = publish_measured(cluster, msgs, per_msg)
    meter = CpuMeter({"shard": [], "nats": nats_pids(cluster), "bench": [os.getpid()]})
    bare.count = 0
    bare.connect(subscribe=False)
    first: tuple[int, CpuReading] | None = None
    done: tuple[int, CpuReading] | None = None
    deadline = time.monotonic() + BARE_WAIT
    while time.monotonic() < deadline:
        n = bare.count
        now = meter.read()
        if first is None and n > 0:
            first = n, now
        if n >= len(msgs):
            done = n, now
            break
        time.sleep(0.05)
    bare.disconnect()
    if first is None or done is None or done[1].at <= first[1].at:
        # NATS's MQTT side sometimes holds a session's deliveries back (README, "Running
        # shards"); such a repeat says nothing about the subscriber's rate.
        raise RuntimeError(f"bare subscribers took {bare.count} of {len(msgs)} messages in {BARE_WAIT:.0f} s")
    take = meter.spent(first[1], done[1], (done[0] - first[0]) * per_msg)
    return (bare.count - 1) / max(bare.last - bare.first, 1e-9), take, store


CPU_HEAD = ("| shards | payload | phase | seconds | samples | shard: samples per CPU-second "
            "(without the /metrics threads) | shard: CPU / wall, of one core | shard's CPU by thread | "
            "shard's main thread: on a core / waiting for a core / asleep | "
            "NATS servers: CPU-s per million samples | this process: CPU-s per million samples | "
            "share of the 2 cores: shard / NATS / this process / other work / idle | load average (1 min) |")
CPU_RULE = "|---|---|---|---|---|---|---|---|---|---|---|---|---|"


def cpu_rows(parts: int | str, kind: str, phase: str, spent: list[CpuSpent]) -> list[str]:
    """One table row: the median over the repeats of each figure.  "This process" is the
    benchmark itself: the publisher while the cluster stores the backlog, the bare
    subscribers while they take it, the /metrics poller while the shards take it."""
    if not spent:
        return []

    def med(f: Any) -> float:
        return statistics.median(f(x) for x in spent)

    shard = med(lambda x: x.groups["shard"])
    per_cpu = busy = threads = split = "-"
    if shard > 0:
        per_cpu = (f"{med(lambda x: x.samples / x.groups['shard']):,.0f} "
                   f"({med(lambda x: x.samples / (x.groups['shard'] - x.polling)):,.0f})")
        busy = f"{med(lambda x: x.groups['shard'] / x.wall):.2f}"
        names = sorted({n for x in spent for n in x.thread_cpu()})
        parts_of = {n: med(lambda x, n=n: x.thread_cpu().get(n, 0.0) / x.groups["shard"]) for n in names}
        threads = ", ".join(f"{n} {v:.0%}" for n, v in sorted(parts_of.items(), key=lambda x: -x[1]) if v >= 0.005)
        split = " / ".join(f"{med(lambda x, i=i: x.main_split()[i]):.0%}" for i in range(3))
    shares = " / ".join(f"{med(f):.0%}" for f in (
        lambda x: x.share(x.groups["shard"]), lambda x: x.share(x.groups["nats"]),
        lambda x: x.share(x.groups["bench"]), lambda x: x.share(x.others),
        lambda x: max(1.0 - x.share(x.busy), 0.0)))
    loads = [x.load for x in spent]
    row = (f"| {parts} | {kind} | {phase} | {med(lambda x: x.wall):.2f} | {med(lambda x: x.samples):,.0f} | "
           f"{per_cpu} | {busy} | {threads} | {split} | {med(lambda x: x.groups['nats'] / x.samples * 1e6):.2f} | "
           f"{med(lambda x: x.groups['bench'] / x.samples * 1e6):.2f} | {shares} | "
           f"{min(loads):.1f} to {max(loads):.1f} |")
    return [row]


def cpu_line(what: str, x: CpuSpent) -> str:
    shard = x.groups["shard"]
    own = (f", {x.samples / shard:,.0f} samples per shard CPU-second "
           f"({x.samples / (shard - x.polling):,.0f} without the /metrics threads)") if shard > 0 else ""
    return (f"    {what}: {x.wall:.2f} s, {x.samples:,.0f} samples{own}; CPU-s shard {shard:.2f}, "
            f"NATS {x.groups['nats']:.2f}, this process {x.groups['bench']:.2f}, other work {x.others:.2f}, "
            f"machine busy {x.share(x.busy):.0%} of {CORES} cores; load {x.load:.1f}"
            + (f"\n      the shard's CPU by thread: {x.by_thread()}; its main thread on a core / waiting "
               "for a core / asleep: " + " / ".join(f"{v:.0%}" for v in x.main_split()) if shard > 0 else ""))


def part_throughput(args: argparse.Namespace, work: Path) -> list[str]:
    rows = []
    cpu = []
    paired: list[str] = []
    streams = 500 if args.quick else 2000
    single_rounds = 10 if args.quick else 20
    batch_rounds = 3 if args.quick else 4
    # Established streams: each first takes WARM_ROUNDS arrays (1,300 samples: past the
    # warm-up of 200 and the young level's 1,000 after it), not measured.
    warm = payloads(streams, WARM_ROUNDS, BATCH) if args.streams == "established" else None
    after = WARM_ROUNDS * BATCH if warm else 0
    # --against DIR: each repeat runs the shards on DIR's code and on this checkout's, one
    # after the other over the same cluster, which goes first alternating.
    sides: list[tuple[str, str | None]] = [("this", None)]
    if args.against:
        sides = [("against", args.against), ("this", str(ROOT / "daemon"))]
    for parts in args.shards:
        with NatsCluster(3, parts, base=work / f"nats{parts}", ack_wait=args.ack_wait,
                         max_ack_pending=args.max_ack_pending) as cluster:
            for kind, batch, rounds in (("single", 1, single_rounds), ("batch260", BATCH, batch_rounds)):
                if kind not in args.payload:
                    continue
                msgs = payloads(streams, rounds, batch, after)
                rs: dict[str, list[float]] = {side: [] for side, _ in sides}
                rb: dict[str, list[float]] = {side: [] for side, _ in sides}
                stores: list[CpuSpent] = []
                bare_takes: list[CpuSpent] = []
                shard_takes: dict[str, list[CpuSpent]] = {side: [] for side, _ in sides}
                per_cpu: dict[str, list[float]] = {side: [] for side, _ in sides}
                for rep in range(args.repeat):
                    tag = f"{kind}{parts}r{rep}"
                    bared: tuple[float, CpuSpent, CpuSpent] | None = None
                    try:
                        bared = run_bare(cluster, parts, msgs, tag, batch)
                    except RuntimeError as exc:
                        if not args.against:
                            print(f"  repeat {rep + 1}: not counted ({exc})", flush=True)
                            continue
                        # Paired runs compare the shards with each other: they go on without it.
                        print(f"  repeat {rep + 1}: bare subscribers not counted ({exc})", flush=True)
                    got: dict[str, tuple[float, CpuSpent, CpuSpent]] = {}
                    for side, code in (sides if rep % 2 == 0 else sides[::-1]):
                        try:
                            got[side] = run_shards(work, cluster, parts, "cluster", msgs, f"{tag}{side}", warm,
                                                   batch, code=code, spy=args.spy)
                        except RuntimeError as exc:
                            print(f"  repeat {rep + 1} ({side}): not counted ({str(exc)[:3000]})", flush=True)
                    if len(got) != len(sides):
                        continue
                    b = math.nan
                    if bared is not None:
                        b, b_take, b_store = bared
                        stores.append(b_store)
                        bare_takes.append(b_take)
                        print(cpu_line("stored (bare's backlog)", b_store), flush=True)
                        print(cpu_line("bare took", b_take), flush=True)
                    for side, (r, s_take, s_store) in got.items():
                        rb[side].append(b)
                        rs[side].append(r)
                        stores.append(s_store)
                        shard_takes[side].append(s_take)
                        per_cpu[side].append(s_take.samples / max(s_take.groups["shard"], 1e-9))
                        print(f"  repeat {rep + 1} ({side}): shards {r:,.0f} msg/s, bare {b:,.0f} msg/s, "
                              f"ratio {r / b:.2f}", flush=True)
                    for side, (_r, s_take, s_store) in got.items():
                        print(cpu_line(f"stored (shards' backlog, {side})", s_store), flush=True)
                        print(cpu_line(f"shards took ({side})", s_take), flush=True)
                    if args.against:
                        print(f"  repeat {rep + 1}: this / against, samples per shard CPU-second: "
                              f"{per_cpu['this'][-1] / per_cpu['against'][-1]:.3f}", flush=True)
                for side, code in sides:
                    if not rs[side]:
                        continue
                    counted = [x for x in rb[side] if not math.isnan(x)]
                    bare_rate = statistics.median(counted) if counted else math.nan
                    shard_rate = statistics.median(rs[side])
                    label = kind if not args.against else f"{kind} ({side}: {code})"
                    rows.append(f"| {parts} | {label} | {args.streams} | {len(msgs):,} | {shard_rate:,.0f} msg/s, "
                                f"{shard_rate * batch:,.0f} samples/s | {bare_rate:,.0f} msg/s | "
                                f"{shard_rate / bare_rate:.2f} | "
                                f"{', '.join(f'{s / b:.2f}' for s, b in zip(rs[side], rb[side]))} |")
                    print(rows[-1], flush=True)
                    cpu += cpu_rows(parts, label, "shards take it", shard_takes[side])
                    if args.against:
                        xs = per_cpu[side]
                        paired.append(f"- {parts} shard(s), {kind}, {side} ({code}): samples per shard CPU-second, "
                                      f"median {statistics.median(xs):,.0f} ({min(xs):,.0f} to {max(xs):,.0f}); "
                                      f"runs {', '.join(f'{x:,.0f}' for x in xs)}")
                if args.against and per_cpu["this"] and per_cpu["against"]:
                    ratios = [t / a for t, a in zip(per_cpu["this"], per_cpu["against"])]
                    paired.append(f"- {parts} shard(s), {kind}, this / against per repeat: "
                                  f"{', '.join(f'{x:.3f}' for x in ratios)} (median {statistics.median(ratios):.3f})")
                cpu = (cpu_rows(parts, kind, "the cluster stores the backlog (publisher)", stores)
                       + cpu_rows(parts, kind, "bare subscribers take it", bare_takes) + cpu)
    head = ("| shards | payload | streams | messages | shards took | bare subscribers took | ratio (median) | "
            "ratio per repeat |")
    out = [head, "|---|---|---|---|---|---|---|---|", *rows, "",
           f"Where the CPU went (medians over the repeats; {CORES} cores):", "",
           CPU_HEAD, CPU_RULE, *cpu]
    if paired:
        out += ["", "Paired (--against; each repeat ran both, which went first alternating):", "", *paired]
    return out


def part_state(args: argparse.Namespace, work: Path) -> list[str]:
    streams = 500 if args.quick else 2000
    msgs = payloads(streams, 10 if args.quick else 20, 1)
    local, clus = [], []
    local_cpu: list[CpuSpent] = []
    clus_cpu: list[CpuSpent] = []
    with NatsCluster(3, 1, base=work / "nats-state", ack_wait=args.ack_wait,
                     max_ack_pending=args.max_ack_pending) as cluster:
        for rep in range(args.repeat):
            r, take, _ = run_shards(work, cluster, 1, "local", msgs, f"local{rep}")
            local.append(r)
            local_cpu.append(take)
            print(cpu_line(f"repeat {rep + 1}, local state, shard took", take), flush=True)
            r, take, _ = run_shards(work, cluster, 1, "cluster", msgs, f"clus{rep}")
            clus.append(r)
            clus_cpu.append(take)
            print(cpu_line(f"repeat {rep + 1}, cluster state, shard took", take), flush=True)
    lm, cm = statistics.median(local), statistics.median(clus)
    return ["| state | messages | one shard took (median) | per repeat |", "|---|---|---|---|",
            f"| local state.dir | {len(msgs):,} | {lm:,.0f} msg/s | {', '.join(f'{x:,.0f}' for x in local)} |",
            (f"| cluster (R3 journal per stream per round) | {len(msgs):,} | {cm:,.0f} msg/s | "
             f"{', '.join(f'{x:,.0f}' for x in clus)} |"),
            f"| cluster / local | | {cm / lm:.2f} | |", "",
            f"Where the CPU went while the shard took the backlog (medians over the repeats; {CORES} cores):", "",
            CPU_HEAD, CPU_RULE,
            *cpu_rows(1, "single", "local state.dir", local_cpu),
            *cpu_rows(1, "single", "cluster state", clus_cpu)]


def main() -> int:
    global POLL
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
    ap.add_argument("--against", metavar="DIR",
                    help="also run the shards on the code of DIR (another checkout's daemon/ directory) in "
                         "each repeat, alternating which goes first, and report both and their ratios")
    ap.add_argument("--spy", metavar="DIR", type=Path,
                    help="py-spy record (raw, per thread, not stopping the shard) of each shard while it "
                         "takes the backlog, into DIR (needs py-spy)")
    ap.add_argument("--poll", type=float, default=POLL, metavar="SECONDS",
                    help=f"seconds between polls of the shards' /metrics while they take the backlog (default "
                         f"{POLL}; bench_daemon.py polls every 0.25)")
    ap.add_argument("--max-ack-pending", type=int, default=4096,
                    help="the NATS servers' mqtt max_ack_pending (default 4096, as config/nats-partitions.conf)")
    args = ap.parse_args()
    POLL = args.poll
    if args.against and not Path(args.against, "shiftwatch", "__init__.py").is_file():
        ap.error(f"--against {args.against}: no shiftwatch package there (give a checkout's daemon/ directory)")
    if args.spy is not None and py_spy() is None:
        ap.error("--spy: py-spy is not installed beside this Python nor on PATH")
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
