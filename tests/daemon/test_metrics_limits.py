"""Issue 11, item 1: slow clients of /metrics, under a file limit and a task limit.

Each connection used to get a thread of its own, with a 10 s timeout on each
read rather than on the request, so a client sending a byte every few seconds
stayed for ever.  About 1,050 of them under the usual limit of 1,024 open files
left the daemon unable to scrape, snapshot, write its outbox or reconnect to
its broker; under a task limit the journal's background sync could not start
its thread and the daemon died.  These tests hold that back with real sockets
on loopback, bounded in count and time, against the real daemon in a process
of its own under ``prlimit --nofile`` or in a pids cgroup.
"""

from __future__ import annotations

import contextlib
import os
import socket
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest

from shiftwatch.broker import wait_until
from shiftwatch.metrics import MAX_CONNECTIONS, Metrics

from .faultkit import CgroupUnavailable, SlowClients, daemon_fds, daemon_threads
from .faultkit import metric_matching as metric
from .faultkit import pids_cgroup as faultkit_pids_cgroup


@contextlib.contextmanager
def pids_cgroup(limit: int) -> Iterator[Path]:
    """faultkit.pids_cgroup, failing under CI and skipping elsewhere when none can be made."""
    try:
        with faultkit_pids_cgroup(limit) as path:
            yield path
    except CgroupUnavailable as exc:
        if os.environ.get("CI") == "true":
            pytest.fail(str(exc))
        pytest.skip(str(exc))


STREAM = "  - topic: oven/+/t\n    format: number\n"


@pytest.mark.parametrize("limit", ["files", "tasks"])
def test_slow_metrics_clients_cannot_exhaust_the_daemon(daemon_factory, broker, publisher, limit: str,
                                                       tmp_path: Path) -> None:
    d = daemon_factory(STREAM)
    if limit == "files":
        # 128 open files: 200 slow clients with a thread and a socket each exhausted it.
        d.command = ["prlimit", "--nofile=128:128", "--", *d.command]
        start_daemon = d.start
    else:
        cm = pids_cgroup(40)
        group = cm.__enter__()
        d.command = ["sh", "-c", f'echo $$ > {group}/cgroup.procs && exec "$@"', "sh", *d.command]
        start_daemon = d.start
    try:
        start_daemon()
        assert d.proc is not None
        pid = d.proc.pid
        assert wait_until(lambda: os.path.exists(f"/proc/{pid}/status") and daemon_threads(pid) > 1)
        for i in range(50):
            publisher.publish("oven/z1/t", f"{180 + 0.1 * (i % 5):.1f}")
        assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="oven/z1/t") == 50)
        threads = daemon_threads(pid)
        snapshots = metric(d.scrape(), "shiftwatch_snapshots_total") or 0.0
        connects = d.log_text().count("connected to broker")
        slow = SlowClients(d.metrics_port, 200)
        scrapes: list[str] = []
        fds: list[int] = []
        restarted = False

        def meanwhile() -> None:
            nonlocal restarted
            fds.append(daemon_fds(pid))
            assert daemon_threads(pid) == threads  # no thread per connection
            if len(scrapes) < 6:
                scrapes.append(d.scrape())
            if limit == "files" and not restarted:  # the broker goes and comes back
                broker.stop()
                broker.start()
                restarted = True

        try:
            # 14 s: past the whole-request deadline of 10 s.  No slow client ever sends
            # its whole request (that would take it half an hour).
            slow.run(14.0, meanwhile)
            left = len(slow.open)
        finally:
            slow.close()
        assert d.proc.poll() is None, d.log_text()
        assert left == 0  # every slow client was closed: shed at the bound, or cut at the deadline
        assert slow.closed_by_server + slow.refused == 200
        assert len(scrapes) == 6 and all(metric(t, "shiftwatch_streams") == 1 for t in scrapes)
        assert max(fds) <= MAX_CONNECTIONS + 40, fds
        assert wait_until(lambda: (metric(d.scrape(), "shiftwatch_snapshots_total") or 0.0) > snapshots)
        if limit == "files":
            assert wait_until(lambda: d.log_text().count("connected to broker") > connects, timeout=30)
            publisher.publish("oven/z1/t", "180.3")
            assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="oven/z1/t") == 51)
        log = d.log_text()
        for bad in ("Too many open files", "can't start new thread", "Traceback", "failed"):
            assert bad not in log, log
        assert d.stop() == 0
    finally:
        if d.proc is not None and d.proc.poll() is None:
            d.proc.kill()
            d.proc.wait()
        if limit == "tasks":
            cm.__exit__(None, None, None)


