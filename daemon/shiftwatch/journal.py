"""A journal of the samples processed since the last snapshot, replayed after a crash.

The daemon acknowledges each round of messages as soon as it has processed
them (the broker sends only a few unacknowledged messages at a time, so the
acknowledgements cannot wait for the next snapshot).  Without more, a crash
would lose from the engines' state every sample acknowledged since the last
snapshot.  So before the acknowledgements go out, the round's samples, as
each engine was fed them, are appended to this journal; a snapshot starts a
new one.  At start the daemon loads the snapshot and feeds the journal's
rounds to the engines again, which brings them to where they were when the
process died.

The journal belongs to one snapshot: its header holds a token that the
snapshot's metadata repeats.  A journal whose token does not match the
snapshot on disk (the process died between writing a snapshot and starting
its journal) is discarded, so no round is applied twice.

Writes are plain ``write`` calls, which survive the death of the process
(SIGKILL, a crash, the OOM killer); the file is fsynced at most once per
``sync_every`` seconds, which bounds what a power cut can take.

File layout (``journal.bin``): a sequence of records, each
``b"SWJ1" + uint32 length + uint32 crc32 + body`` (little-endian).  The first
body is JSON ``{"format": "shiftwatch-journal", "version": 1, "token": "..."}``.
Every later body is one round: a JSON line ``[[stream, unit, n, filter], ...]``
(``filter`` is the ``topic`` of the config entry the stream's engine was made
for; journals written before it was added have three items, read as no
filter), then for each stream its ``n`` times, values and arrival times as
float64.  A torn
or damaged record ends the journal; what follows it is never read.
"""

from __future__ import annotations

import functools
import json
import logging
import os
import struct
import threading
import time
import zlib
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any, BinaryIO, NamedTuple

import numpy as np
from numpy.typing import NDArray

from shiftwatch.fsutil import fsync_dir

__all__ = ["JOURNAL_NAME", "MAX_BYTES", "Journal", "JournalGroup"]

JOURNAL_NAME = "journal.bin"
#: The journal never grows past this.  The daemon snapshots early once the journal
#: is half this size (a snapshot starts a new one), so it reaches the bound only while
#: snapshots fail; then journaling stops (counted) until one succeeds.  A start-up
#: replays at most this much (see the README for the time that takes).
MAX_BYTES = 64 << 20
_MAGIC = b"SWJ1"
_HEAD = struct.Struct("<4sII")
_FORMAT = "shiftwatch-journal"
_VERSION = 1


class JournalGroup(NamedTuple):
    """The samples one engine was fed in one round."""

    stream: str
    unit: str | None
    times: NDArray[np.float64]
    values: NDArray[np.float64]
    arrived: NDArray[np.float64]
    #: The ``topic`` of the config entry the engine was made for (None: unknown).
    topic_filter: str | None = None


def _record(body: bytes) -> bytes:
    return _HEAD.pack(_MAGIC, len(body), zlib.crc32(body)) + body


class JournalSingles(NamedTuple):
    """One sample each of many streams in one round, as columns (the pooled calm
    streams of shiftwatch.core.calm): journaled as one-sample groups, in one step."""

    streams: list[str]
    units: list[str | None]
    topic_filters: list[str | None]
    times: NDArray[np.float64]
    values: NDArray[np.float64]
    arrived: NDArray[np.float64]


def _encode_round(groups: Iterable[JournalGroup], singles: JournalSingles | None = None) -> bytes:
    return b"".join(_round_parts(groups, singles))


def _round_parts(groups: Iterable[JournalGroup], singles: JournalSingles | None = None) -> list[bytes | memoryview]:
    """A round's body in parts: the index line, then every group's times, values and
    arrival times as little-endian float64 (copied once, into one array), then the
    pooled singles' rows."""
    index: list[list[object]] = []
    arrays: list[np.ndarray] = []
    for g in groups:
        index.append([g.stream, g.unit, int(g.times.shape[0]), g.topic_filter])
        arrays += [g.times, g.values, g.arrived]
    parts: list[bytes | memoryview] = [b""]
    if arrays:
        parts.append(np.concatenate(arrays, dtype="<f8").data.cast("B"))
    if singles is not None and singles.streams:
        index += [[n, u, 1, f] for n, u, f in zip(singles.streams, singles.units, singles.topic_filters)]
        # Each group's times, values and arrivals in turn: one row of three per stream.
        parts.append(np.column_stack((singles.times, singles.values, singles.arrived))
                     .astype("<f8").data.cast("B"))
    parts[0] = json.dumps(index, ensure_ascii=False).encode("utf-8") + b"\n"
    return parts


