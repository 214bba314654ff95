"""The MQTT link against a real Mosquitto: the Receive Maximum window and acknowledgements in bulk.

Mosquitto 2.0 sends an MQTT 5 client at most as many unacknowledged QoS 1
messages as its CONNECT asked for with Receive Maximum (MQTT 5.0 section
3.1.2.11.3); without it, its own max_inflight_messages (20 in the test
brokers).  The daemon acknowledges only after processing, so this window is
what lets a round hold more than 20 messages.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from shiftwatch.broker import MosquittoBroker, wait_until
from shiftwatch.config import BrokerConfig
from shiftwatch.mqtt import Inbox, Message, MqttLink, PlainClient




def make_link(broker: MosquittoBroker, inbox: Inbox, receive_maximum: int) -> MqttLink:
    cfg = BrokerConfig(url=broker.url, client_id="link-window", receive_maximum=receive_maximum)
    link = MqttLink(cfg, subscriptions=["line/+/v"], status_topic="sw/status", inbox=inbox,
                    on_drop=lambda reason: None, on_published=lambda mid: None,
                    on_connection=lambda up: None)
    link.start()
    assert wait_until(lambda: link.connected)
    time.sleep(0.2)  # the SUBACK
    return link


def test_the_broker_holds_to_the_window_and_bulk_acks_release_it(broker: MosquittoBroker) -> None:
    inbox = Inbox(100_000)
    link = make_link(broker, inbox, receive_maximum=50)
    pub = PlainClient(broker.url, "link-publisher").start()
    try:
        for i in range(300):
            pub.publish(f"line/{i % 7}/v", b'{"v": %d}' % i, qos=1)
        # Nothing acknowledged yet: the broker stops at the window of 50.
        assert wait_until(lambda: len(inbox) >= 50)
        time.sleep(0.5)
        assert len(inbox) == 50
        got: list[Message] = []
        while len(got) < 300:
            msgs = inbox.take(1000, 10_000_000, 5.0)
            assert msgs, f"the flow stalled after {len(got)} messages"
            assert all(m.qos == 1 for m in msgs)
            got.extend(msgs)
            link.ack_all(msgs)  # one write for the whole round
        assert sorted(int(m.payload[6:-1]) for m in got) == list(range(300))
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
