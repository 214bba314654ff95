"""The handover of a moved stream between shards, as a pure exchange (shiftwatch.handover).

The live exchange, through a real NATS cluster with a stopped old owner, is
``test_shard_handover_stalls.py::test_an_old_owner_held_back_at_a_reshard_hands_its_late_samples_over``.

References outside the project:

- MQTT 3.1.1 (OASIS standard) section 4.6, Message ordering: a server forwards the
  messages of one topic to a subscriber in the order it received them.  The ask goes
  on the stream's own topic so that it queues behind the stream's samples.
- Protocol Buffers encoding (protobuf.dev, "Encoding"): each field begins with a key
  ``(field_number << 3) | wire_type`` and field numbers start at 1, so no message begins
  with a 0 byte (from memory of that page); a Sparkplug B payload is such a message.
- RFC 8428 (SenML) section 5: a JSON pack is an array, so its first byte is ``[``.
"""

from __future__ import annotations

import json
from typing import Any

import pytest

from shiftwatch.handover import MAGIC, MAX_NAMES, Handover, HandoverError, is_handover

TOPIC = "brackenfield/line2/head1/fill"


def _body(payload: bytes) -> dict[str, Any]:
    assert payload.startswith(MAGIC)
    doc = json.loads(payload[len(MAGIC):])
    assert isinstance(doc, dict)
    return doc


def test_an_ask_is_answered_on_the_asker_s_partition_and_releases_only_the_streams_asked() -> None:
    new = Handover(3, "w-new", "part/{number}", 60.0)
    old = Handover(1, "w-old", "part/{number}", 60.0)
    new.ask("s1", 1, TOPIC)
    new.ask("s2", 1, TOPIC)
    new.ask("s1", 1, TOPIC)  # asked once
    [(topic, payload)] = new.outgoing()
    assert topic == "part/1/" + TOPIC
    assert _body(payload) == {"ask": ["s1", "s2"], "shard": 3, "writer": "w-new"}
    assert new.outgoing() == []  # sent once
    assert old.receive(payload, 5.0) == []
    [(writer, answer)] = old.answers_due(5.0)
    assert writer == "w-new"  # sent on <cluster.name>.handover.w-new, plain NATS
    assert _body(answer) == {"answer": ["s1", "s2"], "shard": 1, "writer": "w-new"}
    assert old.answers_due(5.0) == []  # owed once
    assert new.receive(answer, 6.0) == ["s1", "s2"]
    assert new.receive(answer, 6.0) == []  # a copy of the answer releases nothing more
    assert new.settle("s1") == "answered" and new.settle("s2") == "answered"
    assert new.settle("s1") is None  # settled once


def test_an_answer_for_another_writer_or_from_another_shard_releases_nothing() -> None:
    new = Handover(3, "w-new", "part/{number}", 60.0)
    new.ask("s1", 1, TOPIC)
    new.outgoing()
    # For the daemon this one replaced (another writer id), or from a shard not asked:
    for doc in ({"answer": ["s1"], "shard": 1, "writer": "w-before"},
                {"answer": ["s1"], "shard": 2, "writer": "w-new"}):
        assert new.receive(MAGIC + json.dumps(doc).encode(), 1.0) == []
    assert new.settle("s1") == "waited_out"


def test_answers_after_a_reconnect_wait_for_the_redeliveries() -> None:
    old = Handover(1, "w-old", "part/{number}", 60.0)
    ask = MAGIC + json.dumps({"ask": ["s1"], "shard": 0, "writer": "w0"}).encode()
    old.receive(ask, 100.0, not_before=130.0)
    assert old.answers_due(129.9) == []
    assert [w for w, _ in old.answers_due(130.0)] == ["w0"]


def test_a_shard_that_still_owns_the_streams_answers_only_once_it_let_them_go() -> None:
    # An old owner whose reload has not come yet (the mapping changed first) still has
    # an engine of the stream, which it saves to the cluster at its next snapshot and at
    # its reload: answered at once, its new owner would begin before that and have its
    # state overwritten (test_shard_handover_stalls.py, test_an_old_owner_not_yet_reloaded_...).
    old = Handover(1, "w-old", "part/{number}", 60.0)
    ask = MAGIC + json.dumps({"ask": ["s1"], "shard": 3, "writer": "w3"}).encode()
    old.receive(ask, 100.0, topic=TOPIC)
    assert old.owes(TOPIC) and not old.owes("brackenfield/line1/head1/fill")
    assert old.answers_due(100.0, lambda topic: topic == TOPIC) == []  # still its own
    assert old.answers_due(159.0, lambda topic: topic == TOPIC) == []
    [(writer, answer)] = old.answers_due(159.0, lambda topic: False)  # the reload let them go
    assert writer == "w3" and _body(answer)["answer"] == ["s1"]
    # Held past the wait, the answer is dropped: its asker stopped waiting then.
    old.receive(ask, 200.0, topic=TOPIC)
    assert old.answers_due(260.0, lambda topic: True) == []
    assert not old.owes(TOPIC) and old.answers_due(261.0, lambda topic: False) == []


