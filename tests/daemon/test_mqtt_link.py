"""The MQTT link against a real Mosquitto: the Receive Maximum window, acknowledgements in bulk,
and the read pause of a full inbox.

Mosquitto 2.0 sends an MQTT 5 client at most as many unacknowledged QoS 1
messages as its CONNECT asked for with Receive Maximum (MQTT 5.0 section
3.1.2.11.3); without it, its own max_inflight_messages (20 in the test
brokers).  The daemon acknowledges only after processing, so this window is
what lets a round hold more than 20 messages.  Once acknowledgements flow,
though, Mosquitto 2.0.11 refills the client up to its max_queued_messages
(measured here, see the test below), so the daemon's inbox bounds itself.
"""

from __future__ import annotations

import logging
import socket
import time
from collections.abc import Callable

import pytest

from shiftwatch.broker import MosquittoBroker, wait_until
from shiftwatch.config import BrokerConfig
from shiftwatch.mqtt import Inbox, Message, MqttLink, PlainClient, _ReadBuffer


def make_link(broker: MosquittoBroker, inbox: Inbox, receive_maximum: int, *, client_id: str = "link-window",
              on_drop: Callable[[str], None] = lambda reason: None) -> MqttLink:
    cfg = BrokerConfig(url=broker.url, client_id=client_id, receive_maximum=receive_maximum)
    link = MqttLink(cfg, subscriptions=["line/+/v"], status_topic="sw/status", inbox=inbox,
                    on_drop=on_drop, on_published=lambda mid: None,
                    on_connection=lambda up: None)
    link.start()
    assert wait_until(lambda: link.connected)
    time.sleep(0.2)  # the SUBACK
    return link


def publish_numbered(pub: PlainClient, n: int, streams: int) -> None:
    """Messages {"v": 0} to {"v": n - 1}, spread over ``streams`` topics."""
    for i in range(n):
        pub.publish(f"line/{i % streams}/v", b'{"v": %d}' % i, qos=1)


def _pending(link: MqttLink) -> int:
    sock = link.client.socket()
    return int(sock.pending()) if isinstance(sock, _ReadBuffer) else -1


def drain(link: MqttLink, inbox: Inbox, n: int, *, max_items: int = 1000,
          pause: float = 0.0) -> tuple[list[Message], int]:
    """Take and acknowledge rounds until ``n`` messages came (waiting ``pause`` before
    each round); returns them and the longest inbox seen."""
    got: list[Message] = []
    most = 0
    while len(got) < n:
        if pause:
            time.sleep(pause)
        most = max(most, len(inbox))
        msgs = inbox.take(max_items, 10_000_000, 15.0)
        # One CI run on a machine loaded past its cores stalled here once (after 1,757 of
        # 5,000); what the link held then says where the messages stopped.
        assert msgs, (f"the flow stalled after {len(got)} messages: connected {link.connected}, "
                      f"inbox {len(inbox)}, unsent packets {len(getattr(link.client, '_out_packet', ()))}, "
                      f"buffered bytes {_pending(link)}")
        got.extend(msgs)
        link.ack_all(msgs)  # one write for the whole round
    return got, most


def numbers(msgs: list[Message]) -> list[int]:
    return sorted(int(m.payload[6:-1]) for m in msgs)


def test_the_broker_holds_to_the_window_and_bulk_acks_release_it(broker: MosquittoBroker) -> None:
    inbox = Inbox(100_000)
    link = make_link(broker, inbox, receive_maximum=50)
    pub = PlainClient(broker.url, "link-publisher").start()
    try:
        publish_numbered(pub, 300, 7)
        # Nothing acknowledged yet: the broker stops at the window of 50.
        assert wait_until(lambda: len(inbox) >= 50)
        time.sleep(0.5)
        assert len(inbox) == 50
        got, _ = drain(link, inbox, 300)
        assert all(m.qos == 1 for m in got)
        assert numbers(got) == list(range(300))
    finally:
        pub.stop()
        link.stop()
    # Same client id, persistent session: had an ack been lost, the broker would deliver it again.
    inbox2 = Inbox(100_000)
    link2 = make_link(broker, inbox2, receive_maximum=50)
    try:
        time.sleep(1.0)
        assert len(inbox2) == 0
    finally:
        link2.stop()


