"""Stream state kept in a NATS cluster (``state.keep: cluster``), keyed by stream.

The same two parts as the local state directory, with the same guarantee
(at least once: no sample the broker forgets is one the engines forget):

- **Journal**: a JetStream stream ``<name>_journal`` with one subject per
  stream, ``<name>.journal.<key>`` (``key`` is a hash of the stream's name, so
  any name fits a subject).  After each round, every stream's samples of the
  round are one message on its subject, in the local journal's encoding
  (``journal.encode_groups`` of the one group, made by ``journal.encode_group``); the
  round's MQTT messages are acknowledged only
  after the cluster has acknowledged all of them (stored on a majority of the
  replicas).  Each publish carries JetStream's
  ``Nats-Expected-Last-Subject-Sequence`` header with the last sequence this
  daemon wrote or read for the stream: a stream that another shard has written
  meanwhile (it moved when the number of shards changed) is refused, and the
  daemon reloads it and feeds it the round again (see ``Daemon``).  A refusal
  whose cause is this daemon's own earlier write of the same group (stored,
  but its acknowledgement lost to a timeout) is taken as that write.
- **Snapshots**: a key-value bucket ``<name>_state``, one key per stream, its
  engine state (``statestore.encode_state``), the journal sequence it
  includes, the ``topic`` filter of its config entry and the alert records it
  had made that the broker had not yet acknowledged.  A snapshot is saved only
  while the stream's journal still ends at the sequence this daemon wrote or
  read (or at its own message after it: a round stored whose acknowledgement
  was lost), and the bucket's entry is still the revision it read or wrote (a
  key-value update with the expected last revision): a daemon whose engine of
  the stream is stale (another has written the stream since) saves nothing.
  The entry names the daemon that saved it (``writer``), so that a save whose
  acknowledgement was lost does not fence out the daemon that made it; an
  entry deleted meanwhile is made again.
  After a snapshot the stream's journal subject is purged up to the
  snapshot's sequence, never past it (the last message stays: it keeps the
  subject's last sequence for the header above).
- **Parked samples**: a JetStream stream ``<name>_parked``, one subject per
  stream, ``<name>.parked.<key>``.  A stream that moved to this shard waits
  for its last writer (see ``shiftwatch.handover``) before it is loaded; the
  samples that reach it meanwhile are parked here, one message per round in
  the journal's encoding, so that their MQTT messages can be acknowledged
  while it waits (a shard holding them unacknowledged was sent nothing more
  once it held the broker's limit of them, asks and all).  Whoever loads the
  stream next feeds them after its journal, writes them to the journal and
  purges them from here.  Another shard's samples that the journal refused
  (the stream was written since that shard last knew it) are parked here too,
  for an owner that still waits for that shard's answer.
- **Mapping record**: the key ``mapping`` in the bucket (``partition.Remap``):
  the mapping for ``shard.of`` partitions the shards run now, the one before,
  and when the latest shard took it up (``note_mapping``, at each shard's start
  and at a reload that changes its ``shard.of``).  Read with every load: a new
  owner asks the shard the mapping before gave a stream, for a while after a
  change, even when no journal message names it (a stream nobody wrote yet).

A stream is loaded when its first samples reach a daemon: snapshot, then the
journal messages after the snapshot's sequence, fed to a new engine.  That is
what lets a shard start on a box with an empty disk, and a stream move to
another shard, with its baseline, open event and samples since the snapshot.
The alert records a replay makes are published again (the same ``event_id``:
ids are made from the stream and the detection time), since the outbox that
held them was on the box that is gone.
"""

from __future__ import annotations

import asyncio
import base64
import functools
import hashlib
import json
import logging
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from shiftwatch.journal import JournalGroup, decode_groups, encode_group
from shiftwatch.natsio import ClusterError, NatsIO, SequenceConflict
from shiftwatch.partition import Remap
from shiftwatch.statestore import decode_state, encode_state

__all__ = ["ClusterState", "JournalRound", "Restored", "stream_key"]

