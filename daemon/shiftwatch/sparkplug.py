"""Sparkplug B payloads: the protobuf schema, topic names, and the edge-node sessions.

Sparkplug B (Eclipse Sparkplug 3.0, also ISO/IEC 20237:2023) carries protobuf
payloads on topics ``spBv1.0/<group>/<message type>/<edge node>[/<device>]``.
A birth (NBIRTH for the edge node, DBIRTH for a device) lists every metric
with its name, datatype and, optionally, a numeric alias; later data
messages (NDATA, DDATA) may name a metric by its alias only.  So decoding is
stateful: :class:`SparkplugSessions` keeps, per edge node and device, the
aliases and datatypes of the last birth, the message sequence number
``seq`` (0 to 255, then 0 again), the node's ``bdSeq`` and which streams
are stale after a death.

The module is pure like :mod:`shiftwatch.decode`: no I/O, no clock (the
arrival time is passed in), no logging, no MQTT library.  ``protobuf`` is
imported on first use only (the optional extra ``sparkplug``).

The schema
----------
The payload schema is written here from the Sparkplug 3.0 specification's
description of the payload (its chapter "Payloads", the Sparkplug B protobuf
definition): message and field names and numbers are the standard's.  The
descriptor is built at import time from :data:`SCHEMA` (no ``protoc``, no
generated module); :func:`proto_text` prints it as a ``.proto`` file
(``python -m shiftwatch.sparkplug``) for a reviewer to compare with the
specification.  The protobuf package name is ours
(``shiftwatch.sparkplug_b``): it never travels on the wire.

Decisions
---------
- Numeric datatypes (Int8 to Int64, UInt8 to UInt64, Float, Double) are
  readings.  Signed integers travel as unsigned ``int_value`` /
  ``long_value``; the low 8, 16, 32 or 64 bits are read as two's complement,
  so ``-1`` as Int8 reads the same whether the sender wrote 255 or
  4294967295.
- Booleans are skipped and counted (kind ``boolean``), as are strings,
  text, UUIDs, date-times, bytes, files, datasets, templates, property sets,
  arrays, null values and metrics without a value: a 0/1 state flag has no
  noise level for a step test, and watching it for "steps" would alarm on
  every switch.
- A metric's own ``timestamp`` (milliseconds since the epoch) is its time;
  without one, the payload's ``timestamp``; without either, the arrival
  time.
- Data (NDATA, DDATA, DBIRTH) from an edge node or device without a live
  birth is set aside as ``sparkplug_no_birth``: its aliases cannot be
  trusted.  An alias not in the birth is ``sparkplug_unknown_alias``.
- A gap in ``seq`` is counted and reported (:attr:`Outcome.seq_gap`); the
  message itself is used.
- An NDEATH whose ``bdSeq`` differs from the one in the node's NBIRTH is a
  leftover of an earlier connection (the broker sends the will late) and is
  ignored (``sparkplug_old_death``).
- NCMD, DCMD and STATE messages are not data (``sparkplug_not_data``).

Stream names
------------
``<group>/<edge node>/<metric name>`` for a node's metric and
``<group>/<edge node>/<device>/<metric name>`` for a device's; a ``/`` in a
metric name (Sparkplug's folders) stays a level.  The name is made safe as
every stream name is (:func:`shiftwatch.decode.stream_name`).  Should a node
metric and a device metric give the same name (a node metric named
``Filler3/Fill Weight`` beside a device ``Filler3`` with a metric
``Fill Weight``), the one seen second gets ``~`` and a hash appended.

Examples
--------
>>> parse_topic("spBv1.0/Brackenfield/DDATA/Line4Edge/Filler3")
SpTopic(group='Brackenfield', kind='DDATA', node='Line4Edge', device='Filler3')
>>> parse_topic("spBv1.0/Brackenfield/NBIRTH/Line4Edge")
SpTopic(group='Brackenfield', kind='NBIRTH', node='Line4Edge', device=None)
>>> parse_topic("brackenfield/l4/fill") is None
True
"""

from __future__ import annotations

import functools
import hashlib
import math
from collections import Counter
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from shiftwatch.decode import DecodeProblem, Reading, stream_name

