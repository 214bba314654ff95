"""Sparkplug B decoding (shiftwatch.sparkplug): the schema, the specification's examples,
aliases, seq, deaths and births, datatypes, malformed payloads, and a fuzz of the decoder.

References
----------
- Eclipse Sparkplug 3.0 specification (the same text as ISO/IEC 20237:2023), cited
  below as "Sparkplug 3.0" with the section named.  The section names, the
  example payloads and the field numbers were written from memory of the
  specification; each check says so.
- The protobuf wire format (protobuf.dev, "Encoding"): varints, tags
  ``field_number << 3 | wire_type``, wire types 0 (varint), 1 (64-bit),
  2 (length-delimited), 5 (32-bit), little-endian fixed-width values.  Used to
  encode payloads by hand, so the schema's field numbers are checked by
  something other than the schema itself.

The invented plant is Brackenfield Bottling (see shiftwatch.demo).
"""

from __future__ import annotations

import math
import struct
from collections import Counter
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch.config import ConfigError, parse_config
from shiftwatch.decode import REASONS as DECODE_REASONS
from shiftwatch.sparkplug import (
    REASONS,
    SKIP_KINDS,
    Outcome,
    SparkplugSessions,
    parse_topic,
    payload_class,
    proto_text,
    rebirth_request,
)

from .fuzz_strategies import PROPERTY, SP_PAYLOADS, SP_TOPICS

P = payload_class()
T_MS = 1_790_000_000_000  # 2026-09-21, milliseconds
GROUP, NODE, DEVICE = "Brackenfield", "Line2Edge", "Filler3"
NT = f"spBv1.0/{GROUP}/{{}}/{NODE}"
DT = f"spBv1.0/{GROUP}/{{}}/{NODE}/{DEVICE}"

# Sparkplug 3.0, "Datatypes" (the DataType enum), from memory.
UINT64, INT8, INT16, INT32, INT64, UINT32 = 8, 1, 2, 3, 4, 7
FLOAT, DOUBLE, BOOLEAN, STRING, DATASET, TEMPLATE = 9, 10, 11, 12, 16, 19


def payload(metrics: list[dict[str, Any]], *, seq: int | None = None, ts: int | None = T_MS) -> bytes:
    p = P()
    if ts is not None:
        p.timestamp = ts
    if seq is not None:
        p.seq = seq
    for m in metrics:
        p.metrics.add(**m)
    return bytes(p.SerializeToString())


def feed(s: SparkplugSessions, topic: str, body: bytes, now: float = 0.0) -> Outcome:
    return s.feed(topic, body, now)


def reasons(out: Outcome) -> list[str]:
    return [p.reason for p in out.problems]


def born(s: SparkplugSessions | None = None) -> SparkplugSessions:
    """A node and a device, born, with aliases 1 (Fill Weight, Double) and 2 (Running, Boolean)."""
    s = s or SparkplugSessions()
    out = feed(s, NT.format("NBIRTH"), payload([{"name": "bdSeq", "datatype": UINT64, "long_value": 4}], seq=0))
    assert out.used and not out.problems
    out = feed(s, DT.format("DBIRTH"), payload([
        {"name": "Fill Weight", "alias": 1, "datatype": DOUBLE, "double_value": 500.2},
        {"name": "Running", "alias": 2, "datatype": BOOLEAN, "boolean_value": True},
        {"name": "Recipe", "alias": 3, "datatype": STRING, "string_value": "cola 0.5 l"},
    ], seq=1))
    assert out.used and not out.problems
    return s


# ---------------------------------------------------------------------------
# The schema against the wire format


def varint(n: int) -> bytes:
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        out.append(b | (0x80 if n else 0))
        if not n:
            return bytes(out)


def tag(field: int, wire: int) -> bytes:
    return varint(field << 3 | wire)


