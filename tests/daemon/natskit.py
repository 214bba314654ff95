"""A private NATS cluster on loopback for the shard tests and benches.

:class:`NatsCluster` starts N ``nats-server`` processes (Debian's package
``nats-server``, 2.9 here) on free loopback ports, routed to each other as one
cluster, each with JetStream (its own store directory) and an MQTT listener.
The cluster's global account maps the invented plant's topics to partitions
with NATS's own ``partition()`` mapping function (nats-server 2.9 documents
``{{partition(n, wildcard indexes...)}}`` in its subject mapping), so an MQTT
message on ``brackenfield/<line>/<machine>/<quantity>`` is delivered as
``part/<k>/brackenfield/...`` for exactly one k in 0..n-1.

Servers can be killed (SIGKILL) and started again on the same ports and store,
which is what the fault tests do to one of them.
"""

from __future__ import annotations

import random
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from shiftwatch.broker import BLOCK_PORTS, find_program, hold, port_open, wait_until

#: The servers' MQTT ack_wait: unacknowledged messages are sent again after it (the
#: daemons' cluster.redelivery_wait in the tests is above it).
ACK_WAIT = "2s"
#: The topic levels the tests' mapping partitions (after the plant name).
PLANT = "brackenfield"


#: Where the kit's listening ports come from: below Linux's ephemeral range (32768 to
#: 60999 by default), whose ports the kernel also gives to outgoing connections as their
#: local ports.  A port taken from that range and bound later (a shard's metrics port at
#: base + k, a NATS server started again on its port) could meanwhile be the local port
#: of some connection, and the bind then fails with "Address already in use".  free_port()
#: never gives a port of this range, so a block picked here stays free for its base + k.
PORT_RANGE = BLOCK_PORTS