#: The first level of every Sparkplug B topic (the namespace).
NAMESPACE = "spBv1.0"
#: Message types that come from an edge node (with a ``seq``, but NDEATH).
NODE_TYPES = ("NBIRTH", "NDEATH", "NDATA", "DBIRTH", "DDEATH", "DDATA")
#: Message types that are not data: commands to edge nodes and devices.
COMMAND_TYPES = ("NCMD", "DCMD")

REASONS: dict[str, str] = {
    "sparkplug_invalid": ("The message is not a valid Sparkplug B payload or topic (the protobuf "
                          "does not parse, a birth metric has no name, a value does not match its "
                          "datatype, a seq beyond 255); what could not be read was set aside."),
    "sparkplug_no_birth": ("Data from a Sparkplug edge node or device that has no live birth "
                           "(none seen since shiftwatch started, or a death since): its metric "
                           "aliases are unknown, so the message was set aside."),
    "sparkplug_unknown_alias": ("A Sparkplug metric names an alias that its birth did not list; "
                                "that metric was set aside."),
    "sparkplug_not_data": ("A Sparkplug command (NCMD, DCMD) or host STATE message: not "
                           "readings, not used."),
    "sparkplug_old_death": ("A Sparkplug NDEATH whose bdSeq does not match the edge node's current "
                            "birth: left over from an earlier connection, ignored."),
}
"""Every problem reason label of Sparkplug decoding, with one sentence an operator can read.

Counted under ``shiftwatch_messages_dropped_total{reason=...}`` like the decoders' reasons.
"""

#: Sparkplug B datatype numbers (Sparkplug 3.0, "Datatypes"; the DataType enum of the schema).
DATATYPES: dict[int, str] = {
    0: "Unknown", 1: "Int8", 2: "Int16", 3: "Int32", 4: "Int64", 5: "UInt8", 6: "UInt16",
    7: "UInt32", 8: "UInt64", 9: "Float", 10: "Double", 11: "Boolean", 12: "String",
    13: "DateTime", 14: "Text", 15: "UUID", 16: "DataSet", 17: "Bytes", 18: "File",
    19: "Template", 20: "PropertySet", 21: "PropertySetList", 22: "Int8Array",
    23: "Int16Array", 24: "Int32Array", 25: "Int64Array", 26: "UInt8Array", 27: "UInt16Array",
    28: "UInt32Array", 29: "UInt64Array", 30: "FloatArray", 31: "DoubleArray",
    32: "BooleanArray", 33: "StringArray", 34: "DateTimeArray",
}
_SIGNED_BITS = {1: 8, 2: 16, 3: 32, 4: 64}
_UNSIGNED = {5, 6, 7, 8}
_FLOATS = {9, 10}
#: The kind a skipped metric is counted under, by datatype.
_SKIP_KIND = {11: "boolean", 12: "string", 13: "datetime", 14: "string", 15: "string",
              16: "dataset", 17: "bytes", 18: "bytes", 19: "template", 20: "property_set",
              21: "property_set"}
#: Kinds of skipped metrics (the label values of ``shiftwatch_sparkplug_metrics_skipped_total``).
SKIP_KINDS = ("boolean", "string", "datetime", "bytes", "dataset", "template", "property_set",
              "array", "null", "no_value", "other")
_ONEOF_KIND = {"boolean_value": "boolean", "string_value": "string", "bytes_value": "bytes",
               "dataset_value": "dataset", "template_value": "template",
               "extension_value": "other"}

# ------------------------------------------------------------------ schema
# Field tuples: (label, type, name, number, oneof).  label: "optional" | "repeated";
# type: a scalar protobuf type name or a message name (relative to Payload).
_F = tuple[str, str, str, int, str | None]


@dataclass(frozen=True)
class _Msg:
    fields: tuple[_F, ...]
    nested: tuple[tuple[str, _Msg], ...] = ()
    extensions_from: int | None = None


def _value_oneof(first: int, extension: str) -> tuple[_F, ...]:
    """The common value oneof of Parameter, DataSetValue and PropertyValue (numbers from ``first``)."""
    names = [("uint32", "int_value"), ("uint64", "long_value"), ("float", "float_value"),
             ("double", "double_value"), ("bool", "boolean_value"), ("string", "string_value")]
    out = [("optional", t, n, first + i, "value") for i, (t, n) in enumerate(names)]
    return (*out, ("optional", extension, "extension_value", first + len(names), "value"))


_EXT_ONLY = _Msg((), (), 1)

