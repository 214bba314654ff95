"""A private MQTT broker for the demo and the tests.

Mosquitto is used when its binary is installed; otherwise the demo falls back
to an embedded broker from PyPI (amqtt, MQTT 3.1.1 only).  Each broker listens
on a free loopback port with its own configuration and data directory.  For
the security tests a Mosquitto can also open TLS listeners (one per server
certificate) and require a user name and password (a password file written
with ``mosquitto_passwd``, and ``allow_anonymous false``).
"""

from __future__ import annotations

import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

#: Linux's default local port range (``ip_local_port_range``), used where /proc is not there.
_DEFAULT_EPHEMERAL = (32768, 60999)
#: Ports below this are left to the system's own services.
_LOWEST_PORT = 10000
#: Ports left to callers that need several consecutive ports (the tests' NATS clusters and
#: shards bind base + k): free_port() never gives one of these.
BLOCK_PORTS = (20000, 32000)


def ephemeral_ports() -> tuple[int, int]:
    """The kernel's range of local ports for outgoing connections and port-0 binds.

    Linux: ``/proc/sys/net/ipv4/ip_local_port_range`` (ip-sysctl.rst); elsewhere the
    Linux default.
    """
    try:
        low, high = (int(x) for x in Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()[:2])
    except (OSError, ValueError):
        return _DEFAULT_EPHEMERAL
    return (low, high) if 1 <= low <= high <= 65535 else _DEFAULT_EPHEMERAL


def _single_ports() -> list[range]:
    """The even ports outside the kernel's range and outside BLOCK_PORTS, as ranges."""
    low, high = ephemeral_ports()
    spans: list[tuple[int, int]] = [(_LOWEST_PORT, low), (high + 1, 65536)]
    cut: list[tuple[int, int]] = []
    for a, b in spans:
        for lo, hi in ((a, min(b, BLOCK_PORTS[0])), (max(a, BLOCK_PORTS[1]), b)):
            lo = max(lo, _LOWEST_PORT)
            lo += lo % 2
            if lo < hi:
                cut.append((lo, hi))
    return [range(lo, hi, 2) for lo, hi in cut]


#: A port free_port() handed out stays claimed for every process of this user for one to
#: two of these (long enough for the caller's server to start and bind it).
CLAIM_SECONDS = 120.0


def _claims_dir() -> Path:
    return Path(tempfile.gettempdir()) / f"shiftwatch-ports-{os.getuid()}"