@functools.lru_cache(maxsize=16384)
def _index_line(stream: str, unit: str | None, topic_filter: str | None) -> tuple[bytes, bytes]:
    """The index line of a round of one group, less its sample count: the bytes before and
    after the count.  ``json.dumps`` of the line is most of a group's encoding otherwise, and
    a stream's name, unit and filter stay the same round after round."""
    def text(x: str | None) -> str:
        return json.dumps(x, ensure_ascii=False)

    return (f"[[{text(stream)}, {text(unit)}, ".encode(), f", {text(topic_filter)}]]\n".encode())


def encode_group(g: JournalGroup) -> bytes:
    """``encode_groups([g])``, the same bytes, for one group (a cluster journal message): the
    index line from its cached parts and the sample count, then the group's times, values
    and arrival times as little-endian float64 (tests/daemon/test_journal_group_encoding.py)."""
    head, tail = _index_line(g.stream, g.unit, g.topic_filter)
    ts, vs, ar = g.times, g.values, g.arrived
    if (ts.dtype is _NATIVE_F8 and vs.dtype is _NATIVE_F8 and ar.dtype is _NATIVE_F8 and ts.flags.c_contiguous
            and vs.flags.c_contiguous and ar.flags.c_contiguous):
        # Already little-endian float64 each, laid out in order: joined from where they
        # lie, the bytes a concatenation into one array would hold, copied once.
        return b"".join((head, b"%d" % int(ts.shape[0]), tail, ts.data, vs.data, ar.data))
    return b"".join((head, b"%d" % int(ts.shape[0]), tail, np.concatenate((ts, vs, ar), dtype="<f8").data))


#: float64 in the machine's order when that is little-endian (the journal's), else None.
_NATIVE_F8: np.dtype[Any] | None = np.dtype("<f8") if np.dtype("<f8").isnative else None


def _round_record(groups: Sequence[JournalGroup], singles: JournalSingles | None = None) -> list[bytes | memoryview]:
    """``_record(_encode_round(groups, singles))`` as the parts to write in turn: the same
    bytes, but the samples are copied once (into one array, written from where it lies)
    rather than joined into one body and again behind the record's head, and the
    checksum is taken over the parts in turn.  A round of 500 streams with 260 samples
    each is 3 MB."""
    parts = _round_parts(groups, singles)
    crc = 0
    for part in parts:
        crc = zlib.crc32(part, crc)
    return [_HEAD.pack(_MAGIC, sum(len(part) for part in parts), crc), *parts]


def _read_record(f: BinaryIO, size: int) -> tuple[bytes | None, str | None]:
    """The next record's body, or (None, problem); (None, None) at a clean end."""
    head = f.read(_HEAD.size)
    if not head:
        return None, None
    if len(head) < _HEAD.size:
        return None, "torn record"
    magic, length, crc = _HEAD.unpack(head)
    if magic != _MAGIC or length > size:
        return None, "torn or damaged record"
    body = f.read(length)
    if len(body) != length or zlib.crc32(body) != crc:
        return None, "torn or damaged record"
    return body, None