#: The Sparkplug B payload schema (Sparkplug 3.0, the Sparkplug B protobuf definition),
#: written from the specification.  ``proto_text()`` shows it as a .proto file.
SCHEMA: tuple[str, _Msg] = ("Payload", _Msg(
    fields=(
        ("optional", "uint64", "timestamp", 1, None),
        ("repeated", "Metric", "metrics", 2, None),
        ("optional", "uint64", "seq", 3, None),
        ("optional", "string", "uuid", 4, None),
        ("optional", "bytes", "body", 5, None),
    ),
    extensions_from=6,
    nested=(
        ("Template", _Msg(
            fields=(
                ("optional", "string", "version", 1, None),
                ("repeated", "Metric", "metrics", 2, None),
                ("repeated", "Template.Parameter", "parameters", 3, None),
                ("optional", "string", "template_ref", 4, None),
                ("optional", "bool", "is_definition", 5, None),
            ),
            extensions_from=6,
            nested=(
                ("Parameter", _Msg(
                    fields=(("optional", "string", "name", 1, None),
                            ("optional", "uint32", "type", 2, None),
                            *_value_oneof(3, "Template.Parameter.ParameterValueExtension")),
                    nested=(("ParameterValueExtension", _EXT_ONLY),))),
            ))),
        ("DataSet", _Msg(
            fields=(
                ("optional", "uint64", "num_of_columns", 1, None),
                ("repeated", "string", "columns", 2, None),
                ("repeated", "uint32", "types", 3, None),
                ("repeated", "DataSet.Row", "rows", 4, None),
            ),
            extensions_from=5,
            nested=(
                ("DataSetValue", _Msg(
                    fields=_value_oneof(1, "DataSet.DataSetValue.DataSetValueExtension"),
                    nested=(("DataSetValueExtension", _EXT_ONLY),))),
                ("Row", _Msg(fields=(("repeated", "DataSet.DataSetValue", "elements", 1, None),),
                             extensions_from=2)),
            ))),
        ("PropertyValue", _Msg(
            fields=(
                ("optional", "uint32", "type", 1, None),
                ("optional", "bool", "is_null", 2, None),
                *_value_oneof(3, "PropertySet")[:6],
                ("optional", "PropertySet", "propertyset_value", 9, "value"),
                ("optional", "PropertySetList", "propertysets_value", 10, "value"),
                ("optional", "PropertyValue.PropertyValueExtension", "extension_value", 11, "value"),
            ),
            nested=(("PropertyValueExtension", _EXT_ONLY),))),
        ("PropertySet", _Msg(
            fields=(("repeated", "string", "keys", 1, None),
                    ("repeated", "PropertyValue", "values", 2, None)),
            extensions_from=3)),
        ("PropertySetList", _Msg(
            fields=(("repeated", "PropertySet", "propertyset", 1, None),),
            extensions_from=2)),
        ("MetaData", _Msg(
            fields=(
                ("optional", "bool", "is_multi_part", 1, None),
                ("optional", "string", "content_type", 2, None),
                ("optional", "uint64", "size", 3, None),
                ("optional", "uint64", "seq", 4, None),
                ("optional", "string", "file_name", 5, None),
                ("optional", "string", "file_type", 6, None),
                ("optional", "string", "md5", 7, None),
                ("optional", "string", "description", 8, None),
            ),
            extensions_from=9)),
        ("Metric", _Msg(
            fields=(
                ("optional", "string", "name", 1, None),
                ("optional", "uint64", "alias", 2, None),
                ("optional", "uint64", "timestamp", 3, None),
                ("optional", "uint32", "datatype", 4, None),
                ("optional", "bool", "is_historical", 5, None),
                ("optional", "bool", "is_transient", 6, None),
                ("optional", "bool", "is_null", 7, None),
                ("optional", "MetaData", "metadata", 8, None),
                ("optional", "PropertySet", "properties", 9, None),
                ("optional", "uint32", "int_value", 10, "value"),
                ("optional", "uint64", "long_value", 11, "value"),
                ("optional", "float", "float_value", 12, "value"),
                ("optional", "double", "double_value", 13, "value"),
                ("optional", "bool", "boolean_value", 14, "value"),
                ("optional", "string", "string_value", 15, "value"),
                ("optional", "bytes", "bytes_value", 16, "value"),
                ("optional", "DataSet", "dataset_value", 17, "value"),
                ("optional", "Template", "template_value", 18, "value"),
                ("optional", "Metric.MetricValueExtension", "extension_value", 19, "value"),
            ),
            nested=(("MetricValueExtension", _EXT_ONLY),))),
    )))