def _claim(port: int) -> bool:
    """Note ``port`` as handed out, for every process of this user that calls free_port():
    False when another one handed it out within the last CLAIM_SECONDS or so.

    A note is a file named by the port and the CLAIM_SECONDS-long period it was made in,
    made with O_EXCL (of two processes in one period, one wins).  A note of the period
    before or after counts too, checked after the file is made: two processes either side
    of a period's end both give the port up, never both take it.  Notes two periods old
    are removed.  Where no note can be written, True: the bind check alone decides."""
    claims = _claims_dir()
    try:
        claims.mkdir(mode=0o700, exist_ok=True)
    except OSError:
        return True
    period = int(time.time() // CLAIM_SECONDS)
    mine = claims / f"{port}.{period}"
    try:
        fd = os.open(mine, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
    except FileExistsError:
        return False
    except OSError:
        return True
    os.close(fd)
    if (claims / f"{port}.{period - 1}").exists() or (claims / f"{port}.{period + 1}").exists():
        try:
            mine.unlink()
        except OSError:
            pass
        return False
    try:
        (claims / f"{port}.{period - 2}").unlink()
    except OSError:
        pass
    return True


_port_lock = threading.Lock()
_port_walk: list[int] = []  # [next index]; each process starts at a random place
if hasattr(os, "register_at_fork"):  # a forked child walks from its own place, not its parent's
    os.register_at_fork(after_in_child=_port_walk.clear)


def free_port() -> int:
    """An even TCP port on 127.0.0.1 that nothing listens on right now, outside the kernel's range.

    Binding port 0 would give a port of the ephemeral range, which the kernel also hands to
    every outgoing connection and every other port-0 bind: between this pick and the
    server's own bind, another process's client could take it (the suite runs in several
    workers).  So the ports come from outside that range, each process walking them from
    a random starting place, each checked by binding it and claimed for two to four
    minutes in a note every process of this user reads (two walks that meet, as the test workers'
    did, never hand out the same port while its caller is starting its server).  Only even ports, and none of
    BLOCK_PORTS: a caller may use the port after the one it got (a NATS server's MQTT
    listener at port + 1), or a block of ports there, and no other call hands those out.
    Falls back to port 0 when there is no such port.
    """
    spans = _single_ports()
    total = sum(len(r) for r in spans)
    with _port_lock:
        if not _port_walk:
            _port_walk.append(int.from_bytes(os.urandom(4), "big") % total if total else 0)
        for _ in range(total):
            k = _port_walk[0] % total
            _port_walk[0] = k + 1
            for r in spans:
                if k < len(r):
                    port = r[k]
                    break
                k -= len(r)
            with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
                try:
                    s.bind(("127.0.0.1", port))
                except OSError:
                    continue
            if _claim(port):
                return port
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def find_program(name: str) -> str | None:
    """Path of a server binary (PATH, then Debian's /usr/sbin and /usr/local/sbin), or None."""
    found = shutil.which(name)
    if found:
        return found
    for candidate in (f"/usr/sbin/{name}", f"/usr/local/sbin/{name}"):
        if os.access(candidate, os.X_OK):
            return candidate
    return None


def find_mosquitto() -> str | None:
    """Path of the mosquitto binary (PATH, then the Debian location), or None."""
    return find_program("mosquitto")


def find_mosquitto_passwd(mosquitto: str | None = None) -> str | None:
    """Path of ``mosquitto_passwd`` (PATH, then beside the broker, then /usr/bin), or None."""
    found = shutil.which("mosquitto_passwd")
    if found:
        return found
    dirs = [str(Path(mosquitto).parent)] if mosquitto else []
    for d in dirs + ["/usr/bin", "/usr/local/bin"]:
        candidate = os.path.join(d, "mosquitto_passwd")
        if os.access(candidate, os.X_OK):
            return candidate
    return None


def wait_until(pred: Callable[[], bool], timeout: float = 30.0, every: float = 0.05) -> bool:
    """Poll ``pred`` every ``every`` seconds until it is true or ``timeout`` has passed.

    Returns whether it became true (it is asked once more at the deadline).  The
    demo and the tests use it to wait for a broker, a daemon or a message.
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return True
        time.sleep(every)
    return pred()


def thread_states(pid: int) -> str:
    """The state letter of each thread of a process, from /proc (proc(5)); '' when it is gone."""
    try:
        tasks = os.listdir(f"/proc/{pid}/task")
    except OSError:
        return ""
    out = []
    for t in tasks:
        try:
            with open(f"/proc/{pid}/task/{t}/stat") as f:
                out.append(f.read().rsplit(")", 1)[1].split()[0])
        except (OSError, IndexError):
            continue
    return "".join(out)


def hold(proc: subprocess.Popen[Any], timeout: float = 20.0) -> None:
    """SIGSTOP ``proc`` and wait until every one of its threads is stopped ('T' in /proc).

    kill(2) returns before the signal is delivered: a busy multi-threaded server was seen
    here answering requests sent after it had returned, for a second or more.  The tests
    that hold a process use this so that what they send next meets a process that is held.
    Raises RuntimeError when it is not stopped within ``timeout`` seconds.
    """
    proc.send_signal(signal.SIGSTOP)
    if not wait_until(lambda: set(thread_states(proc.pid)) == {"T"}, timeout, every=0.01):
        raise RuntimeError(f"process {proc.pid} not stopped {timeout:.0f} s after SIGSTOP "
                           f"(its threads: {thread_states(proc.pid)!r})")


def port_open(port: int) -> bool:
    """Whether something accepts connections on 127.0.0.1:``port`` (within 0.2 s)."""
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.2):
            return True
    except OSError:
        return False


def wait_for_port(port: int, timeout: float = 10.0) -> bool:
    return wait_until(lambda: port_open(port), timeout)


@dataclass
class TlsListener:
    """A TLS listener of a :class:`MosquittoBroker`.

    Attributes
    ----------
    certfile, keyfile : the server's certificate (PEM, leaf first) and private key.
    cafile : CA that signs client certificates; when given, clients must present one.
    port : the port; 0 picks a free one at start.
    """

    certfile: str | Path
    keyfile: str | Path
    cafile: str | Path | None = None
    port: int = 0

    def lines(self) -> list[str]:
        out = [f"listener {self.port} 127.0.0.1", f"certfile {self.certfile}",
               f"keyfile {self.keyfile}"]
        if self.cafile is not None:
            out += [f"cafile {self.cafile}", "require_certificate true"]
        return out

    @property
    def url(self) -> str:
        return f"mqtts://127.0.0.1:{self.port}"


@dataclass
class MosquittoBroker:
    """A Mosquitto process of our own.

    ``extra`` lines go into its configuration.  Persistence is on and
    ``max_queued_messages`` is raised, the settings the README asks operators
    to use.  ``tls`` adds TLS listeners beside the plain one; ``users`` (name
    to password) writes a password file and turns ``allow_anonymous`` off for
    every listener; ``log`` writes the broker's log to :attr:`log_path`.
    ``autosave_interval`` (in seconds) is how often the broker writes its state to disk,
    which bounds what a crash of the broker loses.  :meth:`restart` keeps the port and
    the data directory, so sessions and queued messages survive it.
    """

    port: int = 0
    extra: list[str] = field(default_factory=list)
    autosave_interval: int = 1
    workdir: Path | None = None
    process: subprocess.Popen[bytes] | None = None
    binary: str | None = None
    tls: list[TlsListener] = field(default_factory=list)
    users: dict[str, str] = field(default_factory=dict)
    log: bool = False

    @property
    def log_path(self) -> Path:
        assert self.workdir is not None
        return self.workdir / "mosquitto.log"

    def _password_lines(self) -> list[str]:
        if not self.users:
            return ["allow_anonymous true"]
        assert self.workdir is not None
        tool = find_mosquitto_passwd(self.binary)
        if tool is None:
            raise RuntimeError("mosquitto_passwd is not installed (it comes with mosquitto)")
        pwfile = self.workdir / "passwd"
        pwfile.unlink(missing_ok=True)
        pwfile.touch(mode=0o600)
        for name, password in self.users.items():
            subprocess.run([tool, "-b", str(pwfile), name, password], check=True,
                           capture_output=True)
        return ["allow_anonymous false", f"password_file {pwfile}"]

    def start(self, timeout: float = 10.0) -> MosquittoBroker:
        self.binary = self.binary or find_mosquitto()
        if self.binary is None:
            raise RuntimeError("mosquitto is not installed (see the README's set-up)")
        if self.workdir is None:
            self.workdir = Path(tempfile.mkdtemp(prefix="shiftwatch-broker-"))
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = self.port or free_port()
        for listener in self.tls:
            listener.port = listener.port or free_port()
        conf = self.workdir / "mosquitto.conf"
        lines = self._password_lines() + [
            # Stay the user that started it: Mosquitto started as root would switch to the
            # "mosquitto" user and could not read our key, password file or data directory.
            # Persistence would silently do nothing without this.
            f"user {pwd.getpwuid(os.geteuid()).pw_name}",
            "persistence true",
            f"persistence_location {self.workdir}/",
            f"autosave_interval {self.autosave_interval}",
            "max_queued_messages 1000000",
            "max_inflight_messages 20",
        ]
        lines += ([f"log_dest file {self.log_path}", "log_type error", "log_type warning",
                   "log_type notice", "log_type information"] if self.log else ["log_dest none"])
        lines.append(f"listener {self.port} 127.0.0.1")
        for listener in self.tls:
            lines += listener.lines()
        lines += list(self.extra)
        conf.write_text("\n".join(lines) + "\n")
        self.process = subprocess.Popen([self.binary, "-c", str(conf)], stdout=subprocess.DEVNULL,
                                        stderr=subprocess.PIPE)
        ports = [self.port] + [listener.port for listener in self.tls]
        if not all(wait_for_port(port, timeout) for port in ports):
            err = b""
            if self.process.poll() is not None and self.process.stderr is not None:
                err = self.process.stderr.read()
            self.stop()
            raise RuntimeError(f"mosquitto did not start on port {self.port}: {err.decode(errors='replace')}")
        return self

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def stop(self, sig: int | None = None) -> None:
        if self.process is not None and self.process.poll() is None:
            self.thaw()  # a frozen broker cannot act on SIGTERM
            if sig is None:
                self.process.terminate()
            else:
                self.process.send_signal(sig)
            try:
                self.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None

    def restart(self, sig: int | None = None) -> None:
        """Stop (SIGTERM, or ``sig`` such as SIGKILL) and start again on the same port."""
        self.stop(sig)
        self.start()

    def freeze(self) -> None:
        """SIGSTOP: the broker keeps its sockets open but answers nothing (returns once it is
        stopped, see :func:`hold`)."""
        if self.process is not None:
            hold(self.process)

    def thaw(self) -> None:
        """SIGCONT after :meth:`freeze`."""
        if self.process is not None:
            self.process.send_signal(signal.SIGCONT)


class EmbeddedBroker:
    """amqtt's broker in a background thread (fallback when mosquitto is missing)."""

    def __init__(self, port: int = 0) -> None:
        self.port = port or free_port()
        self._thread: threading.Thread | None = None
        self._loop: Any = None
        self._broker: Any = None
        self._ready = threading.Event()
        self._error: BaseException | None = None

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self, timeout: float = 15.0) -> EmbeddedBroker:
        import asyncio

        try:
            from amqtt.broker import Broker  # type: ignore[import-untyped]  # amqtt ships no type information
        except ImportError as exc:
            raise RuntimeError("no mosquitto binary and no embedded broker (pip install amqtt)") from exc

        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{self.port}"}},
            "sys_interval": 0,
            "auth": {"allow-anonymous": True},
            "topic-check": {"enabled": False},
        }

        def run() -> None:
            loop = asyncio.new_event_loop()
            self._loop = loop
            asyncio.set_event_loop(loop)
            try:
                self._broker = Broker(config, loop=loop)
                loop.run_until_complete(self._broker.start())
            except BaseException as exc:  # noqa: BLE001  reported to the caller of start()
                self._error = exc
                self._ready.set()
                return
            self._ready.set()
            loop.run_forever()

        self._thread = threading.Thread(target=run, name="embedded-broker", daemon=True)
        self._thread.start()
        self._ready.wait(timeout)
        if self._error is not None:
            raise RuntimeError(f"embedded broker did not start: {self._error}")
        if not wait_for_port(self.port, timeout):
            raise RuntimeError(f"embedded broker did not listen on port {self.port}")
        return self

    def stop(self) -> None:
        import asyncio

        if self._loop is None or self._broker is None:
            return
        fut = asyncio.run_coroutine_threadsafe(self._broker.shutdown(), self._loop)
        try:
            fut.result(timeout=10)
        except Exception:  # noqa: BLE001, S110  the loop is stopped below whatever shutdown did
            pass
        self._loop.call_soon_threadsafe(self._loop.stop)
        if self._thread is not None:
            self._thread.join(timeout=10)