def test_field_numbers_match_a_payload_encoded_by_hand() -> None:
    # Field numbers: Sparkplug 3.0, "Payload" and "Metric" (the Sparkplug B protobuf
    # definition): Payload.timestamp 1, metrics 2, seq 3; Metric.name 1, alias 2,
    # timestamp 3, datatype 4, int_value 10, long_value 11, float_value 12,
    # double_value 13, boolean_value 14, string_value 15 (from memory).
    # Encoding: protobuf.dev, "Encoding".
    metric = (tag(1, 2) + varint(11) + b"Fill Weight" + tag(2, 0) + varint(1) + tag(3, 0) + varint(T_MS)
              + tag(4, 0) + varint(DOUBLE) + tag(13, 1) + struct.pack("<d", 500.25))
    flag = tag(1, 2) + varint(7) + b"Running" + tag(4, 0) + varint(BOOLEAN) + tag(14, 0) + varint(1)
    level = tag(1, 2) + varint(5) + b"Level" + tag(4, 0) + varint(FLOAT) + tag(12, 5) + struct.pack("<f", 1.5)
    count = tag(1, 2) + varint(5) + b"Count" + tag(4, 0) + varint(UINT32) + tag(10, 0) + varint(77)
    big = tag(1, 2) + varint(3) + b"Big" + tag(4, 0) + varint(UINT64) + tag(11, 0) + varint(2**40)
    text = tag(1, 2) + varint(6) + b"Recipe" + tag(4, 0) + varint(STRING) + tag(15, 2) + varint(4) + b"cola"
    wire = (tag(1, 0) + varint(T_MS)
            + b"".join(tag(2, 2) + varint(len(m)) + m for m in (metric, flag, level, count, big, text))
            + tag(3, 0) + varint(0))
    p = P.FromString(wire)
    assert p.timestamp == T_MS and p.seq == 0 and len(p.metrics) == 6
    m = p.metrics[0]
    assert (m.name, m.alias, m.timestamp, m.datatype, m.double_value) == ("Fill Weight", 1, T_MS, DOUBLE, 500.25)
    assert p.metrics[1].boolean_value is True and p.metrics[2].float_value == 1.5
    assert p.metrics[3].int_value == 77 and p.metrics[4].long_value == 2**40
    assert p.metrics[5].string_value == "cola"
    # And back: the schema writes what was encoded by hand (fields in number order).
    assert p.SerializeToString() == wire
    out = SparkplugSessions().feed(NT.format("NBIRTH"), wire, 0.0)
    assert [(r.name, r.value) for r in out.readings] == [
        (f"{GROUP}/{NODE}/Fill Weight", 500.25), (f"{GROUP}/{NODE}/Level", 1.5),
        (f"{GROUP}/{NODE}/Count", 77.0), (f"{GROUP}/{NODE}/Big", float(2**40))]
    assert out.skipped == Counter({"boolean": 1, "string": 1})


def test_nested_messages_have_the_specifications_field_numbers() -> None:
    # Sparkplug 3.0, the Sparkplug B protobuf definition (from memory): DataSet
    # num_of_columns 1, columns 2, types 3, rows 4; Row.elements 1; DataSetValue
    # int_value 1 ... string_value 6; Template version 1, metrics 2, parameters 3,
    # template_ref 4, is_definition 5; PropertySet keys 1, values 2; PropertyValue
    # type 1, is_null 2, int_value 3 ...; Metric.dataset_value 17, template_value 18,
    # properties 9, metadata 8, is_historical 5, is_transient 6, is_null 7.
    d = P.DataSet
    f = {name: fd.number for name, fd in d.DESCRIPTOR.fields_by_name.items()}
    assert f == {"num_of_columns": 1, "columns": 2, "types": 3, "rows": 4}
    assert {n: x.number for n, x in d.DataSetValue.DESCRIPTOR.fields_by_name.items()} == {
        "int_value": 1, "long_value": 2, "float_value": 3, "double_value": 4, "boolean_value": 5,
        "string_value": 6, "extension_value": 7}
    assert {n: x.number for n, x in P.Template.DESCRIPTOR.fields_by_name.items()} == {
        "version": 1, "metrics": 2, "parameters": 3, "template_ref": 4, "is_definition": 5}
    assert {n: x.number for n, x in P.PropertySet.DESCRIPTOR.fields_by_name.items()} == {"keys": 1, "values": 2}
    mf = P.Metric.DESCRIPTOR.fields_by_name
    assert (mf["metadata"].number, mf["properties"].number, mf["dataset_value"].number,
            mf["template_value"].number, mf["is_historical"].number, mf["is_transient"].number,
            mf["is_null"].number) == (8, 9, 17, 18, 5, 6, 7)
    assert [o.name for o in P.Metric.DESCRIPTOR.oneofs] == ["value"]
    # The printed .proto shows the same.
    text = proto_text()
    assert "optional uint64 alias = 2;" in text and "DataSet dataset_value = 17;" in text


