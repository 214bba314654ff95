"""The loopback ports the tests and the demo give their brokers, clusters and endpoints.

The suite runs in three pytest-xdist workers.  ``free_port()`` used to bind port 0 and
return what the kernel chose: a port of the kernel's ephemeral range, which it also gives
to every outgoing connection (``connect()`` without ``bind()``) and to every other port-0
bind, so between the pick and the server's own bind another worker's client could take
it.  CI saw exactly that: "metrics endpoint 127.0.0.1:47185: [Errno 98] Address already
in use".  Linux documents the range in ``/proc/sys/net/ipv4/ip_local_port_range``
(ip-sysctl.rst: "the local port range that is used by TCP and UDP traffic to choose the
local port"); ports outside it are never handed out that way.
"""

from __future__ import annotations

import socket
import time
from pathlib import Path

from shiftwatch.broker import ephemeral_ports, free_port


def test_the_kernel_range_is_read_from_proc() -> None:
    text = Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()
    assert ephemeral_ports() == (int(text[0]), int(text[1]))


def test_a_free_port_is_never_one_the_kernel_hands_to_outgoing_connections() -> None:
    low, high = ephemeral_ports()
    ports = [free_port() for _ in range(200)]
    inside = [p for p in ports if low <= p <= high]
    assert inside == [], f"{len(inside)} of 200 in the kernel's ephemeral range {low}-{high}"
    assert all(1024 <= p <= 65535 for p in ports)


def test_successive_ports_differ_and_each_can_be_bound() -> None:
    ports = [free_port() for _ in range(50)]
    assert len(set(ports)) == 50  # a process walks its own sequence
    for p in ports:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.bind(("127.0.0.1", p))


def test_a_port_something_listens_on_is_passed_over() -> None:
    # The walk hands out successive ports: a listener put on the port it would give next
    # must make it give a later one (its bind check), not the held port.
    from shiftwatch.broker import _single_ports

    walked = _single_ports()  # even ports, outside the kernel's range and the block range
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        for _ in range(100):
            before = free_port()
            nxt = before + 2
            if not any(nxt in r for r in walked):
                continue  # the walk jumps over a range it leaves out (or wraps) here
            try:
                s.bind(("127.0.0.1", nxt))
            except OSError:
                continue  # something holds it already; try the next place in the walk
            break
        else:
            raise AssertionError("found no bindable next port in 100 tries")
        s.listen()
        given = free_port()
        assert given != nxt, (before, nxt, given)
        assert given > nxt  # passed over, not a jump elsewhere


def test_an_outgoing_connections_local_port_is_not_given_out() -> None:
    """The CI failure's mechanism: a client's connection holds a kernel-chosen local port."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as server:
        server.bind(("127.0.0.1", free_port()))
        server.listen(64)
        clients = [socket.create_connection(server.getsockname()) for _ in range(50)]
        try:
            local = {c.getsockname()[1] for c in clients}
            low, high = ephemeral_ports()
            assert all(low <= p <= high for p in local)  # the kernel's choice (common practice)
            assert local.isdisjoint(free_port() for _ in range(200))
        finally:
            for c in clients:
                c.close()


def test_a_forked_child_does_not_walk_its_parents_sequence() -> None:
    import multiprocessing

    free_port()
    ctx = multiprocessing.get_context("fork")
    with ctx.Pool(1) as pool:
        child = pool.apply(_ports, (20,))
    mine = _ports(20)
    assert set(child).isdisjoint(mine)


def _ports(n: int) -> list[int]:
    return [free_port() for _ in range(n)]


def test_the_port_after_a_free_port_and_the_block_range_are_never_given_out() -> None:
    """CI: with ports walked one by one, the next call gave ``port + 1``, the MQTT listener
    a NATS server of the tests was about to bind beside its client port, and ports of the
    blocks shards bind at ``base + k`` (tests/daemon/natskit.py, ``free_port_block``)."""
    from shiftwatch.broker import BLOCK_PORTS

    ports = [free_port() for _ in range(300)]
    assert all(p % 2 == 0 for p in ports)
    assert not [p for p in ports if BLOCK_PORTS[0] <= p < BLOCK_PORTS[1]]
    given = set(ports)
    assert not [p for p in ports if p + 1 in given]


def test_two_processes_walking_the_same_ports_never_get_the_same_one() -> None:
    """CI: two test workers' walks met (their starts 267 ports apart, from their pids), and
    a port one had handed to its daemon, not bound yet, went to the other's daemon too
    ("metrics endpoint 127.0.0.1:32604: Address already in use").  Here both processes are
    set to walk from the same place, the worst case: the claims keep their ports apart."""
    import multiprocessing

    from shiftwatch import broker

    ctx = multiprocessing.get_context("fork")
    # Old notes of those ports (a run of the suite minutes ago) are there and do not matter:
    # a first version took such notes over in two steps, and two processes both won one.
    claims = broker._claims_dir()
    claims.mkdir(mode=0o700, exist_ok=True)
    old = int(time.time() // broker.CLAIM_SECONDS) - 3
    first = [p for r in broker._single_ports() for p in r][:400]
    for p in first:
        (claims / f"{p}.{old}").touch()
    with broker._port_lock:
        broker._port_walk[:] = [0]
    with ctx.Pool(1) as pool:
        child = pool.apply_async(_walk_from_zero, (100,))
        mine = _ports(100)
        theirs = child.get(timeout=60)
    assert set(mine).isdisjoint(theirs)


def _walk_from_zero(n: int) -> list[int]:
    from shiftwatch import broker

    with broker._port_lock:
        broker._port_walk[:] = [0]
    return _ports(n)