_FORMAT = "shiftwatch-cluster-state"
SCHEMA_VERSION = 1
#: Requests in flight at once (loads, journal publishes, snapshot puts).
PARALLEL = 256
#: Headers of each journal message: the daemon that wrote it, when, and (a shard's)
#: its shard number, which names the partition topic where that daemon can be asked
#: to pass on what it still holds of a stream that moved (see Daemon, handover).
WRITER = "Shiftwatch-Writer"
WRITTEN = "Shiftwatch-Written"
SHARD = "Shiftwatch-Shard"
#: Journal messages older than this are dropped by the cluster even without a snapshot
#: (a safety net: snapshots purge them long before).
JOURNAL_MAX_AGE = 7 * 86400.0
#: The key of the mapping record (``partition.Remap``) in the state bucket; no stream's
#: key (``stream_key``: "s" and 40 hex digits) can be it.
MAPPING_KEY = "mapping"


@functools.lru_cache(maxsize=16384)
def stream_key(name: str) -> str:
    """The stream's key in the bucket and its journal subject's last token (kept for the
    streams seen last: each round names every stream's subject again).

    >>> k = stream_key("brackenfield/line2/filler/3/fill")
    >>> k[0], len(k)
    ('s', 41)
    >>> k[1:] == hashlib.sha256(b"brackenfield/line2/filler/3/fill").hexdigest()[:40]
    True
    """
    return "s" + hashlib.sha256(name.encode("utf-8", "surrogatepass")).hexdigest()[:40]


@dataclass
class Restored:
    """What the cluster holds of one stream."""

    state: dict[str, Any] | None = None
    topic_filter: str | None = None
    unit: str | None = None
    saved_at: float | None = None
    records: list[tuple[str, bytes, int]] = field(default_factory=list)
    groups: list[JournalGroup] = field(default_factory=list)
    #: Samples parked while the stream waited for its last writer, in the order parked,
    #: and the last parked message's sequence (0: none); see :meth:`ClusterState.unpark`.
    parked: list[JournalGroup] = field(default_factory=list)
    parked_last: int = 0
    problem: str | None = None
    #: Who wrote the stream's last journal message, when (wall clock, seconds), and the
    #: shard number it ran as (None: not a shard, or written before the header existed).
    written_by: str | None = None
    written_at: float | None = None
    written_shard: int | None = None