# ---------------------------------------------------------------------------
# Topics

@pytest.mark.parametrize("topic, parts", [
    # Sparkplug 3.0, "Topic Namespace Elements": namespace/group_id/message_type/edge_node_id/[device_id]
    # (from memory), with the specification's example names "Sparkplug B Devices" and "Raspberry Pi".
    ("spBv1.0/Sparkplug B Devices/NBIRTH/Raspberry Pi", ("Sparkplug B Devices", "NBIRTH", "Raspberry Pi", None)),
    ("spBv1.0/Sparkplug B Devices/DDATA/Raspberry Pi/Pibrella",
     ("Sparkplug B Devices", "DDATA", "Raspberry Pi", "Pibrella")),
    ("spBv1.0/STATE/scada1", None),            # Sparkplug 3.0: a host application's STATE topic
    ("spBv1.0/G/NDATA/N/D", None),             # node messages have no device level
    ("spBv1.0/G/DDATA/N", None),               # device messages need one
    ("spBv1.0/G/FOO/N", None), ("spBv1.0//NDATA/N", None), ("spAv1.0/G/NDATA/N", None),
])
def test_topic_parts(topic: str, parts: tuple[str, str, str, str | None] | None) -> None:
    got = parse_topic(topic)
    assert (None if got is None else tuple(got)) == parts


# ---------------------------------------------------------------------------
# The specification's examples (Sparkplug 3.0, "Payloads": the NBIRTH, DBIRTH,
# DDATA and NDEATH examples of the Raspberry Pi edge node with its Pibrella
# board; recalled from memory, values as the specification gives them)

SPEC_GROUP, SPEC_NODE, SPEC_DEVICE = "Sparkplug B Devices", "Raspberry Pi", "Pibrella"
SPEC_TS = 1486144502122


def spec_nbirth() -> bytes:
    m = [{"name": "bdSeq", "timestamp": SPEC_TS, "datatype": UINT64, "long_value": 0},
         {"name": "Node Control/Reboot", "timestamp": SPEC_TS, "datatype": BOOLEAN, "boolean_value": False},
         {"name": "Node Control/Rebirth", "timestamp": SPEC_TS, "datatype": BOOLEAN, "boolean_value": False},
         {"name": "Node Control/Next Server", "timestamp": SPEC_TS, "datatype": BOOLEAN, "boolean_value": False},
         {"name": "Node Control/Scan Rate", "timestamp": SPEC_TS, "datatype": INT64, "long_value": 3000},
         {"name": "Properties/Hardware Make", "timestamp": SPEC_TS, "datatype": STRING,
          "string_value": "Raspberry Pi"},
         {"name": "Properties/Hardware Model", "timestamp": SPEC_TS, "datatype": STRING,
          "string_value": "Pi 3 Model B"},
         {"name": "Properties/OS", "timestamp": SPEC_TS, "datatype": STRING, "string_value": "Raspbian"},
         {"name": "Properties/OS Version", "timestamp": SPEC_TS, "datatype": STRING,
          "string_value": "Jessie with PIBrella"},
         {"name": "Supply Voltage", "timestamp": SPEC_TS, "datatype": FLOAT, "float_value": 12.1}]
    return payload(m, seq=0, ts=SPEC_TS)


def spec_topic(kind: str, device: bool = False) -> str:
    return f"spBv1.0/{SPEC_GROUP}/{kind}/{SPEC_NODE}" + (f"/{SPEC_DEVICE}" if device else "")