def test_a_task_limit_too_tight_for_the_daemon_stops_the_start_with_one_line(daemon_factory) -> None:
    d = daemon_factory(STREAM)
    with pids_cgroup(4) as group:  # the interpreter, paho and the daemon's own threads do not fit
        d.command = ["sh", "-c", f'echo $$ > {group}/cgroup.procs && exec "$@"', "sh", *d.command]
        with pytest.raises(RuntimeError, match="exited with 2"):
            d.start()
    log = d.log_text()
    assert "cannot start: can't start new thread (is the service's task limit, TasksMax=, too low?)" in log
    assert "Traceback" not in log


# ------------------------------------------------------------------ in process
def test_a_client_that_trickles_its_request_is_cut_at_the_deadline() -> None:
    metrics = Metrics()
    with metrics.serve("127.0.0.1:0", connection_timeout=0.5) as server:
        # One byte every 0.1 s: each read comes well within any per-read timeout, and the
        # whole request would take 3 s.  The threaded server answered it after 3 s; now the
        # connection is closed at 0.5 s, before the request is complete.
        request = b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n"
        with socket.create_connection(("127.0.0.1", server.port), timeout=30) as s:
            sent = 0
            got = b""
            for byte in request:
                try:
                    s.sendall(bytes([byte]))
                except OSError:
                    break
                sent += 1
                s.settimeout(0.1)
                try:
                    got = s.recv(4096)
                    if got == b"":
                        break
                except TimeoutError:
                    pass
                except ConnectionResetError:
                    # Also a cut: a server that closes a socket with bytes of ours still
                    # unread sends a reset instead of an end of stream (RFC 1122, 4.2.2.13).
                    # A run with three test workers on two cores got it at the recv. (The RFC
                    # section is cited from memory.)
                    break
                s.settimeout(30)
            assert sent < len(request), (sent, got)
            assert not got.startswith(b"HTTP/1.1 200")
        with urllib.request.urlopen(f"http://127.0.0.1:{server.port}/metrics", timeout=30) as r:
            assert r.status == 200


def test_past_the_bound_the_oldest_silent_connection_makes_room_for_a_scrape() -> None:
    metrics = Metrics()
    with metrics.serve("127.0.0.1:0", max_connections=4) as server:
        silent = [socket.create_connection(("127.0.0.1", server.port), timeout=30) for _ in range(4)]
        try:
            assert wait_until(lambda: server.open_connections == 4)
            with urllib.request.urlopen(f"http://127.0.0.1:{server.port}/metrics", timeout=30) as r:
                assert r.status == 200 and b"shiftwatch_streams" in r.read()
            assert server.shed == 1
            assert silent[0].recv(1) == b""  # the oldest one was closed to make room
            assert wait_until(lambda: server.open_connections == 3)
        finally:
            for s in silent:
                s.close()


def test_a_burst_of_connections_past_the_bound_leaves_no_place_taken() -> None:
    # 60 connections at once against a bound of 4: most are shed before their handler
    # first runs.  Such a handler never entered its try, so its place was never given
    # back (found by bench_faults_daemon's task-limit part: the endpoint stopped answering).
    metrics = Metrics()
    with metrics.serve("127.0.0.1:0", max_connections=4) as server:
        burst = [socket.create_connection(("127.0.0.1", server.port), timeout=30) for _ in range(60)]
        for s in burst:
            s.close()
        assert wait_until(lambda: server.open_connections == 0), server.open_connections
        with urllib.request.urlopen(f"http://127.0.0.1:{server.port}/metrics", timeout=30) as r:
            assert r.status == 200
