"""sd_notify against real AF_UNIX datagram sockets, as systemd would listen."""

from __future__ import annotations

import os
import socket
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from shiftwatch.notify import sd_notify, watchdog_interval


@pytest.fixture
def path_socket(tmp_path: Path) -> Iterator[tuple[socket.socket, str]]:
    path = str(tmp_path / "notify.sock")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    sock.settimeout(30)
    try:
        yield sock, path
    finally:
        sock.close()


@pytest.fixture
def abstract_socket() -> Iterator[tuple[socket.socket, str]]:
    name = f"shiftwatch-test-{uuid.uuid4().hex}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind("\0" + name)
    sock.settimeout(30)
    try:
        yield sock, "@" + name
    finally:
        sock.close()


def test_path_socket_receives_the_message(path_socket: tuple[socket.socket, str]) -> None:
    sock, path = path_socket
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": path})
    assert sock.recv(4096) == b"READY=1"
    msg = "WATCHDOG=1\nSTATUS=watching 12 streams, température ok"
    assert sd_notify(msg, env={"NOTIFY_SOCKET": path})
    assert sock.recv(4096) == msg.encode("utf-8")


def test_abstract_socket_receives_the_message(abstract_socket: tuple[socket.socket, str]) -> None:
    sock, addr = abstract_socket
    assert sd_notify("STOPPING=1", env={"NOTIFY_SOCKET": addr})
    assert sock.recv(4096) == b"STOPPING=1"


def test_process_environment_is_the_default(path_socket: tuple[socket.socket, str],
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    sock, path = path_socket
    monkeypatch.setenv("NOTIFY_SOCKET", path)
    assert sd_notify("READY=1")
    assert sock.recv(4096) == b"READY=1"
    monkeypatch.delenv("NOTIFY_SOCKET")
    assert sd_notify("READY=1") is False


def test_unset_or_unusable_address_returns_false(tmp_path: Path) -> None:
    assert sd_notify("READY=1", env={}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": ""}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": "relative/path"}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": "vsock:2:1234"}) is False
    # Nobody listening, a path that is not a socket, a path too long for sun_path.
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": str(tmp_path / "absent.sock")}) is False
    (tmp_path / "plain").write_text("x")
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": str(tmp_path / "plain")}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": "/" + "x" * 200}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": "@" + uuid.uuid4().hex}) is False
    assert sd_notify("READY=1", env={"NOTIFY_SOCKET": "/tmp/with\0nul"}) is False


def test_bad_messages_return_false(path_socket: tuple[socket.socket, str]) -> None:
    sock, path = path_socket
    assert sd_notify("", env={"NOTIFY_SOCKET": path}) is False
    assert sd_notify("STATUS=\udcff", env={"NOTIFY_SOCKET": path}) is False  # not encodable
    assert sd_notify("X=" + "y" * 300_000, env={"NOTIFY_SOCKET": path}) is False  # too big
    sock.setblocking(False)
    with pytest.raises(BlockingIOError):
        sock.recv(4096)


def test_watchdog_interval() -> None:
    me = str(os.getpid())
    assert watchdog_interval({"WATCHDOG_USEC": "30000000"}) == 30.0
    assert watchdog_interval({"WATCHDOG_USEC": "1500", "WATCHDOG_PID": me}) == 0.0015
    assert watchdog_interval({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": ""}) == 30.0
    assert watchdog_interval({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid() + 1)}) is None
    assert watchdog_interval({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "me"}) is None
    for bad in ("", "0", "-5", "3.5", "abc", "٣٠"):
        assert watchdog_interval({"WATCHDOG_USEC": bad}) is None
    assert watchdog_interval({}) is None


def test_watchdog_interval_reads_the_process_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WATCHDOG_USEC", "20000000")
    monkeypatch.setenv("WATCHDOG_PID", str(os.getpid()))
    assert watchdog_interval() == 20.0
    monkeypatch.delenv("WATCHDOG_USEC")
    assert watchdog_interval() is None