def test_the_specifications_nbirth_example() -> None:
    s = SparkplugSessions()
    out = s.feed(spec_topic("NBIRTH"), spec_nbirth(), 0.0)
    assert out.used and not out.problems and out.kind == "NBIRTH"
    # Numbers only: Scan Rate (Int64) and Supply Voltage (Float); bdSeq is the session
    # counter (Sparkplug 3.0, "bdSeq"), not a reading; 3 booleans and 4 strings skipped.
    assert [(r.name, r.time, r.value) for r in out.readings] == [
        ("Sparkplug B Devices/Raspberry Pi/Node Control/Scan Rate", SPEC_TS / 1000, 3000.0),
        ("Sparkplug B Devices/Raspberry Pi/Supply Voltage", SPEC_TS / 1000, float(struct.unpack(
            "<f", struct.pack("<f", 12.1))[0]))]  # a Float is 32 bits: 12.1 as the nearest float32
    assert out.skipped == Counter({"boolean": 3, "string": 4})


def test_the_specifications_dbirth_ddata_and_ndeath_examples() -> None:
    s = SparkplugSessions()
    s.feed(spec_topic("NBIRTH"), spec_nbirth(), 0.0)
    # DBIRTH: the Pibrella's inputs and outputs are Booleans (Sparkplug 3.0, DBIRTH example).
    names = ["Inputs/A", "Inputs/B", "Inputs/C", "Inputs/D", "Inputs/Button", "Outputs/E", "Outputs/F",
             "Outputs/G", "Outputs/H", "Outputs/LEDs/Green", "Outputs/LEDs/Red", "Outputs/LEDs/Yellow",
             "Outputs/Buzzer"]
    dbirth = payload([{"name": n, "timestamp": SPEC_TS, "datatype": BOOLEAN, "boolean_value": False}
                      for n in names], seq=1, ts=SPEC_TS)
    out = s.feed(spec_topic("DBIRTH", True), dbirth, 0.0)
    assert out.used and not out.readings and not out.problems
    assert out.skipped == Counter({"boolean": len(names)})
    # DDATA: one input changed (Sparkplug 3.0, DDATA example: Inputs/A, seq 2).
    ddata = payload([{"name": "Inputs/A", "timestamp": SPEC_TS, "datatype": BOOLEAN, "boolean_value": True}],
                    seq=2, ts=SPEC_TS)
    out = s.feed(spec_topic("DDATA", True), ddata, 0.0)
    assert out.used and out.seq_gap is None and out.skipped == Counter({"boolean": 1})
    # NDEATH: bdSeq only, the value of the NBIRTH's bdSeq (Sparkplug 3.0, NDEATH example).
    ndeath = payload([{"name": "bdSeq", "timestamp": SPEC_TS, "datatype": UINT64, "long_value": 0}],
                     ts=SPEC_TS)
    out = s.feed(spec_topic("NDEATH"), ndeath, 5.0)
    assert out.used and not out.problems
    assert set(out.stale) == {"Sparkplug B Devices/Raspberry Pi/Node Control/Scan Rate",
                              "Sparkplug B Devices/Raspberry Pi/Supply Voltage"}
    # After the death, data is set aside until the next birth (Sparkplug 3.0, host
    # applications: a dead edge node's data is not trusted).
    out = s.feed(spec_topic("NDATA"), payload([{"name": "Supply Voltage", "float_value": 12.0}], seq=3), 6.0)
    assert reasons(out) == ["sparkplug_no_birth"] and out.rebirth == (SPEC_GROUP, SPEC_NODE)


def test_rebirth_request_is_the_specifications_ncmd() -> None:
    # Sparkplug 3.0, "NCMD" / "Node Control/Rebirth": a Boolean metric of that name set to true
    # (from memory).
    p = P.FromString(rebirth_request(T_MS))
    assert p.timestamp == T_MS and len(p.metrics) == 1
    m = p.metrics[0]
    assert (m.name, m.datatype, m.WhichOneof("value"), m.boolean_value) == (
        "Node Control/Rebirth", BOOLEAN, "boolean_value", True)


