"""A message the broker sends again while the daemon still holds it is taken once.

NATS 2.9's MQTT side keeps each QoS 1 session's messages in a JetStream
consumer and sends a message that is not acknowledged within its
``mqtt { ack_wait }`` again, with DUP set and the same packet id, while the
first copy is still waiting (nats-server's ``trackPublish`` keeps one packet id
per stored message until its PUBACK).  A shard that takes a backlog of
batches longer than ``ack_wait`` had every such copy queued behind the
original: decoded, its samples handed to the engines and set aside as
duplicates or out of order, and acknowledged a second time.  In the shard
benchmark (500 streams, 1,500 arrays of 260 samples, ``ack_wait`` 2 s) the
copies held more samples than the backlog itself.

The link now skips a copy (DUP set) whose packet id it has handed to the
inbox and not yet acknowledged: the first copy's PUBACK acknowledges both
(MQTT 3.1.1 section 4.3.2: the packet id stays the message's until the
PUBACK).  A copy that comes after the PUBACK went out is taken as before.

References outside the project: MQTT 3.1.1 sections 3.3.1.1 (DUP) and 4.3.2
(QoS 1); the real nats-server 2.9 (Debian's package) redelivers with DUP and
the same packet id after ``ack_wait``, checked here before the link is judged.
"""

from __future__ import annotations

import subprocess
import time
from pathlib import Path

import paho.mqtt.client as paho

from shiftwatch.broker import wait_until
from shiftwatch.config import BrokerConfig
from shiftwatch.mqtt import Inbox, MqttLink, PlainClient

from .natskit import start_lone_server

N = 30


def _server(tmp_path: Path) -> tuple[subprocess.Popen[bytes], str]:
    server, port = start_lone_server(tmp_path, "redeliver", mqtt='ack_wait: "1s", max_ack_pending: 1000')
    return server, f"mqtt://127.0.0.1:{port + 1}"


def _link(url: str, inbox: Inbox, client_id: str) -> MqttLink:
    cfg = BrokerConfig(url=url, client_id=client_id, mqtt_version="3.1.1", keepalive=10)
    link = MqttLink(cfg, subscriptions=["plant/+/v"], status_topic=f"sw/status/{client_id}", inbox=inbox,
                    on_drop=lambda reason: None, on_published=lambda mid: None, on_connection=lambda up: None)
    link.start()
    assert wait_until(lambda: link.connected, 20)
    return link


def test_nats_sends_an_unacknowledged_message_again_with_dup_and_the_same_packet_id(tmp_path: Path) -> None:
    """The reference: what the real server does after ack_wait, seen by a plain paho client."""
    server, url = _server(tmp_path)
    seen: list[tuple[int, bool, bytes]] = []
    host, port = url.split("://")[1].split(":")
    c = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="ref", clean_session=False,
                    protocol=paho.MQTTv311, manual_ack=True)
    c.on_message = lambda cl, u, m: seen.append((m.mid, bool(m.dup), m.payload))
    try:
        c.connect(host, int(port), 10)
        c.loop_start()
        assert wait_until(c.is_connected, 20)
        c.subscribe("plant/+/v", qos=1)
        time.sleep(1.0)  # the session's consumer
        pub = PlainClient(url, "ref-pub", mqtt_version="3.1.1").start()
        for i in range(5):
            pub.publish_wait(f"plant/{i}/v", b'{"v": %d}' % i)
        pub.stop()
        assert wait_until(lambda: len(seen) >= 10, 15), seen  # each sent again after 1 s
        first = {p: (mid, dup) for mid, dup, p in seen[:5]}
        assert not any(dup for _, dup in first.values())
        for mid, dup, p in seen[5:10]:
            assert dup and first[p][0] == mid, seen
    finally:
        c.loop_stop()
        c.disconnect()
        server.terminate()
        server.wait(10)


def test_the_link_takes_a_copy_sent_again_while_it_holds_the_first_once(tmp_path: Path) -> None:
    server, url = _server(tmp_path)
    inbox = Inbox(10_000)
    link = _link(url, inbox, "sw-redeliver")
    try:
        time.sleep(1.0)  # the session's consumer
        pub = PlainClient(url, "sw-pub", mqtt_version="3.1.1").start()
        for i in range(N):
            pub.publish_wait(f"plant/{i}/v", b'{"v": %d}' % i)
        pub.stop()
        assert wait_until(lambda: len(inbox) >= N, 15)
        # Held unacknowledged for three ack_waits: the server sends every message again.
        assert wait_until(lambda: link.redeliveries_skipped >= 2 * N, 15), link.redeliveries_skipped
        assert len(inbox) == N  # before: each copy was queued too (3 x N and more)
        msgs = inbox.take(10_000, 10_000_000, 0.0)
        assert sorted(m.payload for m in msgs) == sorted(b'{"v": %d}' % i for i in range(N))
        link.ack_all(msgs)
        # The first copies' PUBACKs acknowledged the messages: nothing more comes, but
        # for copies the server had sent before it read the PUBACKs (taken as new).
        time.sleep(2.5)
        late = inbox.take(10_000, 10_000_000, 0.0)
        assert len(late) <= N and all(m.payload in {x.payload for x in msgs} for m in late)
        link.ack_all(late)
        time.sleep(2.5)
        assert len(inbox) == 0
        assert not link._unacked
    finally:
        link.stop()
        server.terminate()
        server.wait(10)


def test_a_copy_that_comes_after_the_acknowledgement_is_taken() -> None:
    """No broker: what paho's thread hands over, as the fuzz tests do.  The DUP flag
    alone never drops a message; only a packet id still held does."""
    inbox = Inbox(100)
    cfg = BrokerConfig(url="mqtt://127.0.0.1:1", client_id="sw-dup", mqtt_version="3.1.1")
    link = MqttLink(cfg, subscriptions=["plant/+/v"], status_topic="sw/status", inbox=inbox,
                    on_drop=lambda reason: None, on_published=lambda mid: None, on_connection=lambda up: None)
    link._connected = True

    def deliver(mid: int, dup: bool) -> None:
        m = paho.MQTTMessage(mid=mid, topic=b"plant/1/v")
        m.payload, m.qos, m.dup = b'{"v": 1}', 1, dup
        link.client.on_message(link.client, None, m)  # type: ignore[misc]

    deliver(7, False)
    deliver(7, True)  # held: skipped
    assert len(inbox) == 1 and link.redeliveries_skipped == 1
    link.ack_all(inbox.take(10, 1000, 0.0))
    deliver(7, True)  # after the PUBACK: taken
    deliver(8, True)  # never seen (say, sent before a restart): taken
    assert len(inbox) == 2 and link.redeliveries_skipped == 1
    link.ack(7, 1)
    link.ack(8, 1)
    assert not link._unacked