def test_after_acknowledgements_mosquitto_overshoots_the_window(broker: MosquittoBroker) -> None:
    # The fact the inbox's own bound rests on (measured with Mosquitto 2.0.11;
    # the test brokers set max_queued_messages 1000000): acknowledging 50 of
    # the first window of 50 releases far more than 50 further messages.
    # Should a later Mosquitto hold to the window, this test says so, and the
    # README's note on it can go.
    inbox = Inbox(100_000)
    link = make_link(broker, inbox, receive_maximum=50)
    pub = PlainClient(broker.url, "link-publisher-overshoot").start()
    try:
        publish_numbered(pub, 2000, 7)
        assert wait_until(lambda: len(inbox) >= 50)
        time.sleep(0.5)
        first = inbox.take(1000, 10_000_000, 1.0)
        assert len(first) == 50
        link.ack_all(first)
        time.sleep(1.0)
        assert len(inbox) > 100
    finally:
        pub.stop()
        link.stop()


def test_a_full_inbox_pauses_reading_and_nothing_is_dropped(broker: MosquittoBroker) -> None:
    # An inbox of 40 messages against a broker that overshoots the window:
    # reading pauses at the bound and resumes at half of it, no message is
    # dropped, every one arrives once, and paho's thread still writes the
    # acknowledgements (the flow would stall otherwise).
    drops: list[str] = []
    inbox = Inbox(40)
    link = make_link(broker, inbox, receive_maximum=1000, client_id="link-pause", on_drop=drops.append)
    pub = PlainClient(broker.url, "link-publisher-pause").start()
    try:
        publish_numbered(pub, 3000, 11)
        got, most = drain(link, inbox, 3000, max_items=15, pause=0.002)  # a slow consumer
        assert drops == []
        assert most <= 40  # only paho's thread puts, and it checks for room before each read
        assert numbers(got) == list(range(3000))
        assert link.connected
    finally:
        pub.stop()
        link.stop()


def test_the_inbox_bound_counts_payload_bytes_too() -> None:
    inbox = Inbox(1000, max_bytes=100)
    m = Message("line/1/v", b"x" * 40, 0.0, 1, 1)
    assert inbox.wait_for_room(0.0)
    for _ in range(3):
        assert inbox.put(m)
    assert inbox.full() and inbox.nbytes == 120
    assert not inbox.wait_for_room(0.01)  # paused at the bound ...
    inbox.take(1, 10_000, 0.0)
    assert not inbox.wait_for_room(0.0)  # ... until down to half of it (80 > 50)
    inbox.take(1, 10_000, 0.0)
    assert inbox.wait_for_room(0.0) and inbox.nbytes == 40
    inbox.close()
    assert not inbox.put(m) and inbox.wait_for_room(0.0)  # closed: nothing taken, the reader never waits


def test_the_read_buffer_serves_small_reads_from_one_large_one() -> None:
    # paho reads a packet a byte or two at a time; the buffer answers those
    # reads from one recv, tells paho through pending() that more is there,
    # and passes the socket's own signals on: no data yet, and end of stream.
    a, b = socket.socketpair()
    try:
        b.setblocking(False)
        buf = _ReadBuffer(b)
        with pytest.raises(BlockingIOError):
            buf.recv(1)
        a.sendall(b"\x30\x05hello\x30\x02ok")
        time.sleep(0.05)
        assert buf.recv(1) == b"\x30" and buf.pending() == 10
        assert buf.recv(1) == b"\x05"
        assert buf.recv(5) == b"hello"
        assert buf.recv(1) == b"\x30" and buf.recv(1) == b"\x02"
        assert buf.recv(100) == b"ok" and buf.pending() == 0
        assert buf.fileno() == b.fileno() and buf.getsockname() == b.getsockname()
        a.close()
        time.sleep(0.05)
        assert buf.recv(1) == b""
    finally:
        a.close()
        b.close()


def test_the_read_buffer_pauses_while_there_is_no_room_and_still_reports_what_it_holds() -> None:
    # While the inbox is full, recv says "no data yet" (after waiting for room),
    # but pending() still counts the buffered bytes: paho then comes back to
    # recv instead of sleeping in select on data only this buffer holds.
    a, b = socket.socketpair()
    room = [True]
    waits: list[float] = []

    def may_read(timeout: float) -> bool:
        waits.append(timeout)
        return room[0]

    try:
        buf = _ReadBuffer(b, may_read)
        a.sendall(b"\x30\x02okMORE")
        time.sleep(0.05)
        assert buf.recv(1) == b"\x30"
        room[0] = False
        with pytest.raises(BlockingIOError):
            buf.recv(1)
        assert waits[-1] == _ReadBuffer.PAUSE_S
        assert buf.pending() == 7
        room[0] = True
        assert buf.recv(3) == b"\x02ok" and buf.recv(10) == b"MORE"
    finally:
        a.close()
        b.close()