#: The protobuf package of the schema (ours; it does not appear on the wire).
PACKAGE = "shiftwatch.sparkplug_b"


def proto_text() -> str:
    """The schema as ``.proto`` text (proto2), for reading beside the specification.

    Examples
    --------
    >>> text = proto_text()
    >>> "optional uint64 seq = 3;" in text and "oneof value {" in text
    True
    """
    lines = ['syntax = "proto2";', "", f"package {PACKAGE};", "",
             "// Sparkplug B payload (Eclipse Sparkplug 3.0), written from the specification.", ""]

    def emit(name: str, msg: _Msg, depth: int) -> None:
        pad = "    " * depth
        lines.append(f"{pad}message {name} {{")
        for nname, nmsg in msg.nested:
            emit(nname, nmsg, depth + 1)
        in_oneof = False
        for label, typ, fname, number, oneof in msg.fields:
            if oneof and not in_oneof:
                lines.append(f"{pad}    oneof {oneof} {{")
                in_oneof = True
            if not oneof and in_oneof:
                lines.append(f"{pad}    }}")
                in_oneof = False
            lead = f"{pad}        " if oneof else f"{pad}    {label} "
            lines.append(f"{lead}{typ} {fname} = {number};")
        if in_oneof:
            lines.append(f"{pad}    }}")
        if msg.extensions_from is not None:
            lines.append(f"{pad}    extensions {msg.extensions_from} to max;")
        lines.append(f"{pad}}}")

    lines += ["// Metric.datatype, PropertyValue.type, DataSet.types and Parameter.type hold these.",
              "enum DataType {"]
    lines += [f"    {name} = {number};" for number, name in DATATYPES.items()]
    lines += ["}", ""]
    emit(SCHEMA[0], SCHEMA[1], 0)
    return "\n".join(lines) + "\n"


@functools.cache
def payload_class() -> Any:
    """The protobuf message class of a Sparkplug B ``Payload`` (built once, on first use).

    Raises
    ------
    ImportError
        When the ``protobuf`` package is missing (install ``shiftwatch[sparkplug]``).
    """
    try:
        from google.protobuf import descriptor_pb2, descriptor_pool, message_factory
    except ImportError as exc:
        raise ImportError("format sparkplug_b needs the protobuf package: "
                          "pip install 'shiftwatch[sparkplug]'") from exc

    fdp = descriptor_pb2.FileDescriptorProto(name="shiftwatch_sparkplug_b.proto", package=PACKAGE,
                                             syntax="proto2")
    F = descriptor_pb2.FieldDescriptorProto
    scalar = {"double": F.TYPE_DOUBLE, "float": F.TYPE_FLOAT, "uint64": F.TYPE_UINT64,
              "uint32": F.TYPE_UINT32, "bool": F.TYPE_BOOL, "string": F.TYPE_STRING,
              "bytes": F.TYPE_BYTES}

    def build(dp: Any, name: str, msg: _Msg) -> None:
        dp.name = name
        for nname, nmsg in msg.nested:
            build(dp.nested_type.add(), nname, nmsg)
        oneofs: dict[str, int] = {}
        for label, typ, fname, number, oneof in msg.fields:
            f = dp.field.add(name=fname, number=number,
                             label=F.LABEL_REPEATED if label == "repeated" else F.LABEL_OPTIONAL)
            if typ in scalar:
                f.type = scalar[typ]
            else:
                f.type = F.TYPE_MESSAGE
                f.type_name = f".{PACKAGE}.Payload.{typ}"
            if oneof is not None:
                if oneof not in oneofs:
                    oneofs[oneof] = len(dp.oneof_decl)
                    dp.oneof_decl.add(name=oneof)
                f.oneof_index = oneofs[oneof]
        if msg.extensions_from is not None:
            dp.extension_range.add(start=msg.extensions_from, end=536870912)  # "to max"

    build(fdp.message_type.add(), SCHEMA[0], SCHEMA[1])
    pool = descriptor_pool.DescriptorPool()
    pool.Add(fdp)
    desc = pool.FindMessageTypeByName(f"{PACKAGE}.Payload")
    return message_factory.GetMessageClass(desc)