# ---------------------------------------------------------------------------
# Aliases, streams, times

def test_aliases_from_the_birth_name_the_streams() -> None:
    s = born()
    out = feed(s, DT.format("DDATA"), payload([
        {"alias": 1, "timestamp": T_MS + 1000, "double_value": 501.0},
        {"alias": 2, "boolean_value": False},
        {"alias": 9, "double_value": 1.0},
        {"name": "Fill Weight", "double_value": 502.0},
    ], seq=2, ts=T_MS + 5000))
    stream = f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
    # The metric's own time stamp first, the payload's when it has none
    # (Sparkplug 3.0, "Metric": timestamp, milliseconds since the epoch, UTC).
    assert [(r.name, r.time, r.value) for r in out.readings] == [
        (stream, (T_MS + 1000) / 1000, 501.0), (stream, (T_MS + 5000) / 1000, 502.0)]
    assert reasons(out) == ["sparkplug_unknown_alias"]
    assert "alias 9" in out.problems[0].message
    assert out.skipped == Counter({"boolean": 1})


def test_a_metric_without_any_time_stamp_takes_the_arrival_time() -> None:
    s = born()
    out = feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=2, ts=None))
    assert out.readings[0].time is None


def test_node_and_device_metric_names_that_collide_stay_apart() -> None:
    s = born()
    out = feed(s, NT.format("NDATA"), payload([{"name": f"{DEVICE}/Fill Weight", "datatype": DOUBLE,
                                                "double_value": 3.0}], seq=2))
    dev = feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 4.0}], seq=3))
    assert dev.readings[0].name == f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
    assert out.readings[0].name.startswith(f"{GROUP}/{NODE}/{DEVICE}/Fill Weight~")


def test_metric_names_are_made_safe_as_every_stream_name() -> None:
    s = SparkplugSessions()
    out = feed(s, NT.format("NBIRTH"), payload([{"name": "Temp+#\x00", "datatype": DOUBLE, "double_value": 1.0}],
                                              seq=0))
    name = out.readings[0].name
    assert name is not None and "+" not in name and "#" not in name and "\x00" not in name and "~" in name


# ---------------------------------------------------------------------------
# Datatypes

@pytest.mark.parametrize("dtype, field, raw, value", [
    # Sparkplug 3.0, "Datatypes": signed integers travel in the unsigned int_value
    # (Int8, Int16, Int32) or long_value (Int64) as two's complement (from memory).
    # Both 8-bit and 32-bit two's complement of -1 must read as -1 (senders differ).
    (INT8, "int_value", 255, -1.0), (INT8, "int_value", 2**32 - 1, -1.0), (INT8, "int_value", 127, 127.0),
    (INT16, "int_value", 0xFFFE, -2.0), (INT16, "int_value", 2**32 - 2, -2.0),
    (INT32, "int_value", 2**31, -(2.0**31)), (INT32, "int_value", 2**31 - 1, 2.0**31 - 1),
    (INT64, "long_value", 2**64 - 1, -1.0), (INT64, "long_value", 3000, 3000.0),
    (UINT32, "int_value", 2**32 - 1, 2.0**32 - 1), (UINT64, "long_value", 2**64 - 1, 2.0**64),
    (DOUBLE, "double_value", -0.125, -0.125), (FLOAT, "float_value", 0.5, 0.5),
])
def test_numeric_datatypes(dtype: int, field: str, raw: float, value: float) -> None:
    out = feed(SparkplugSessions(), NT.format("NBIRTH"),
               payload([{"name": "m", "datatype": dtype, field: raw}], seq=0))
    assert [r.value for r in out.readings] == [value] and not out.problems


