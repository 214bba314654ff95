"""A shard whose MQTT connection is lost while it takes a backlog loses no sample.

What the connection carried when it was lost (in the kernel's buffers, in
paho's, in the server's) never reaches the shard, and the PUBACKs of what the
shard had fed may be lost with it.  NATS 2.9's MQTT side sends every message of
the session that is not acknowledged again after its ``mqtt { ack_wait }``
(``test_shard_redelivery.py`` shows it with DUP and the same packet id), so the
shard sees copies of messages it has fed, some after newer ones.  Their samples
are set aside (``duplicate_time``, or ``out_of_order`` once they have left the
engine's window), which made a benchmark run look as if samples were lost.
This test holds the shard to the publisher: every sample the server
acknowledged (MQTT 3.1.1 section 4.3.2: the PUBACK says the server took the
message over) is fed exactly once, by ``shiftwatch_samples_total``, which
counts a sample only the first time (a copy counts in the rejected total
only).

Against real parts: one nats-server with JetStream and MQTT (``ack_wait`` 2 s,
``max_ack_pending`` 20 so that new messages keep coming after the reconnect),
a real ``shiftwatch run`` with ``state.keep: cluster`` and
``cluster.redelivery_wait`` above ``ack_wait`` (as the README asks) in a
subprocess, a paho publisher at QoS 1, and between the shard and the server a
TCP relay this test resets, as a server closing the connection does.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path

from shiftwatch.broker import free_port, wait_until
from shiftwatch.mqtt import PlainClient

from .faultkit import metric_values, scrape
from .natskit import start_lone_server

T0 = 1_790_000_000.0
STREAMS = 40
ROUNDS = 6
BATCH = 260
ROOT = Path(__file__).resolve().parents[2]


class Relay:
    """A TCP relay from a local port to ``target``; :meth:`cut` resets every connection."""

    def __init__(self, target: int) -> None:
        self.target = target
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.pairs: list[tuple[socket.socket, socket.socket]] = []
        self.connections = 0
        self._lock = threading.Lock()
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                a, _ = self.listener.accept()
            except OSError:
                return
            b = socket.create_connection(("127.0.0.1", self.target))
            with self._lock:
                self.pairs.append((a, b))
                self.connections += 1
            threading.Thread(target=self._pump, args=(a, b), daemon=True).start()
            threading.Thread(target=self._pump, args=(b, a), daemon=True).start()

    @staticmethod
    def _pump(src: socket.socket, dst: socket.socket) -> None:
        try:
            while data := src.recv(65536):
                dst.sendall(data)
        except OSError:
            pass
        for s in (src, dst):
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass

    def cut(self) -> None:
        with self._lock:
            pairs, self.pairs = self.pairs, []
        for pair in pairs:
            for s in pair:
                # SO_LINGER 0: a reset, and what the buffers hold is gone.
                s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00\x00\x00\x00\x00")
                s.close()

    def close(self) -> None:
        self.listener.close()
        self.cut()


def _payloads() -> list[tuple[str, bytes]]:
    out = []
    for r in range(ROUNDS):
        for i in range(STREAMS):
            t = T0 + r * BATCH
            out.append((f"brackenfield/line{i % 5 + 1}/head{i}/fill",
                        json.dumps([{"v": round(500 + ((r * BATCH + j + i) % 13) * 0.01, 3), "ts": t + j}
                                    for j in range(BATCH)]).encode()))
    return out


def _publish(url: str, msgs: list[tuple[str, bytes]]) -> None:
    """Every message at QoS 1, each one's PUBACK awaited: the server has stored them all."""
    pub = PlainClient(url, "ovl-publisher", mqtt_version="3.1.1").start()
    try:
        infos = [pub.client.publish(t, p, qos=1) for t, p in msgs]
        for info in infos:
            info.wait_for_publish(30)
            # The PUBACK: the server has taken the message over (MQTT 3.1.1 section 4.3.2).
            assert info.is_published()
    finally:
        pub.stop()


