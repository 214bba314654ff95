"""The cluster journal of a round is published while the round is being fed.

``ClusterState.journal_round()`` takes each stream's group as its engine is fed
and hands the groups to the NATS thread in chunks, so the cluster stores the
first streams' samples while the engines take the next ones (in the shard
benchmark the wait for the journal at the end of a round of arrays was a third
of the round; it is about half that now).  The guarantee does not change: the
daemon acknowledges the round's messages only after ``wait()`` returned, every
message stored, and a stream written meanwhile by another daemon is refused by
its expected last sequence, as with ``journal()``.

Against a real nats-server with JetStream (one server, one replica: the
cluster's replication is not what is tested here).
"""

from __future__ import annotations

import asyncio
import logging
import re
import signal
import subprocess
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.broker import wait_until
from shiftwatch.clusterstate import ClusterState, JournalRound
from shiftwatch.journal import JournalGroup
from shiftwatch.natsio import ClusterError, NatsIO, SequenceConflict

from .natskit import connects, freeze, start_lone_server


@pytest.fixture
def served(tmp_path: Path):  # type: ignore[no-untyped-def]
    """A ClusterState on a lone nats-server, and that server's process."""
    server, port = start_lone_server(tmp_path, "journal")
    io = None
    try:
        io = NatsIO([f"nats://127.0.0.1:{port}"], name="journal-test", timeout=5.0)
        io.start()
        assert wait_until(lambda: connects(io), 30)
        cs = ClusterState(io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w1")
        cs.setup()
        yield cs, server
    finally:
        if io is not None:
            io.close()
        server.send_signal(signal.SIGCONT)  # (a test may have left it stopped)
        server.terminate()
        server.wait(10)


@pytest.fixture
def cluster(served: tuple[ClusterState, subprocess.Popen[bytes]]) -> ClusterState:
    return served[0]


def _group(i: int, n: int = 5, t0: float = 0.0) -> JournalGroup:
    t = np.arange(n, dtype=float) + t0
    return JournalGroup(f"plant/{i}/v", None, t, t * 2.0, t, "plant/+/v")


def _stored(cs: ClusterState) -> int:
    async def go() -> int:
        info = await cs.io._js.stream_info(cs.stream)
        return int(info.state.messages)
    return cs.io.run(go())


def _both_rounds_read_back(cs: ClusterState, names: list[str]) -> None:
    """Every stream's journal holds its first group and the one at t0 = 10, each once (read
    by another daemon), and this daemon's sequences are the reader's."""
    assert _stored(cs) == 2 * len(names)
    reader = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3")
    loaded = reader.load(names)
    for i, name in enumerate(names):
        assert [g.times.tolist() for g in loaded[name].groups] == [_group(i).times.tolist(),
                                                                   _group(i, t0=10.0).times.tolist()]
        assert cs.seq[name] == reader.seq[name]


def test_a_rounds_journal_messages_are_stored_before_the_round_is_done(cluster: ClusterState) -> None:
    cs = cluster
    rnd = cs.journal_round()
    n = 3 * JournalRound.CHUNK + 5
    for i in range(JournalRound.CHUNK + 1):
        rnd.add(_group(i))
    # The first chunk left while the round is still being fed.
    assert wait_until(lambda: _stored(cs) >= JournalRound.CHUNK, 10)
    for i in range(JournalRound.CHUNK + 1, n):
        rnd.add(_group(i))
    assert rnd.wait() == []
    assert _stored(cs) == n
    assert len({cs.seq[f"plant/{i}/v"] for i in range(n)}) == n
    # Read back: the same samples, each stream's on its own subject.
    loaded = cs.load([f"plant/{i}/v" for i in (0, n - 1)])
    for i in (0, n - 1):
        (g,) = loaded[f"plant/{i}/v"].groups
        assert g.values.tolist() == _group(i).values.tolist()


def test_a_round_the_cluster_does_not_acknowledge_times_out_and_is_taken_once_when_written_again(
        served: tuple[ClusterState, subprocess.Popen[bytes]]) -> None:
    """The round's journal messages carry no deadline of their own (nats-py's
    ``publish_async``): the round's :meth:`JournalRound.wait` bounds them all.  With the
    server stopped (SIGSTOP) the wait must end in ClusterError by that bound and take
    no sequence; the messages the server stores once it runs again are then found as
    this daemon's own when the held round is written again, each group stored once."""
    cs, server = served
    names = [f"plant/{i}/v" for i in range(3)]
    assert cs.journal([_group(i) for i in range(3)]) == []
    before = dict(cs.seq)
    cs.io.timeout = 1.0
    freeze(server)
    try:
        rnd = cs.journal_round()
        for i in range(3):
            rnd.add(_group(i, t0=10.0))
        # wait() gives up by its own bound (the client's timeout for a round of fewer than
        # PARALLEL messages, plus the second NatsIO.result allows) and says so.
        with pytest.raises(ClusterError, match="no answer within"):
            rnd.wait()
        assert cs.seq == before  # no sequence from a round that timed out
    finally:
        server.send_signal(signal.SIGCONT)
    cs.io.timeout = 5.0
    # The stopped server stores what was sent to it once it runs; the round, held, is
    # written again with the same expected sequences and finds its own messages.
    assert cs.journal([_group(i, t0=10.0) for i in range(3)]) == []
    assert _stored(cs) == 6
    for i, name in enumerate(names):
        assert cs.seq[name] > before[name]
        groups = cs.load([name])[name].groups
        assert [g.times[0] for g in groups] == [0.0, 10.0]


def test_a_batch_publish_is_refused_as_a_single_one_is(cluster: ClusterState) -> None:
    """``NatsIO.publish_in_batch`` (the journal round's publish, one reply subscription
    for all) reads JetStream's answers as ``publish`` does: the stream sequence, a
    wrong expected last sequence as SequenceConflict (JetStream error 10071, from
    memory, as above), another refusal and a subject no stream takes as ClusterError,
    each at once, not after a timeout, and naming the subject."""
    io = cluster.io
    subject = cluster.subject("plant/batch/v")

    async def both(expect: int | None) -> list[object]:
        out: list[object] = []
        for fn in (io.publish, io.publish_in_batch):
            try:
                out.append(await asyncio.wait_for(fn(subject, b"x", expect_last=expect), 5))
            except Exception as exc:  # noqa: BLE001  compared below
                out.append(exc)
        return out

    first, second = io.run(both(0))
    assert isinstance(first, int) and isinstance(second, SequenceConflict)  # one per empty subject
    assert subject in str(second)
    a, b = io.run(both(None))
    assert isinstance(a, int) and b == a + 1
    for stale in io.run(both(1)):
        assert isinstance(stale, SequenceConflict) and subject in str(stale)

    async def refused(subj: str, payload: bytes) -> list[BaseException]:
        out: list[BaseException] = []
        for fn in (io.publish, io.publish_in_batch):
            with pytest.raises(ClusterError) as info:
                await asyncio.wait_for(fn(subj, payload), 5)
            out.append(info.value)
        return out

    # No stream takes the subject (NATS answers "no responders").
    for exc in io.run(refused("nowhere.at.all", b"x")):
        assert not isinstance(exc, SequenceConflict) and "nowhere.at.all" in str(exc)

    async def small_stream() -> None:
        from nats.js.api import StreamConfig
        await io._js.add_stream(StreamConfig(name="tiny", subjects=["tiny.>"], max_msg_size=8))

    io.run(small_stream())
    # A message over the stream's max_msg_size: refused by JetStream with an error of its own.
    for exc in io.run(refused("tiny.a", b"x" * 64)):
        assert not isinstance(exc, SequenceConflict) and "refused" in str(exc) and "tiny.a" in str(exc)


def test_a_stream_written_by_another_daemon_meanwhile_is_refused(cluster: ClusterState) -> None:
    cs = cluster
    assert cs.journal([_group(1), _group(2)]) == []
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    other.load(["plant/2/v"])
    assert other.journal([_group(2, t0=10.0)]) == []  # the stream moved: the other daemon wrote it
    rnd = cs.journal_round()
    rnd.add(_group(1, t0=10.0))
    rnd.add(_group(2, t0=10.0))
    refused = rnd.wait()
    assert [g.stream for g in refused] == ["plant/2/v"]
    assert cs.seq["plant/2/v"] < other.seq["plant/2/v"]


def test_a_group_stored_whose_acknowledgement_was_lost_is_not_taken_for_another_daemons(
        cluster: ClusterState) -> None:
    """A round whose journal wait timed out is held and written again with the same
    expected last sequence (the wait takes no sequence from a round that timed out).
    A group the cluster had stored all the same is then refused: JetStream checks the
    ``Nats-Expected-Last-Subject-Sequence`` header against the subject's last message
    (NATS JetStream documentation, "Headers"; its error 10071, "wrong last sequence",
    from memory).  That refusal must not read as another daemon's write."""
    cs = cluster
    name = "plant/1/v"
    assert cs.journal([_group(1)]) == []
    before = cs.seq[name]
    g = _group(1, t0=10.0)
    assert cs.journal([g]) == []
    stored = cs.seq[name]
    cs.seq[name] = before  # what a timed-out wait leaves: the acknowledgement never came
    assert cs.journal([g]) == []  # the held round, written again
    assert cs.seq[name] == stored
    assert _stored(cs) == 2  # the group is in the journal once
    (again,) = cs.load([name])[name].groups[1:]
    assert again.values.tolist() == g.values.tolist()
    # A different message after the expected sequence is still a refusal: another group of
    # this daemon's (not the one being written again) ...
    cs.seq[name] = before
    assert [x.stream for x in cs.journal([_group(1, t0=20.0)])] == [name]
    # ... and the same samples written by another daemon.
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    other.load([name])
    g2 = _group(1, t0=30.0)
    assert other.journal([g2]) == []
    cs.seq[name] = stored
    assert [x.stream for x in cs.journal([g2])] == [name]


def test_a_snapshot_of_a_stream_another_daemon_wrote_since_is_refused_and_purges_nothing(
        cluster: ClusterState) -> None:
    """A daemon whose engine of a stream is stale (another daemon has written the stream's
    journal since: it moved, and this one has not let it go yet) must not save it.  Its
    snapshot used to overwrite the other's and purge the journal down to its last message,
    so a later load had the stale state and lost the other's samples but the last.
    The fence is the same as the journal's: the stream's journal must still end where
    this daemon left it, and the bucket's entry must still be the revision it read or
    wrote (a key-value update with the expected last revision, NATS JetStream's
    ``Nats-Expected-Last-Subject-Sequence`` on the bucket's stream)."""
    cs = cluster
    name = "plant/7/v"
    assert cs.journal([_group(7, t0=0.0)]) == []
    assert cs.save({name: ({"n": 5}, "plant/+/v", None, [])}) == 1
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    other.load([name])
    assert other.journal([_group(7, t0=5.0)]) == []
    assert other.journal([_group(7, t0=10.0)]) == []
    # The stale daemon's snapshot: refused, nothing saved, nothing purged.
    assert cs.save({name: ({"n": 99}, "plant/+/v", None, [])}) == 0
    assert cs.refused == [name]
    reader = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3")
    r = reader.load([name])[name]
    assert r.state == {"n": 5}
    assert [t for g in r.groups for t in g.times.tolist()] == [float(t) for t in range(5, 15)]
    # The other daemon's own snapshot goes through, and a later stale one is refused too.
    assert other.save({name: ({"n": 15}, "plant/+/v", None, [])}) == 1
    assert cs.save({name: ({"n": 99}, "plant/+/v", None, [])}) == 0
    assert reader.load([name])[name].state == {"n": 15}


def test_a_snapshot_purges_only_up_to_what_it_includes(cluster: ClusterState) -> None:
    """The purge after a snapshot keeps the journal messages after the snapshot's sequence,
    whoever wrote them: purging down to the last message would delete another daemon's."""
    cs = cluster
    name = "plant/8/v"
    for t0 in (0.0, 5.0, 10.0):
        assert cs.journal([_group(8, t0=t0)]) == []
    assert cs.save({name: ({"n": 15}, "plant/+/v", None, [])}) == 1
    r = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3").load([name])[name]
    assert r.state == {"n": 15} and r.groups == []
    assert _stored(cs) >= 1  # the last message stays: it carries the subject's last sequence


def test_a_snapshot_of_the_journal_s_first_message_keeps_that_message(cluster: ClusterState) -> None:
    """The purge after a snapshot keeps the message the snapshot includes (it carries the
    subject's last sequence for the expected-last header).  A snapshot of the journal's
    very first message (stream sequence 1) purged with ``seq`` 1, which nats-server
    (2.9.10, as installed here) takes as no bound at all: the subject was emptied, its
    last sequence read 0, and the daemon's next journal write of the stream was refused
    as another daemon's.  Purging below sequence 1 purges nothing: no request is made."""
    cs = cluster
    name = "plant/6/v"
    assert cs.journal([_group(6, t0=0.0)]) == []
    assert cs.seq[name] == 1  # a fresh cluster: the journal stream's first message
    assert cs.save({name: ({"n": 5}, "plant/+/v", None, [])}) == 1
    assert _stored(cs) == 1
    assert cs.journal([_group(6, t0=5.0)]) == []  # not refused
    assert cs.seq[name] == 2


def test_a_snapshot_whose_acknowledgement_was_lost_does_not_fence_out_its_own_writer(
        cluster: ClusterState) -> None:
    """A save that timed out takes no revision from its key-value update (the wait was
    cancelled), though the cluster may have stored it.  The next save of that stream then
    expected the revision before it, was refused as if another daemon had written the
    stream, and the daemon dropped its engine (after a snapshot of many streams timed
    out, every one of them): the legitimate owner fenced out by its own write.  Now a
    refused update reads the entry, and one this daemon wrote (the writer id in the
    saved document) is taken as that write; another daemon's still refuses."""
    cs = cluster
    name = "plant/9/v"
    assert cs.journal([_group(9, t0=0.0)]) == []
    assert cs.save({name: ({"n": 5}, "plant/+/v", None, [])}) == 1
    before = cs._rev[name]
    assert cs.journal([_group(9, t0=5.0)]) == []
    assert cs.save({name: ({"n": 10}, "plant/+/v", None, [])}) == 1
    cs._rev[name] = before  # what a timed-out save leaves: its acknowledgement never came
    assert cs.journal([_group(9, t0=10.0)]) == []
    assert cs.save({name: ({"n": 15}, "plant/+/v", None, [])}) == 1
    assert cs.refused == []
    reader = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3")
    assert reader.load([name])[name].state == {"n": 15}
    # Another daemon's save since is still a refusal, whatever revision this one expects.
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    other.load([name])
    assert other.save({name: ({"n": 15, "by": 2}, "plant/+/v", None, [])}) == 1
    cs._rev[name] = before
    assert cs.save({name: ({"n": 99}, "plant/+/v", None, [])}) == 0
    assert cs.refused == [name]
    assert reader.load([name])[name].state == {"n": 15, "by": 2}


def test_a_snapshot_taken_while_the_daemon_s_own_round_waits_to_be_written_again_is_saved(
        cluster: ClusterState) -> None:
    """A round whose journal wait timed out is held (its engines fed, its messages stored
    or not) until it is written again; a snapshot due meanwhile found the journal past
    the daemon's sequence and was refused as if another daemon had written the stream,
    and the owner dropped its engine.  When the messages past that sequence are this
    daemon's own (each was written expecting the one before, so only its own can follow
    its own), the engine has been fed them: the snapshot includes them, and the held
    round written again still finds its group stored."""
    cs = cluster
    name = "plant/5/v"
    assert cs.journal([_group(5, t0=0.0)]) == []
    before = cs.seq[name]
    g = _group(5, t0=5.0)
    assert cs.journal([g]) == []
    stored = cs.seq[name]
    cs.seq[name] = before  # what a timed-out wait leaves: the acknowledgement never came
    assert cs.save({name: ({"n": 10}, "plant/+/v", None, [])}) == 1
    assert cs.refused == []
    reader = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3")
    r = reader.load([name])[name]
    assert r.state == {"n": 10} and r.groups == []  # the snapshot includes the stored group
    assert cs.journal([g]) == []  # the held round, written again: its group is found stored
    assert cs.seq[name] == stored
    # Another daemon's message past this daemon's sequence is still a refusal.
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    other.load([name])
    assert other.journal([_group(5, t0=10.0)]) == []
    assert cs.save({name: ({"n": 99}, "plant/+/v", None, [])}) == 0
    assert cs.refused == [name]


def test_a_snapshot_whose_entry_was_deleted_meanwhile_is_saved_again(cluster: ClusterState) -> None:
    """The stream's entry in the bucket deleted while its owner runs (by hand, or the
    bucket made anew): the owner's update expecting its revision was refused, and the
    owner dropped its engine and loaded the stream from the journal, which its earlier
    snapshots had purged down to their last message, so the stream warmed up again on
    a few samples.  With the journal still ending where the owner left it nobody else
    wrote the stream: the owner's state is saved anew (a key-value create, which NATS
    allows over a deleted key)."""
    cs = cluster
    name = "plant/4/v"
    assert cs.journal([_group(4, t0=0.0)]) == []
    assert cs.journal([_group(4, t0=5.0)]) == []
    assert cs.save({name: ({"n": 10}, "plant/+/v", None, [])}) == 1
    from shiftwatch.clusterstate import stream_key
    cs.io.run(cs.io.kv_delete(cs.bucket, stream_key(name)))
    assert cs.journal([_group(4, t0=10.0)]) == []
    assert cs.save({name: ({"n": 15}, "plant/+/v", None, [])}) == 1
    assert cs.refused == []
    reader = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w3")
    assert reader.load([name])[name].state == {"n": 15}


def _read_back(cs: ClusterState, subject: str) -> list[tuple[bytes, dict[str, str]]]:
    """Every message on ``subject`` in the journal stream: body and headers, in order."""
    async def go() -> list[tuple[bytes, dict[str, str]]]:
        last, _ = await cs.io.last_seq(cs.stream, subject)
        out = []
        seq = 1
        while seq <= last:
            msg = await cs.io._js.get_msg(cs.stream, seq=seq, subject=subject, next=True)
            out.append((bytes(msg.data or b""), dict(msg.headers or {})))
            seq = int(msg.seq) + 1
        return out
    return cs.io.run(go())


def test_a_batch_publish_answers_each_message_in_its_place_as_a_single_publish_would(
        cluster: ClusterState) -> None:
    """``NatsIO.publish_batch`` (a journal round's chunk: one coroutine, one future for
    all the acknowledgements, since 2026-12-05) against nats-py's own JetStream
    ``publish`` (the reference, a request a message): in one batch, a message stored, a
    wrong expected last sequence (JetStream error 10071, from memory), a subject no
    stream takes (NATS's "no responders") and a message over a stream's
    ``max_msg_size`` each get, in their own place, what ``publish`` gives the same
    message, and the stored ones are stored byte for byte with the same headers."""
    io = cluster.io

    async def tiny() -> None:
        from nats.js.api import StreamConfig
        await io._js.add_stream(StreamConfig(name="tinyb", subjects=["tinyb.>"], max_msg_size=8))

    io.run(tiny())
    a, b = cluster.subject("plant/ba/v"), cluster.subject("plant/bb/v")
    headers = {"Shiftwatch-Writer": "w1", "Shiftwatch-Written": "1790000000.000"}
    items: list[tuple[str, bytes, int | None]] = [
        (a, b"first", 0), (b, b"stale", 7), ("nowhere.at.all", b"x", None),
        ("tinyb.a", b"y" * 64, None), (a, b"second", None)]
    got = io.run(io.publish_batch(items, headers))
    assert len(got) == len(items)
    assert isinstance(got[0], int) and isinstance(got[4], int) and got[4] == got[0] + 1
    assert isinstance(got[1], SequenceConflict) and b in str(got[1])
    assert isinstance(got[2], ClusterError) and not isinstance(got[2], SequenceConflict)
    assert "nowhere.at.all" in str(got[2]) and "no stream takes" in str(got[2])
    assert isinstance(got[3], ClusterError) and "refused" in str(got[3]) and "tinyb.a" in str(got[3])

    # The reference: the same messages through nats-py's publish, one request each.
    a2, b2 = cluster.subject("plant/ra/v"), cluster.subject("plant/rb/v")
    ref: list[object] = []
    for subject, payload, last in [(a2, b"first", 0), (b2, b"stale", 7), ("nowhere.at.all", b"x", None),
                                   ("tinyb.a", b"y" * 64, None), (a2, b"second", None)]:
        try:
            ref.append(io.run(io.publish(subject, payload, expect_last=last, headers=headers)))
        except ClusterError as exc:
            ref.append(exc)
    assert [type(x) for x in ref] == [type(x) for x in got]
    # Stored alike: bodies and headers (the expected-sequence header included, kept as
    # sent) byte for byte.
    assert _read_back(cluster, a) == _read_back(cluster, a2)
    assert [body for body, _ in _read_back(cluster, a)] == [b"first", b"second"]
    assert io.run(io.publish_batch([], headers)) == []


def test_a_round_refused_in_the_middle_of_its_chunks_takes_every_other_stream_s_sequence(
        cluster: ClusterState) -> None:
    """Streams another daemon wrote meanwhile, in the middle of the round's chunks (one in
    the first chunk, one in the second): exactly those are refused, every other stream's
    message is stored once and its sequence taken, as the per-message publish did."""
    cs = cluster
    n = 2 * JournalRound.CHUNK + 3
    names = [f"plant/{i}/v" for i in range(n)]
    assert cs.journal([_group(i) for i in range(n)]) == []
    other = ClusterState(cs.io, name="jt", replicas=1, logger=logging.getLogger("test"), writer="w2")
    moved = [17, JournalRound.CHUNK + 5]
    other.load([names[i] for i in moved])
    assert other.journal([_group(i, t0=10.0) for i in moved]) == []
    before = dict(cs.seq)
    rnd = cs.journal_round()
    for i in range(n):
        rnd.add(_group(i, t0=10.0))
    refused = rnd.wait()
    assert [g.stream for g in refused] == [names[i] for i in moved]
    for i, name in enumerate(names):
        if i in moved:
            assert cs.seq[name] == before[name]  # untouched: the daemon reloads those
        else:
            assert cs.seq[name] > before[name]
            assert [g.times[0] for g in cs.load([name])[name].groups] == [0.0, 10.0]
    assert cs.refused_by[names[17]][0] is None  # no shard header: not a shard's write
    assert _stored(cs) == 2 * n


def test_a_round_whose_cluster_stops_half_way_is_taken_once_when_written_again(
        served: tuple[ClusterState, subprocess.Popen[bytes]]) -> None:
    """The cluster stops (SIGSTOP) after the round's first chunk was stored and before the
    rest is: ``wait()`` ends in ClusterError by its bound and takes no sequence, not even
    the first chunk's (the round is held whole: its messages stay unacknowledged with
    the broker).  Written again once the cluster runs, every group of the round is in the
    journal exactly once, the first chunk's found as this daemon's own."""
    cs, server = served
    n = 2 * JournalRound.CHUNK + 7
    names = [f"plant/{i}/v" for i in range(n)]
    assert cs.journal([_group(i) for i in range(n)]) == []
    before = dict(cs.seq)
    cs.io.timeout = 1.0
    rnd = cs.journal_round()
    try:
        for i in range(JournalRound.CHUNK):
            rnd.add(_group(i, t0=10.0))  # the first chunk leaves here
        assert wait_until(lambda: _stored(cs) >= n + JournalRound.CHUNK, 10)
        freeze(server)
        for i in range(JournalRound.CHUNK, n):
            rnd.add(_group(i, t0=10.0))
        with pytest.raises(ClusterError, match="no answer within"):
            rnd.wait()
        assert cs.seq == before
    finally:
        server.send_signal(signal.SIGCONT)
    cs.io.timeout = 5.0
    assert cs.journal([_group(i, t0=10.0) for i in range(n)]) == []
    _both_rounds_read_back(cs, names)


def test_a_batch_sent_in_one_write_stores_what_publish_stores(cluster: ClusterState) -> None:
    """``publish_batch`` hands a batch to nats-py's buffer as one write of HPUB frames made
    by ``natsio._hpub`` (since 2026-12-05; before, nats-py's ``publish`` per message).  The
    reference is nats-py's own ``publish`` (the NATS protocol's encoding as the client
    library writes it): for the same messages, reply subjects and headers it writes the
    very bytes of that one write, and the server stores the same bodies and headers.  A
    batch whose headers ``publish`` would rewrite (a value with a line break: nats-py
    turns it into a space) goes out through ``publish`` itself, one write a message."""
    from shiftwatch.journal import encode_group
    from shiftwatch.natsio import _publish_headers

    io = cluster.io
    nc = io._nc
    real = nc._send_command
    sent: list[bytes] = []

    async def spy(cmd: bytes, priority: bool = False) -> None:
        sent.append(bytes(cmd))
        await real(cmd, priority)

    headers = {"Shiftwatch-Writer": "w1", "Shiftwatch-Written": "1790000000.125", "Shiftwatch-Shard": "2"}
    a, b = cluster.subject("plant/wa/v"), cluster.subject("plant/wb/\u00e9t\u00e9")
    t = 1.79e9 + np.arange(260.0)
    body_a = encode_group(JournalGroup("plant/wa/v", None, t, np.sin(t), t, "plant/+/v"))
    body_b = encode_group(JournalGroup("plant/wb/\u00e9t\u00e9", "°C", t[:3], t[:3] * 0.5, t[:3], None))
    items: list[tuple[str, bytes, int | None]] = [(a, body_a, 0), (b, body_b, 0), (a, b"second", None)]
    nc._send_command = spy
    try:
        got = io.run(io.publish_batch(items, headers))
    finally:
        nc._send_command = real
    assert all(isinstance(x, int) for x in got)
    (blob,) = [cmd for cmd in sent if not cmd.startswith(b"SUB ")]  # one write for the batch (and the
    # reply subscription's SUB, made at the first batch)
    replies = re.findall(rb"HPUB \S+ (\S+) ", blob)
    assert len(replies) == 3

    # nats-py's publish of the same messages to the same reply subjects, captured, not sent.
    ref: list[bytes] = []

    async def capture(cmd: bytes, priority: bool = False) -> None:
        ref.append(bytes(cmd))

    async def reference() -> None:
        for (subject, payload, last), reply in zip(items, replies):
            await nc.publish(subject, payload, reply=reply.decode(), headers=_publish_headers(headers, last))

    nc._send_command = capture
    try:
        io.run(reference())
    finally:
        nc._send_command = real
    assert b"".join(ref) == blob

    # Stored alike: the same messages through publish (a request each) on other subjects.
    a2, b2 = cluster.subject("plant/ra2/v"), cluster.subject("plant/rb2/v")
    for subject, payload, last in [(a2, body_a, 0), (b2, body_b, 0), (a2, b"second", None)]:
        io.run(io.publish(subject, payload, expect_last=last, headers=headers))
    assert _read_back(cluster, a) == _read_back(cluster, a2)
    assert _read_back(cluster, b) == _read_back(cluster, b2)
    assert [body for body, _ in _read_back(cluster, a)] == [body_a, b"second"]

    # Headers publish would rewrite: through publish, one write a message, stored as it stores them.
    odd = {"Shiftwatch-Writer": "w1\nx", "Shiftwatch-Written": "1790000000.125"}
    c, c2 = cluster.subject("plant/wc/v"), cluster.subject("plant/rc/v")
    sent.clear()
    nc._send_command = spy
    try:
        (seq,) = io.run(io.publish_batch([(c, b"odd", 0)], odd))
    finally:
        nc._send_command = real
    assert isinstance(seq, int) and [cmd for cmd in sent if not cmd.startswith(b"SUB ")] == sent
    assert len(sent) == 1 and b"w1 x" in sent[0]
    io.run(io.publish(c2, b"odd", expect_last=0, headers=odd))
    assert _read_back(cluster, c) == _read_back(cluster, c2)


def test_a_round_in_flight_when_its_server_dies_ends_at_once_and_is_taken_once_when_written_again(
        served: tuple[ClusterState, subprocess.Popen[bytes]], tmp_path: Path) -> None:
    """The server holding a round's journal messages dies (SIGKILL; stopped first, so that
    they are surely sent and not yet acknowledged).  No acknowledgement can come on the
    next connection, so ``wait()`` must end in a ClusterError saying the connection was
    lost, not wait out its bound (the client's timeout, 30 s here, more for a large
    round) with the shard's round held.  Written again once the server is back (the same
    store, the same port), every group of the round is in the journal exactly once.
    Reference for the kernel's part: a process killed by SIGKILL has its sockets closed
    by the kernel (POSIX ``_exit`` semantics, "all of the file descriptors ... shall be
    closed"), which the client reads as the end of its connection."""
    cs, server = served
    n = JournalRound.CHUNK + 3
    names = [f"plant/{i}/v" for i in range(n)]
    assert cs.journal([_group(i) for i in range(n)]) == []
    before = dict(cs.seq)
    cs.io.timeout = 30.0
    freeze(server)
    rnd = cs.journal_round()
    for i in range(n):
        rnd.add(_group(i, t0=10.0))
    server.kill()
    server.wait(10)
    with pytest.raises(ClusterError, match="connection was lost before the publish"):
        rnd.wait()
    assert cs.seq == before
    # The server again, on its port and store (the configuration start_lone_server wrote).
    from .natskit import find_nats_server

    exe = find_nats_server()
    assert exe is not None
    with open(tmp_path / "nats-again.log", "wb") as log:
        again = subprocess.Popen([exe, "-c", str(tmp_path / "nats.conf")], stdout=log,
                                 stderr=subprocess.STDOUT)
    try:
        cs.io.timeout = 5.0
        assert wait_until(lambda: cs.io.connected, 30)

        def written() -> bool:
            try:
                return cs.journal([_group(i, t0=10.0) for i in range(n)]) == []
            except ClusterError:
                return False  # JetStream not up yet: the round is held and tried again

        assert wait_until(written, 30, every=0.5)
        _both_rounds_read_back(cs, names)
    finally:
        cs.io.close()  # while its server runs (the fixture's close then has nothing to do)
        again.terminate()
        again.wait(10)