# ------------------------------------------------------------------ topics
class SpTopic(NamedTuple):
    """The parts of a Sparkplug B topic."""

    group: str
    kind: str
    node: str
    device: str | None


def parse_topic(topic: str) -> SpTopic | None:
    """The parts of ``spBv1.0/<group>/<type>/<node>[/<device>]``; None for any other topic
    (``spBv1.0/STATE/<host>`` included: it has no edge node)."""
    levels = topic.split("/")
    if len(levels) not in (4, 5) or levels[0] != NAMESPACE or not all(levels[1:]):
        return None
    device = levels[4] if len(levels) == 5 else None
    kind = levels[2]
    if kind not in NODE_TYPES and kind not in COMMAND_TYPES:
        return None
    if (device is None) != kind.startswith("N"):
        return None
    return SpTopic(levels[1], kind, levels[3], device)


# ---------------------------------------------------------------- sessions
@dataclass
class _Session:
    """One edge node's or one device's birth: aliases, datatypes, stream names."""

    alive: bool = False
    aliases: dict[int, str] = field(default_factory=dict)
    types: dict[str, int] = field(default_factory=dict)
    streams: dict[str, str] = field(default_factory=dict)  # metric name -> stream name


@dataclass
class _Node:
    session: _Session = field(default_factory=_Session)
    devices: dict[str, _Session] = field(default_factory=dict)
    seq: int | None = None
    bd_seq: int | None = None


@dataclass
class Outcome:
    """What one Sparkplug message gave.

    Attributes
    ----------
    readings : readings whose ``name`` is the full stream name.
    problems : problems, each counted under its reason.
    kind : the message type (``NBIRTH``, ...), or None for a topic outside the namespace.
    skipped : non-numeric metrics skipped, by kind (see :data:`SKIP_KINDS`).
    seq_gap : (expected, received) when ``seq`` did not follow on.
    stale : streams that a death made stale now.
    fresh : streams that a birth cleared of staleness now.
    rebirth : (group, node) whose births a host would ask for again (data before a
        birth, a gap in seq); whether to ask is the daemon's choice.
    note : a short line about a birth or death, for the log.
    used : True when the message was taken in (a birth, a death or data applied);
        False when it was set aside whole (see ``problems``).
    """

    readings: list[Reading] = field(default_factory=list)
    problems: list[DecodeProblem] = field(default_factory=list)
    kind: str | None = None
    skipped: Counter[str] = field(default_factory=Counter)
    seq_gap: tuple[int, int] | None = None
    stale: list[str] = field(default_factory=list)
    fresh: list[str] = field(default_factory=list)
    rebirth: tuple[str, str] | None = None
    note: str | None = None
    used: bool = False


class _Bad(Exception):
    def __init__(self, reason: str, message: str) -> None:
        super().__init__(reason, message)
        self.reason = reason
        self.message = message


