"""Fixtures for the daemon's integration tests: a real Mosquitto of our own, and the real daemon.

Every test that needs a broker starts a private Mosquitto on a free loopback
port.  When no broker can be started the test fails (it never skips): the
README's test command (tests/install-and-test.sh) installs Mosquitto wherever it is missing.
"""

from __future__ import annotations

import json
import signal
import subprocess
import threading
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from shiftwatch.broker import MosquittoBroker, free_port, hold
from shiftwatch.mqtt import PlainClient


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    """A module's own 3-server NATS cluster (JetStream, 3 replicas, MQTT, the plant's
    partition mapping: ``natskit.module_cluster``), for the shard test files that ask for
    ``cluster``; it fails the test when it cannot start.  (test_shard_journal.py has a
    ``cluster`` of its own, a different thing.)"""
    from .natskit import module_cluster

    yield from module_cluster(tmp_path_factory)


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[MosquittoBroker]:
    try:
        b = MosquittoBroker(workdir=tmp_path / "broker").start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test broker: {exc}")
    yield b
    b.stop()


class Collector:
    """Subscribes to a filter and keeps every message (topic, parsed JSON or raw bytes)."""

    def __init__(self, url: str, filt: str, client_id: str) -> None:
        self.items: list[tuple[str, Any]] = []
        self._cv = threading.Condition()
        self.client = PlainClient(url, client_id, subscribe=[filt], on_message=self._on)

    def _on(self, topic: str, payload: bytes) -> None:
        try:
            body: Any = json.loads(payload)
        except ValueError:
            body = payload
        with self._cv:
            self.items.append((topic, body))
            self._cv.notify_all()

    def wait_for(self, pred: Callable[[list[tuple[str, Any]]], bool], timeout: float = 30.0) -> bool:
        deadline = time.monotonic() + timeout
        with self._cv:
            while not pred(self.items):
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                self._cv.wait(left)
            return True

    def records(self, phase: str | None = None) -> list[dict[str, Any]]:
        with self._cv:
            return [b for _, b in self.items if isinstance(b, dict) and (phase is None or b.get("phase") == phase)]


@pytest.fixture
def collector(broker: MosquittoBroker) -> Iterator[Callable[[str], Collector]]:
    made: list[Collector] = []

    def make(filt: str) -> Collector:
        c = Collector(broker.url, filt, f"test-collector-{len(made)}")
        c.client.start()
        made.append(c)
        return c

    yield make
    for c in made:
        c.client.stop()


@pytest.fixture
def publisher(broker: MosquittoBroker) -> Iterator[PlainClient]:
    p = PlainClient(broker.url, "test-publisher").start()
    yield p
    p.stop()


class DaemonProcess:
    """The real daemon (`shiftwatch run`) in a subprocess."""

    def __init__(self, command: list[str], config: Path, metrics_port: int) -> None:
        self.command = command
        self.config = config
        self.metrics_port = metrics_port
        self.proc: subprocess.Popen[str] | None = None
        self.log_path = config.with_suffix(".log")
        self.run_args: list[str] = []  # more options of `shiftwatch run`, e.g. --log-format json

    def start(self, timeout: float = 20.0) -> DaemonProcess:
        self.log = open(self.log_path, "a")  # noqa: SIM115  the daemon's output while it runs; closed by stop()
        offset = self.log_path.stat().st_size
        self.proc = subprocess.Popen(self.command + ["run", "--config", str(self.config), *self.run_args],
                                     stdout=self.log, stderr=subprocess.STDOUT, text=True)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"daemon exited with {self.proc.returncode}: {self.log_text()}")
            if "connected to broker" in self.log_text()[offset:]:
                return self
            time.sleep(0.05)
        raise RuntimeError(f"daemon did not connect within {timeout} s: {self.log_text()}")

    def log_text(self) -> str:
        return self.log_path.read_text() if self.log_path.exists() else ""

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        if sig == signal.SIGSTOP:
            hold(self.proc)  # returns once every thread of the daemon is stopped
            return
        self.proc.send_signal(sig)
        if sig == signal.SIGTERM:
            self.term_sent = True

    def stop(self, timeout: float = 20.0) -> int:
        """SIGTERM (once) and wait for the exit status."""
        assert self.proc is not None
        if self.proc.poll() is None and not getattr(self, "term_sent", False):
            self.proc.send_signal(signal.SIGTERM)
        self.term_sent = False
        code = self.proc.wait(timeout=timeout)
        self.log.close()
        return code

    def scrape(self) -> str:
        with urllib.request.urlopen(f"http://127.0.0.1:{self.metrics_port}/metrics", timeout=5) as r:
            return r.read().decode()


@pytest.fixture
def daemon_factory(tmp_path: Path, broker: MosquittoBroker,
                   shiftwatch_cmd: list[str]) -> Iterator[Callable[..., DaemonProcess]]:
    started: list[DaemonProcess] = []

    def make(streams_yaml: str, *, extra: str = "", client_id: str = "shiftwatch-test",
             keepalive: int = 5) -> DaemonProcess:
        port = free_port()
        cfg = tmp_path / f"shiftwatch-{len(started)}.yaml"
        cfg.write_text(
            f"broker:\n  url: {broker.url}\n  client_id: {client_id}\n  keepalive: {keepalive}\n"
            f"streams:\n{streams_yaml}"
            f"alerts:\n  topic_prefix: sw\n"
            f"metrics:\n  listen: 127.0.0.1:{port}\n"
            f"state:\n  dir: {tmp_path / 'state'}\n  snapshot_every: 1s\n" + extra)
        d = DaemonProcess(shiftwatch_cmd, cfg, port)
        started.append(d)
        return d

    yield make
    for d in started:
        if d.proc is not None and d.proc.poll() is None:
            d.proc.kill()
            d.proc.wait()