def test_the_link_reads_a_long_run_of_small_messages_through_the_buffer(broker: MosquittoBroker) -> None:
    inbox = Inbox(100_000)
    link = make_link(broker, inbox, receive_maximum=1000)
    pub = PlainClient(broker.url, "link-publisher-buffer").start()
    try:
        assert isinstance(link.client.socket(), _ReadBuffer)
        publish_numbered(pub, 5000, 13)
        got, _ = drain(link, inbox, 5000)
        assert numbers(got) == list(range(5000))
    finally:
        pub.stop()
        link.stop()


def test_a_close_without_a_reason_after_a_refusal_with_one_is_the_same_failure(
        caplog: pytest.LogCaptureFixture) -> None:
    # A broker that refuses a client certificate sends a TLS alert and closes;
    # on a loaded machine the reset can overtake the alert, and the next
    # attempt then ends with a bare EOF.  That is the failure already shown
    # with its reason, not a new one: one information line, no second error.
    cfg = BrokerConfig(url="mqtt://127.0.0.1:9", client_id="link-eof")
    log = logging.getLogger("test-link-eof")
    link = MqttLink(cfg, subscriptions=[], status_topic="sw/status", inbox=Inbox(10),
                    on_drop=lambda reason: None, on_published=lambda mid: None,
                    on_connection=lambda up: None, logger=log)
    reasons = ["[SSL: TLSV1_ALERT_UNKNOWN_CA] tlsv1 alert unknown ca (_ssl.c:2580)",
               "EOF occurred in violation of protocol (_ssl.c:2427)",
               "[SSL: TLSV1_ALERT_UNKNOWN_CA] tlsv1 alert unknown ca (_ssl.c:2580)"]
    with caplog.at_level(logging.INFO, logger="test-link-eof"):
        for why in reasons:
            link._paho_error.text = f"failed to receive on socket: {why}"
            link._handle_disconnect(link.client, None, None, "unspecified error", None)
    errors = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert len(errors) == 1 and "alert unknown ca" in errors[0].getMessage()
    same = [r.getMessage() for r in caplog.records if "failed the same way" in r.getMessage()]
    assert [m.split("attempt ")[1].split(" ")[0] for m in same] == ["2", "3"]


def test_a_suback_that_comes_before_subscribe_returns_is_still_matched(
        broker: MosquittoBroker, caplog: pytest.LogCaptureFixture) -> None:
    # paho sends the SUBSCRIBE from the calling thread; over loopback the SUBACK can
    # be read and handled on paho's own thread before client.subscribe() has returned
    # its mid to the caller.  Seen in CI on a loaded machine: a reload's new filter was
    # taken by the broker but never said to be, and a refusal answered that early would
    # never have been tried again (MQTT 3.1.1 section 3.9: the SUBACK carries the
    # SUBSCRIBE's packet identifier, the only way to match the two).  The caller's
    # thread is held here after the real SUBSCRIBE went out, until the real SUBACK
    # has been handled.
    log = logging.getLogger("test-link-early-suback")
    cfg = BrokerConfig(url=broker.url, client_id="link-early-suback")
    link = MqttLink(cfg, subscriptions=["line/a/+"], status_topic="sw/status", inbox=Inbox(100),
                    on_drop=lambda reason: None, on_published=lambda mid: None,
                    on_connection=lambda up: None, logger=log)
    link.start()
    try:
        assert wait_until(lambda: link.connected)
        handled: list[int] = []
        real_handler = link.client.on_subscribe

        def handler(*args: object) -> None:
            real_handler(*args)
            handled.append(1)

        link.client.on_subscribe = handler
        real_subscribe = link.client.subscribe

        def slow_return(*args: object, **kwargs: object) -> object:
            out = real_subscribe(*args, **kwargs)
            assert wait_until(lambda: bool(handled), timeout=10.0)  # the SUBACK, handled meanwhile
            return out

        link.client.subscribe = slow_return  # type: ignore[method-assign]
        with caplog.at_level(logging.INFO, logger="test-link-early-suback"):
            link.set_subscriptions(["line/a/+", "line/c/+"], added=["line/c/+"], removed=[])
            assert wait_until(lambda: "took the subscription to line/c/+" in caplog.text, timeout=10.0), caplog.text
        assert not link._sub_mids  # every SUBACK matched its SUBSCRIBE; nothing left waiting
    finally:
        link.stop()
