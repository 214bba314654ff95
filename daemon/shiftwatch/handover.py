"""Passing a moved stream from the shard that wrote it last to its new owner.

With ``state.keep: cluster`` a stream that moves between shards (the number
of shards changed) continues from its state in the cluster: its snapshot and
the journal messages after it.  The old owner writes what still reaches it of
the stream into that journal until the new owner writes the stream itself;
from then on the journal refuses the old owner (``Nats-Expected-Last-Subject-Sequence``).
What the broker had queued for the old owner's MQTT session before the
mapping changed can reach it seconds late (a busy or paused process, NATS
holding a session's deliveries back), after the new owner has begun: those
samples used to be refused and set aside.

So the new owner asks before it begins.  Its first samples of a stream whose
journal another shard wrote moments ago (or, with no such journal message, that
the mapping before a change less than ``cluster.handover_wait`` old gave another
shard: ``partition.Remap``) make it send, at QoS 1, an *ask* on
the stream's own topic in that shard's partition (``<its shard.topic_prefix>/<topic>``),
and hold the stream (its samples wait, see ``shiftwatch.moved``).  The ask is
stored by the broker after every message the mapping sent that shard before
the change (the new owner only sees the stream once the mapping has changed).
NATS's MQTT side keeps one JetStream consumer per subscription and delivers
what it stored in order, so the ask has to come through the subscription that
carries the stream's samples: hence the stream's own topic, and a payload no
sensor sends (:data:`MAGIC` first).  When the old owner takes the ask from its
queue it has taken all of the stream's earlier samples and written them to the
journal.  It then sends an *answer*, and the new owner loads the stream with
everything the old one wrote, then the samples of it that reached the new owner
while it waited (parked in the cluster meanwhile, so that their rounds could be
acknowledged: see ``shiftwatch.clusterstate``).

The answer goes by plain NATS, on ``<cluster.name>.handover.<the asker's writer
id>``, which the asker subscribes to through its cluster connection, not over
MQTT: a message queued behind others on an MQTT subscription comes only as fast
as they are acknowledged, and NATS's MQTT side sends a subscription no more once
``max_ack_pending`` of its messages are unacknowledged (the first version held
the waiting streams' rounds unacknowledged, and its answers never came).  A plain NATS message is sent at
most once: one that is lost costs the wait.  An old owner that never answers (stopped, or gone with a
shrinking cluster) costs the new owner ``cluster.handover_wait``, after which it
loads the stream as it is.  An old owner that still owns the stream by its own
``shard.of`` (the mapping changed before its reload) answers only once its reload
has let the stream go: until then it keeps an engine of the stream, which it would
save over its new owner's work.  An old owner that connected again moments before
holds its answers for ``cluster.redelivery_wait``: what its lost connection left
unacknowledged comes again only after the servers' ack_wait, after the ask.

Both messages are :data:`MAGIC`, then a JSON object:

- ask: ``{"ask": [stream names], "shard": <asking shard>, "writer": <its id>}``
- answer: ``{"answer": [stream names], "shard": <answering shard>, "writer": <the asker's id>}``

An answer goes to the asker's writer id, so a daemon that restarted meanwhile (a
new id) does not take an answer meant for its predecessor.

Pure: bytes and times in, topics and bytes out; no I/O, no clock.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from dataclasses import dataclass, field

__all__ = ["MAGIC", "MAX_NAMES", "Handover", "HandoverError", "is_handover"]

#: How an ask or an answer begins.  No sensor payload does: JSON, SenML and text begin
#: with a printable character, and a protobuf message (Sparkplug B) cannot begin with 0,
#: a field number 0 being invalid.
MAGIC = b"\x00shiftwatch-handover\n"
#: Stream names per message (a reshard can move thousands of streams at once).
MAX_NAMES = 500
#: A writer id: one token of a NATS subject.
_WRITER = re.compile(r"[A-Za-z0-9_-]{1,64}")


def is_handover(payload: bytes | bytearray) -> bool:
    """Whether a message's payload is an ask or an answer."""
    return payload[:1] == b"\x00" and payload.startswith(MAGIC)


class HandoverError(ValueError):
    """A handover message that cannot be read: says what was wrong with it."""


@dataclass
class _Waiting:
    shard: int
    answered: bool = False