class SparkplugSessions:
    """The state of every Sparkplug edge node and device seen, and the decoding that needs it.

    Parameters
    ----------
    max_sessions : most edge nodes plus devices tracked; births of new ones past it are
        refused (``stream_cap``).
    max_metrics : most metrics read from one payload (the rest: ``too_many_items``).
    """

    def __init__(self, max_sessions: int = 10000, max_metrics: int = 10000) -> None:
        self.max_sessions = max_sessions
        self.max_metrics = max_metrics
        self._nodes: dict[tuple[str, str], _Node] = {}
        self._count = 0  # nodes + devices
        #: Streams stale after a death, with the time of the death (epoch seconds).
        self.stale: dict[str, float] = {}
        self._owner: dict[str, tuple[str, str, str | None, str]] = {}
        self._asked: dict[tuple[str, str], float] = {}

    # -------------------------------------------------------------- queries
    def is_stale(self, stream: str) -> bool:
        """True while ``stream`` belongs to a dead edge node or device (until its next birth)."""
        return stream in self.stale

    def may_ask_rebirth(self, node: tuple[str, str], now: float, every: float = 30.0) -> bool:
        """True at most once per ``every`` seconds per edge node (for rebirth requests)."""
        last = self._asked.get(node)
        if last is not None and now - last < every:
            return False
        if len(self._asked) >= self.max_sessions:
            self._asked.clear()
        self._asked[node] = now
        return True

    def forget_stream(self, stream: str) -> None:
        """A stream the daemon dropped (reload): no longer stale."""
        self.stale.pop(stream, None)

    # -------------------------------------------------------------- decoding
    def feed(self, topic: str, payload: bytes | bytearray, now: float, *,
             max_bytes: int = 65536) -> Outcome:
        """Decode one message on ``topic`` and update the sessions; never raises on the payload."""
        out = Outcome()
        t = parse_topic(topic)
        if t is None:
            what = "a Sparkplug host STATE message" if topic.startswith(f"{NAMESPACE}/STATE/") else None
            if what is not None:
                out.problems.append(DecodeProblem("sparkplug_not_data", f"{what}, not data"))
            else:
                out.problems.append(DecodeProblem(
                    "sparkplug_invalid", "the topic is not spBv1.0/<group>/<message type>/<edge node>"
                    "[/<device>] with a known message type"))
            return out
        out.kind = t.kind
        if t.kind in COMMAND_TYPES:
            out.problems.append(DecodeProblem("sparkplug_not_data", f"{t.kind} is a command, not data"))
            return out
        if len(payload) > max_bytes:
            out.problems.append(DecodeProblem(
                "too_large", f"the payload has {len(payload)} bytes; the limit is {max_bytes}"))
            return out
        try:
            p = payload_class().FromString(bytes(payload))
        except ImportError:
            raise
        except Exception as exc:  # noqa: BLE001  protobuf's DecodeError, and whatever else parsing raises
            detail = " ".join(str(exc).split())[:120] or type(exc).__name__
            out.problems.append(DecodeProblem(
                "sparkplug_invalid", f"{t.kind}: the payload is not a Sparkplug B protobuf ({detail})"))
            return out
        try:
            self._message(t, p, now, out)
            out.used = True
        except _Bad as bad:
            out.problems.append(DecodeProblem(bad.reason, bad.message))
        return out

    def _message(self, t: SpTopic, p: Any, now: float, out: Outcome) -> None:
        key = (t.group, t.node)
        node = self._nodes.get(key)
        if t.kind == "NDEATH":
            self._ndeath(t, p, node, now, out)
            return
        if t.kind == "NBIRTH":
            if node is None:
                node = self._new_node(key)
            seq = self._seq(p, t.kind)
            node.seq = seq
            node.bd_seq = self._bd_seq(p)
            for device in node.devices.values():  # a new node session: devices must be born again
                device.alive = False
                device.aliases = {}
            self._birth(t, node.session, p, now, out)
            out.note = (f"NBIRTH of edge node {t.group}/{t.node}: {len(node.session.types)} metric(s)"
                        + ("" if node.bd_seq is None else f", bdSeq {node.bd_seq}"))
            return
        if node is None or not node.session.alive:
            out.rebirth = key
            raise _Bad("sparkplug_no_birth", f"{t.kind} from edge node {t.group}/{t.node} before its "
                       "NBIRTH (or after its NDEATH)")
        self._check_seq(key, node, p, t.kind, out)
        if t.kind == "NDATA":
            self._data(t, node.session, p, out)
            return
        assert t.device is not None
        dev = node.devices.get(t.device)
        if t.kind == "DBIRTH":
            if dev is None:
                dev = self._new_device(node, t.device)
            self._birth(t, dev, p, now, out)
            out.note = (f"DBIRTH of device {t.group}/{t.node}/{t.device}: "
                        f"{len(dev.types)} metric(s)")
            return
        if dev is None or not dev.alive:
            out.rebirth = key
            raise _Bad("sparkplug_no_birth", f"{t.kind} from device {t.group}/{t.node}/{t.device} "
                       "before its DBIRTH (or after its DDEATH)")
        if t.kind == "DDEATH":
            dev.alive = False
            self._mark_stale(dev, now, out)
            out.note = f"DDEATH of device {t.group}/{t.node}/{t.device}: its streams are stale"
            return
        self._data(t, dev, p, out)

    def _new_node(self, key: tuple[str, str]) -> _Node:
        if self._count >= self.max_sessions:
            raise _Bad("stream_cap", f"{self.max_sessions} Sparkplug edge nodes and devices are "
                       f"tracked already; the birth of {key[0]}/{key[1]} was set aside")
        self._count += 1
        node = self._nodes[key] = _Node()
        return node

    def _new_device(self, node: _Node, device: str) -> _Session:
        if self._count >= self.max_sessions:
            raise _Bad("stream_cap", f"{self.max_sessions} Sparkplug edge nodes and devices are "
                       f"tracked already; the birth of device {device} was set aside")
        self._count += 1
        dev = node.devices[device] = _Session()
        return dev

    @staticmethod
    def _seq(p: Any, kind: str) -> int | None:
        if not p.HasField("seq"):
            return None
        if p.seq > 255:
            raise _Bad("sparkplug_invalid", f"{kind}: seq is {p.seq}, beyond 255")
        return int(p.seq)

    def _check_seq(self, key: tuple[str, str], node: _Node, p: Any, kind: str, out: Outcome) -> None:
        seq = self._seq(p, kind)
        if seq is None:
            return
        if node.seq is not None:
            expected = (node.seq + 1) % 256
            if seq != expected:
                out.seq_gap = (expected, seq)
                out.rebirth = key
        node.seq = seq

    @staticmethod
    def _bd_seq(p: Any) -> int | None:
        for m in p.metrics:
            if m.name == "bdSeq" and m.WhichOneof("value") in ("int_value", "long_value"):
                return int(getattr(m, m.WhichOneof("value")))
        return None

    def _ndeath(self, t: SpTopic, p: Any, node: _Node | None, now: float, out: Outcome) -> None:
        if node is None or not node.session.alive:
            out.note = f"NDEATH of edge node {t.group}/{t.node}, which has no live birth"
            return
        bd = self._bd_seq(p)
        if bd is not None and node.bd_seq is not None and bd != node.bd_seq:
            raise _Bad("sparkplug_old_death", f"NDEATH of edge node {t.group}/{t.node} with bdSeq "
                       f"{bd}, but its NBIRTH had bdSeq {node.bd_seq}")
        node.session.alive = False
        node.seq = None
        self._mark_stale(node.session, now, out)
        for dev in node.devices.values():
            dev.alive = False
            self._mark_stale(dev, now, out)
        out.note = f"NDEATH of edge node {t.group}/{t.node}: its streams and its devices' are stale"

    def _mark_stale(self, s: _Session, now: float, out: Outcome) -> None:
        for stream in s.streams.values():
            if stream not in self.stale:
                self.stale[stream] = now
                out.stale.append(stream)

    def _stream(self, t: SpTopic, metric: str) -> str:
        parts = [t.group, t.node] + ([t.device] if t.device is not None else []) + [metric]
        owner = (t.group, t.node, t.device, metric)
        name = stream_name("/".join(parts), None)
        held = self._owner.get(name)
        if held is not None and held != owner:
            digest = hashlib.sha256(repr(owner).encode("utf-8", "surrogatepass")).hexdigest()[:12]
            name = stream_name(f"{'/'.join(parts)}~{digest}", None)
        if len(self._owner) < 16 * self.max_sessions:
            self._owner.setdefault(name, owner)
        return name

    def _metrics(self, p: Any, kind: str, out: Outcome) -> list[Any]:
        metrics = list(p.metrics)
        if len(metrics) > self.max_metrics:
            out.problems.append(DecodeProblem(
                "too_many_items", f"{kind}: {len(metrics)} metrics; only the first "
                f"{self.max_metrics} were used"))
            metrics = metrics[:self.max_metrics]
        return metrics

    def _birth(self, t: SpTopic, s: _Session, p: Any, now: float, out: Outcome) -> None:
        s.alive = True
        s.aliases = {}
        s.types = {}
        seen_names: set[str] = set()
        for i, m in enumerate(self._metrics(p, t.kind, out)):
            if not m.name:
                out.problems.append(DecodeProblem(
                    "sparkplug_invalid", f"{t.kind}: metric {i} has no name (a birth must name "
                    "every metric)"))
                continue
            seen_names.add(m.name)
            s.types[m.name] = int(m.datatype)
            if m.HasField("alias"):
                other = s.aliases.get(m.alias)
                if other is not None and other != m.name:
                    out.problems.append(DecodeProblem(
                        "sparkplug_invalid", f"{t.kind}: alias {m.alias} is given to both "
                        f"{other!r} and {m.name!r}; kept for {other!r}"))
                else:
                    s.aliases[int(m.alias)] = m.name
        for name in seen_names:  # streams are named when a metric gives a number (in _data)
            stream = s.streams.get(name)
            if stream is not None and self.stale.pop(stream, None) is not None:
                out.fresh.append(stream)
        self._data(t, s, p, out, birth=True)

    def _data(self, t: SpTopic, s: _Session, p: Any, out: Outcome, *, birth: bool = False) -> None:
        default_ms = p.timestamp if p.HasField("timestamp") else None
        metrics = list(p.metrics) if birth else self._metrics(p, t.kind, out)
        for i, m in enumerate(metrics[:self.max_metrics]):
            if m.name:
                name = m.name
            elif birth:
                continue  # reported by _birth: a birth must name every metric
            elif m.HasField("alias"):
                found = s.aliases.get(m.alias)
                if found is None:
                    out.problems.append(DecodeProblem(
                        "sparkplug_unknown_alias", f"{t.kind}: metric {i} has alias {m.alias}, "
                        "which its birth did not list"))
                    continue
                name = found
            else:
                out.problems.append(DecodeProblem(
                    "sparkplug_invalid", f"{t.kind}: metric {i} has neither a name nor an alias"))
                continue
            if birth and name == "bdSeq" and t.kind == "NBIRTH":
                continue  # the session counter, not a process value
            dtype = int(m.datatype) if m.HasField("datatype") else s.types.get(name, 0)
            try:
                value = _number(m, dtype)
            except _Bad as bad:
                out.problems.append(DecodeProblem(bad.reason, f"{t.kind}: metric {name!r}: {bad.message}"))
                continue
            if isinstance(value, str):
                out.skipped[value] += 1
                continue
            stream = s.streams.get(name)
            if stream is None:
                if len(s.streams) >= self.max_metrics:
                    continue
                stream = s.streams[name] = self._stream(t, name)
            ms = m.timestamp if m.HasField("timestamp") else default_ms
            out.readings.append(Reading(stream, None if ms is None else ms / 1000.0, value, None))


