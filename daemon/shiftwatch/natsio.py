"""The daemon's connection to a NATS cluster: the only module that imports nats-py.

nats-py is an asyncio client and the daemon is threaded, so :class:`NatsIO`
runs one asyncio loop in a thread of its own (started with the daemon's other
threads) and offers blocking calls that wait for a coroutine on that loop,
each with a deadline.  Everything the cluster state (``clusterstate.py``) and
the shard lease (``lease.py``) need goes through here: JetStream publishes
with an expected last sequence per subject, reads of a subject's messages,
purges, and key-value buckets.

Errors come out as :class:`ClusterError` with one line that names the cluster
and what failed; a publish refused because the subject moved on meanwhile is
a :class:`SequenceConflict`.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import re
import threading
from collections.abc import Awaitable, Callable, Coroutine, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import msgspec

__all__ = ["ClusterError", "KvEntry", "NatsIO", "SequenceConflict", "nats_available"]

T = TypeVar("T")

#: JetStream's error code for "wrong last sequence" (an expected-last-sequence header not met).
WRONG_LAST_SEQUENCE = 10071
#: The header JetStream checks a subject's last sequence against.
EXPECT_LAST = "Nats-Expected-Last-Subject-Sequence"
#: A JetStream answer (a publish acknowledgement or an error), parsed as ``json.loads`` would.
_decode_answer = msgspec.json.Decoder().decode
#: What :meth:`NatsIO._send_batch` uses of nats-py's client besides its public calls.
_CLIENT_PARTS = ("_send_command", "_flush_pending", "_flush_queue", "_max_payload", "stats",
                 "is_connected", "is_draining_pubs")
#: A header name the NATS protocol takes as it is (nats-py's own check, ``_HEADER_KEY_RE``).
_HEADER_KEY = re.compile(r"[!#$%&'*+\-.^_`|~0-9A-Za-z]+")
#: JetStream's error code for "stream name already in use with a different configuration".
STREAM_EXISTS_OTHERWISE = 10058


class ClusterError(RuntimeError):
    """The NATS cluster could not be reached or refused a request (one line, no traceback)."""


class SequenceConflict(ClusterError):
    """A publish expected a subject's last sequence and found another: someone else wrote."""


@dataclass(frozen=True)
class KvEntry:
    value: bytes
    revision: int


def nats_available() -> bool:
    try:
        import nats  # noqa: F401
    except ImportError:
        return False
    return True


class _Batch:
    """The messages of one :meth:`NatsIO.publish_batch`: each one's answer in its place,
    and one future done once every message has its answer."""

    __slots__ = ("done", "left", "results")

    def __init__(self, n: int, done: asyncio.Future[None]) -> None:
        self.results: list[Any] = [None] * n
        self.left = n
        self.done = done

    def settle(self, i: int, got: int | ClusterError) -> None:
        if self.results[i] is not None:
            return  # (a message answered twice: the first answer stands)
        self.results[i] = got
        self.left -= 1
        if self.left == 0 and not self.done.done():
            self.done.set_result(None)


def _publish_headers(headers: dict[str, str] | None, expect_last: int | None) -> dict[str, str] | None:
    out = dict(headers or {})
    if expect_last is not None:
        out[EXPECT_LAST] = str(expect_last)
    return out or None


def _header_lines(headers: dict[str, str] | None) -> bytes | None:
    """The header block's first lines as nats-py's ``publish`` writes them for ``headers``
    (the version line, then ``name: value`` per header, in order), or None when nats-py
    would write them otherwise (a name to strip or refuse, a value to strip or with a line
    break, the expected-sequence header among them): such a batch goes out through
    ``publish`` itself."""
    lines = [b"NATS/1.0\r\n"]
    for k, v in (headers or {}).items():
        if k == EXPECT_LAST or not _HEADER_KEY.fullmatch(k) or v != v.strip() or "\r" in v or "\n" in v:
            return None
        lines.append(f"{k}: {v}\r\n".encode())
    return b"".join(lines)


def _hpub(subject: str, reply: str, lines: bytes, expect_last: int | None, payload: bytes) -> bytes:
    """One message as nats-py's ``publish`` puts it on the wire (HPUB, its header block
    ``lines`` and the expected last sequence, then the payload): the same bytes."""
    return b"".join(_hpub_parts(subject, reply, lines, expect_last, payload))


