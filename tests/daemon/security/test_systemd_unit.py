"""The systemd unit: hardened (systemd-analyze's own rating), valid, and livable for the daemon.

``systemd-analyze security --offline=true`` rates the unit file without a running
systemd; ``systemd-analyze verify`` checks it (on a copy whose ExecStart names this
checkout's real ``shiftwatch``, because /opt/shiftwatch does not exist here).  There is
no systemd as PID 1 on a build machine, so the unit cannot be started for real.  Instead:

* every system call the daemon makes while it connects, takes samples, raises an alert,
  snapshots and stops (traced with strace) must be allowed by the unit's SystemCallFilter
  lines, expanded by ``systemd-analyze syscall-filter``;
* the daemon runs in a sandbox built from the same ideas with util-linux tools: its own
  mount namespace with every file system read-only except its state directory
  (ProtectSystem=strict, StateDirectory=), a private /tmp (PrivateTmp=), no capabilities
  at all (CapabilityBoundingSet=), no_new_privs (NoNewPrivileges=), UMask=0077 and only the
  unit's Environment=; it must work, write its state 0600, and map no memory that is both
  writable and executable (what MemoryDenyWriteExecute= forbids).

Not reproduced here: DynamicUser's transient uid (the interpreter of this checkout lives
under /root, which only root may enter), PrivateDevices, PrivateUsers, the Protect*
kernel settings and RestrictAddressFamilies (kernel features systemd arms itself).
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from shiftwatch.broker import MosquittoBroker, free_port
from shiftwatch.mqtt import PlainClient

from .conftest import Watcher, fill_series, metric, scrape, wait_until, write_config

ROOT = Path(__file__).resolve().parents[3]
UNIT = ROOT / "systemd" / "shiftwatch.service"


def need(tool: str) -> str:
    """The tool's path; under CI a missing tool fails the test, elsewhere it skips it."""
    found = shutil.which(tool) or next(
        (p for p in (f"/usr/bin/{tool}", f"/usr/sbin/{tool}") if os.access(p, os.X_OK)), None
    )
    if found:
        return found
    if os.environ.get("CI") == "true":
        pytest.fail(f"{tool} is not installed (the README's test command (tests/install-and-test.sh) installs it)")
    pytest.skip(f"{tool} is not installed")


def service_settings(text: str) -> list[tuple[str, str]]:
    """(key, value) of every line of the [Service] section, in order."""
    out, section = [], ""
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if line.startswith("["):
            section = line
            continue
        if section == "[Service]":
            key, _, value = line.partition("=")
            out.append((key, value))
    return out


def exposure(unit: Path) -> float:
    res = subprocess.run(
        [need("systemd-analyze"), "security", "--offline=true", str(unit)],
        capture_output=True, check=False,
        text=True,
        timeout=60,
    )
    m = re.search(r"Overall exposure level for \S+: (\d+\.\d+)", res.stdout + res.stderr)
    assert m, res.stdout + res.stderr
    return float(m.group(1))


def test_the_unit_is_rated_at_most_1_5() -> None:
    assert exposure(UNIT) <= 1.5


def test_the_rating_would_notice_a_weaker_unit(tmp_path: Path) -> None:
    # The same unit without its sandboxing lines rates far worse: the check above can fail.
    weak = tmp_path / "shiftwatch.service"
    keep = ("Type", "ExecStart", "Restart", "StateDirectory")
    weak.write_text(
        "\n".join(
            line
            for line in UNIT.read_text().splitlines()
            if not line or line.startswith(("[", "#")) or line.split("=")[0] in keep
        )
        + "\n"
    )
    assert exposure(weak) > 5.0


def test_the_unit_verifies_clean(tmp_path: Path, shiftwatch_cmd: list[str]) -> None:
    exe = Path(shiftwatch_cmd[0])
    assert exe.is_absolute() and os.access(exe, os.X_OK), shiftwatch_cmd
    copy = tmp_path / "shiftwatch.service"
    text = UNIT.read_text()
    assert "ExecStart=/opt/shiftwatch/.venv/bin/shiftwatch run" in text
    copy.write_text(
        text.replace("ExecStart=/opt/shiftwatch/.venv/bin/shiftwatch", f"ExecStart={exe}")
    )
    res = subprocess.run(
        [need("systemd-analyze"), "verify", str(copy)], capture_output=True, check=False, text=True,
        timeout=60,
    )
    assert res.returncode == 0 and res.stdout + res.stderr == "", res.stdout + res.stderr