def _bindable(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def free_port_block(n: int = 1) -> int:
    """The first of ``n`` consecutive loopback ports, all free now, outside the ephemeral range."""
    lo, hi = PORT_RANGE
    for _ in range(1000):
        base = random.randrange(lo, hi - n)  # not cryptography: spreads concurrent runs apart
        if all(_bindable(base + i) for i in range(n)):
            return base
    raise RuntimeError(f"no {n} consecutive free ports in {lo} to {hi}")


def find_nats_server() -> str | None:
    """Path of the nats-server binary (PATH, then Debian's /usr/sbin), or None."""
    return find_program("nats-server")


def partition_mapping(parts: int, prefix: str = "part") -> str:
    """The account mapping that puts every plant topic of three levels below the
    plant name into one of ``parts`` partitions, as a nats-server config line."""
    idx = ",".join(str(i) for i in (1, 2, 3))
    return (f'"{PLANT}.*.*.*": "{prefix}.{{{{partition({parts},{idx})}}}}.{PLANT}.'
            '{{wildcard(1)}}.{{wildcard(2)}}.{{wildcard(3)}}"')


def connects(io: object) -> bool:
    """Whether a ``shiftwatch.natsio.NatsIO`` connects now (False while the server, or its
    JetStream, is not up yet): for ``wait_until(lambda: connects(io), 30)``."""
    try:
        io.connect()  # type: ignore[attr-defined]
    except Exception:  # noqa: BLE001  not up yet
        return False
    return True


def started_io(port: int, who: str) -> Any:
    """A started :class:`shiftwatch.natsio.NatsIO` named ``who`` on the server at ``port``,
    once it is connected."""
    from shiftwatch.natsio import NatsIO

    io = NatsIO([f"nats://127.0.0.1:{port}"], name=who, timeout=5.0)
    io.start()
    assert wait_until(lambda: connects(io), 30)
    return io


def _text(path: Path) -> str:
    try:
        return path.read_text(errors="replace")
    except OSError:
        return ""


def freeze(proc: subprocess.Popen[bytes]) -> None:
    """SIGSTOP a server and wait until it is stopped (shiftwatch.broker.hold); fails the test
    when it is not."""
    import pytest

    try:
        hold(proc)
    except RuntimeError as exc:
        pytest.fail(str(exc))


def start_lone_server(base: Path, name: str, mqtt: str | None = None) -> tuple[subprocess.Popen[bytes], int]:
    """One nats-server with JetStream on a free loopback port (its MQTT side on the next port
    when ``mqtt`` holds that block's options, e.g. ``'ack_wait: "1s"'``), started and answering;
    the test fails, with the server's log, when it cannot be started (CI never skips)."""
    import pytest  # here: the benchmarks import this module without pytest's fixtures

    exe = find_nats_server()
    if exe is None:
        pytest.fail("nats-server is not installed (tests/install-and-test.sh installs it)")
    for _attempt in range(3):
        port = free_port_block(2 if mqtt is not None else 1)
        conf = base / "nats.conf"
        text = f"server_name: {name}\nlisten: 127.0.0.1:{port}\n" f'jetstream {{ store_dir: "{base / "js"}" }}\n'
        if mqtt is not None:
            text += f"mqtt {{ listen: 127.0.0.1:{port + 1}, {mqtt} }}\n"
        conf.write_text(text)
        with open(base / "nats.log", "wb") as log:
            server = subprocess.Popen([exe, "-c", str(conf)], stdout=log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 30
        # Ready: this server says so, and it still runs. An open port alone is not enough: on a
        # machine running other tests, another process may take the port between its choice and
        # this server's bind, and the test would then talk to that one.
        while not (server.poll() is None and "Server is ready" in _text(base / "nats.log")
                   and port_open(port) and (mqtt is None or port_open(port + 1))):
            if time.monotonic() > deadline or server.poll() is not None:
                break
            time.sleep(0.05)
        if server.poll() is None and time.monotonic() <= deadline:
            return server, port
        server.kill()
        server.wait(10)
        said = _text(base / "nats.log")
        if "address already in use" not in said:
            break
    pytest.fail(f"nats-server did not start: {_text(base / 'nats.log')[-600:]}")


def lone_server_port(tmp_path_factory: Any, name: str) -> Iterator[int]:
    """The body of a module fixture: a lone JetStream server (``start_lone_server``) for the
    module's tests, its client port yielded, the server stopped after them."""
    proc, port = start_lone_server(tmp_path_factory.mktemp("nats"), name)
    yield port
    proc.terminate()
    proc.wait(10)


class NatsServer:
    """One server of a :class:`NatsCluster` (ports fixed for its whole life)."""

    def __init__(self, binary: str, name: str, base: Path, client_port: int, cluster_port: int,
                 mqtt_port: int) -> None:
        self.binary = binary
        self.name = name
        self.dir = base / name
        self.dir.mkdir(parents=True, exist_ok=True)
        self.client_port = client_port
        self.cluster_port = cluster_port
        self.mqtt_port = mqtt_port
        self.conf = self.dir / "nats.conf"
        self.log_path = self.dir / "nats.log"
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"nats://127.0.0.1:{self.client_port}"

    @property
    def mqtt_url(self) -> str:
        return f"mqtt://127.0.0.1:{self.mqtt_port}"

    def write_config(self, routes: list[int], parts: int, ack_wait: str = ACK_WAIT,
                     max_ack_pending: int = 4096) -> None:
        route_list = ", ".join(f"nats-route://127.0.0.1:{p}" for p in routes)
        self.conf.write_text(
            f"server_name: {self.name}\n"
            f"listen: 127.0.0.1:{self.client_port}\n"
            f"jetstream {{ store_dir: \"{self.dir / 'js'}\", max_memory_store: 256MB, "
            "max_file_store: 4GB }\n"
            f"cluster {{ name: shiftwatch-test, listen: 127.0.0.1:{self.cluster_port}, "
            f"routes: [{route_list}] }}\n"
            f"mqtt {{ listen: 127.0.0.1:{self.mqtt_port}, ack_wait: \"{ack_wait}\", "
            f"max_ack_pending: {max_ack_pending} }}\n"
            f"mappings {{ {partition_mapping(parts)} }}\n")

    def start(self) -> None:
        log = self.log_path.open("ab")
        self.proc = subprocess.Popen([self.binary, "-c", str(self.conf)], stdout=log,
                                     stderr=subprocess.STDOUT)
        log.close()

    def ready(self) -> bool:
        return (self.proc is not None and self.proc.poll() is None and port_open(self.client_port)
                and port_open(self.mqtt_port))

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)
        self.proc = None

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self.proc = None


class NatsCluster:
    """``size`` routed nats-servers with JetStream and MQTT, the plant mapped to ``parts`` partitions."""

    def __init__(self, size: int = 3, parts: int = 3, base: str | Path | None = None, *,
                 ack_wait: str = ACK_WAIT, max_ack_pending: int = 4096) -> None:
        binary = find_nats_server()
        if binary is None:
            raise RuntimeError("nats-server not found (Debian package nats-server; "
                               "tests/install-and-test.sh installs it)")
        self._tmp = None if base is not None else tempfile.TemporaryDirectory(prefix="sw-nats-")
        self.base = Path(base if base is not None else self._tmp.name)  # type: ignore[union-attr]
        self.parts = parts
        ports = []
        for _ in range(size):
            base = free_port_block(3)
            ports.append((base, base + 1, base + 2))
        self.servers = [NatsServer(binary, f"n{i + 1}", self.base, *p) for i, p in enumerate(ports)]
        for s in self.servers:
            s.write_config([p[1] for p in ports if p[1] != s.cluster_port], parts, ack_wait, max_ack_pending)

    @property
    def urls(self) -> list[str]:
        return [s.url for s in self.servers]

    def mqtt_url(self, i: int = 0) -> str:
        return self.servers[i].mqtt_url

    def start(self, timeout: float = 60.0) -> NatsCluster:
        for s in self.servers:
            s.start()
        if not wait_until(lambda: all(s.ready() for s in self.servers), timeout):
            logs = "; ".join(f"{s.name}: {s.log_path.read_text()[-400:]}" for s in self.servers)
            self.stop()
            raise RuntimeError(f"NATS cluster did not come up within {timeout:.0f} s: {logs}")
        if not wait_until(self.jetstream_ready, timeout, every=0.5):
            self.stop()
            raise RuntimeError("NATS cluster came up but JetStream has no meta leader")
        return self

    def jetstream_ready(self) -> bool:
        """JetStream answers an account info request (the meta group has a leader)."""
        import asyncio

        import nats

        async def probe() -> bool:
            nc = await nats.connect(servers=self.urls, connect_timeout=1, max_reconnect_attempts=0)
            try:
                await nc.jetstream().account_info()
                return True
            except Exception:  # noqa: BLE001  not ready yet
                return False
            finally:
                await nc.close()

        try:
            return asyncio.run(probe())
        except Exception:  # noqa: BLE001  not ready yet
            return False

    def kill(self, i: int) -> None:
        self.servers[i].kill()

    def restart(self, i: int, timeout: float = 30.0) -> None:
        s = self.servers[i]
        s.start()
        if not wait_until(s.ready, timeout):
            raise RuntimeError(f"NATS server {s.name} did not come back within {timeout:.0f} s")

    def stop(self) -> None:
        for s in self.servers:
            s.stop()
        if self._tmp is not None:
            self._tmp.cleanup()
            self._tmp = None

    def __enter__(self) -> NatsCluster:  # noqa: PYI034  start() returns the cluster itself
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def module_cluster(tmp_path_factory: Any) -> Iterator[NatsCluster]:
    """A module's own 3-server cluster with 3 replicas (a fixture's body: ``yield from``); the
    test fails when it cannot be started (CI never skips)."""
    import pytest

    try:
        c = NatsCluster(3, 3, base=tmp_path_factory.mktemp("nats")).start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test NATS cluster: {exc}")
    yield c
    c.stop()