@pytest.mark.parametrize("metric, kind", [
    ({"datatype": BOOLEAN, "boolean_value": True}, "boolean"),
    ({"datatype": STRING, "string_value": "x"}, "string"),
    ({"datatype": 13, "long_value": T_MS}, "datetime"),        # DateTime: a time, not a level
    ({"datatype": 17, "bytes_value": b"\x01"}, "bytes"),
    ({"datatype": DATASET, "dataset_value": {"num_of_columns": 1, "columns": ["a"], "types": [DOUBLE]}}, "dataset"),
    ({"datatype": TEMPLATE, "template_value": {"version": "1"}}, "template"),
    ({"datatype": 31, "bytes_value": b"\x00" * 8}, "array"),   # DoubleArray
    ({"datatype": DOUBLE, "is_null": True}, "null"),
    ({"datatype": DOUBLE}, "no_value"),
])
def test_non_numeric_metrics_are_skipped_and_counted(metric: dict[str, Any], kind: str) -> None:
    out = feed(SparkplugSessions(), NT.format("NBIRTH"), payload([{"name": "m", **metric}], seq=0))
    assert out.used and not out.readings and not out.problems
    assert out.skipped == Counter({kind: 1}) and kind in SKIP_KINDS


@pytest.mark.parametrize("metric, reason", [
    ({"datatype": DOUBLE, "double_value": math.nan}, "nan"),
    ({"datatype": FLOAT, "float_value": -math.inf}, "infinite"),
    ({"datatype": DOUBLE, "string_value": "12.5"}, "sparkplug_invalid"),
    ({"datatype": INT32, "double_value": 1.0}, "sparkplug_invalid"),
])
def test_values_that_break_their_datatype_are_problems(metric: dict[str, Any], reason: str) -> None:
    out = feed(SparkplugSessions(), NT.format("NBIRTH"), payload([{"name": "Fill Weight", **metric}], seq=0))
    assert reasons(out) == [reason] and "'Fill Weight'" in out.problems[0].message


# ---------------------------------------------------------------------------
# seq, births, deaths

def test_seq_wraps_after_255_and_gaps_are_reported() -> None:
    # Sparkplug 3.0, "Sequence Number": 0 to 255, then 0 again; NBIRTH carries the first.
    s = born()  # NBIRTH seq 0, DBIRTH seq 1
    for seq in range(2, 256):
        assert feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=seq)).seq_gap is None
    assert feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=0)).seq_gap is None
    out = feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=5))
    assert out.seq_gap == (1, 5) and out.rebirth == (GROUP, NODE)
    assert len(out.readings) == 1  # the message itself is used
    assert feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=6)).seq_gap is None
    out = feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=256))
    assert reasons(out) == ["sparkplug_invalid"] and "beyond 255" in out.problems[0].message


def test_data_before_any_birth_is_set_aside() -> None:
    s = SparkplugSessions()
    out = feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=4))
    assert reasons(out) == ["sparkplug_no_birth"] and not out.used and out.rebirth == (GROUP, NODE)
    assert f"{GROUP}/{NODE}" in out.problems[0].message
    # A node born, its device not: DDATA and DDEATH of the device are still before its birth.
    feed(s, NT.format("NBIRTH"), payload([], seq=0))
    assert reasons(feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=1))) == [
        "sparkplug_no_birth"]


def test_death_marks_streams_stale_until_the_next_birth() -> None:
    s = born()
    stream = f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
    feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=2))
    out = feed(s, DT.format("DDEATH"), payload([], seq=3), now=100.0)
    assert out.used and out.stale == [stream] and s.is_stale(stream) and s.stale[stream] == 100.0
    assert reasons(feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=4))) == [
        "sparkplug_no_birth"]
    out = feed(s, DT.format("DBIRTH"), payload([{"name": "Fill Weight", "alias": 7, "datatype": DOUBLE,
                                                 "double_value": 2.0}], seq=5))
    assert out.fresh == [stream] and not s.is_stale(stream)
    # The new birth's aliases hold now.
    assert [r.value for r in feed(s, DT.format("DDATA"), payload([{"alias": 7, "double_value": 3.0}],
                                                                   seq=6)).readings] == [3.0]