class ClusterState:
    """The journal and snapshots of every stream, in a NATS cluster."""

    def __init__(self, io: NatsIO, *, name: str, replicas: int, logger: logging.Logger,
                 writer: str = "", shard: int | None = None) -> None:
        self.io = io
        #: This daemon's id in the journal messages it writes (header Shiftwatch-Writer).
        self.writer = writer
        #: Its shard number (header Shiftwatch-Shard), None when it runs no shard.
        self.shard = shard
        self.name = name
        self.replicas = replicas
        self.log = logger
        self.stream = f"{name}_journal"
        self.bucket = f"{name}_state"
        self.parking = f"{name}_parked"
        #: Last journal sequence written or read per stream (the expected-last header).
        self.seq: dict[str, int] = {}
        #: Sequence each stream's last snapshot includes.
        self._saved: dict[str, int] = {}
        #: Revision of each stream's entry in the bucket, as read or written here (0: none).
        self._rev: dict[str, int] = {}
        #: Streams the last :meth:`save` refused: written by another daemon since.
        self.refused: list[str] = []
        #: Streams whose journal write was refused because the subject's last message is
        #: none of a daemon's (no writer header: put there by hand or by another program),
        #: with that message's sequence; the daemon takes them out when it says so.
        self.unsigned: dict[str, int] = {}
        #: Streams whose entry the last :meth:`save` found damaged (no stream state at all)
        #: and wrote anew from the engine.
        self.damaged: list[str] = []
        #: The mapping record (``partition.Remap``) as the last :meth:`load` read it (None:
        #: none yet, or unreadable): where a stream was before the last change.
        self.remap: Remap | None = None
        #: What was wrong with the mapping record the last :meth:`note_mapping` found (no
        #: such record: damaged, or put there by hand) and wrote anew; None: it was sound.
        self.mapping_damaged: str | None = None
        #: Per stream whose journal write was refused: the shard (Shiftwatch-Shard) and the
        #: wall-clock time (Shiftwatch-Written) of the message that ended its journal then
        #: (None where the header is missing); the daemon takes them out.
        self.refused_by: dict[str, tuple[int | None, float | None]] = {}

    def subject(self, name: str) -> str:
        return f"{self.name}.journal.{stream_key(name)}"

    def parked_subject(self, name: str) -> str:
        return f"{self.name}.parked.{stream_key(name)}"

    def setup(self) -> None:
        """Create the journal stream and the bucket where missing (ClusterError otherwise)."""
        async def go() -> None:
            await self.io.ensure_stream(self.stream, [f"{self.name}.journal.*"], self.replicas,
                                        JOURNAL_MAX_AGE)
            await self.io.ensure_bucket(self.bucket, self.replicas)
            await self.io.ensure_stream(self.parking, [f"{self.name}.parked.*"], self.replicas,
                                        JOURNAL_MAX_AGE)

        self.io.run(go(), timeout=self.io.timeout * 4)

    # ------------------------------------------------------------ loading
    def load(self, names: Iterable[str]) -> dict[str, Restored]:
        """What the cluster holds of each stream (an empty Restored for a new one)."""
        names = list(names)
        sem = asyncio.Semaphore(PARALLEL)

        parked: set[str] = set()

        async def one(name: str) -> tuple[str, Restored, int]:
            async with sem:
                return (name, *await self._load_one(name, self.parked_subject(name) in parked))

        async def go() -> list[tuple[str, Restored, int]]:
            # One request says which streams have parked samples (few, and only around a
            # change of the number of shards), instead of one request per stream; one more
            # reads the mapping record (where a stream was before the last change).
            subjects, entry = await asyncio.gather(self.io.subjects(self.parking, f"{self.name}.parked.*"),
                                                   self.io.kv_get(self.bucket, MAPPING_KEY))
            parked.update(subjects)
            self.remap = None if entry is None else Remap.decode(entry.value)
            return list(await asyncio.gather(*(one(n) for n in names)))

        out: dict[str, Restored] = {}
        for name, r, last in self.io.run(go(), timeout=self.io.timeout * (1 + len(names) // PARALLEL)):
            self.seq[name] = last
            out[name] = r
        return out

    async def _load_one(self, name: str, parked: bool = False) -> tuple[Restored, int]:
        r = Restored()
        subject = self.subject(name)
        key = stream_key(name)
        problems: list[str] = []
        entry = await self.io.kv_get(self.bucket, key)
        self._rev[name] = 0 if entry is None else entry.revision
        where = f"bucket {self.bucket} key {key}"
        after: int | None = 0
        if entry is not None:
            after, why = self._read_entry(r, name, entry.value, where)
            if why is not None:
                problems.append(why)
        last, headers = await self.io.last_seq(self.stream, subject)
        if after is None or after > last:
            # A position that cannot be (the journal's last message stays at every purge, so
            # a snapshot never includes more than the journal holds): damaged, or the journal
            # stream was made anew.  The state is kept and the journal fed from its start:
            # samples the state already holds are set aside as repeats, none is skipped.
            if after is not None:
                problems.append(f"saved state in {where} includes journal sequence {after}, past the "
                                f"end of {self.stream} ({last}); its journal is read from the start")
            after = 0
        r.written_by = headers.get(WRITER)
        r.written_shard, r.written_at = _written(headers)
        if last > after:
            for seq, body in await self.io.messages_after(self.stream, subject, after, last):
                try:
                    r.groups.extend(g for g in decode_groups(body) if g.stream == name)
                except (ValueError, TypeError) as exc:
                    problems.append(f"journal message {self.stream} sequence {seq} ({subject}) unusable "
                                    f"({exc}); its samples are set aside")
        if parked:
            psubject = self.parked_subject(name)
            r.parked_last, _ = await self.io.last_seq(self.parking, psubject)
            for seq, body in await self.io.messages_after(self.parking, psubject, 0, r.parked_last):
                try:
                    r.parked.extend(g for g in decode_groups(body) if g.stream == name)
                except (ValueError, TypeError) as exc:
                    problems.append(f"parked message {self.parking} sequence {seq} ({psubject}) unusable "
                                    f"({exc}); its samples are set aside")
        if problems:
            r.problem = "; ".join(problems)
        self._saved[name] = after
        return r, last

    def _read_entry(self, r: Restored, name: str, value: bytes, where: str) -> tuple[int | None, str | None]:
        """Fill ``r`` from a stream's entry in the bucket: the journal sequence the snapshot
        includes (None: unusable) and what was wrong with the entry (None: nothing).  A part
        of the entry that is damaged is set aside alone: the engine state (then the whole
        snapshot: the stream warms up again from its journal), the position, the filter and
        unit (the configuration's are used), each alert record that could not be published."""
        try:
            doc = json.loads(value)
            if not isinstance(doc, dict) or doc.get("format") != _FORMAT:
                raise ValueError("not a shiftwatch stream state")
            if doc.get("schema_version") != SCHEMA_VERSION:
                raise ValueError(f"schema version {doc.get('schema_version')!r}")
            if doc.get("stream") != name:
                raise ValueError("saved under another stream's name (hash collision)")
            state = decode_state(doc["state"])
            if not isinstance(state, dict):
                raise TypeError(f"engine state is a {type(state).__name__}, not an object")
        except (ValueError, KeyError, TypeError) as exc:
            return 0, f"saved state in {where} unusable ({exc}); the stream starts from its journal"
        wrong: list[str] = []
        seq = doc.get("seq")
        after: int | None = seq if type(seq) is int and seq >= 0 else None
        if after is None:
            wrong.append(f"journal position {_short(seq)} (its journal is read from the start)")
        r.state = state
        for part in ("filter", "unit"):
            v = doc.get(part)
            if v is not None and not isinstance(v, str):
                wrong.append(f"{part} {_short(v)} (the configuration's is used)")
            elif part == "filter":
                r.topic_filter = v
            else:
                r.unit = v
        saved_at = doc.get("saved_at", 0.0)
        r.saved_at = float(saved_at) if type(saved_at) in (int, float) else None
        records = doc.get("records", [])
        for rec in records if isinstance(records, list) else [records]:
            item = _record(rec)
            if item is None:
                wrong.append(f"alert record {_short(rec)} (not published again)")
            else:
                r.records.append(item)
        if not wrong:
            return after, None
        return after, f"saved state in {where} has an unusable " + ", ".join(wrong)

    def last_written(self, names: Iterable[str]) -> dict[str, tuple[int | None, float | None]]:
        """Per stream, the shard and wall-clock time its journal's last message was written
        by and at (None where a header is missing, or there is no message).  Raises
        ClusterError."""
        names = list(names)
        sem = asyncio.Semaphore(PARALLEL)

        async def one(name: str) -> tuple[str, tuple[int | None, float | None]]:
            async with sem:
                _last, headers = await self.io.last_seq(self.stream, self.subject(name))
                return name, _written(headers)

        async def go() -> dict[str, tuple[int | None, float | None]]:
            return dict(await asyncio.gather(*(one(n) for n in names)))

        return self.io.run(go(), timeout=self.io.timeout * (1 + len(names) // PARALLEL))

    def read_mapping(self) -> Remap | None:
        """The mapping record as it stands (None: none, or damaged), kept in :attr:`remap`.
        Raises ClusterError."""
        entry = self.io.run(self.io.kv_get(self.bucket, MAPPING_KEY))
        self.remap = None if entry is None else Remap.decode(entry.value)
        return self.remap

    def note_mapping(self, of: int, levels: tuple[int, ...], *, changed: bool) -> Remap | None:
        """This shard runs the mapping for ``of`` partitions over ``levels`` now (at its
        start, or at a reload that ``changed`` its own): the cluster's mapping record is
        brought up to date (``Remap.taken_up``), with the bucket's revision checked so that
        shards starting or reloading together keep the one before.  A record that is no
        such record is written anew and said in :attr:`mapping_damaged`.  Returns the record
        as it stands; raises ClusterError."""
        self.mapping_damaged = None

        async def go() -> Remap | None:
            for _attempt in range(5):
                entry = await self.io.kv_get(self.bucket, MAPPING_KEY)
                cur = None if entry is None else Remap.decode(entry.value)
                if entry is not None and cur is None:
                    self.mapping_damaged = (f"bucket {self.bucket} key {MAPPING_KEY} revision {entry.revision} "
                                            "is no mapping record (damaged, or put there by hand)")
                now = time.time()
                new = Remap(of, tuple(levels), None, None, now) if cur is None \
                    else cur.taken_up(of, tuple(levels), now, changed=changed)
                if new is None:
                    return cur
                if entry is None:
                    rev = await self.io.kv_create(self.bucket, MAPPING_KEY, new.encode())
                else:
                    rev = await self.io.kv_update(self.bucket, MAPPING_KEY, new.encode(), last=entry.revision)
                if rev is not None:
                    return new
            raise ClusterError(f"the mapping record {self.bucket} key {MAPPING_KEY} kept changing")

        self.remap = self.io.run(go(), timeout=self.io.timeout * 2)
        return self.remap

    # ------------------------------------------------------------ parking
    def park(self, groups: list[JournalGroup], stored: Callable[[int], None] | None = None) -> None:
        """Store each group as its stream's next parked message and wait for the cluster
        (ClusterError when it did not acknowledge them in time).  A group parked twice
        (a round taken again after a timeout) is stored once: its message id is the hash
        of the writer and the body, which JetStream's duplicate window checks.
        ``stored(n)`` is called with each group's sample count as the cluster stores it
        anew (not for a copy it took for a duplicate; also for groups stored before a
        failure), from the NATS thread: so a count of parked samples counts samples, not
        attempts."""
        sem = asyncio.Semaphore(PARALLEL)

        async def one(g: JournalGroup) -> None:
            async with sem:
                if await self._park_one(g) and stored is not None:
                    stored(len(g.values))

        async def go() -> None:
            await asyncio.gather(*(one(g) for g in groups))

        self.io.run(go(), timeout=self.io.timeout * (1 + len(groups) // PARALLEL))

    async def _park_one(self, g: JournalGroup) -> bool:
        """Park one group; whether the cluster stored it anew (not a duplicate)."""
        body = encode_group(g)
        digest = hashlib.sha256(self.writer.encode() + body).hexdigest()[:32]
        _seq, new = await self.io.publish_once(self.parked_subject(g.stream), body,
                                               headers={WRITER: self.writer, WRITTEN: f"{time.time():.3f}",
                                                        "Nats-Msg-Id": digest})
        return new

    def unpark(self, lasts: Mapping[str, int]) -> None:
        """Purge each stream's parked messages up to and including the sequence given
        (those a load read; later ones, parked meanwhile, stay).  Raises ClusterError."""
        async def go() -> None:
            await asyncio.gather(*(self.io.purge_subject(self.parking, self.parked_subject(n), keep=None,
                                                         upto=last) for n, last in lasts.items()))

        self.io.run(go(), timeout=self.io.timeout * (1 + len(lasts) // PARALLEL))

    # ------------------------------------------------------------ journal
    def journal(self, groups: list[JournalGroup]) -> list[JournalGroup]:
        """Store each group as its stream's next journal message and wait for the cluster.

        Returns the groups refused because their stream's subject moved on (written
        by another daemon); raises ClusterError when the cluster did not
        acknowledge the others in time.
        """
        rnd = self.journal_round()
        for g in groups:
            rnd.add(g)
        return rnd.wait()

    def journal_round(self) -> JournalRound:
        """A round's journal messages, sent while the round is still being fed
        (:meth:`JournalRound.add` as each stream's group is ready, then
        :meth:`JournalRound.wait`): the cluster stores the first streams' samples
        while the engines take the next ones, instead of after the whole round.  Clears
        :attr:`refused_by` (it speaks of the last round's refusals only)."""
        self.refused_by.clear()
        return JournalRound(self)


    # ---------------------------------------------------------- snapshots
    def save(self, entries: Mapping[str, tuple[dict[str, Any], str | None, str | None,
                                               list[tuple[str, bytes, int]]]]) -> int:
        """Save the states of the streams given (state, filter, unit, records not yet
        acknowledged), each with the journal sequence it includes, then purge their
        journal subjects up to that sequence.  A stream another daemon has written
        since (its journal ends past this daemon's sequence, or its entry in the bucket
        is not the revision this daemon knows) is not saved: it is listed in
        :attr:`refused`.  Returns how many were saved; raises ClusterError."""
        now = time.time()
        sem = asyncio.Semaphore(PARALLEL)
        refused: list[str] = []
        damaged: list[str] = []

        async def one(name: str, state: dict[str, Any], f: str | None, unit: str | None,
                      records: list[tuple[str, bytes, int]]) -> None:
            seq = self.seq.get(name, 0)
            async with sem:
                last, headers = await self.io.last_seq(self.stream, self.subject(name))
                if last != seq:
                    if not (last > seq and self.writer and headers.get(WRITER) == self.writer):
                        if last and WRITER not in headers:
                            self.unsigned[name] = last  # none of a daemon's: said as such
                        refused.append(name)
                        return
                    # This daemon's own message past its sequence: a round whose journal wait
                    # timed out, stored all the same and held to be written again.  Each of its
                    # writes expects this daemon's sequence, so nobody else's lies between,
                    # and the engine was fed that round: the snapshot includes it.  (The
                    # sequence stays: the held round finds its group stored by it.)
                    seq = last
                doc = {"format": _FORMAT, "schema_version": SCHEMA_VERSION, "stream": name, "filter": f,
                       "unit": unit, "seq": seq, "saved_at": now, "writer": self.writer,
                       "state": encode_state(dict(state)),
                       "records": [[t, base64.b64encode(p).decode("ascii"), q] for t, p, q in records]}
                body = json.dumps(doc, separators=(",", ":")).encode("utf-8")
                rev = self._rev.get(name, 0)
                if rev:
                    new = await self.io.kv_update(self.bucket, stream_key(name), body, last=rev)
                else:
                    new = await self.io.kv_create(self.bucket, stream_key(name), body)
                if new is None:
                    # The journal check above says nobody wrote the stream since.  An entry
                    # deleted meanwhile (by hand, or the bucket made anew) is made again from
                    # this engine; one this daemon saved itself, whose acknowledgement was
                    # lost (a timed-out save takes no revision), is not another's write.
                    entry = await self.io.kv_get(self.bucket, stream_key(name))
                    if entry is None:
                        new = await self.io.kv_create(self.bucket, stream_key(name), body)
                    elif self.writer and _saved_by(entry.value) == self.writer:
                        new = await self.io.kv_update(self.bucket, stream_key(name), body,
                                                      last=entry.revision)
                    elif not _is_state(entry.value):
                        # Damaged (put there by hand or by another program): nobody's stream
                        # state, and nobody wrote the stream since (the check above).  The
                        # engine here is good: written anew, not dropped as stale.
                        damaged.append(name)
                        new = await self.io.kv_update(self.bucket, stream_key(name), body,
                                                      last=entry.revision)
                if new is None:
                    refused.append(name)
                    return
                self._rev[name] = new
                if seq > self._saved.get(name, 0):
                    await self.io.purge_subject(self.stream, self.subject(name), keep=None, upto=seq - 1)
                self._saved[name] = seq

        async def go() -> None:
            await asyncio.gather(*(one(n, *e) for n, e in entries.items()))

        try:
            self.io.run(go(), timeout=self.io.timeout * (1 + len(entries) // PARALLEL))
        except ClusterError:
            raise
        except Exception as exc:  # noqa: BLE001  nats-py's own errors, as one line
            raise ClusterError(f"NATS cluster {self.io.where}: snapshot to bucket {self.bucket} "
                               f"failed ({type(exc).__name__}: {exc})") from None
        self.refused = sorted(refused)
        self.damaged = sorted(damaged)
        return len(entries) - len(refused)


def _record(rec: Any) -> tuple[str, bytes, int] | None:
    """A saved alert record as (topic, payload, qos), or None when it could not be published:
    paho refuses a topic that is empty, holds a wildcard or a NUL, and a QoS outside 0 to 2
    (MQTT 3.1.1 sections 4.7.1 and 3.3.1.2), and the daemon would stop on such a refusal."""
    if not isinstance(rec, list) or len(rec) != 3:
        return None
    topic, payload, qos = rec
    if (not isinstance(topic, str) or not topic or "+" in topic or "#" in topic or "\0" in topic
            or len(topic.encode("utf-8", "surrogatepass")) > 65535
            or not isinstance(payload, str) or type(qos) is not int or qos not in (0, 1, 2)):
        return None
    try:
        topic.encode("utf-8")
        return topic, base64.b64decode(payload, validate=True), qos
    except (ValueError, UnicodeError):
        return None


def _short(v: Any) -> str:
    """A damaged value for a log line: its repr, cut to 60 characters."""
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _is_state(value: bytes) -> bool:
    """Whether a bucket entry is a stream state at all (of whichever daemon)."""
    try:
        doc = json.loads(value)
    except ValueError:
        return False
    return isinstance(doc, dict) and doc.get("format") == _FORMAT


def _saved_by(value: bytes) -> str | None:
    """The writer id in a saved stream state (None: unreadable, or saved before it was kept)."""
    try:
        doc = json.loads(value)
    except ValueError:
        return None
    writer = doc.get("writer") if isinstance(doc, dict) else None
    return writer if isinstance(writer, str) else None


class JournalRound:
    """The journal messages of one round, published as their groups are added.

    Each stream's group is one message with the expected last sequence known when
    it is added (a stream has one group a round), exactly as :meth:`ClusterState.journal`
    sends them.  Groups go to the NATS thread in chunks of :data:`CHUNK`, each chunk one
    ``NatsIO.publish_batch`` (its messages sent together, one future for their
    acknowledgements), so the publishing overlaps the feeding of the rest of the round;
    :meth:`wait` sends the last chunk and waits for every acknowledgement.  Nothing is acknowledged to the
    broker before :meth:`wait` returns: the guarantee is the same.
    """

    #: Groups handed to the NATS thread at a time (each hand-over wakes its loop).
    CHUNK = 32

    def __init__(self, cs: ClusterState) -> None:
        self.cs = cs
        #: Chunks in flight at once: PARALLEL messages, as the round's other requests.
        self._sem = asyncio.Semaphore(max(1, PARALLEL // self.CHUNK))
        self._buf: list[tuple[JournalGroup, bytes, int]] = []
        self._futs: list[Any] = []
        self._n = 0
        self._error: BaseException | None = None

    def add(self, g: JournalGroup) -> None:
        self._buf.append((g, encode_group(g), self.cs.seq.get(g.stream, 0)))
        self._n += 1
        if len(self._buf) >= self.CHUNK:
            self._send()

    def _send(self) -> None:
        chunk, self._buf = self._buf, []
        if not chunk or self._error is not None:
            return
        cs, sem = self.cs, self._sem
        headers = {WRITER: cs.writer, WRITTEN: f"{time.time():.3f}"}
        if cs.shard is not None:
            headers[SHARD] = str(cs.shard)

        async def refused(g: JournalGroup, body: bytes, last: int) -> int | None:
            # Refused: the subject moved on.  When its last message is this very group,
            # written by this daemon, an earlier attempt of the round was stored and only
            # its acknowledgement was lost (the round timed out and is tried again): that
            # message is this group's (its sequence), nothing to reload.
            subject = cs.subject(g.stream)
            at, hdrs, stored = await cs.io.last_message(cs.stream, subject)
            if at > last and hdrs.get(WRITER) == cs.writer and stored == body:
                return at
            if at and WRITER not in hdrs:
                cs.unsigned[g.stream] = at
            cs.refused_by[g.stream] = _written(hdrs)
            return None

        async def go() -> list[tuple[JournalGroup, int | None]]:
            # One batch for the chunk (its messages leave together, one future for all of
            # their acknowledgements); at most PARALLEL messages of the round in flight.
            async with sem:
                got = await cs.io.publish_batch([(cs.subject(g.stream), body, last) for g, body, last in chunk],
                                                headers)
            out: list[tuple[JournalGroup, int | None]] = []
            for (g, body, last), seq in zip(chunk, got):
                if isinstance(seq, SequenceConflict):
                    out.append((g, await refused(g, body, last)))
                elif isinstance(seq, BaseException):
                    raise seq
                else:
                    out.append((g, seq))
            return out

        try:
            self._futs.append(cs.io.submit(go()))
        except Exception as exc:  # noqa: BLE001  the loop is gone: said by wait()
            self._error = exc

    def wait(self) -> list[JournalGroup]:
        """Send what is left, wait for the cluster; the groups refused (their stream's
        subject moved on).  Raises ClusterError when the cluster did not acknowledge
        the others in time (no sequence is taken from such a round)."""
        self._send()
        if self._error is not None:
            raise ClusterError(f"NATS cluster {self.cs.io.where}: {self._error}")
        deadline = time.monotonic() + self.cs.io.timeout * (1 + self._n // PARALLEL)
        results: list[tuple[JournalGroup, int | None]] = []
        try:
            for f in self._futs:
                # (at least a moment: a timeout of 0 would mean the client's whole timeout)
                results += self.cs.io.result(f, max(0.05, deadline - time.monotonic()))
        except ClusterError:
            for f in self._futs:
                f.cancel()
            raise
        refused = []
        for g, seq in results:
            if seq is None:
                refused.append(g)
            else:
                self.cs.seq[g.stream] = seq
        return refused


def _written(headers: Mapping[str, str]) -> tuple[int | None, float | None]:
    """The shard number and the wall-clock time a journal message's headers give (None
    for one missing or unreadable)."""
    shard = headers.get(SHARD, "")
    try:
        at: float | None = float(headers.get(WRITTEN, "nan"))
    except ValueError:
        at = None
    return (int(shard) if shard.isascii() and shard.isdigit() else None), at