def _config(path: Path, mqtt_port: int, nats_port: int, metrics_port: int, redelivery_wait: str) -> None:
    path.write_text(
        f"broker:\n  url: mqtt://127.0.0.1:{mqtt_port}\n  client_id: ovl\n  mqtt_version: \"3.1.1\"\n"
        "  keepalive: 5\n"
        "streams:\n  - topic: brackenfield/+/+/fill\n    format: json\n    value: v\n    time: ts\n"
        "alerts:\n  topic_prefix: ovl/out\n"
        f"metrics:\n  listen: 127.0.0.1:{metrics_port}\n"
        f"state:\n  dir: {path.parent / 'state'}\n  snapshot_every: 60s\n  keep: cluster\n"
        f"cluster:\n  servers: [nats://127.0.0.1:{nats_port}]\n  name: ovl\n  replicas: 1\n"
        f"  lease: 15s\n  redelivery_wait: {redelivery_wait}\n")


def _counts(port: int) -> tuple[int, dict[str, int]]:
    try:
        text = scrape(port)
    except OSError:  # not serving yet
        return 0, {}
    taken = int(sum(metric_values(text, "shiftwatch_samples_total").values()))
    rejected: dict[str, int] = {}
    for k, v in metric_values(text, "shiftwatch_samples_rejected_total").items():
        reason = dict(k)["reason"]
        rejected[reason] = rejected.get(reason, 0) + int(v)
    return taken, rejected


def _shard(cfg: Path, log_path: Path) -> tuple[Callable[[], subprocess.Popen[bytes]], Callable[[], str]]:
    """How to start ``shiftwatch run --config cfg`` (its output appended to ``log_path``),
    and how to read that log."""
    env = dict(os.environ, PYTHONPATH=str(ROOT / "daemon"))

    def start() -> subprocess.Popen[bytes]:
        with open(log_path, "ab") as log:
            return subprocess.Popen([sys.executable, "-m", "shiftwatch", "run", "--config", str(cfg)],
                                    stdout=log, stderr=subprocess.STDOUT, env=env)

    def log() -> str:
        return log_path.read_text(errors="replace")

    return start, log


def _serving(port: int) -> bool:
    try:
        scrape(port)
    except OSError:
        return False
    return True


def _run_shard(tmp_path: Path, redelivery_wait: str) -> tuple[int, int, dict[str, int], str, int]:
    """The shard's samples taken at the end and just after the cut, what it set aside by
    reason, its log, and how many connections the relay carried."""
    server, port = start_lone_server(tmp_path, "ovl", mqtt='ack_wait: "2s", max_ack_pending: 20')
    relay = Relay(port + 1)
    cfg = tmp_path / "shiftwatch.yaml"
    metrics_port = free_port()
    _config(cfg, relay.port, port, metrics_port, redelivery_wait)
    start, log = _shard(cfg, tmp_path / "shard.log")
    proc: subprocess.Popen[bytes] | None = None

    try:
        # The shard's session and subscription first, then the backlog while it is away.
        proc = start()
        assert wait_until(lambda: log().count("connected to broker") >= 1, 60), log()
        time.sleep(2.0)  # the SUBSCRIBE handled: the session's consumer exists
        proc.terminate()
        assert proc.wait(60) == 0, log()
        msgs = _payloads()
        _publish(f"mqtt://127.0.0.1:{port + 1}", msgs)
        proc = start()
        # Reset the connection once the shard has taken a sixth of the backlog.
        assert wait_until(lambda: _counts(metrics_port)[0] >= BATCH * STREAMS, 60), log()
        relay.cut()
        at_cut = _counts(metrics_port)[0]
        total = len(msgs) * BATCH
        last: tuple[int, int] = (-1, -1)
        moved = time.monotonic()
        while time.monotonic() - moved < 12.0:  # settled: nothing more for well over ack_wait
            taken, rejected = _counts(metrics_port)
            if (taken, sum(rejected.values())) != last:
                last, moved = (taken, sum(rejected.values())), time.monotonic()
            if taken >= total and time.monotonic() - moved > 3.0:
                break
            time.sleep(0.2)
        taken, rejected = _counts(metrics_port)
        return taken, at_cut, rejected, log(), relay.connections
    finally:
        if proc is not None and proc.poll() is None:
            proc.terminate()
            proc.wait(60)
        relay.close()
        server.terminate()
        server.wait(10)


