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
wrote it last (see ``Daemon._set_shard_of``).

Pure: no I/O, no clock.
"""

from __future__ import annotations

__all__ = ["FNV32_OFFSET", "FNV32_PRIME", "Ownership", "fnv1a_32", "partition_of"]

#: 32-bit FNV-1a parameters (Fowler, Noll, Vo; the IETF draft "The FNV
#: Non-Cryptographic Hash Algorithm", draft-eastlake-fnv).
FNV32_OFFSET = 0x811C9DC5
FNV32_PRIME = 0x01000193
#: Topics whose partition is remembered (then the memory starts again).
CACHE_TOPICS = 100_000
#: Streams whose first sample from another shard's partition is logged (then no more lines).
LOGGED_STREAMS = 10_000


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