def _decode_round(body: bytes) -> list[JournalGroup]:
    head, sep, data = body.partition(b"\n")
    if not sep:
        raise ValueError("no index line")
    index = json.loads(head)
    # Views of one array (read-only: a round's samples are never changed in place); a
    # copy per group cost most of a start-up with a large journal.
    flat = np.frombuffer(data, dtype="<f8").astype(np.float64, copy=False)
    out = []
    pos = 0
    for entry in index:
        if not isinstance(entry, list) or len(entry) not in (3, 4):
            raise ValueError("malformed index entry")
        stream, unit, n, topic_filter = (entry + [None])[:4]
        if not isinstance(stream, str) or not (unit is None or isinstance(unit, str)) \
                or not isinstance(n, int) or n < 0 or pos + 3 * n > flat.shape[0] \
                or not (topic_filter is None or isinstance(topic_filter, str)):
            raise ValueError("malformed index entry")
        t, v, a = flat[pos:pos + n], flat[pos + n:pos + 2 * n], flat[pos + 2 * n:pos + 3 * n]
        pos += 3 * n
        out.append(JournalGroup(stream, unit, t, v, a, topic_filter))
    if pos != flat.shape[0]:
        raise ValueError("index and data differ in length")
    return out


class Journal:
    """The sample journal of one state directory.

    Parameters
    ----------
    directory : where ``journal.bin`` lives (created if missing).
    sync_every : most seconds between fsyncs of appended rounds.
    background : do those fsyncs in a thread of their own (the daemon does, so
        that the disk never holds up its main loop); :meth:`close` waits for it.
    max_bytes : the journal stops growing at this size (when snapshots keep
        failing); :meth:`append` then raises ``OSError`` until the next
        :meth:`restart`.
    logger : where problems are logged.

    Examples
    --------
    >>> import tempfile
    >>> d = tempfile.mkdtemp()
    >>> j = Journal(d)
    >>> j.open("t1")
    []
    >>> one = np.array([1.0, 2.0])
    >>> j.append([JournalGroup("line1/fill", "g", one, one * 10, one + 0.5)])
    >>> j.close()
    >>> [(g.stream, g.values.tolist()) for r in Journal(d).open("t1") for g in r]
    [('line1/fill', [10.0, 20.0])]
    >>> Journal(d).open("another snapshot")
    []
    """

    def __init__(self, directory: str | Path, *, sync_every: float = 1.0, max_bytes: int = MAX_BYTES,
                 logger: logging.Logger | None = None, background: bool = False) -> None:
        self.directory = Path(directory)
        self.path = self.directory / JOURNAL_NAME
        self.sync_every = sync_every
        self.max_bytes = max_bytes
        self._log = logger if logger is not None else logging.getLogger(__name__)
        self._fd: int | None = None
        self._size = 0  # bytes in the journal (see :attr:`size`)
        self._last_sync = 0.0
        self._dirty = False
        self.background = background
        # The background syncs' thread (start_background) and the one job it may hold:
        # a duplicate of the journal's descriptor to force to disk.
        self._syncer: threading.Thread | None = None
        self._cv = threading.Condition()
        self._job: int | None = None
        self._stopping = False
        # The header record this journal was opened or started with, and the file's
        # identity, which check() compares with what is on disk.
        self._head = b""
        self._ident: tuple[int, int] | None = None
        #: What was wrong with the journal found by the last open() (None: nothing); the
        #: samples it held since the snapshot could not be replayed.
        self.lost: str | None = None

    # ------------------------------------------------------------ opening
    def open(self, token: str) -> list[list[JournalGroup]]:
        """Read the rounds recorded on top of the snapshot with ``token`` and go on appending.

        A journal of another snapshot is discarded (and a new one started); a
        damaged tail is cut off with a log line.  :meth:`replay` does the same
        one round at a time.

        Returns
        -------
        list of rounds, oldest first, each a list of :class:`JournalGroup`.

        Raises
        ------
        OSError
            If the journal cannot be read or a new one cannot be written.
        """
        return list(self.replay(token))

    def replay(self, token: str) -> Iterator[list[JournalGroup]]:
        """:meth:`open`, one round at a time: memory holds one round, whatever the size of
        the journal.  The journal is open for appending once the iterator is exhausted
        (a journal of another snapshot is replaced before this returns)."""
        self.close()
        self.lost = None
        try:
            f = open(self.path, "rb")  # noqa: SIM115  kept open to append to, or closed below
        except FileNotFoundError:
            f = None
        header_token: str | None = None
        problem: str | None = None
        head = b""
        size = 0
        if f is not None:
            size = os.fstat(f.fileno()).st_size
            body, problem = _read_record(f, size)
            if body is not None:
                try:
                    h = json.loads(body)
                except (ValueError, UnicodeDecodeError):
                    h = None
                if (isinstance(h, dict) and h.get("format") == _FORMAT and h.get("version") == _VERSION
                        and isinstance(h.get("token"), str)):
                    header_token = h["token"]
                    head = _record(body)
                else:
                    problem = "unknown header"
        if header_token != token:
            if f is not None:
                f.close()
            if header_token is not None:
                self._log.info("journal %s belongs to another snapshot; discarded", self.path)
            elif size:
                # Not a journal of another snapshot: one whose header cannot be read (a
                # flipped bit, another file).  What it held is lost; say so, keep it aside.
                self.lost = (f"journal {self.path} has an unreadable header ({problem or 'unknown'}); "
                             f"the {size} bytes of samples it held since the last snapshot "
                             f"cannot be replayed")
                aside = self._set_aside()
                self._log.error("%s%s; a fresh journal is started", self.lost,
                                f", it was moved to {aside}" if aside else "")
            self.restart(token)
            return iter(())
        assert f is not None
        return self._rounds(f, size, head)

    def _rounds(self, f: BinaryIO, size: int, head: bytes) -> Iterator[list[JournalGroup]]:
        good = len(head)
        rounds = 0
        problem: str | None = None
        with f:
            while True:
                body, problem = _read_record(f, size)
                if body is None:
                    break
                try:
                    groups = _decode_round(body)
                except (ValueError, TypeError, UnicodeDecodeError):
                    problem = "malformed record"
                    break
                good += _HEAD.size + len(body)
                rounds += 1
                yield groups
        if problem is not None:
            self._log.warning("journal %s: %s after %d round(s); the rest (%d bytes) is discarded",
                              self.path, problem, rounds, size - good)
        fd = os.open(self.path, os.O_RDWR)
        try:
            os.ftruncate(fd, good)
            os.lseek(fd, good, os.SEEK_SET)
        except BaseException:
            os.close(fd)
            raise
        self._fd, self._size = fd, good
        self._head = head
        st = os.fstat(fd)
        self._ident = (st.st_dev, st.st_ino)

    def _set_aside(self) -> str | None:
        n = 1
        while (aside := self.path.with_name(f"{JOURNAL_NAME}.damaged-{n}")).exists():
            n += 1
        try:
            os.replace(self.path, aside)
        except OSError:
            return None
        return aside.name

    def check(self) -> str | None:
        """What has happened to the open journal behind its back, or None: deleted,
        replaced by another file, or its header changed on disk.  Each would lose
        every sample since the last snapshot at the next crash, silently; the
        daemon calls this once a second and starts a fresh journal (through a
        snapshot) when it says something."""
        if self._fd is None or self._ident is None:
            return None
        try:
            if os.fstat(self._fd).st_nlink == 0:
                return "was deleted"
            st = os.stat(self.path)
            if (st.st_dev, st.st_ino) != self._ident:
                return "was replaced by another file"
            if os.pread(self._fd, len(self._head), 0) != self._head:
                return "has a damaged header"
        except FileNotFoundError:
            return "was deleted"
        except OSError as exc:
            return f"cannot be checked ({exc.strerror or exc})"
        return None

    def restart(self, token: str) -> None:
        """Start an empty journal for the snapshot with ``token`` (atomically replaces the old one).

        Raises
        ------
        OSError
            If it cannot be written; no journal is then open.
        """
        self.close()
        self.directory.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{JOURNAL_NAME}.tmp")
        head = _record(json.dumps({"format": _FORMAT, "version": _VERSION, "token": token}).encode())
        fd = os.open(tmp, os.O_RDWR | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(fd, head)
            os.fsync(fd)
            os.replace(tmp, self.path)
            # The rename itself must reach the disk: after a power cut an old
            # journal with another token would otherwise come back, and every
            # round since the snapshot would be thrown away with it.
            fsync_dir(self.directory)
        except BaseException:
            os.close(fd)
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise
        self._fd, self._size = fd, len(head)
        self._head = head
        st = os.fstat(fd)
        self._ident = (st.st_dev, st.st_ino)

    # ------------------------------------------------------------ writing
    @property
    def size(self) -> int:
        """Bytes in the open journal."""
        return self._size

    @property
    def is_open(self) -> bool:
        return self._fd is not None

    def append(self, groups: Sequence[JournalGroup], singles: JournalSingles | None = None) -> None:
        """Append one round (``singles``: one sample each of more streams).  Raises
        ``OSError`` when it cannot be written in full; the journal is then closed (a
        torn record must not be followed by more)."""
        if self._fd is None:
            raise OSError("the journal is not open")
        rec = _round_record(groups, singles)
        size = sum(len(part) for part in rec)
        if self._size + size > self.max_bytes:
            self.close()
            raise OSError(f"the journal reached its limit of {self.max_bytes} bytes")
        try:
            n = os.writev(self._fd, rec)
            if n != size:
                raise OSError(f"short write ({n} of {size} bytes)")
        except OSError:
            self.close()
            raise
        self._size += size
        self._dirty = True
        self.sync_if_due()

    def sync_if_due(self) -> None:
        """Force appended rounds to disk once ``sync_every`` has passed since the last time.

        Called after each append and from the daemon's main loop, so the last
        rounds before a pause in traffic reach the disk too.
        """
        if not self._dirty:
            return
        now = time.monotonic()
        if now - self._last_sync >= self.sync_every:
            if self.background and self._syncer is not None:
                self._sync_in_background()
            else:
                self.sync()
            self._last_sync = now

    def start_background(self) -> None:
        """Start the thread that does the background syncs (``background=True``).

        Called once at start-up, where a failure stops the start with a clear
        error: a thread started later, on the path of every round, could fail
        under a task limit (``RuntimeError: can't start new thread``) and kill
        the daemon.  Without it, syncs are done in the caller.
        """
        if self._syncer is None:
            t = threading.Thread(target=self._sync_loop, name="shiftwatch-journal-sync", daemon=True)
            t.start()
            self._syncer = t

    def stop_background(self) -> None:
        """End the sync thread (after :meth:`close`)."""
        with self._cv:
            self._stopping = True
            self._cv.notify_all()
        if self._syncer is not None:
            self._syncer.join()
            self._syncer = None

    def _sync_loop(self) -> None:
        while True:
            with self._cv:
                self._cv.wait_for(lambda: self._job is not None or self._stopping)
                if self._job is None:
                    return
                fd = self._job
            try:
                os.fdatasync(fd)
            except OSError as exc:
                self._log.warning("journal %s could not be forced to disk: %s", self.path, exc)
            finally:
                os.close(fd)
                with self._cv:
                    self._job = None
                    self._cv.notify_all()

    def _sync_in_background(self) -> None:
        """Force the journal to disk in the sync thread, through a duplicate of its
        descriptor (so a journal closed meanwhile is never a problem): the disk can
        take tens of milliseconds, which the caller's next alert must not wait for.
        While one such sync runs, the next waits for the following due time."""
        if self._fd is None or self._job is not None:
            return
        try:
            fd = os.dup(self._fd)
        except OSError as exc:
            self._log.warning("journal %s could not be forced to disk: %s", self.path, exc)
            return
        self._dirty = False
        with self._cv:
            self._job = fd
            self._cv.notify_all()

    def sync(self) -> None:
        """Force what was appended to disk (errors are logged: the data is still in the page cache)."""
        if self._fd is not None and self._dirty:
            try:
                os.fdatasync(self._fd)
            except OSError as exc:
                self._log.warning("journal %s could not be forced to disk: %s", self.path, exc)
            self._dirty = False

    def close(self) -> None:
        """Force what was appended to disk, then close."""
        with self._cv:  # a background sync of this journal finishes first
            self._cv.wait_for(lambda: self._job is None)
        if self._fd is not None:
            self.sync()
            fd, self._fd = self._fd, None
            os.close(fd)


#: One round's groups as bytes, and back: the cluster journal (shiftwatch.clusterstate)
#: stores each stream's group of a round in this form, one JetStream message each.
encode_groups = _encode_round
decode_groups = _decode_round