@dataclass
class Handover:
    """One shard's side of the handover: the streams it asked about, the answers it owes.

    Parameters
    ----------
    number
        This shard's number.
    writer
        This daemon's writer id (the journal's ``Shiftwatch-Writer``).
    topic_prefix
        ``shard.topic_prefix``; other shards' partition topics are found through its
        ``{number}``, so without it no shard can be asked.
    wait
        ``cluster.handover_wait``, seconds; 0: never ask.

    Topics given are a stream's topic without any partition prefix; :meth:`outgoing`
    returns whole topics to publish on, :meth:`answers_due` the writer ids to answer.

    Examples
    --------
    >>> new = Handover(3, "w-new", "part/{number}", 60.0)
    >>> old = Handover(1, "w-old", "part/{number}", 60.0)
    >>> new.can_ask(1), new.can_ask(3), new.can_ask(None)
    (True, False, False)
    >>> new.ask("brackenfield/line2/head1/fill", 1, "brackenfield/line2/head1/fill")
    >>> [(topic, body[len(MAGIC):]) for topic, body in new.outgoing()]  # doctest: +NORMALIZE_WHITESPACE
    [('part/1/brackenfield/line2/head1/fill',
      b'{"ask":["brackenfield/line2/head1/fill"],"shard":3,"writer":"w-new"}')]
    >>> ask = MAGIC + b'{"ask":["brackenfield/line2/head1/fill"],"shard":3,"writer":"w-new"}'
    >>> old.receive(ask, 10.0)
    []
    >>> [writer for writer, _ in old.answers_due(10.0)]
    ['w-new']
    >>> answer = MAGIC + b'{"answer":["brackenfield/line2/head1/fill"],"shard":1,"writer":"w-new"}'
    >>> new.receive(answer, 11.0)
    ['brackenfield/line2/head1/fill']
    >>> new.settle("brackenfield/line2/head1/fill")
    'answered'
    """

    number: int
    writer: str
    topic_prefix: str
    wait: float
    #: Streams asked about and not yet settled: the shard asked, whether it answered.
    waiting: dict[str, _Waiting] = field(default_factory=dict)
    #: Asks to send: (shard, topic) -> names.
    _asks: dict[tuple[int, str], list[str]] = field(default_factory=dict)
    #: Answers owed: (not before, writer, the ask's topic) -> names, in the order asked.
    _owed: dict[tuple[float, str, str], list[str]] = field(default_factory=dict)

    def topic(self, shard: int, topic: str) -> str:
        """``topic`` in ``shard``'s partition."""
        return self.topic_prefix.replace("{number}", str(shard)).rstrip("/") + "/" + topic

    def can_ask(self, shard: int | None) -> bool:
        """Whether a stream last written by ``shard`` is asked for (another shard, a
        prefix that names other shards' partitions, a wait above 0)."""
        return (shard is not None and shard != self.number and self.wait > 0
                and "{number}" in self.topic_prefix)

    def ask(self, name: str, shard: int, topic: str) -> None:
        """Ask ``shard`` for what it still holds of stream ``name``, which comes on
        ``topic`` (sent by :meth:`outgoing`)."""
        if name in self.waiting:
            return
        self.waiting[name] = _Waiting(shard)
        self._asks.setdefault((shard, topic), []).append(name)

    def asking(self) -> list[str]:
        """The streams :meth:`outgoing` is about to ask for."""
        return [n for names in self._asks.values() for n in names]

    def outgoing(self) -> list[tuple[str, bytes]]:
        """The asks to publish now (QoS 1), at most :data:`MAX_NAMES` names a message."""
        out = []
        for (shard, topic), names in self._asks.items():
            for i in range(0, len(names), MAX_NAMES):
                out.append((self.topic(shard, topic), _dump({"ask": names[i:i + MAX_NAMES],
                                                             "shard": self.number, "writer": self.writer})))
        self._asks = {}
        return out

    def receive(self, payload: bytes | bytearray, now: float, *, topic: str = "",
                not_before: float = 0.0) -> list[str]:
        """An ask (that came on ``topic``) or an answer.  An ask is answered by
        :meth:`answers_due` from ``max(now, not_before)`` on; an answer returns the
        streams it releases (asked by this daemon and not settled).  Raises
        :class:`HandoverError` for a message that is neither."""
        try:
            doc = json.loads(bytes(payload[len(MAGIC):]))
        except (ValueError, UnicodeDecodeError) as exc:
            raise HandoverError(f"not JSON after its first line ({exc})") from None
        if not isinstance(doc, dict):
            raise HandoverError("not a JSON object after its first line")
        kind = "ask" if "ask" in doc else "answer" if "answer" in doc else None
        if kind is None:
            raise HandoverError("neither an ask nor an answer")
        names, shard, writer = doc[kind], doc.get("shard"), doc.get("writer")
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            raise HandoverError(f"'{kind}' is not a list of stream names")
        if type(shard) is not int or shard < 0:
            raise HandoverError("'shard' is not a shard number")
        if not isinstance(writer, str) or not _WRITER.fullmatch(writer):
            raise HandoverError("'writer' is not a writer id (1 to 64 letters, digits, - or _)")
        if kind == "ask":
            owed = self._owed.setdefault((max(now, not_before), writer, topic), [])
            owed.extend(n for n in names if n not in owed)
            return []
        if writer != self.writer:
            return []  # meant for a daemon this one replaced
        released = []
        for n in names:
            w = self.waiting.get(n)
            if w is not None and w.shard == shard and not w.answered:
                w.answered = True
                released.append(n)
        return released

    def answers_due(self, now: float, holding: Callable[[str], bool] | None = None) -> list[tuple[str, bytes]]:
        """The answers to send now, each with the writer id it goes to: call only when
        everything taken before the asks is in the cluster's journal.

        ``holding(topic)``: this shard still owns the streams on ``topic`` (the mapping
        moved them, but its reload has not let them go yet): it would snapshot its
        engine of them after their new owner had begun, so their answer waits until
        the reload, and is dropped once ``wait`` has passed (the asker has stopped
        waiting then)."""
        out = []
        for key in [k for k in self._owed if k[0] <= now]:
            due, writer, topic = key
            if holding is not None and holding(topic):
                if now - due >= self.wait:
                    del self._owed[key]
                continue
            names = self._owed.pop(key)
            for i in range(0, len(names), MAX_NAMES):
                out.append((writer, _dump({"answer": names[i:i + MAX_NAMES], "shard": self.number,
                                           "writer": writer})))
        return out

    def owes(self, topic: str) -> bool:
        """Whether an answer is owed for streams on ``topic``."""
        return any(k[2] == topic for k in self._owed)

    def settle(self, name: str) -> str | None:
        """The stream is loaded now: how its wait ended ('answered', 'waited_out'), or
        None when it was not asked about."""
        w = self.waiting.pop(name, None)
        if w is None:
            return None
        return "answered" if w.answered else "waited_out"

    def forget(self, name: str) -> None:
        """The stream is not this shard's any more: its question is dropped."""
        self.waiting.pop(name, None)


def _dump(doc: dict[str, object]) -> bytes:
    return MAGIC + json.dumps(doc, separators=(",", ":")).encode("utf-8")