def test_node_death_makes_its_devices_stale_and_an_old_death_is_ignored() -> None:
    s = born()
    feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=2))
    stream = f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
    # Sparkplug 3.0, "bdSeq": an NDEATH whose bdSeq is not the current NBIRTH's belongs to an
    # earlier connection (the birth above had bdSeq 4).
    old = feed(s, NT.format("NDEATH"), payload([{"name": "bdSeq", "datatype": UINT64, "long_value": 3}]))
    assert reasons(old) == ["sparkplug_old_death"] and not s.is_stale(stream)
    out = feed(s, NT.format("NDEATH"), payload([{"name": "bdSeq", "datatype": UINT64, "long_value": 4}]))
    assert out.used and out.stale == [stream]
    # The next NBIRTH revives the node; the device waits for its own DBIRTH.
    feed(s, NT.format("NBIRTH"), payload([{"name": "bdSeq", "datatype": UINT64, "long_value": 5}], seq=0))
    assert s.is_stale(stream)
    assert reasons(feed(s, DT.format("DDATA"), payload([{"alias": 1, "double_value": 1.0}], seq=1))) == [
        "sparkplug_no_birth"]


def test_commands_and_state_are_not_data() -> None:
    s = born()
    assert reasons(feed(s, NT.format("NCMD"), rebirth_request(T_MS))) == ["sparkplug_not_data"]
    assert reasons(feed(s, "spBv1.0/STATE/scada1", b'{"online": true}')) == ["sparkplug_not_data"]
    assert reasons(feed(s, "brackenfield/line2/x", b"")) == ["sparkplug_invalid"]


def test_the_session_bound_holds() -> None:
    s = SparkplugSessions(max_sessions=3)
    for k in range(3):
        assert feed(s, f"spBv1.0/{GROUP}/NBIRTH/e{k}", payload([], seq=0)).used
    out = feed(s, f"spBv1.0/{GROUP}/NBIRTH/e9", payload([], seq=0))
    assert reasons(out) == ["stream_cap"]


# ---------------------------------------------------------------------------
# Malformed protobuf

@pytest.mark.parametrize("body, what", [
    (b"\xff\xff\xff", "not a Sparkplug B protobuf"),                       # a bad varint
    (payload([{"name": "x", "datatype": DOUBLE, "double_value": 1.0}], seq=0)[:-3], "not a Sparkplug B protobuf"),
    (tag(2, 2) + varint(50) + b"\x00", "not a Sparkplug B protobuf"),      # a length beyond the end
    (tag(1, 3), "not a Sparkplug B protobuf"),                             # a group start, never ended
])
def test_malformed_payloads_are_named(body: bytes, what: str) -> None:
    out = feed(SparkplugSessions(), NT.format("NBIRTH"), body)
    assert reasons(out) == ["sparkplug_invalid"] and what in out.problems[0].message
    assert out.problems[0].message.startswith("NBIRTH:")


def test_a_birth_metric_without_a_name_is_a_problem_and_the_rest_is_kept() -> None:
    out = feed(SparkplugSessions(), NT.format("NBIRTH"), payload([
        {"alias": 1, "datatype": DOUBLE, "double_value": 1.0},
        {"name": "Fill Weight", "alias": 2, "datatype": DOUBLE, "double_value": 2.0}], seq=0))
    assert reasons(out) == ["sparkplug_invalid"] and [r.value for r in out.readings] == [2.0]


def test_too_large_and_too_many_metrics() -> None:
    s = SparkplugSessions(max_metrics=3)
    assert reasons(s.feed(NT.format("NBIRTH"), b"\x00" * 100, 0.0, max_bytes=50)) == ["too_large"]
    out = s.feed(NT.format("NBIRTH"), payload([{"name": f"m{k}", "datatype": DOUBLE, "double_value": 1.0}
                                               for k in range(5)], seq=0), 0.0)
    assert reasons(out) == ["too_many_items"] and len(out.readings) == 3


def test_every_reason_has_a_sentence_and_does_not_clash_with_the_decoders() -> None:
    assert not set(REASONS) & set(DECODE_REASONS)
    for label, sentence in REASONS.items():
        assert label.startswith("sparkplug_") and sentence[0].isupper() and sentence.endswith(".")