def test_the_unit_uses_the_hardening_directives() -> None:
    s = dict(service_settings(UNIT.read_text()))
    for key, want in {
        "DynamicUser": "yes",
        "NoNewPrivileges": "yes",
        "ProtectSystem": "strict",
        "StateDirectory": "shiftwatch",
        "StateDirectoryMode": "0700",
        "UMask": "0077",
        "PrivateTmp": "yes",
        "PrivateDevices": "yes",
        "PrivateUsers": "yes",
        "PrivateMounts": "yes",
        "ProtectHome": "yes",
        "ProtectKernelTunables": "yes",
        "ProtectKernelModules": "yes",
        "ProtectKernelLogs": "yes",
        "ProtectControlGroups": "yes",
        "ProtectClock": "yes",
        "ProtectHostname": "yes",
        "ProtectProc": "invisible",
        "MemoryDenyWriteExecute": "yes",
        "CapabilityBoundingSet": "",
        "AmbientCapabilities": "",
        "RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX",
        "SystemCallArchitectures": "native",
        "SystemCallErrorNumber": "EPERM",
    }.items():
        assert s.get(key) == want, (key, s.get(key))
    filters = [v for k, v in service_settings(UNIT.read_text()) if k == "SystemCallFilter"]
    assert filters[:2] == ["@system-service", "~@privileged @resources"]
    # The daemon's own defaults match the directories the unit gives it.
    assert "/var/lib/shiftwatch" in (ROOT / "daemon/shiftwatch/config.py").read_text()
    assert (
        "--config /etc/shiftwatch/" in s["ExecStart"]
        and s["ConfigurationDirectory"] == "shiftwatch"
    )