def _hpub_parts(subject: str, reply: str, lines: bytes, expect_last: int | None,
                payload: bytes) -> tuple[bytes, bytes, bytes, bytes]:
    """:func:`_hpub`'s bytes in four parts, so that a batch joins all of its messages' parts
    once (each payload copied once into the write, not first into a frame of its own)."""
    hdr = lines + (b"" if expect_last is None else f"{EXPECT_LAST}: {expect_last}\r\n".encode()) + b"\r\n"
    return (f"HPUB {subject} {reply} {len(hdr)} {len(hdr) + len(payload)}\r\n".encode(), hdr, payload, b"\r\n")


def _describe(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


class NatsIO:
    """A NATS connection on an asyncio loop in its own thread, used with blocking calls.

    Parameters
    ----------
    servers : ``nats://host:port`` URLs of the cluster's servers (any subset; the client
        learns the others and reconnects to whichever answers).
    name : the connection's name, as the servers' monitoring shows it.
    timeout : deadline of each request, seconds.
    """

    def __init__(self, servers: list[str], *, name: str, timeout: float = 5.0,
                 user: str | None = None, password: str | None = None) -> None:
        self.servers = list(servers)
        self.name = name
        self.timeout = timeout
        self._user = user
        self._password = password
        self._loop = asyncio.new_event_loop()
        self._thread: threading.Thread | None = None
        self._nc: Any = None
        self._js: Any = None
        self._kv: dict[str, Any] = {}
        # publish_batch: one reply subscription; per message in flight its batch and place
        self._batch_prefix: str | None = None
        self._batch_futs: dict[str, tuple[_Batch, int, str]] = {}
        self._batch_n = 0
        self._batch_lock = asyncio.Lock()
        self._raw_send: bool | None = None  # nats-py's client has what _send_batch uses

    @property
    def where(self) -> str:
        return ", ".join(self.servers)

    # ------------------------------------------------------------ running
    def start(self) -> None:
        """Start the loop's thread (once, with the daemon's other threads)."""
        if self._thread is None:
            t = threading.Thread(target=self._loop.run_forever, name="shiftwatch-nats", daemon=True)
            t.start()
            self._thread = t

    def run(self, coro: Coroutine[Any, Any, T], timeout: float | None = None) -> T:
        """Run ``coro`` on the loop and wait for it (``timeout`` plus a second at most)."""
        return self.result(self.submit(coro), timeout)

    def submit(self, coro: Coroutine[Any, Any, T]) -> concurrent.futures.Future[T]:
        """Start ``coro`` on the loop; :meth:`result` waits for it."""
        if self._thread is None:
            self.start()
        return asyncio.run_coroutine_threadsafe(coro, self._loop)

    def result(self, fut: concurrent.futures.Future[T], timeout: float | None = None) -> T:
        """Wait for a coroutine started with :meth:`submit` (``timeout`` plus a second at most);
        its errors as ClusterError."""
        try:
            return fut.result((timeout or self.timeout) + 1.0)
        except TimeoutError:
            fut.cancel()
            raise ClusterError(f"NATS cluster {self.where}: no answer within "
                               f"{(timeout or self.timeout):.0f} s") from None
        except ClusterError:
            raise
        except Exception as exc:  # noqa: BLE001  nats-py's errors, as one line
            raise ClusterError(f"NATS cluster {self.where}: {_describe(exc)}") from None

    def call_soon(self, fn: Callable[[], Awaitable[Any]]) -> None:
        """Start ``fn()`` on the loop without waiting for it (errors are dropped)."""
        async def quiet() -> None:
            try:
                await fn()
            except Exception:  # noqa: BLE001, S110  best effort by design (see callers)
                pass
        asyncio.run_coroutine_threadsafe(quiet(), self._loop)

    def cancel(self, task: Any) -> None:
        """Cancel an asyncio task running on the loop."""
        self._loop.call_soon_threadsafe(task.cancel)

    def connect(self) -> None:
        """Connect, or raise ClusterError naming the servers and the cause."""
        import nats

        async def go() -> None:
            errors: list[str] = []

            async def on_error(exc: Exception) -> None:
                errors.append(_describe(exc))

            try:
                self._nc = await nats.connect(
                    servers=self.servers, name=self.name, connect_timeout=min(self.timeout, 5.0),
                    max_reconnect_attempts=-1, reconnect_time_wait=0.5, allow_reconnect=True,
                    user=self._user, password=self._password, error_cb=on_error,
                    disconnected_cb=self._connection_lost)
            except Exception as exc:  # noqa: BLE001  every cause becomes one line
                cause = errors[-1] if errors else _describe(exc)
                raise ClusterError(f"NATS cluster {self.where} cannot be reached ({cause})") from None
            self._js = self._nc.jetstream(timeout=self.timeout)
            self._batch_prefix = None  # (a new connection has no reply subscription yet)

        try:
            self.run(go(), timeout=self.timeout * 2)
        except ClusterError as exc:
            if "cannot be reached" in str(exc):
                raise
            raise ClusterError(f"NATS cluster {self.where} cannot be reached (no answer within "
                               f"{self.timeout * 2:.0f} s)") from None

    def close(self) -> None:
        async def go() -> None:
            if self._nc is not None and not self._nc.is_closed:
                await self._nc.drain()

        if self._thread is not None:
            try:
                self.run(go(), timeout=3.0)
            except Exception:  # noqa: BLE001, S110  closing: nothing more to do with the cluster
                pass
            self._loop.call_soon_threadsafe(self._loop.stop)
            self._thread.join(5.0)
            self._thread = None

    @property
    def connected(self) -> bool:
        return self._nc is not None and bool(self._nc.is_connected)

    # ------------------------------------------------------- plain NATS
    def subscribe(self, subject: str, take: Callable[[bytes], None]) -> None:
        """Hand every message on ``subject`` to ``take`` (called on the loop's thread: it
        must only queue the payload).  The client subscribes again after a reconnect."""
        async def go() -> None:
            async def cb(msg: Any) -> None:
                take(bytes(msg.data))

            await self._nc.subscribe(subject, cb=cb)

        self.run(go())

    def send(self, subject: str, payload: bytes) -> None:
        """Publish on ``subject`` without waiting: at most once, as plain NATS is."""
        async def go() -> None:
            await self._nc.publish(subject, payload)

        self.call_soon(go)

    # ---------------------------------------------------------- JetStream
    async def ensure_stream(self, name: str, subjects: list[str], replicas: int,
                            max_age: float) -> None:
        """Create the stream, or check that one of that name is there."""
        from nats.js.api import StorageType, StreamConfig
        from nats.js.errors import NotFoundError

        try:
            await self._js.stream_info(name)
            return
        except NotFoundError:
            pass
        try:
            await self._js.add_stream(StreamConfig(name=name, subjects=subjects, num_replicas=replicas,
                                                   storage=StorageType.FILE, max_age=max_age))
        except Exception as exc:  # noqa: BLE001
            raise ClusterError(f"NATS cluster {self.where}: JetStream stream {name} cannot be created "
                               f"with {replicas} replica(s) ({_describe(exc)})") from None

    async def ensure_bucket(self, bucket: str, replicas: int, ttl: float | None = None) -> None:
        from nats.js.api import KeyValueConfig, StorageType
        from nats.js.errors import BucketNotFoundError

        try:
            self._kv[bucket] = await self._js.key_value(bucket)
            return
        except BucketNotFoundError:
            pass
        try:
            self._kv[bucket] = await self._js.create_key_value(KeyValueConfig(
                bucket=bucket, history=1, replicas=replicas, ttl=ttl, storage=StorageType.FILE))
        except Exception as exc:  # noqa: BLE001
            raise ClusterError(f"NATS cluster {self.where}: key-value bucket {bucket} cannot be "
                               f"created with {replicas} replica(s) ({_describe(exc)})") from None

    async def publish(self, subject: str, payload: bytes, *, expect_last: int | None = None,
                      headers: dict[str, str] | None = None) -> int:
        """Publish to JetStream and wait for the ack; the message's stream sequence.

        With ``expect_last`` the cluster stores the message only when the subject's
        last sequence is that number (0: no message on it yet); otherwise SequenceConflict.
        """
        return (await self.publish_once(subject, payload, expect_last=expect_last, headers=headers))[0]

    async def publish_once(self, subject: str, payload: bytes, *, expect_last: int | None = None,
                           headers: dict[str, str] | None = None) -> tuple[int, bool]:
        """:meth:`publish`, and whether the message was stored anew: False when JetStream
        took it for a duplicate (its ``Nats-Msg-Id`` already stored within the stream's
        duplicate window) and kept the copy it had."""
        hdrs = _publish_headers(headers, expect_last)
        try:
            ack = await self._js.publish(subject, payload, headers=hdrs)
        except Exception as exc:  # noqa: BLE001  as one of ours
            raise self._publish_error(subject, exc) from None
        return int(ack.seq), not ack.duplicate

    async def publish_in_batch(self, subject: str, payload: bytes, *, expect_last: int | None = None,
                               headers: dict[str, str] | None = None) -> int:
        """:meth:`publish` with no deadline of its own: :meth:`publish_batch` of one message
        (the caller bounds the wait).  Refusals are the same as :meth:`publish`'s."""
        (got,) = await self.publish_batch([(subject, payload, expect_last)], headers)
        if isinstance(got, BaseException):
            raise got
        return got

    async def publish_batch(self, items: Sequence[tuple[str, bytes, int | None]],
                            headers: dict[str, str] | None = None) -> list[int | ClusterError]:
        """Publish each ``(subject, payload, expect_last)`` to JetStream (``expect_last`` as
        in :meth:`publish`; ``headers`` on every message) and wait for every
        acknowledgement, with no deadline of its own: the caller bounds the wait for the
        whole batch (a journal round, see ``clusterstate.JournalRound.wait``) and cancels
        it when it gives up.  Per message, in order: its stream sequence, or the refusal
        :meth:`publish` would have raised (SequenceConflict, ClusterError).

        nats-py's ``publish`` is a request with a timer for every message, which was
        most of the NATS thread's CPU per journal message.  Here every message is
        sent with a reply subject under one subscription of this connection, all of
        them from one coroutine (so they leave in one write), and each
        acknowledgement fills its message's place; the batch's one future completes
        with the last.  (Until 2026-12-05 each message had a task, a semaphore's turn
        and a future of its own, gathered: about a third of the NATS thread's CPU per
        journal message in the shard benchmark.  nats-py's own ``publish_async``
        works like this but never completes the future of a refused publish: its
        reply handler calls ``APIError.from_error``, which raises, inside the
        subscription's callback, in nats-py 2.x.)
        """
        prefix = self._batch_prefix or await self._batch_subscribe()
        batch = _Batch(len(items), self._loop.create_future())
        tokens = []
        try:
            for i, (subject, _payload, _expect) in enumerate(items):
                self._batch_n += 1
                token = str(self._batch_n)
                self._batch_futs[token] = batch, i, subject
                tokens.append(token)
            if not await self._send_batch(prefix, tokens, items, headers):
                for i, (token, (subject, payload, expect_last)) in enumerate(zip(tokens, items)):
                    try:
                        await self._nc.publish(subject, payload, reply=prefix + token,
                                               headers=_publish_headers(headers, expect_last))
                    except Exception as exc:  # noqa: BLE001  as one of ours, in its place
                        self._batch_futs.pop(token, None)
                        batch.settle(i, self._publish_error(subject, exc))
            if items:
                await batch.done
            return batch.results
        finally:
            for token in tokens:
                self._batch_futs.pop(token, None)

    async def _send_batch(self, prefix: str, tokens: list[str], items: Sequence[tuple[str, bytes, int | None]],
                          headers: dict[str, str] | None) -> bool:
        """Hand the batch's messages to nats-py's outgoing buffer as one write, each exactly
        as its ``publish`` would write it (:func:`_hpub`); False when this is not done and
        the caller publishes them one by one.

        nats-py's ``publish`` checks and encodes each message's subjects and headers
        anew: about a third of the NATS thread's CPU per journal message in the shard
        benchmark (2026-12-05).  A batch's headers are the same but for the expected
        sequence, so their lines are made once.  Only on a connection that is up, with
        headers ``publish`` would write as they are and payloads within the server's
        limit (else ``publish`` raises or buffers them its own way), and with the
        client's buffer (``_send_command``, ``_flush_pending``, present in nats-py 2.x)
        as expected; the same bytes reach the server
        (``test_shard_journal.py::test_a_batch_sent_in_one_write_stores_what_publish_stores``)."""
        nc = self._nc
        lines = _header_lines(headers)
        if self._raw_send is None:
            self._raw_send = all(hasattr(nc, part) for part in _CLIENT_PARTS)
        if (lines is None or not self._raw_send or not nc.is_connected or nc.is_draining_pubs
                or any(len(payload) > nc._max_payload for _s, payload, _e in items)):
            return False
        parts: list[bytes] = []
        for token, (subject, payload, expect_last) in zip(tokens, items):
            parts += _hpub_parts(subject, prefix + token, lines, expect_last, payload)
        nc.stats["out_msgs"] += len(items)
        nc.stats["out_bytes"] += sum(len(payload) for _s, payload, _e in items)
        await nc._send_command(b"".join(parts))
        if nc._flush_queue is not None and nc._flush_queue.empty():
            await nc._flush_pending()
        return True

    async def _connection_lost(self) -> None:
        """nats-py lost the connection (it reconnects on its own): every batch message in
        flight on it gets its answer now, an error, since no acknowledgement of it can come
        on the next connection.  Until 2026-12-05 such a batch waited out its caller's whole
        bound (a journal round's: the client's timeout, more for a large round), the shard's
        round held meanwhile, for acknowledgements that were gone with the connection
        (``test_shard_journal.py::test_a_round_in_flight_when_its_server_dies_ends_at_once``).
        The round written again finds what the server stored of it as its own
        (``JournalRound``'s ``refused``)."""
        lost, self._batch_futs = self._batch_futs, {}
        for batch, i, subject in lost.values():
            batch.settle(i, ClusterError(f"NATS cluster {self.where}: the connection was lost before "
                                         f"the publish to {subject} was acknowledged"))

    async def _batch_subscribe(self) -> str:
        async with self._batch_lock:
            if self._batch_prefix is None:
                prefix = self._nc.new_inbox() + "."
                await self._nc.subscribe(prefix + "*", cb=self._batch_reply)
                self._batch_prefix = prefix
            return self._batch_prefix

    async def _batch_reply(self, msg: Any) -> None:
        assert self._batch_prefix is not None
        batch, i, subject = self._batch_futs.pop(msg.subject[len(self._batch_prefix):], (None, 0, ""))
        if batch is None or batch.done.done():
            return  # its batch was given up (timed out) meanwhile
        status = (msg.headers or {}).get("Status")
        try:
            resp = _decode_answer(msg.data) if msg.data else {}
        except ValueError:  # (msgspec's DecodeError is one)
            resp = {}
        err = resp.get("error") if isinstance(resp, dict) else None
        got: int | ClusterError
        if isinstance(err, dict):
            if err.get("err_code") == WRONG_LAST_SEQUENCE:
                got = SequenceConflict(f"{subject}: {err.get('description')}")
            else:
                got = ClusterError(f"NATS cluster {self.where}: publish to {subject} refused "
                                   f"({err.get('description') or err})")
        elif isinstance(resp, dict) and isinstance(resp.get("seq"), int):
            got = int(resp["seq"])
        else:  # no JetStream stream took it ("no responders", status 503), or an odd answer
            why = "no stream takes the subject" if status == "503" else f"answer {bytes(msg.data[:80])!r}"
            got = ClusterError(f"NATS cluster {self.where}: publish to {subject} not acknowledged ({why})")
        batch.settle(i, got)

    def _publish_error(self, subject: str, exc: BaseException) -> ClusterError:
        from nats.js.errors import APIError

        if isinstance(exc, APIError):
            if exc.err_code == WRONG_LAST_SEQUENCE:
                return SequenceConflict(f"{subject}: {exc.description}")
            return ClusterError(f"NATS cluster {self.where}: publish to {subject} refused "
                                f"({_describe(exc)})")
        return ClusterError(f"NATS cluster {self.where}: publish to {subject} not acknowledged "
                            f"({_describe(exc)})")

    async def last_seq(self, stream: str, subject: str) -> tuple[int, dict[str, str]]:
        """The sequence of the subject's last message in the stream (0: none), and its headers."""
        from nats.js.errors import NotFoundError

        try:
            msg = await self._js.get_last_msg(stream, subject)
        except NotFoundError:
            return 0, {}
        return int(msg.seq), dict(msg.headers or {})

    async def last_message(self, stream: str, subject: str) -> tuple[int, dict[str, str], bytes]:
        """The subject's last message in the stream: sequence (0: none), headers and body."""
        from nats.js.errors import NotFoundError
        try:
            msg = await self._js.get_last_msg(stream, subject)
        except NotFoundError:
            return 0, {}, b""
        return int(msg.seq), dict(msg.headers or {}), bytes(msg.data or b"")

    async def messages_after(self, stream: str, subject: str, after: int, last: int) -> list[tuple[int, bytes]]:
        """The subject's messages with sequences in (after, last], in order."""
        from nats.js.errors import NotFoundError

        out: list[tuple[int, bytes]] = []
        seq = after + 1
        while seq <= last:
            try:
                msg = await self._js.get_msg(stream, seq=seq, subject=subject, next=True)
            except NotFoundError:
                break
            if msg.seq > last:
                break
            out.append((int(msg.seq), bytes(msg.data or b"")))
            seq = int(msg.seq) + 1
        return out

    async def purge_subject(self, stream: str, subject: str, keep: int | None = 1,
                            upto: int | None = None) -> None:
        """Purge the subject's messages in the stream: all but the last ``keep``, or (with
        ``upto``) those with sequences up to and including ``upto``.  A purge request's
        ``seq`` is the first sequence kept, and the server takes ``seq`` 1 (and 0) as no
        bound, purging the whole subject: with ``upto`` below 1 nothing is sent."""
        if upto is not None:
            if upto >= 1:
                await self._js.purge_stream(stream, subject=subject, seq=upto + 1)
        else:
            await self._js.purge_stream(stream, subject=subject, keep=keep)

    async def subjects(self, stream: str, subject_filter: str) -> dict[str, int]:
        """The stream's subjects that match the filter and hold messages, with their counts."""
        info = await self._js.stream_info(stream, subjects_filter=subject_filter)
        return dict(info.state.subjects or {})

    # ------------------------------------------------------- key-value
    async def kv_get(self, bucket: str, key: str) -> KvEntry | None:
        """The key's entry, read from the bucket's stream leader (a direct get may be
        answered by a replica that lags, say one just restarted); None when absent."""
        from nats.js.errors import NotFoundError

        try:
            msg = await self._js.get_last_msg(f"KV_{bucket}", f"$KV.{bucket}.{key}", direct=False)
        except NotFoundError:
            return None
        op = (msg.headers or {}).get("KV-Operation")
        if op in ("DEL", "PURGE"):
            return None
        return KvEntry(bytes(msg.data or b""), int(msg.seq))

    async def kv_put(self, bucket: str, key: str, value: bytes) -> int:
        return int(await self._kv[bucket].put(key, value))

    async def kv_create(self, bucket: str, key: str, value: bytes) -> int | None:
        """Create the key; None when it exists (someone holds it)."""
        from nats.js.errors import KeyWrongLastSequenceError

        try:
            return int(await self._kv[bucket].create(key, value))
        except KeyWrongLastSequenceError:
            return None

    async def kv_update(self, bucket: str, key: str, value: bytes, last: int) -> int | None:
        """Update the key if its revision is still ``last``; None when it is not."""
        from nats.js.errors import KeyWrongLastSequenceError

        try:
            return int(await self._kv[bucket].update(key, value, last=last))
        except KeyWrongLastSequenceError:
            return None

    async def kv_delete(self, bucket: str, key: str, last: int | None = None) -> None:
        from nats.js.errors import KeyWrongLastSequenceError

        try:
            await self._kv[bucket].delete(key, last=last)
        except KeyWrongLastSequenceError:
            pass