def test_a_shard_whose_connection_is_cut_while_it_takes_a_backlog_loses_no_sample(tmp_path: Path) -> None:
    """Every sample the server acknowledged to the publisher is fed once, although the
    connection was reset in the middle of the backlog.  ``shiftwatch_samples_total``
    counts each sample once, the first time it is fed; a copy of a message the shard
    had already fed (its PUBACK went down with the connection) is set aside as
    ``duplicate_time`` or, once its samples have left the engine's window, as
    ``out_of_order``: that count is not a count of samples lost."""
    taken, at_cut, rejected, log, connections = _run_shard(tmp_path, "3s")
    total = STREAMS * ROUNDS * BATCH
    assert at_cut < total, (at_cut, total)  # the cut fell in the middle of the backlog
    assert connections >= 3, log  # the session, the shard's first connection, the one after the cut
    # paho-mqtt 2 names a connection lost under it "Unspecified error"
    # (convert_disconnect_error_code_to_reason_code, MQTT_ERR_CONN_LOST).
    assert "disconnected from broker" in log and "Unspecified error" in log
    # Each sample once (shiftwatch_samples_total counts a sample the first time it is fed),
    # all of them: what the server acknowledged to the publisher.
    assert taken == total, (taken, total, rejected, log[-3000:])


def test_only_a_resumed_session_waits_for_what_came_before(tmp_path: Path) -> None:
    """``cluster.redelivery_wait`` is for messages an earlier connection left
    unacknowledged, which only a session the broker kept can bring (MQTT 3.1.1 section
    3.2.2.2, Session Present; section 4.4: the server sends the unacknowledged QoS 1
    messages again only within that session).  A shard whose session is new has
    nothing to wait for: before, it took nothing for the whole wait, and a shard
    started moments before a reshard or a kill had fed none of its samples (the
    reshard and SIGKILL tests in ``test_shards.py`` lost samples that way in CI runs).
    The wait here is 600 s, so a sample the new session takes is one it did not wait for."""
    server, port = start_lone_server(tmp_path, "hold", mqtt='ack_wait: "2s"')
    cfg = tmp_path / "shiftwatch.yaml"
    metrics_port = free_port()
    _config(cfg, port + 1, port, metrics_port, "600s")
    start, log = _shard(cfg, tmp_path / "shard.log")
    url = f"mqtt://127.0.0.1:{port + 1}"
    msg = [("brackenfield/line1/head1/fill", json.dumps([{"v": 500.0 + j * 0.01, "ts": T0 + j}
                                                         for j in range(5)]).encode())]
    proc: subprocess.Popen[bytes] | None = None

    try:
        proc = start()
        assert wait_until(lambda: "(session new)" in log(), 60), log()
        time.sleep(1.0)  # the SUBSCRIBE handled: the session's consumer exists
        _publish(url, msg)
        assert wait_until(lambda: _counts(metrics_port)[0] == 5, 60), log()
        assert "session resumed: processing waits" not in log()
        proc.terminate()
        assert proc.wait(60) == 0, log()
        _publish(url, msg)  # the same samples again while the shard is away
        proc = start()
        assert wait_until(lambda: "(session resumed)" in log(), 60), log()
        assert wait_until(lambda: "session resumed: processing waits cluster.redelivery_wait (600 s)"
                          in log(), 10), log()
        # Held for the wait: the message that came while the shard was away is not
        # processed yet.  (The main loop may already be waiting for a message when the
        # connection comes up; what it takes then waits for the sorted round too.  Before,
        # it was processed at once, and a JSON array for a stream held that way stopped
        # the daemon: tests/daemon/test_columns_daemon.py.)
        assert wait_until(lambda: _serving(metrics_port), 30), log()
        time.sleep(2.0)  # the message delivered (not a timing check: the wait is 600 s)
        processed = metric_values(scrape(metrics_port), "shiftwatch_messages_processed_total")
        assert sum(processed.values()) == 0, (processed, log())
        assert _counts(metrics_port)[0] == 0 and "Traceback" not in log(), log()
    finally:
        if proc is not None and proc.poll() is None:
            proc.terminate()
            proc.wait(60)
        server.terminate()
        server.wait(10)
