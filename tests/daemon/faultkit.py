"""Tools shared by the broker fault tests and their benchmark (tests/bench/bench_faults_broker.py).

A :class:`TallyPublisher` is a QoS 1 publisher with a persistent session that
keeps count of the samples the broker acknowledged; :class:`AlertViewer`
subscribes to the alert topic with a persistent session of its own; the
metric helpers scrape the daemon's real endpoint over HTTP.  For the metrics
endpoint's limits (tests/daemon/test_metrics_limits.py and
bench_faults_daemon.py): :class:`SlowClients` that trickle requests, the
daemon's open files and threads from /proc, and a pids cgroup.
"""

from __future__ import annotations

import contextlib
import itertools
import json
import os
import select
import socket
import threading
import time
import urllib.request
from collections import deque
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import wait_until  # noqa: F401  re-exported for the fault tests
from shiftwatch.mqtt import PlainClient

T0 = 1_790_000_000.0  # sample times start here (2026-09-21), one second apart

#: Configuration of the streams the fault tests publish on (the invented bottling line).
STREAMS_YAML = """\
  - topic: brackenfield/line2/filler/+/fill
    format: json
    value: weight_g
    time: ts
    unit: g
"""


def topic_of(head: int) -> str:
    return f"brackenfield/line2/filler/head{head}/fill"


class TallyPublisher:
    """Publishes samples at QoS 1 on a persistent session and counts the acknowledged ones.

    paho keeps every publication the broker has not acknowledged and sends it
    again (with the DUP flag) after a reconnect, as a QoS 1 publisher with a
    persistent session must.  A sample counts as published once the broker
    acknowledged it; one acknowledged twice (after a re-send) counts once.

    Samples made while the link is down wait here, in order, and go out once
    the publications paho re-sends after the reconnect are acknowledged.  paho
    2.2 on its own would send a publication made between its reconnect and the
    broker's CONNACK *before* the ones it queued during the outage, so a
    stream's samples would reach the broker out of order (see the README).
    """

    def __init__(self, url: str, client_id: str) -> None:
        self._acks: deque[int] = deque()  # filled from paho's thread, emptied by ours
        self._pending: dict[int, tuple[str, int]] = {}
        self._backlog: deque[tuple[str, int, float]] = deque()
        self._online = False
        self._reconnected = False
        self._old: list[int] = []  # publications made before the last reconnect, not yet acknowledged
        self.acked: dict[str, set[int]] = {}
        self.sent: dict[str, int] = {}
        self.last_ack_at: dict[tuple[str, int], float] = {}
        self.client = PlainClient(url, client_id, persistent=True, on_acked=self._acks.append,
                                  on_connection=self._link)

    def _link(self, up: bool) -> None:  # paho's thread
        self._online = up
        if up:
            self._reconnected = True

    def start(self) -> TallyPublisher:
        self.client.start()
        return self

    def send(self, topic: str, i: int, value: float) -> None:
        """Publish sample ``i`` of ``topic`` (time T0 + i seconds)."""
        self.sent[topic] = self.sent.get(topic, 0) + 1
        self._backlog.append((topic, i, value))
        self.flush()

    def flush(self) -> None:
        """Hand waiting samples to paho when the link is up and its re-sends are through."""
        self.drain()
        if self._reconnected:
            self._reconnected = False
            self._old = list(self._pending)
        if self._old:
            self._old = [m for m in self._old if m in self._pending]
        while self._backlog and self._online and not self._old:
            topic, i, value = self._backlog.popleft()
            mid = self.client.publish(topic, json.dumps({"weight_g": value, "ts": T0 + i}))
            self._pending[mid] = (topic, i)

    def drain(self) -> None:
        """Move acknowledgements from paho's thread into the tally."""
        now = time.monotonic()
        while self._acks:
            mid = self._acks.popleft()
            key = self._pending.pop(mid, None)
            if key is not None:
                self.acked.setdefault(key[0], set()).add(key[1])
                self.last_ack_at[key] = now

    def unacked(self) -> int:
        self.flush()
        return len(self._pending) + len(self._backlog)

    def wait_all_acked(self, timeout: float = 60.0) -> bool:
        deadline = time.monotonic() + timeout
        while self.unacked() and time.monotonic() < deadline:
            time.sleep(0.05)
        return not self.unacked()

    def stop(self) -> None:
        self.client.stop()


class AlertViewer:
    """Keeps every alert record, on a persistent session (records queued during an outage arrive)."""

    def __init__(self, url: str, filt: str, client_id: str) -> None:
        self.records: list[dict[str, Any]] = []
        self._lock = threading.Lock()
        self.client = PlainClient(url, client_id, subscribe=[filt], on_message=self._on, persistent=True)

    def _on(self, topic: str, payload: bytes) -> None:
        with self._lock:
            self.records.append(json.loads(payload))

    def start(self) -> AlertViewer:
        self.client.start()
        return self

    def distinct(self) -> set[tuple[str, str]]:
        """(id, phase) of the records seen; a record delivered twice counts once."""
        with self._lock:
            return {(r["id"], r["phase"]) for r in self.records}

    def stop(self) -> None:
        self.client.stop()


def scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return str(r.read().decode())


def metric_values(text: str, name: str) -> dict[tuple[tuple[str, str], ...], float]:
    """Every sample of ``name`` in a scrape, keyed by its sorted labels."""
    out: dict[tuple[tuple[str, str], ...], float] = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.name == name:
                out[tuple(sorted(s.labels.items()))] = float(s.value)
    return out


def metric(text: str, name: str, **labels: str) -> float | None:
    return metric_values(text, name).get(tuple(sorted(labels.items())))


def metric_matching(text: str, name: str, **labels: str) -> float | None:
    """The first sample of ``name`` whose labels include ``labels`` (others may differ)."""
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items()):
                return float(s.value)
    return None


def samples_by_stream(text: str) -> dict[str, int]:
    """``shiftwatch_samples_total`` per stream."""
    return {dict(k)["stream"]: int(v) for k, v in metric_values(text, "shiftwatch_samples_total").items()}


def rejected_by_stream(text: str, reason: str) -> dict[str, int]:
    return {dict(k)["stream"]: int(v)
            for k, v in metric_values(text, "shiftwatch_samples_rejected_total").items()
            if dict(k)["reason"] == reason}


def alert_records_total(text: str) -> int:
    return int(sum(metric_values(text, "shiftwatch_alert_records_total").values()))




def settle(port: int, want: dict[str, int], timeout: float = 60.0, quiet: float = 2.0) -> dict[str, int]:
    """Scrape until the per-stream sample counts reach ``want`` (then once more, a moment
    later, so a double count would show), or stop moving for ``quiet`` seconds; return them."""
    deadline = time.monotonic() + timeout
    last: dict[str, int] = {}
    moved = time.monotonic()
    while time.monotonic() < deadline:
        got = samples_by_stream(scrape(port))
        if all(got.get(k, 0) >= v for k, v in want.items()):
            time.sleep(0.5)
            return samples_by_stream(scrape(port))
        if got != last:
            last, moved = got, time.monotonic()
        elif time.monotonic() - moved >= quiet:
            return got
        time.sleep(0.05)
    return last


# ------------------------------------------------------------ the endpoint's limits
SLOW_REQUEST = b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nX-Slow: " + b"a" * 4000


class SlowClients:
    """``n`` connections that each send one byte of a request every ``every`` seconds and
    never finish it; counts those the server closes.  Bounded: ``n`` sockets, and the
    caller's loop of :meth:`trickle` stops at its own deadline."""

    def __init__(self, port: int, n: int, every: float = 0.5) -> None:
        self.every = every
        self.open: dict[socket.socket, int] = {}
        self.closed_by_server = 0
        self.refused = 0
        for _ in range(n):
            try:
                s = socket.create_connection(("127.0.0.1", port), timeout=5)
            except OSError:
                self.refused += 1
                continue
            s.setblocking(False)
            self.open[s] = 0

    def trickle(self) -> None:
        """Send the next byte on each open connection; notice the ones closed meanwhile."""
        if self.open:
            poller = select.poll()  # not select(): past 1,024 descriptors it cannot
            by_fd = {s.fileno(): s for s in self.open}
            for fd in by_fd:
                poller.register(fd, select.POLLIN)
            for fd, _ in poller.poll(0):
                self._close(by_fd[fd])
        for s, sent in list(self.open.items()):
            try:
                s.send(SLOW_REQUEST[sent:sent + 1])
                self.open[s] = sent + 1
            except (BlockingIOError, InterruptedError):
                pass
            except OSError:  # reset or broken pipe: the server closed it
                self._close(s)

    def _close(self, s: socket.socket) -> None:
        self.open.pop(s, None)
        self.closed_by_server += 1
        s.close()

    def run(self, seconds: float, between: Callable[[], object] | None = None) -> None:
        end = time.monotonic() + seconds
        while self.open and time.monotonic() < end:
            self.trickle()
            if between is not None:
                between()
            time.sleep(self.every)

    def close(self) -> None:
        for s in self.open:
            s.close()
        self.open.clear()


def daemon_fds(pid: int) -> int:
    return len(os.listdir(f"/proc/{pid}/fd"))


def daemon_threads(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("Threads:"):
            return int(line.split()[1])
    raise AssertionError("no Threads line")


_count = itertools.count()


class CgroupUnavailable(RuntimeError):
    """No pids cgroup can be made here (not root, or no cgroup v1 pids hierarchy)."""


@contextlib.contextmanager
def pids_cgroup(limit: int) -> Iterator[Path]:
    """A cgroup (v1 pids controller) that allows ``limit`` tasks; root only."""
    base = Path("/sys/fs/cgroup/pids")
    path = base / f"shiftwatch-test-{os.getpid()}-{next(_count)}"
    try:
        path.mkdir()
        (path / "pids.max").write_text(f"{limit}\n")
    except OSError as exc:
        raise CgroupUnavailable(f"cannot make a pids cgroup in {base}: {exc}") from None
    try:
        yield path
    finally:
        for _ in range(100):
            try:
                path.rmdir()
                break
            except OSError:
                time.sleep(0.1)