# ---------------------------------------------------------------------------
# Fuzz: the decoder never raises, every message is used or has a problem, and
# every reading is finite and named.

def build(d: dict[str, Any]) -> bytes:
    p = P()
    for key in ("timestamp", "seq", "uuid", "body"):
        if key in d:
            setattr(p, key, d[key])
    for m in d["metrics"]:
        p.metrics.add(**m)
    return bytes(p.SerializeToString())


SP_BODIES = (SP_PAYLOADS.map(build) | SP_PAYLOADS.map(build)
             | st.tuples(SP_PAYLOADS.map(build), SP_PAYLOADS.map(build)).map(b"".join)  # merged on parse
             | st.tuples(SP_PAYLOADS.map(build), st.integers(0, 60)).map(lambda t: t[0][:t[1]])
             | st.binary(max_size=80))


@settings(PROPERTY, max_examples=600)
@given(msgs=st.lists(st.tuples(SP_TOPICS, SP_BODIES), min_size=1, max_size=12))
def test_fuzz_sparkplug_decoder(msgs: list[tuple[str, bytes]]) -> None:
    s = SparkplugSessions(max_sessions=4, max_metrics=4)
    allowed = set(REASONS) | set(DECODE_REASONS) | {"stream_cap"}
    for topic, body in msgs:
        out = s.feed(topic, body, 1_790_000_000.0, max_bytes=200)
        assert out.used or out.problems
        for p in out.problems:
            assert p.reason in allowed and p.message
        for r in out.readings:
            assert r.name and math.isfinite(r.value) and (r.time is None or math.isfinite(r.time))
        assert set(out.skipped) <= set(SKIP_KINDS)
        assert all(s.is_stale(x) for x in out.stale) and not any(s.is_stale(x) for x in out.fresh)


# ---------------------------------------------------------------------------
# Configuration

SP_ENTRY = "streams:\n  - topic: 'spBv1.0/Brackenfield/#'\n    format: sparkplug_b\n"


def test_configuration_of_a_sparkplug_entry() -> None:
    cfg = parse_config(SP_ENTRY + "    label: '{name} on {node}'\n    rebirth_requests: true\n")
    sc = cfg.streams[0]
    assert sc.format == "sparkplug_b" and sc.rebirth_requests
    stream = f"{GROUP}/{NODE}/{DEVICE}/Fill Weight"
    assert cfg.stream_for(stream) is sc and cfg.stream_for(stream, sc.topic) is sc
    assert cfg.label_for(stream, sc.topic) == f"{DEVICE}/Fill Weight on {NODE}"
    assert parse_config(SP_ENTRY).streams[0].rebirth_requests is False


@pytest.mark.parametrize("text, where", [
    ("streams:\n  - topic: 'plant/#'\n    format: sparkplug_b\n", "streams[0].topic"),
    ("streams:\n  - topic: 'plant/#'\n    rebirth_requests: true\n", "streams[0].rebirth_requests"),
    (SP_ENTRY + "    value: v\n", "streams[0].value"),
    (SP_ENTRY + "    label: 'filler {1}'\n", "streams[0].label"),
])
def test_configuration_mistakes_are_named(text: str, where: str) -> None:
    with pytest.raises(ConfigError) as err:
        parse_config(text)
    assert err.value.key_path == where


def test_without_protobuf_the_configuration_says_what_to_install(tmp_path: Any) -> None:
    # A fresh interpreter in which importing google.protobuf fails, as on a machine without
    # the sparkplug extra.
    import subprocess
    import sys

    cfg = tmp_path / "plant.yaml"
    cfg.write_text(SP_ENTRY)
    code = ("import sys; sys.modules['google.protobuf'] = None\n"
            "from shiftwatch.config import ConfigError, load_config\n"
            f"try:\n    load_config({str(cfg)!r})\nexcept ConfigError as exc:\n    print(exc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=True)
    assert "streams[0]): format: sparkplug_b needs the protobuf package, which is not installed" in out.stdout
    assert "pip install 'shiftwatch[sparkplug]'" in out.stdout