def test_many_streams_go_in_messages_of_at_most_max_names() -> None:
    new = Handover(0, "w", "sites/{number}/", 60.0)
    names = [f"s{i}" for i in range(2 * MAX_NAMES + 1)]
    for n in names:
        new.ask(n, 2, TOPIC)
    out = new.outgoing()
    assert [t for t, _ in out] == ["sites/2/" + TOPIC] * 3  # the trailing / of the prefix once
    assert [n for _, p in out for n in _body(p)["ask"]] == names
    assert max(len(_body(p)["ask"]) for _, p in out) == MAX_NAMES


def test_who_can_be_asked() -> None:
    h = Handover(1, "w", "part/{number}", 60.0)
    assert h.can_ask(0) and h.can_ask(7)
    assert not h.can_ask(1)  # itself: its predecessor's redeliveries come after ack_wait (redelivery_wait)
    assert not h.can_ask(None)  # written before the shard header, or by a daemon without a shard
    assert not Handover(1, "w", "part/{number}", 0.0).can_ask(0)  # handover_wait 0: never ask
    assert not Handover(1, "w", "part/one", 60.0).can_ask(0)  # no way to name shard 0's partition


@pytest.mark.parametrize(("payload", "why"), [
    (MAGIC + b"{", "not JSON after its first line"),
    (MAGIC + b"\xff\xfe", "not JSON after its first line"),
    (MAGIC + b"[1]", "not a JSON object"),
    (MAGIC + b'{"shard": 1, "writer": "w"}', "neither an ask nor an answer"),
    (MAGIC + b'{"ask": "s1", "shard": 1, "writer": "w"}', "'ask' is not a list of stream names"),
    (MAGIC + b'{"answer": [1], "shard": 1, "writer": "w"}', "'answer' is not a list of stream names"),
    (MAGIC + b'{"ask": [], "shard": -1, "writer": "w"}', "'shard' is not a shard number"),
    (MAGIC + b'{"ask": [], "shard": true, "writer": "w"}', "'shard' is not a shard number"),
    (MAGIC + b'{"ask": [], "shard": 1.0, "writer": "w"}', "'shard' is not a shard number"),
    (MAGIC + b'{"ask": [], "shard": 1}', "'writer' is not a writer id"),
    (MAGIC + b'{"ask": [], "shard": 1, "writer": "a.b"}', "'writer' is not a writer id"),  # a subject's dot
    (MAGIC + b'{"ask": [], "shard": 1, "writer": "*"}', "'writer' is not a writer id"),  # a wildcard
])
def test_a_damaged_message_is_refused_with_what_is_wrong(payload: bytes, why: str) -> None:
    h = Handover(1, "w", "part/{number}", 60.0)
    with pytest.raises(HandoverError, match=why):
        h.receive(payload, 0.0)
    assert h.answers_due(1e9) == []


def test_names_of_any_text_go_through() -> None:
    new = Handover(3, "w-new", "part/{number}", 60.0)
    name = 'plant/"quoted"/\u00e9/\udcff'  # a quote, a non-ASCII letter, a lone surrogate
    new.ask(name, 1, TOPIC)
    [(_t, payload)] = new.outgoing()
    old = Handover(1, "w-old", "part/{number}", 60.0)
    old.receive(payload, 0.0)
    [(_t, answer)] = old.answers_due(0.0)
    assert new.receive(answer, 0.0) == [name]


@pytest.mark.parametrize("payload", [
    b'{"v": 500.1, "ts": 1790000000}',  # JSON object (the tests' sensors)
    b'[{"bn":"urn:dev:ow:10e2073a01080063:","n":"voltage","u":"V","v":120.1}]',  # RFC 8428 Figure 2 style
    b"500.1",  # a bare number
    bytes([0x08, 0x96, 0x01]),  # protobuf: field 1, varint 150 (protobuf.dev "Encoding" example)
    b"", b"\x00", b"\x00shiftwatch",  # empty, a lone 0, a cut magic
])
def test_sensor_payloads_are_never_taken_for_a_handover(payload: bytes) -> None:
    assert not is_handover(payload)
    assert is_handover(MAGIC + b"{}") and is_handover(bytearray(MAGIC))
