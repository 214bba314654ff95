"""``shiftwatch demo --metrics-listen``: a bad address is refused before anything starts,
the port asked for is kept, and the demo's broker never outlives it.

An outside tester's report: ``foo`` and ``:abc`` ended in ``ValueError: invalid literal
for int()``, ``127.0.0.1:99999`` in an OverflowError, and ``[::1]:19660`` (valid as
``metrics.listen`` in a real configuration) in "config:25: not valid YAML", because the
demo wrote its configuration by string formatting; ``foo`` left the demo's Mosquitto
running; ``256.1.1.1:9000`` moved the port to a free one as if 9000 were taken, printed
the recap table of a daemon that never ran, and exited 0.  The real command line runs in
a subprocess with its own TMPDIR, so a broker it leaves behind is found by its working
directory.
"""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

import pytest

from shiftwatch.broker import find_mosquitto, free_port


def _processes_under(directory: Path) -> list[str]:
    """Command lines of running processes that name ``directory`` (a broker's config there)."""
    found = []
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            cmd = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
        except OSError:
            continue
        if str(directory) in cmd:
            found.append(f"{pid}: {cmd}")
    return found


def _demo(shiftwatch_cmd: list[str], tmp_path: Path, listen: str) -> subprocess.CompletedProcess[str]:
    if find_mosquitto() is None and os.environ.get("CI") == "true":
        pytest.fail("mosquitto is not installed: the demo's broker cannot start")
    env = dict(os.environ, TMPDIR=str(tmp_path))
    return subprocess.run(shiftwatch_cmd + ["demo", "--duration", "3s", "--metrics-listen", listen],
                          capture_output=True, check=False, text=True, timeout=120, env=env)


@pytest.mark.parametrize("listen", ["foo", ":abc", "127.0.0.1:99999", "127.0.0.1:", "[::1", "1.2.3.4:-1"])
def test_a_malformed_metrics_address_is_refused_before_the_broker_starts(shiftwatch_cmd, tmp_path: Path,
                                                                          listen: str) -> None:
    res = _demo(shiftwatch_cmd, tmp_path, listen)
    assert res.returncode == 2, res.stdout + res.stderr
    assert "Traceback" not in res.stderr
    assert f"--metrics-listen {listen!r}: must be HOST:PORT" in res.stderr, res.stderr
    assert "What happened" not in res.stdout
    assert _processes_under(tmp_path) == []  # no broker left running


def test_an_address_nothing_can_listen_on_keeps_its_port_and_fails(shiftwatch_cmd, tmp_path: Path) -> None:
    # 256 is no IPv4 octet (RFC 791 addresses are four octets): the name lookup fails.
    res = _demo(shiftwatch_cmd, tmp_path, "256.1.1.1:9000")
    assert res.returncode == 2, res.stdout + res.stderr
    assert "Traceback" not in res.stderr
    assert "--metrics-listen '256.1.1.1:9000': cannot listen there" in res.stderr, res.stderr
    assert "256.1.1.1:9000" in res.stderr and "took a free one" not in res.stdout + res.stderr
    assert "What happened" not in res.stdout
    assert _processes_under(tmp_path) == []


def test_an_ipv6_metrics_address_runs_the_demo(shiftwatch_cmd, tmp_path: Path) -> None:
    """metrics.listen "[::1]:PORT" is valid in a configuration; the demo builds its
    configuration as data (yaml.safe_dump), so it is valid there too."""
    import socket

    try:
        with socket.socket(socket.AF_INET6) as s:
            s.bind(("::1", 0))
    except OSError as exc:
        pytest.fail(f"this machine has no IPv6 loopback: {exc}")
    port = free_port()
    res = _demo(shiftwatch_cmd, tmp_path, f"[::1]:{port}")
    assert res.returncode == 0, res.stdout + res.stderr
    assert "Traceback" not in res.stderr
    assert f"metrics  http://[::1]:{port}/metrics" in res.stdout, res.stdout
    assert "What happened" in res.stdout
    assert _processes_under(tmp_path) == []