# ------------------------------------------------------------- system calls
def syscall_groups() -> dict[str, list[str]]:
    res = subprocess.run(
        [need("systemd-analyze"), "syscall-filter"],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    groups: dict[str, list[str]] = {}
    current = None
    for line in res.stdout.splitlines():
        if line.startswith("@"):
            current = line.strip()
            groups[current] = []
        elif current and line.strip() and not line.strip().startswith("#"):
            groups[current].append(line.strip())
    return groups


def allowed_syscalls(filters: list[str]) -> set[str]:
    """The allow list the unit's SystemCallFilter lines build (systemd.exec(5): the first
    line is an allow list, which implies @default; ~ lines take names out, later lines put
    them back)."""
    groups = syscall_groups()

    def expand(name: str) -> set[str]:
        if not name.startswith("@"):
            return {name}
        return set().union(*(expand(m) for m in groups[name]))

    allowed = expand("@default")
    for f in filters:
        names = set().union(*(expand(n) for n in f.lstrip("~").split()))
        allowed = allowed - names if f.startswith("~") else allowed | names
    return allowed


def children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        out += [int(c) for c in (task / "children").read_text().split()]
    return out


def exercise(broker: MosquittoBroker, port: int) -> None:
    """Samples with a step in, until the daemon has published its alert."""
    alerts = Watcher(broker.url, "sw/alerts/#", f"viewer-{port}")
    alerts.client.start()
    pub = PlainClient(broker.url, f"publisher-{port}").start()
    try:
        for payload in fill_series(seed=11):
            pub.publish("brackenfield/line2/filler/head1/fill", payload)
        assert wait_until(lambda: any(r.get("phase") == "detected" for r in alerts.records()), 60)
        assert metric(scrape(port), "shiftwatch_snapshots_total") is not None
        time.sleep(1.5)  # one more snapshot with the event in it
    finally:
        pub.stop()
        alerts.client.stop()


@pytest.mark.broker
def test_every_system_call_the_daemon_makes_is_allowed(
    broker: MosquittoBroker, tmp_path: Path, shiftwatch_cmd: list[str]
) -> None:
    strace = need("strace")
    filters = [v for k, v in service_settings(UNIT.read_text()) if k == "SystemCallFilter"]
    allowed = allowed_syscalls(filters)
    assert "mbind" in allowed and "setrlimit" not in allowed and "reboot" not in allowed
    port = free_port()
    cfg = write_config(
        tmp_path / "traced.yaml",
        state=tmp_path / "state",
        metrics=f"  listen: 127.0.0.1:{port}\n",
        broker=f"  url: {broker.url}\n  client_id: sw-traced\n",
    )
    trace = tmp_path / "trace.txt"
    log = open(tmp_path / "traced.log", "w")  # noqa: SIM115  closed in the finally below
    proc = subprocess.Popen(
        [strace, "-f", "-qq", "-o", str(trace)] + shiftwatch_cmd + ["run", "--config", str(cfg)],
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    try:
        assert wait_until(
            lambda: "connected to broker" in (tmp_path / "traced.log").read_text(), 60
        )
        exercise(broker, port)
        (daemon_pid,) = children(proc.pid)
        os.kill(daemon_pid, signal.SIGTERM)
        assert proc.wait(timeout=60) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
        log.close()
    used = set(re.findall(r"^\d+\s+([a-z0-9_]+)\(", trace.read_text(), re.MULTILINE))
    assert {"connect", "fsync", "rename", "mbind"} <= used  # the trace saw the daemon at work
    assert used - allowed == set(), (
        f"calls outside the unit's SystemCallFilter: {sorted(used - allowed)}"
    )


# ------------------------------------------------------------------ sandbox
SANDBOX = r"""
set -eu
mount --make-rprivate /
mount --bind "$WORK" /srv                   # config and state, reachable after /tmp is covered
mount --bind /srv/state /srv/state
for m in $(awk '{print $5}' /proc/self/mountinfo | sort -u); do
  case "$m" in /proc|/proc/*|/sys|/sys/*|/dev|/dev/*) continue ;; esac
  mount -o remount,bind,ro "$m" 2>/dev/null || true   # ProtectSystem=strict
done
mount -o remount,bind,rw /srv/state          # StateDirectory=
if [ -n "$KEEP" ]; then                      # an install under /tmp (a CI clone)
  mount --bind "$KEEP" /srv/keep && mount -o remount,bind,ro /srv/keep
fi
mount -t tmpfs -o mode=1777 tmpfs /tmp       # PrivateTmp=
if [ -n "$KEEP" ]; then                      # ... stays where its scripts expect it, read-only
  mkdir -p "$KEEP" && mount --bind /srv/keep "$KEEP" && mount -o remount,bind,ro "$KEEP"
fi
if touch /srv/probe 2>/dev/null || touch /usr/probe 2>/dev/null; then
  echo "SANDBOX IS WRITABLE"; exit 9
fi
touch /srv/state/probe && rm /srv/state/probe
umask 0077                                   # UMask=
exec setpriv --no-new-privs --bounding-set=-all --inh-caps=-all --ambient-caps=-all \
     --securebits=+noroot,+noroot_locked,+no_setuid_fixup,+no_setuid_fixup_locked \
     env -i $UNIT_ENV PATH=/usr/bin:/bin HOME=/ "$SHIFTWATCH" run --config /srv/shiftwatch.yaml
"""


@pytest.mark.broker
def test_the_daemon_works_inside_the_units_restrictions(
    broker: MosquittoBroker, tmp_path: Path, shiftwatch_cmd: list[str]
) -> None:
    for tool in ("unshare", "setpriv", "mount"):
        need(tool)
    if os.geteuid() != 0:
        if os.environ.get("CI") == "true":
            pytest.fail("the sandbox needs root (mount namespaces)")
        pytest.skip("the sandbox needs root (mount namespaces)")
    env_line = dict(service_settings(UNIT.read_text()))["Environment"]
    assert "OPENBLAS_NUM_THREADS=1" in env_line
    work = tmp_path / "unit"
    (work / "state").mkdir(parents=True)
    os.chmod(work / "state", 0o700)
    port = free_port()
    write_config(
        work / "shiftwatch.yaml",
        state=Path("/srv/state"),
        metrics=f"  listen: 127.0.0.1:{port}\n",
        broker=f"  url: {broker.url}\n  client_id: sw-sandboxed\n",
    )
    # PrivateTmp covers /tmp: an install that lives there (a CI clone with its
    # venv) is bound back at the same path, as an install under /opt needs no help.
    import shiftwatch

    needed = [Path(sys.prefix).resolve(), Path(shiftwatch.__file__).resolve().parents[2]]
    under_tmp = [str(p) for p in needed if Path("/tmp") in p.parents]
    keep = os.path.commonpath(under_tmp) if under_tmp else ""
    if keep:
        (work / "keep").mkdir()
    log_path = tmp_path / "sandbox.log"
    log = open(log_path, "w")  # noqa: SIM115  closed in the finally below
    proc = subprocess.Popen(
        ["unshare", "--mount", "--propagation", "private", "sh", "-c", SANDBOX],
        stdout=log,
        stderr=subprocess.STDOUT,
        env={
            "PATH": "/usr/sbin:/usr/bin:/sbin:/bin",
            "WORK": str(work),
            "UNIT_ENV": env_line,
            "SHIFTWATCH": shiftwatch_cmd[0],
            "KEEP": keep,
        },
    )
    try:
        ok = wait_until(
            lambda: "connected to broker" in log_path.read_text() or proc.poll() is not None, 60
        )
        assert ok and proc.poll() is None, log_path.read_text()
        status = Path(f"/proc/{proc.pid}/status").read_text()
        assert re.search(r"^CapEff:\s+0+$", status, re.MULTILINE) and re.search(
            r"^CapBnd:\s+0+$", status, re.MULTILINE
        )
        assert re.search(r"^NoNewPrivs:\s+1$", status, re.MULTILINE)
        exercise(broker, port)
        maps = Path(f"/proc/{proc.pid}/maps").read_text().splitlines()
        assert [
            m for m in maps if m.split()[1].startswith("rwx")
        ] == []  # nothing writable and executable
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0, log_path.read_text()
    finally:
        if proc.poll() is None:
            proc.kill()
        log.close()
    text = log_path.read_text()
    assert "ERROR" not in text and "Traceback" not in text and "WARNING" not in text, text
    written = [p for p in (work / "state").rglob("*") if p.is_file()]
    assert any(p.name.startswith("streams") for p in written), written
    assert all(p.stat().st_mode & 0o077 == 0 for p in written), [
        (p, oct(p.stat().st_mode)) for p in written
    ]
