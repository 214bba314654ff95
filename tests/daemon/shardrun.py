"""Shards of shiftwatch behind a private NATS cluster: the scenario of test_shards.py
and tests/bench/bench_shards.py.

A 3-server NATS cluster (``natskit.NatsCluster``: JetStream, MQTT, the plant's
topics mapped to partitions), one real ``shiftwatch run --shard k`` per
partition in a subprocess with ``state.keep: cluster``, a publisher thread
sending filler weights with scheduled steps over MQTT at QoS 1 (paho, through
``PlainClient``), and a viewer keeping every alert record.

The tally (``Tally``) counts, over all streams: samples published, samples the
engines took (``shiftwatch_samples_total`` of the shard that holds each stream
at the end: the count is part of the stream's saved state, so it carries
across restarts and moves), samples lost (published, never taken), injected
steps without a confirmed record, steps confirmed under two or more event ids,
and records delivered more than once under the same id.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import threading
import time
from collections import defaultdict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from shiftwatch.broker import wait_until
from shiftwatch.mqtt import PlainClient

try:  # in the test package
    from .killrun import metric, scrape
    from .natskit import NatsCluster, free_port_block
except ImportError:  # from the benches, with tests/daemon on sys.path
    from killrun import metric, scrape  # type: ignore[no-redef]
    from natskit import NatsCluster, free_port_block  # type: ignore[no-redef]

T0 = 1_790_000_000.0
#: The topic levels natskit's mapping hashes (its wildcards 1, 2, 3 below the plant name).
HASHED_LEVELS = (2, 3, 4)
NOISE = 0.2
STEP = 0.6  # 3 sigma


@dataclass
class Plan:
    """``lines`` x ``heads`` streams of ``samples`` readings at ``rate`` a second, a step every ``gap``."""

    lines: int = 3
    heads: int = 4
    samples: int = 1000
    gap: int = 400
    rate: float = 100.0
    seed: int = 3

    def names(self) -> list[str]:
        return [f"brackenfield/line{li + 1}/head{h + 1}/fill"
                for li in range(self.lines) for h in range(self.heads)]

    def series(self, i: int) -> np.ndarray:
        rng = np.random.default_rng(self.seed * 1000 + i)
        x = 500.0 + NOISE * rng.standard_normal(self.samples)
        for k, at in enumerate(self.shift_indices()):
            x[at:] += STEP if k % 2 == 0 else -STEP
        return x

    def shift_indices(self) -> list[int]:
        return list(range(self.gap, self.samples - self.gap // 4, self.gap))


@dataclass
class Tally:
    published: int = 0
    taken: int = 0
    lost: int = 0
    shifts: int = 0
    shifts_missed: int = 0
    shifts_with_two_ids: int = 0
    records: int = 0
    delivered_twice: int = 0
    seconds: float = 0.0
    short: dict[str, int] = field(default_factory=dict)
    restarts: int = 0

    def line(self) -> str:
        return (f"samples published {self.published}, taken {self.taken}, lost {self.lost}; "
                f"steps {self.shifts}, missed {self.shifts_missed}, confirmed under two ids "
                f"{self.shifts_with_two_ids}; records {self.records}, delivered twice (same id) "
                f"{self.delivered_twice}; shards restarted after a failure {self.restarts}; "
                f"{self.seconds:.0f} s"
                + (f"; streams short of samples: {self.short}" if self.short else ""))


class Shard:
    """One ``shiftwatch run --shard k`` with its log in a file."""

    def __init__(self, command: list[str], config: Path, number: int, log: Path, port: int) -> None:
        self.command, self.config, self.number, self.log_path, self.port = command, config, number, log, port
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self, timeout: float = 60.0) -> None:
        offset = self.log_path.stat().st_size if self.log_path.exists() else 0
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(self.command + ["run", "--config", str(self.config),
                                                         "--shard", str(self.number)],
                                         stdout=log, stderr=subprocess.STDOUT)
        ok = wait_until(lambda: "connected to broker" in self.log()[offset:]
                        or self.proc is None or self.proc.poll() is not None, timeout)
        if not ok or self.proc.poll() is not None:
            raise RuntimeError(f"shard {self.number} did not start: {self.log()[-3000:]}")

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def exited_on_its_own(self) -> bool:
        """The daemon stopped with a failure status (as systemd's Restart=on-failure sees it)."""
        return self.proc is not None and self.proc.poll() not in (None, 0, -signal.SIGKILL)

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()

    def stop(self) -> int:
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait()


class ShardRun:
    """The cluster, ``shards`` daemons, a publisher and a viewer, in ``workdir``."""

    def __init__(self, workdir: Path, command: list[str], cluster: NatsCluster, *, shards: int = 3,
                 plan: Plan | None = None, name: str = "sw", lease: str = "15s", keepalive: int = 5) -> None:
        self.workdir = Path(workdir)
        self.command = command
        self.cluster = cluster
        self.plan = plan or Plan()
        self.name = name
        self.lease = lease
        self.keepalive = keepalive
        # Each shard's metrics port is base + k (metrics_port: offset): the whole block free.
        self.base_port = free_port_block(8)
        self.shards: dict[int, Shard] = {}
        self.records: list[dict[str, Any]] = []
        self.status: dict[str, str] = {}
        self.restarts = 0
        self._probes: set[str] = set()
        self._closing = threading.Event()
        self._lock = threading.Lock()
        self.clients: list[PlainClient] = []
        self.config = self.workdir / "shiftwatch.yaml"
        self.write_config(shards)

    def write_config(self, parts: int, state_dir: str = "state") -> None:
        self.parts = parts
        servers = ", ".join(self.cluster.urls)
        self.config.write_text(
            f"broker:\n  url: {self.cluster.mqtt_url(0)}\n  client_id: {self.name}\n  keepalive: {self.keepalive}\n"
            "  mqtt_version: \"3.1.1\"\n"
            "streams:\n  - topic: brackenfield/+/+/fill\n    format: json\n"
            "    value: v\n    time: ts\n    unit: g\n"
            f"alerts:\n  topic_prefix: {self.name}/out\n"
            f"metrics:\n  listen: 127.0.0.1:{self.base_port}\n"
            f"state:\n  dir: {self.workdir / state_dir}\n  snapshot_every: 2s\n  keep: cluster\n"
            f"shard:\n  number: 0\n  of: {parts}\n  hashed_levels: {list(HASHED_LEVELS)}\n"
            f"cluster:\n  servers: [{servers}]\n  name: {self.name}\n  lease: {self.lease}\n"
            "  redelivery_wait: 6s\n")

    def fresh_state(self, k: int, state_dir: str) -> None:
        """Shard k's next start uses a configuration with a state directory never used (another box)."""
        old = self.config
        self.config = self.workdir / f"shiftwatch-{k}-{state_dir}.yaml"
        self.write_config(self.parts, state_dir)
        self.shards[k] = Shard(self.command, self.config, k, self.workdir / f"shard{k}-{state_dir}.log",
                               self.base_port + k)
        self.config = old

    def repartition(self, parts: int) -> None:
        """Change the cluster's mapping to ``parts`` partitions (every server reloads its
        configuration) and the daemons' shard.of for the shards started after it."""
        self.write_config(parts)
        self.remap(parts)

    def remap(self, parts: int) -> None:
        """Only the cluster's mapping: every server writes ``parts`` partitions and reloads."""
        for s in self.cluster.servers:
            s.write_config([o.cluster_port for o in self.cluster.servers if o is not s], parts)
            if s.proc is not None:
                s.proc.send_signal(signal.SIGHUP)

    def reload_shards(self, numbers: list[int], line: str, timeout: float = 30.0) -> None:
        """SIGHUP to the running shards ``numbers`` (they read the configuration again), then
        wait for ``line`` in each one's log after it."""
        offsets = {}
        for k in numbers:
            sh = self.shards[k]
            offsets[k] = len(sh.log())
            if sh.proc is not None and sh.proc.poll() is None:
                sh.proc.send_signal(signal.SIGHUP)
        for k in numbers:
            sh = self.shards[k]
            if not wait_until(lambda sh=sh, k=k: line in sh.log()[offsets[k]:], timeout):
                raise RuntimeError(f"shard {k} did not log {line!r} after SIGHUP: {sh.log()[-2000:]}")

    def cluster_holds(self, streams: list[str]) -> list[str]:
        """The streams of ``streams`` of which the cluster holds a snapshot or a journal
        message under this run's cluster.name (read with nats-py, not through a daemon)."""
        import asyncio

        import nats
        from nats.js.errors import NotFoundError

        from shiftwatch.clusterstate import stream_key

        async def go() -> list[str]:
            nc = await nats.connect(servers=self.cluster.urls, connect_timeout=2, max_reconnect_attempts=2)
            try:
                js = nc.jetstream(timeout=5)
                out = []
                for s in streams:
                    key = stream_key(s)
                    for stream, subject in ((f"{self.name}_journal", f"{self.name}.journal.{key}"),
                                            (f"KV_{self.name}_state", f"$KV.{self.name}_state.{key}")):
                        try:
                            await js.get_last_msg(stream, subject)
                        except NotFoundError:
                            continue
                        out.append(s)
                        break
                return out
            finally:
                await nc.close()

        return asyncio.run(go())

    def shard(self, k: int) -> Shard:
        if k not in self.shards:
            self.shards[k] = Shard(self.command, self.config, k, self.workdir / f"shard{k}.log",
                                   self.base_port + k)
        return self.shards[k]

    def _on_record(self, topic: str, payload: bytes) -> None:
        try:
            body = json.loads(payload)
        except ValueError:
            return
        with self._lock:
            self.records.append(body)

    def _on_message(self, topic: str, payload: bytes) -> None:
        if topic.endswith("/~probe"):
            self._probes.add(topic)
        elif "/status/" in topic:
            with self._lock:
                self.status[topic.rsplit("-", 1)[-1]] = payload.decode(errors="replace")
        else:
            self._on_record(topic, payload)

    def online(self, k: int, timeout: float = 60.0) -> bool:
        """Wait for shard k's retained status to say online: the daemon publishes it
        right after its SUBSCRIBE, which the cluster has then handled."""
        return wait_until(lambda: self.status.get(str(k)) == "online", timeout)

    def supervise(self) -> None:
        """Start a shard again when it exits with a failure status, after 2 s, as the
        systemd template's Restart=on-failure and RestartSec do (a shard that lost its
        lease while the cluster did not answer stops with status 3)."""
        def loop() -> None:
            while not self._closing.wait(0.5):
                for sh in list(self.shards.values()):
                    if sh.exited_on_its_own() and not self._closing.wait(2.0):
                        self.restarts += 1
                        try:
                            sh.start()
                        except RuntimeError:
                            pass  # tried again on the next turn
        threading.Thread(target=loop, daemon=True).start()

    def start(self) -> None:
        self.supervise()
        filters = [f"{self.name}/out/alerts/#", f"{self.name}/out/status/#"]
        viewer = PlainClient(self.cluster.mqtt_url(1), f"{self.name}-viewer", subscribe=filters,
                             on_message=self._on_message, mqtt_version="3.1.1").start()
        self.clients.append(viewer)
        self._confirm_subscriptions(viewer, filters)

    def _confirm_subscriptions(self, viewer: PlainClient, filters: list[str], timeout: float = 90.0) -> None:
        """Wait until a probe published under each filter comes back to the viewer.  NATS's
        MQTT side answers a SUBSCRIBE whose JetStream consumer it could not create in time
        with a failure code ("Unable to add JetStream consumer ... timeout" in its log, seen
        on this loaded machine): the viewer then saw no alert record at all.  A filter whose
        probe does not come back is subscribed again."""
        probes = {f: f[:-1] + "~probe" for f in filters}
        deadline = time.monotonic() + timeout
        while True:
            missing = [f for f, t in probes.items() if t not in self._probes]
            if not missing:
                return
            if time.monotonic() > deadline:
                raise RuntimeError(f"the viewer's subscriptions {missing} were never confirmed")
            for f in missing:
                viewer.publish(probes[f], b"probe", qos=1)
            if wait_until(lambda missing=missing: all(probes[f] in self._probes for f in missing), 5.0):
                continue
            for f in missing:
                viewer.client.subscribe(f, qos=1)

    def publish(self, during: Callable[[int], None] | None = None) -> None:
        """Publish the plan (from the cluster's third server); ``during(j)`` is called
        after each sample index j, from the publishing thread."""
        p = self.plan
        pub = PlainClient(self.cluster.mqtt_url(2), f"{self.name}-publisher", mqtt_version="3.1.1")
        # paho keeps what is published while the connection is down and sends it, with the
        # QoS 1 messages not yet acknowledged, once it is back (paho-mqtt 2.x
        # _messages_reconnect_reset_out); its default wait between attempts doubles to 120 s.
        # A CI run whose NATS server timed out storing the publisher's messages ("timeout for
        # request type MS" in its log) and closed its connection near the end of the plan
        # left 5,657 samples in paho past settle's 20 s still: the shards had lost nothing.
        # The publisher tries again within 2 s, as PlainClient(persistent=True) does.
        pub.client.reconnect_delay_set(min_delay=1, max_delay=2)
        pub.start()
        self.clients.append(pub)
        names = p.names()
        series = [p.series(i) for i in range(len(names))]
        start = time.monotonic()
        for j in range(p.samples):
            for i, name in enumerate(names):
                pub.publish(name, json.dumps({"v": round(float(series[i][j]), 4), "ts": T0 + j}), qos=1)
            if during is not None:
                during(j)
            lag = start + (j + 1) / p.rate - time.monotonic()
            if lag > 0:
                time.sleep(lag)

    def settle(self, timeout: float = 120.0, still_for: float = 20.0) -> dict[str, float]:
        """Wait until every stream's samples are taken (or nothing moves for ``still_for``
        seconds: a daemon tries a broker that is away again at least every 4 s, and waits for
        redeliveries after each reconnection); the count per stream, from the shard that has
        taken most of it."""
        names = self.plan.names()
        deadline = time.monotonic() + timeout
        last: dict[str, float] = {}
        still = time.monotonic()
        while time.monotonic() < deadline:
            counts = self.taken()
            if all(counts.get(s, 0) >= self.plan.samples for s in names):
                last = counts
                break
            if counts != last:
                last, still = counts, time.monotonic()
            elif time.monotonic() - still > still_for:
                break
            time.sleep(0.3)
        time.sleep(1.0)  # records completed by the last readings
        return self.taken() or last

    def taken(self) -> dict[str, float]:
        out: dict[str, float] = defaultdict(float)
        for sh in self.shards.values():
            if sh.proc is None or sh.proc.poll() is not None:
                continue
            try:
                m = scrape(sh.port)
            except OSError:
                continue
            for s in self.plan.names():
                out[s] = max(out[s], metric(m, "shiftwatch_samples_total", stream=s))
        return dict(out)

    def tally(self, counts: dict[str, float], seconds: float) -> Tally:
        p = self.plan
        t = Tally(seconds=seconds, restarts=self.restarts)
        names = p.names()
        t.published = p.samples * len(names)
        t.taken = int(sum(min(counts.get(s, 0), p.samples) for s in names))
        t.lost = t.published - t.taken
        t.short = {s: int(counts.get(s, 0)) for s in names if counts.get(s, 0) < p.samples}
        with self._lock:
            records = list(self.records)
        t.records = len(records)
        seen: dict[tuple[str, str], int] = defaultdict(int)
        for r in records:
            seen[(str(r.get("id")), str(r.get("phase")))] += 1
        t.delivered_twice = sum(n - 1 for n in seen.values() if n > 1)
        for s in names:
            # A step back to the level before the last one is confirmed as "returned".
            confirmed = [r for r in records if r.get("stream") == s
                         and r.get("phase") in ("confirmed", "returned")]
            for at in p.shift_indices():
                t.shifts += 1
                t_at = T0 + at
                near = {r["id"] for r in confirmed if abs(_epoch(r.get("shift_at")) - t_at) <= 20}
                if not near:
                    t.shifts_missed += 1
                elif len(near) > 1:
                    t.shifts_with_two_ids += 1
        return t

    def log_tails(self, lines: int = 12) -> str:
        """The last ``lines`` lines of every shard's log and the cluster servers' warnings and
        errors: what a failed fault test shows, since a CI run keeps nothing else of it."""
        out = []
        for k, sh in sorted(self.shards.items()):
            tail = sh.log().splitlines()[-lines:]
            out.append(f"--- shard {k} ---\n" + "\n".join(t[:240] for t in tail))
        for s in self.cluster.servers:
            text = s.log_path.read_text(errors="replace") if s.log_path.exists() else ""
            bad = [t for t in text.splitlines() if "[WRN]" in t or "[ERR]" in t][-lines:]
            out.append(f"--- NATS {s.name} ---\n" + "\n".join(t[:240] for t in bad))
        return "\n".join(out)

    def close(self) -> None:
        self._closing.set()
        for sh in self.shards.values():
            sh.stop()
        for c in self.clients:
            c.stop()


def _epoch(value: Any) -> float:
    from shiftwatch.core.timefmt import parse_time

    try:
        return float(parse_time(value)) if isinstance(value, str) else float(value)
    except (TypeError, ValueError):
        return float("nan")


# The steps the shard tests share (test_shards.py, test_shard_handover_stalls.py).

#: The real command line of the daemon, in this interpreter.
SHIFTWATCH = [sys.executable, "-m", "shiftwatch"]


def run_three_shards(tmp_path: Path, cluster: NatsCluster, name: str, plan: Plan, keepalive: int = 5) -> ShardRun:
    r = ShardRun(tmp_path, SHIFTWATCH, cluster, plan=plan, name=name, keepalive=keepalive)
    r.start()
    for k in range(3):
        r.shard(k).start()
        assert r.online(k), f"shard {k} never said online: {r.shard(k).log()[-2000:]}"
    return r


def all_taking(r: ShardRun, shards: int = 3) -> float:
    """Wait until shards 0 to ``shards`` - 1 have all taken samples; the seconds waited."""
    t = time.monotonic()
    if not wait_until(lambda: all(metric(scrape(r.shard(k).port), "shiftwatch_samples_total") > 0
                                  for k in range(shards)), 60):
        raise RuntimeError("a shard took no sample in 60 s")
    return time.monotonic() - t


def publish_with(r: ShardRun, change: Callable[[], None], *, at: int = 300, wait: float = 120.0,
                 settle: float = 150.0, still_for: float = 20.0,
                 progress: list[int] | None = None) -> tuple[dict[str, float], Tally]:
    """Publish the plan; once sample index ``at`` is out, run ``change`` in a thread (what it
    raises fails the test); then wait for the shards to settle (``ShardRun.settle``): the
    samples each stream's holder took, and the tally.  ``progress[-1]``: the last index out."""
    done = threading.Event()
    errors: list[str] = []

    def run() -> None:
        try:
            change()
        except Exception as exc:  # noqa: BLE001  reported below, in the test's thread
            errors.append(f"{type(exc).__name__}: {exc}")
        finally:
            done.set()

    def during(j: int) -> None:
        if progress is not None:
            progress[-1] = j
        if j == at:
            threading.Thread(target=run, daemon=True).start()

    t0 = time.monotonic()
    r.publish(during)
    assert done.wait(wait)
    assert not errors, errors
    counts = r.settle(settle, still_for=still_for)
    return counts, r.tally(counts, time.monotonic() - t0)


def handover_outcomes(pages: Iterable[dict[tuple[str, tuple[tuple[str, str], ...]], float]]) -> dict[str, float]:
    """shiftwatch_stream_handovers_total by outcome, summed over the shards' scrapes."""
    out = {"answered": 0.0, "waited_out": 0.0}
    for m in pages:
        for (n, lab), v in m.items():
            if n == "shiftwatch_stream_handovers_total":
                out[dict(lab)["outcome"]] += v
    return out
