"""What ``shiftwatch check`` tries beyond the syntax, without side effects.

A configuration can be valid and still fail at start: the state directory
is a file, the metrics port is taken, the password file cannot be read, the
broker does not answer.  Each probe here tries one of those the way the
daemon will, and leaves nothing behind: no directory is created, the port
is bound and released at once, files are only opened for reading, and the
broker sees one MQTT connection under a client id of its own (the
configured id with ``-check`` appended, a clean session that expires at
once), so the running daemon's session is never taken over.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from shiftwatch.config import Config


@dataclass(frozen=True)
class Probe:
    """The outcome of one probe: what was tried, and a problem or None."""

    what: str
    problem: str | None = None
    note: str = ""

    @property
    def ok(self) -> bool:
        return self.problem is None


def state_dir_probe(directory: str) -> Probe:
    """The state directory is a directory the daemon can write, or can be made where it is missing.

    Examples
    --------
    >>> state_dir_probe("/proc/version").problem
    'is a file, not a directory'
    """
    what = f"state.dir {directory}"
    p = Path(directory)
    if p.exists():
        if not p.is_dir():
            return Probe(what, "is a file, not a directory")
        bad = [sub for sub in ("", "snapshots", "outbox")
               if (p / sub).exists() and not _writable_dir(p / sub)]
        if bad:
            where = ", ".join(str(p / b) if b else str(p) for b in bad)
            return Probe(what, f"cannot be written ({where}): snapshots, the journal and the "
                         "alert outbox live there")
        return Probe(what, note="a writable directory")
    parent = p.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        return Probe(what, f"does not exist, and {parent} is a file, so it cannot be made")
    if not _writable_dir(parent):
        return Probe(what, f"does not exist, and {parent} cannot be written to make it")
    return Probe(what, note=f"does not exist yet; the daemon will make it in {parent}")


def _writable_dir(p: Path) -> bool:
    if not p.is_dir() or not os.access(p, os.W_OK | os.X_OK):
        return False
    try:
        return not os.statvfs(p).f_flag & os.ST_RDONLY
    except OSError:
        return False


def port_probe(listen: str) -> Probe:
    """The metrics address can be bound (bound and released again at once)."""
    from shiftwatch.metrics import parse_listen

    what = f"metrics.listen {listen}"
    host, port = parse_listen(listen)
    if port == 0:
        return Probe(what, note="port 0: a free port is picked at start")
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    try:
        with socket.socket(family, socket.SOCK_STREAM) as s:
            # As the endpoint's HTTP server does (http.server sets allow_reuse_address).
            s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            s.bind((host, port))
            s.listen(1)
    except OSError as exc:
        why = exc.strerror or str(exc)
        hint = " (is shiftwatch, or something else, already listening there?)" \
            if exc.errno in (98, 48) else ""
        return Probe(what, f"cannot listen there: {why}{hint}")
    return Probe(what, note="free")


#: Where systemd puts a system service's credentials (systemd.exec(5), LoadCredential=): such a
#: file exists only inside the running service, so `check` run beside it cannot read it.
CREDENTIALS_DIR = "/run/credentials/"


def _credential_elsewhere(path: str | None) -> bool:
    return path is not None and path.startswith(CREDENTIALS_DIR) and not os.path.exists(path)


def readable_probe(what: str, path: str) -> Probe:
    """A file the daemon reads at start (password, certificates, keys) can be opened and read.

    A systemd credential that is not there is not a problem: it exists only inside the
    service (``LoadCredential=`` copies it there when the service starts).
    """
    if _credential_elsewhere(path):
        return Probe(f"{what} {path}", note="a systemd credential, there only inside the service: "
                     "not tried (check its source file named by LoadCredential=)")
    try:
        with open(path, "rb") as f:
            f.read(1)
    except OSError as exc:
        return Probe(f"{what} {path}", f"cannot be read: {exc.strerror or exc}")
    return Probe(f"{what} {path}", note="readable")


def broker_probe(cfg: Config, env: dict[str, str] | None = None, timeout: float = 5.0) -> Probe:
    """The broker accepts an MQTT connection with the configured TLS settings and login."""
    from shiftwatch.mqtt import BrokerError, probe_broker, read_password

    what = f"broker {cfg.broker.url}"
    b = cfg.broker
    if any(_credential_elsewhere(f) for f in (b.password_file, b.tls.cert_file if b.tls else None,
                                              b.tls.key_file if b.tls else None)):
        return Probe(what, note="not tried: its password or key is a systemd credential, there "
                     "only inside the service")
    try:
        password = read_password(cfg.broker, env)
    except BrokerError as exc:
        return Probe(what, f"not tried: {exc}")
    problem = probe_broker(cfg.broker, password, timeout=timeout)
    return Probe(what, problem, note="" if problem else "accepted a connection")


def run_probes(cfg: Config, *, network: bool = True, env: dict[str, str] | None = None,
               broker: Callable[[Config], Probe] | None = None) -> list[Probe]:
    """Every probe that applies to ``cfg``; the broker only with ``network``."""
    out = [state_dir_probe(cfg.state.dir), port_probe(cfg.metrics.listen)]
    b, m = cfg.broker, cfg.metrics
    files = [("broker.password_file", b.password_file)]
    if b.tls is not None:
        files += [("broker.tls.ca_file", b.tls.ca_file), ("broker.tls.cert_file", b.tls.cert_file),
                  ("broker.tls.key_file", b.tls.key_file)]
    if m.tls is not None:
        files += [("metrics.tls.cert_file", m.tls.cert_file), ("metrics.tls.key_file", m.tls.key_file),
                  ("metrics.tls.client_ca_file", m.tls.client_ca_file)]
    out += [readable_probe(what, path) for what, path in files if path]
    if b.password_env:
        environ = os.environ if env is None else env
        out.append(Probe(f"broker.password_env {b.password_env}",
                         None if b.password_env in environ else "is not set in this environment "
                         "(set it where the daemon runs, e.g. Environment= in the unit)",
                         note="set"))
    if network:
        out.append((broker or (lambda c: broker_probe(c, env)))(cfg))
    else:
        out.append(Probe(f"broker {b.url}", note="not tried (--no-network)"))
    return out
