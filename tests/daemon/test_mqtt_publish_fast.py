"""The link's handling of incoming PUBLISH packets (mqtt._Client._handle_publish) held to
paho's own: the same message fields to on_message, the same return, the same PUBACKs, the
same exception, on random packets (both protocol versions, every QoS, flags, properties,
topics that are not UTF-8, packets cut short)."""

from __future__ import annotations

import random
import struct
from typing import Any

import paho.mqtt.client as paho
import pytest
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion
from paho.mqtt.properties import Properties

from shiftwatch.mqtt import _Client


def _varint(n: int) -> bytes:
    out = bytearray()
    while True:
        n, b = divmod(n, 128)
        out.append(b | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _packet(rng: random.Random, v5: bool) -> tuple[int, bytes]:
    """A PUBLISH's first byte and the bytes after its remaining length."""
    qos = rng.choice([0, 1, 1, 1, 2])
    command = 0x30 | (qos << 1) | (0x08 if rng.random() < 0.3 else 0) | (0x01 if rng.random() < 0.2 else 0)
    kind = rng.random()
    if kind < 0.1:
        topic = bytes(rng.randrange(256) for _ in range(rng.randrange(1, 12)))  # often not UTF-8
    elif kind < 0.15:
        topic = b""
    else:
        topic = f"plant/{rng.randrange(1000):04d}/v".encode()
    body = struct.pack("!H", len(topic)) + topic
    if qos:
        body += struct.pack("!H", rng.randrange(1, 65536))
    if v5:
        r = rng.random()
        if r < 0.6:
            body += b"\x00"
        elif r < 0.8:  # a payload format indicator and a content type
            props = b"\x01\x01" + b"\x03" + struct.pack("!H", 4) + b"json"
            body += _varint(len(props)) + props
        elif r < 0.9:  # a message expiry interval
            props = b"\x02" + struct.pack("!I", rng.randrange(1 << 32))
            body += _varint(len(props)) + props
        else:
            body += b"\x07\x99"  # a property that is not one: malformed
    body += bytes(rng.randrange(256) for _ in range(rng.choice([0, 1, 5, 300])))
    if rng.random() < 0.1:
        body = body[:rng.randrange(len(body) + 1)]  # cut short
    return command, body


def _props(p: Any) -> Any:
    return None if p is None else p.pack()


def _run(handle: Any, client: Any, command: int, body: bytes, as_bytearray: bool = True) -> tuple[Any, ...]:
    """What handling one packet did (paho reads a packet into a bytearray)."""
    seen: list[tuple[Any, ...]] = []

    def on_message(c: Any, userdata: Any, msg: Any) -> None:
        try:
            topic: Any = msg.topic
        except UnicodeDecodeError:
            topic = "not utf-8"
        seen.append((msg._topic, topic, msg.payload, type(msg.payload), msg.qos, msg.dup, msg.retain,
                     msg.mid, _props(msg.properties), type(msg.timestamp)))

    client.on_message = on_message
    sent: list[tuple[Any, ...]] = []
    client._send_puback = lambda mid: sent.append(("puback", mid)) or paho.MQTT_ERR_SUCCESS
    client._send_pubrec = lambda mid: sent.append(("pubrec", mid)) or paho.MQTT_ERR_SUCCESS
    client._in_packet = {"command": command, "packet": bytearray(body) if as_bytearray else body}
    client._in_messages.clear()
    try:
        rc: Any = handle()
    except Exception as exc:  # noqa: BLE001  compared with paho's
        rc = ("raised", type(exc).__name__)
    return rc, seen, sent, sorted(client._in_messages)


@pytest.mark.parametrize("v5", [True, False])
@pytest.mark.parametrize("manual_ack", [True, False])
def test_fast_publish_matches_paho(v5: bool, manual_ack: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = random.Random(1234 + v5 + 2 * manual_ack)
    paho_s = paho.Client._handle_publish
    by_paho = [0]

    def counted(self: Any) -> Any:
        by_paho[0] += self is ours
        return paho_s(self)

    monkeypatch.setattr(paho.Client, "_handle_publish", counted)
    proto = MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311
    ours = _Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id="a", protocol=proto,
                   manual_ack=manual_ack)
    theirs = paho.Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id="b", protocol=proto,
                         manual_ack=manual_ack)
    n = 3000
    for _ in range(n):
        command, body = _packet(rng, v5)
        as_bytearray = rng.random() < 0.8
        a = _run(ours._handle_publish, ours, command, body, as_bytearray)
        b = _run(theirs._handle_publish, theirs, command, body, as_bytearray)
        assert a == b, (command, body)
    assert 0 < by_paho[0] < 0.7 * n  # many went the fast way (qos 2, properties and the rest paho's)


def test_filtered_callbacks_and_debug_log_go_paho_s_way() -> None:
    c = _Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id="a",
                protocol=MQTTProtocolVersion.MQTTv5, manual_ack=True)
    got: list[str] = []
    c.message_callback_add("plant/#", lambda cl, u, m: got.append("filtered"))
    body = struct.pack("!H", 7) + b"plant/x" + struct.pack("!H", 9) + b"\x00payload"
    _run(c._handle_publish, c, 0x32, body)
    assert got == ["filtered"]
    logged: list[str] = []
    d = _Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id="d",
                protocol=MQTTProtocolVersion.MQTTv5, manual_ack=True)
    d.on_log = lambda cl, u, level, buf: logged.append(buf)
    _rc, seen, _, _ = _run(d._handle_publish, d, 0x32, body)
    assert seen and any("Received PUBLISH" in line for line in logged)


def test_empty_properties_are_a_publish_s() -> None:
    from shiftwatch.mqtt import _NO_PROPERTIES

    assert isinstance(_NO_PROPERTIES, Properties)
    assert _NO_PROPERTIES.pack() == Properties(paho.PacketTypes.PUBLISH).pack() == b"\x00"
