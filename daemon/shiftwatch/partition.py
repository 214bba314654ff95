"""Which shard owns a topic: the partition the NATS cluster's mapping gives it.

The NATS servers map each topic to one of ``shard.of`` partitions with their
``{{partition(n, wildcard indexes...)}}`` mapping function.  nats-server 2.9
joins the text of the wildcard tokens it is given, in the order given, with
nothing between them, hashes the bytes with 32-bit FNV-1a and takes the
remainder by n (checked against the real server in
``tests/daemon/test_shards.py``: every topic of a sample arrived on the
partition this module computes, and topics whose joined tokens are equal,
such as ``ab/c/d`` and ``a/bc/d``, always share a partition).

``shard.hashed_levels`` names the topic levels those wildcards stand for
(counted from 1 in the stream's topic, after ``shard.topic_prefix`` is taken
off).  With it a shard knows, for every topic, whether the mapping in force
for ``shard.of`` partitions sends it here.  A shard feeds its engines only
the streams it owns, so that a stream moving when the number of shards
changes has one writer at a time, decided by the mapping and not by who
wrote it last (see ``ShardCount.reload``).

Pure: no I/O, no clock.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass

__all__ = ["FNV32_OFFSET", "FNV32_PRIME", "Count", "Ownership", "Remap", "count_disagreement", "fnv1a_32",
           "new_to_the_set", "partition_of"]

#: 32-bit FNV-1a parameters (Fowler, Noll, Vo; the IETF draft "The FNV
#: Non-Cryptographic Hash Algorithm", draft-eastlake-fnv).
FNV32_OFFSET = 0x811C9DC5
FNV32_PRIME = 0x01000193
#: Topics whose partition is remembered (then the memory starts again).
CACHE_TOPICS = 100_000
#: Streams whose first sample from another shard's partition is logged (then no more lines).
LOGGED_STREAMS = 10_000
#: A mapping record's time further ahead of a shard's clock than this (seconds) is taken
#: for a clock error when the shard takes the mapping up again (``Remap.taken_up``).
CLOCK_AHEAD = 60.0

#: A shard's count: ``shard.of`` and ``shard.hashed_levels``, which together are the mapping.
Count = tuple[int, tuple[int, ...]]


def fnv1a_32(data: bytes) -> int:
    """32-bit FNV-1a of ``data``.

    >>> hex(fnv1a_32(b""))  # the offset basis
    '0x811c9dc5'
    >>> hex(fnv1a_32(b"a")), hex(fnv1a_32(b"foobar"))  # the draft's test vectors
    ('0xe40c292c', '0xbf9cf968')
    """
    h = FNV32_OFFSET
    for byte in data:
        h = ((h ^ byte) * FNV32_PRIME) & 0xFFFFFFFF
    return h


def partition_of(topic: str, levels: tuple[int, ...], parts: int) -> int | None:
    """The partition (0 to ``parts`` - 1) of ``topic`` when the mapping hashes its
    ``levels`` (counted from 1); None when the topic has too few levels for the
    mapping (the mapping does not apply to it).

    >>> partition_of("brackenfield/line1/head1/fill", (2, 3, 4), 3)
    1
    >>> partition_of("brackenfield/ab/c/d", (2, 3, 4), 7) == partition_of("brackenfield/a/bc/d", (2, 3, 4), 7)
    True
    >>> partition_of("brackenfield/line1", (2, 3, 4), 3) is None
    True
    """
    tokens = topic.split("/")
    if not levels or max(levels) > len(tokens):
        return None
    key = "".join(tokens[i - 1] for i in levels).encode("utf-8", "surrogatepass")
    return fnv1a_32(key) % parts


def count_disagreement(number: int, mine: Count, others: Mapping[int, Count | None]) -> str | None:
    """Whether shard ``number`` may take up the count its configuration gives it (``mine``),
    judged by the counts the other live shards of the set announce (``others``: shard
    number -> count, None for a shard that announces none): None when it may, otherwise a
    line that names the disagreement.

    A count may be taken up when no other live shard announces one (the shard is alone,
    or the others run a release that does not announce it), or when another live shard
    runs or wants the same count: a change of the number of shards is made on every shard
    within a short time, so the second shard to change agrees with the first.  A count
    that every other live shard disagrees with is one shard's alone: a typo, or the first
    step of a change that the others have not made yet; either way the cluster's mapping
    record is not rewritten by it (see ``ShardCount.take_up``).

    >>> count_disagreement(1, (3, (2, 3, 4)), {0: (3, (2, 3, 4)), 2: (3, (2, 3, 4))}) is None
    True
    >>> count_disagreement(1, (4, (2, 3, 4)), {0: (3, (2, 3, 4)), 2: (3, (2, 3, 4))})
    'shard.of 4 agrees with no other live shard of the set (shards 0, 2 run shard.of 3)'
    >>> count_disagreement(0, (4, (2, 3, 4)), {1: (3, (2, 3, 4)), 3: (4, (2, 3, 4))}) is None  # one agrees
    True
    >>> count_disagreement(3, (4, (2, 3, 4)), {}) is None  # alone
    True
    >>> count_disagreement(1, (3, (2, 3)), {0: (3, (2, 3, 4)), 2: None})
    'shard.of 3 over hashed levels [2, 3] agrees with no other live shard of the set (shard 0 runs shard.of 3 over hashed levels [2, 3, 4])'
    """
    known = {n: c for n, c in others.items() if n != number and c is not None}
    if not known or mine in known.values():
        return None
    by: dict[Count, list[int]] = {}
    for n, c in sorted(known.items()):
        by.setdefault(c, []).append(n)
    show_levels = any(levels != mine[1] for _of, levels in by)

    def count(c: Count) -> str:
        return f"shard.of {c[0]}" + (f" over hashed levels {list(c[1])}" if show_levels else "")

    said = "; ".join(f"shard {ns[0]} runs {count(c)}" if len(ns) == 1
                     else f"shards {', '.join(map(str, ns))} run {count(c)}" for c, ns in by.items())
    return f"{count(mine)} agrees with no other live shard of the set ({said})"


def new_to_the_set(number: int, others: Mapping[int, Count | None]) -> bool:
    """Whether shard ``number`` has no partition under the count any other live shard
    announces (it is past every one's ``shard.of``): a shard being added to the set, to
    which the servers' mapping sends nothing before it changes too.

    >>> new_to_the_set(3, {0: (3, (2, 3, 4)), 1: (3, (2, 3, 4)), 2: None})
    True
    >>> new_to_the_set(1, {0: (3, (2, 3, 4)), 2: (3, (2, 3, 4))})
    False
    >>> new_to_the_set(3, {0: (4, (2, 3, 4)), 1: (3, (2, 3, 4))})  # shard 0 already runs 4
    False
    >>> new_to_the_set(0, {})
    False
    """
    known = [c for n, c in others.items() if n != number and c is not None]
    return bool(known) and all(number >= of for of, _levels in known)


class Ownership:
    """The streams one shard owns under the mapping for ``of`` partitions.

    ``owns(topic)`` is asked for every message, so answers are remembered per
    topic.  A topic the mapping does not apply to (too few levels) is owned by
    whichever shard it reaches: no other shard can be sent it.
    """

    def __init__(self, number: int, of: int, levels: tuple[int, ...]) -> None:
        self.number = number
        self.of = of
        self.levels = tuple(levels)
        self._cache: dict[str, bool] = {}
        self._logged: set[str] = set()

    def owns(self, topic: str) -> bool:
        got = self._cache.get(topic)
        if got is None:
            k = partition_of(topic, self.levels, self.of)
            got = k is None or k == self.number
            if len(self._cache) >= CACHE_TOPICS:
                self._cache.clear()
            self._cache[topic] = got
        return got

    def partition(self, topic: str) -> int | None:
        """The partition of ``topic`` under the mapping in force (None: not mapped)."""
        return partition_of(topic, self.levels, self.of)

    def change(self, of: int, levels: tuple[int, ...]) -> None:
        """A new number of partitions (or hashed levels): every answer is asked again."""
        self.of = of
        self.levels = tuple(levels)
        self._cache.clear()
        self._logged.clear()

    def first_sight(self, stream: str) -> bool:
        """True the first time a stream of another shard is seen since the last change
        (for one log line per stream; bounded)."""
        if stream in self._logged or len(self._logged) >= LOGGED_STREAMS:
            return False
        self._logged.add(stream)
        return True


@dataclass(frozen=True)
class Remap:
    """The mapping the shards run with, the one before it, and when the latest shard took it
    up (wall clock, seconds): kept in the cluster (``ClusterState.note_mapping``), so that
    every shard, a new one included, knows where a stream was before the last change.

    A stream's journal says who wrote it last, and its new owner asks that shard for what
    it still holds (``shiftwatch.handover``).  A stream nobody wrote yet (or not for long)
    has no such word: its old owner may still hold samples of it that the mapping sent it
    before the change (a shard still waiting after resuming its session, a frozen one).
    :meth:`moved_from` names that old owner for a while after a change.

    >>> r = Remap(4, (2, 3, 4), 3, (2, 3, 4), since=100.0)
    >>> topic = "brackenfield/line1/head1/fill"
    >>> partition_of(topic, (2, 3, 4), 3), partition_of(topic, (2, 3, 4), 4)
    (1, 2)
    >>> r.moved_from(topic, 2, now=130.0, wait=60.0), r.moved_from(topic, 1, now=130.0, wait=60.0)
    (1, None)
    >>> r.moved_from(topic, 2, now=170.0, wait=60.0) is None  # the change is too old
    True
    >>> r.moved_from(topic, 2, now=130.0, wait=60.0, written=90.0)  # last written before it
    1
    >>> r.moved_from(topic, 2, now=130.0, wait=60.0, written=110.0) is None  # taken up since
    True
    >>> r.moved_from(topic, 2, now=90.0, wait=60.0)  # written by a clock 10 s ahead
    1
    >>> r.moved_from(topic, 2, now=30.0, wait=60.0) is None  # 70 s ahead: a clock error
    True
    >>> Remap.decode(r.encode()) == r
    True
    >>> Remap(3, (2, 3, 4), None, None, 5.0).moved_from(topic, 2, now=6.0, wait=60.0) is None
    True
    """

    of: int
    levels: tuple[int, ...]
    previous_of: int | None
    previous_levels: tuple[int, ...] | None
    since: float

    def moved_from(self, topic: str, number: int, *, now: float, wait: float,
                   written: float | None = None) -> int | None:
        """The shard the mapping before gave ``topic``, when it is not ``number`` and the
        change is less than ``wait`` seconds old; otherwise None.  ``written``: when the
        stream's journal was last written (None: never); written since the change, the
        stream has been taken up under the new mapping already (its handover is done), so
        None too.  A change more than ``wait`` ahead of ``now`` is a clock that is ahead
        (``since`` is the wall clock of the box that wrote the record): not a young change."""
        if self.previous_of is None or self.previous_levels is None or not -wait < now - self.since < wait:
            return None
        if written is not None and written >= self.since:
            return None
        k = partition_of(topic, self.previous_levels, self.previous_of)
        return None if k is None or k == number else k

    def encode(self) -> bytes:
        return json.dumps({"format": "shiftwatch-mapping", "of": self.of, "levels": list(self.levels),
                           "previous_of": self.previous_of,
                           "previous_levels": None if self.previous_levels is None else list(self.previous_levels),
                           "since": self.since}, separators=(",", ":")).encode("utf-8")

    @classmethod
    def decode(cls, body: bytes) -> Remap | None:
        """None for anything that is not such a record (damaged, put there by hand)."""
        try:
            doc = json.loads(body)
            if not isinstance(doc, dict) or doc.get("format") != "shiftwatch-mapping":
                return None

            def levels(v: object) -> tuple[int, ...]:
                if not isinstance(v, list) or not v or not all(type(x) is int and x > 0 for x in v):
                    raise ValueError("levels")
                return tuple(v)

            of, pof, since = doc["of"], doc.get("previous_of"), doc["since"]
            if type(of) is not int or of < 1 or type(since) not in (int, float):
                return None
            if pof is not None and (type(pof) is not int or pof < 1):
                return None
            plev = doc.get("previous_levels")
            return cls(of, levels(doc["levels"]), pof, None if plev is None else levels(plev), float(since))
        except (ValueError, KeyError, TypeError, UnicodeDecodeError):
            return None

    def taken_up(self, of: int, levels: tuple[int, ...], now: float, *, changed: bool) -> Remap | None:
        """The record after a shard took up the mapping for ``of`` partitions over ``levels``
        (at its start, or at a reload that ``changed`` its own); None when it stays as is."""
        levels = tuple(levels)
        if (of, levels) != (self.of, self.levels):
            return Remap(of, levels, self.of, self.levels, now)
        if changed:  # the latest old shard's reload: the streams move from about now on
            # (a time far ahead of this clock is another box's clock error: not kept)
            since = max(now, self.since) if self.since - now < CLOCK_AHEAD else now
            return Remap(of, levels, self.previous_of, self.previous_levels, since)
        return None