def _number(m: Any, dtype: int) -> float | str:
    """A metric's value as a finite float, or the kind it is skipped as; :class:`_Bad` for a
    value that breaks its datatype."""
    if m.is_null:
        return "null"
    which = m.WhichOneof("value")
    if which is None:
        return "no_value"
    if dtype in _SIGNED_BITS or dtype in _UNSIGNED:
        if which not in ("int_value", "long_value"):
            raise _Bad("sparkplug_invalid", f"datatype {DATATYPES[dtype]} but the value is {which}")
        raw = int(getattr(m, which))
        bits = _SIGNED_BITS.get(dtype)
        if bits is not None:
            raw &= (1 << bits) - 1
            if raw >= 1 << (bits - 1):
                raw -= 1 << bits
        return float(raw)
    if dtype in _FLOATS or (dtype == 0 and which in ("float_value", "double_value")):
        if which not in ("float_value", "double_value"):
            raise _Bad("sparkplug_invalid", f"datatype {DATATYPES.get(dtype, dtype)} but the value is {which}")
        v = float(getattr(m, which))
        if math.isnan(v):
            raise _Bad("nan", "the value is NaN")
        if math.isinf(v):
            raise _Bad("infinite", "the value is infinite")
        return v
    if dtype == 0 and which in ("int_value", "long_value"):
        return float(getattr(m, which))
    if dtype in _SKIP_KIND:
        return _SKIP_KIND[dtype]
    if 22 <= dtype <= 34:
        return "array"
    return _ONEOF_KIND.get(which, "other")


def rebirth_request(timestamp_ms: int) -> bytes:
    """The payload of an NCMD asking an edge node for its births again: the metric
    ``Node Control/Rebirth`` set to true (Sparkplug 3.0, "Node Control/Rebirth").

    Examples
    --------
    >>> p = payload_class().FromString(rebirth_request(1790000000000))
    >>> (p.metrics[0].name, p.metrics[0].boolean_value, p.metrics[0].datatype)
    ('Node Control/Rebirth', True, 11)
    """
    p = payload_class()()
    p.timestamp = timestamp_ms
    m = p.metrics.add()
    m.name = "Node Control/Rebirth"
    m.timestamp = timestamp_ms
    m.datatype = 11  # Boolean
    m.boolean_value = True
    return bytes(p.SerializeToString())


def main() -> None:
    """``python -m shiftwatch.sparkplug``: print the schema as a .proto file."""
    print(proto_text(), end="")


if __name__ == "__main__":
    main()
