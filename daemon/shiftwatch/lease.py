"""One owner per shard: a lease in a NATS key-value bucket.

The bucket ``<name>_owners`` (3 replicas) has one key per shard,
``shard-<number>``, and a time to live of ``cluster.lease`` for every entry.

- **Claim**: a daemon starting shard n creates the key (JetStream refuses the
  create while the key exists), with its host, process id and a random id.
  While another daemon holds it, the newcomer logs who does and tries again
  every third of the lease, before it connects to the broker: it processes
  nothing and acknowledges nothing until it owns the shard.
- **Renewal**: the owner rewrites the key every third of the lease, each time
  naming the revision it wrote last (a revision-checked update), from the
  NATS thread, so a busy main thread does not let it lapse.  An update refused
  (someone else's revision: the key expired and was claimed) or no successful
  renewal for three quarters of the lease (the cluster unreachable) ends the
  ownership: the daemon stops at once with exit status 3, before the key can
  expire and be claimed elsewhere, and the service manager starts it again
  (it then waits for the lease like any newcomer).
- **Count**: the entry also says which count (``shard.of`` and
  ``shard.hashed_levels``) the shard's configuration gives it (:meth:`announce`
  writes a new one at once), so that a shard can see whether the other live
  shards of the set agree with its own before it takes it up (:meth:`peers`,
  ``partition.count_disagreement``).
- **Handover**: a daemon that stops (SIGTERM) releases the key after its last
  acknowledgement and snapshot, so the next owner starts at once; a daemon
  that dies (SIGKILL, a lost box) holds it until it expires, at most
  ``cluster.lease`` later.  The messages it had not acknowledged stay with the
  broker's session and its state in the cluster (``clusterstate``), so the
  next owner carries on from there.
"""

from __future__ import annotations

import asyncio
import json
import logging
import os
import secrets
import socket
import threading
import time
from typing import Any

from shiftwatch.natsio import ClusterError, NatsIO
from shiftwatch.partition import Count

__all__ = ["ShardLease"]


class ShardLease:
    """The claim of one shard (see the module docstring)."""

    def __init__(self, io: NatsIO, *, name: str, shard: int, lease: float, replicas: int,
                 logger: logging.Logger, count: Count | None = None) -> None:
        self.io = io
        self.bucket = f"{name}_owners"
        self.key = f"shard-{shard}"
        self.shard = shard
        self.lease = lease
        self.replicas = replicas
        self.log = logger
        self.owner = {"host": socket.gethostname(), "pid": os.getpid(), "id": secrets.token_hex(6)}
        self._rev: int | None = None
        self._last_ok = 0.0
        self.lost: str | None = None
        self.lost_event = threading.Event()
        self._task: Any = None
        #: The count (shard.of, hashed levels) this shard's configuration gives it, announced
        #: in the entry (None: none, the shard has no hashed levels).
        self.count: Count | None = None if count is None else (count[0], tuple(count[1]))

    def _value(self) -> bytes:
        doc: dict[str, Any] = {**self.owner, "renewed_at": time.time()}
        if self.count is not None:
            doc["of"], doc["levels"] = self.count[0], list(self.count[1])
        return json.dumps(doc).encode()

    def announce(self, count: Count | None) -> None:
        """The count this shard's configuration gives it now (a reload): written to the
        entry at once, so that the other shards see it before the next renewal.  A write
        that does not get through is left to that renewal (within a third of the lease)."""
        self.count = None if count is None else (count[0], tuple(count[1]))
        if self._rev is None or self.lost is not None:
            return

        async def go() -> None:
            for _attempt in range(3):
                rev = await self.io.kv_update(self.bucket, self.key, self._value(), int(self._rev or 0))
                if rev is not None:
                    self._rev = rev
                    self._last_ok = time.monotonic()
                    return
                # The renewal wrote meanwhile (the same loop): carry on from its revision.
                entry = await self.io.kv_get(self.bucket, self.key)
                if entry is None or _owner_id(entry.value) != self.owner["id"]:
                    return  # judged by the renewal
                self._rev = entry.revision

        try:
            self.io.run(go())
        except ClusterError as exc:
            self.log.warning("shard %d: the count in its lease not written at once (%s); the next "
                             "renewal writes it", self.shard, exc)

    def peers(self) -> dict[int, Count | None]:
        """The other live shards of the set (those whose lease entry is there) and the count
        each announces (None: none, or not readable).  Raises ClusterError."""
        async def go() -> dict[int, Count | None]:
            prefix = f"$KV.{self.bucket}."
            subjects = await self.io.subjects(f"KV_{self.bucket}", prefix + "*")  # (a whole token)
            numbers = [int(k) for s in subjects if s.startswith(prefix + "shard-")
                       and (k := s[len(prefix) + len("shard-"):]).isascii() and k.isdigit()]
            numbers = [n for n in numbers if n != self.shard]
            entries = await asyncio.gather(*(self.io.kv_get(self.bucket, f"shard-{n}") for n in numbers))
            return {n: _count(e.value) for n, e in zip(numbers, entries) if e is not None}

        return self.io.run(go())

    def setup(self) -> None:
        self.io.run(self.io.ensure_bucket(self.bucket, self.replicas, ttl=self.lease))

    def holder(self) -> str:
        entry = self.io.run(self.io.kv_get(self.bucket, self.key))
        if entry is None:
            return "nobody"
        try:
            d = json.loads(entry.value)
            return f"{d['host']} (pid {d['pid']}, id {d['id']})"
        except (ValueError, KeyError, TypeError):
            return "an unreadable entry"

    def claim(self, stop: threading.Event) -> bool:
        """Wait until this daemon owns the shard (True), or ``stop`` is set (False)."""
        said = None
        while not stop.is_set():
            try:
                rev = self.io.run(self.io.kv_create(self.bucket, self.key, self._value()))
            except ClusterError as exc:
                # A bucket another shard has just made may not answer for a moment; the
                # cluster may be electing leaders: nothing is processed meanwhile anyway.
                if said != str(exc):
                    self.log.warning("shard %d: the lease cannot be claimed yet (%s); trying again",
                                     self.shard, exc)
                    said = str(exc)
                stop.wait(min(2.0, self.lease / 3))
                continue
            if rev is not None:
                self._rev = rev
                self._last_ok = time.monotonic()
                self.log.info("shard %d is ours (lease %s, key %s in bucket %s)", self.shard,
                              _seconds(self.lease), self.key, self.bucket)
                self._task = self.io.run(self._start_renewing())
                return True
            who = self.holder()
            if who != said:
                self.log.warning("shard %d is held by %s; waiting for it to be released or to "
                                 "expire (within %s)", self.shard, who, _seconds(self.lease))
                said = who
            stop.wait(self.lease / 3)
        return False

    async def _start_renewing(self) -> Any:
        return asyncio.ensure_future(self._renew_loop())

    async def _renew_loop(self) -> None:
        while self.lost is None:
            await asyncio.sleep(self.lease / 3)
            try:
                rev = await asyncio.wait_for(
                    self.io.kv_update(self.bucket, self.key, self._value(), int(self._rev or 0)),
                    timeout=self.lease / 4)
            except Exception as exc:  # noqa: BLE001  any failure: judged by the time since the last success
                if time.monotonic() - self._last_ok > self.lease * 0.75:
                    self._lose(f"not renewed for {_seconds(time.monotonic() - self._last_ok)} "
                               f"({type(exc).__name__}: {exc})")
                continue
            if rev is None:
                # Refused: the key is not at the revision we wrote last.  An update whose
                # answer was lost (a server died meanwhile) still moved it on: if the
                # entry is ours, carry on from its revision.
                try:
                    entry = await self.io.kv_get(self.bucket, self.key)
                except Exception:  # noqa: BLE001, S112  judged at the next renewal, by the time since the last success
                    continue
                if entry is None:
                    # Gone (it expired while a server was down and no renewal got through):
                    # claimed again if nobody else has it; create is atomic, so one owner.
                    try:
                        again = await asyncio.wait_for(
                            self.io.kv_create(self.bucket, self.key, self._value()), timeout=self.lease / 4)
                    except Exception:  # noqa: BLE001  judged below, by the time since the last success
                        again = None
                    if again is not None:
                        self._rev = again
                        self._last_ok = time.monotonic()
                        continue
                if entry is None or _owner_id(entry.value) == self.owner["id"]:
                    # Ours (carry on from its revision), or gone for now: the time since
                    # the last success decides, as for a cluster that does not answer.
                    if entry is not None:
                        self._rev = entry.revision
                    elif time.monotonic() - self._last_ok > self.lease * 0.75:
                        self._lose("the lease's entry is gone and could not be renewed")
                        return
                    continue
                if _owner_id(entry.value) is None:
                    # No owner entry at all (put there by hand or by another program): who
                    # wrote it is not known, so the shard is given up all the same.
                    self._lose(f"key {self.key} in bucket {self.bucket} was overwritten with something "
                               f"that is no owner entry ({_sample(entry.value)})")
                    return
                self._lose("the lease was claimed by another daemon")
                return
            self._rev = rev
            self._last_ok = time.monotonic()

    def _lose(self, why: str) -> None:
        self.lost = why
        self.lost_event.set()

    def release(self) -> None:
        """Give the shard up (after the last acknowledgement), so the next owner starts at once."""
        if self._task is not None:
            self.io.cancel(self._task)
        if self._rev is None or self.lost is not None:
            return
        try:
            self.io.run(self.io.kv_delete(self.bucket, self.key, last=self._rev), timeout=3.0)
            self.log.info("shard %d released", self.shard)
        except ClusterError as exc:
            self.log.warning("shard %d not released (%s); it passes on when the lease expires", self.shard, exc)
        self._rev = None


def _owner_id(value: bytes) -> str | None:
    try:
        d = json.loads(value)
        return str(d["id"]) if isinstance(d, dict) else None
    except (ValueError, KeyError):
        return None


def _count(value: bytes) -> Count | None:
    """The count a lease entry announces (None: none, or not readable)."""
    try:
        d = json.loads(value)
    except ValueError:
        return None
    if not isinstance(d, dict):
        return None
    of, levels = d.get("of"), d.get("levels")
    if type(of) is not int or of < 1 or not isinstance(levels, list) or not levels \
            or not all(type(x) is int and x > 0 for x in levels):
        return None
    return of, tuple(levels)


def _sample(value: bytes) -> str:
    """The start of an entry's bytes, for a log line."""
    text = value[:40].decode("utf-8", "replace")
    return text + ("..." if len(value) > 40 else "")


def _seconds(s: float) -> str:
    return f"{s:.0f} s" if s >= 10 else f"{s:.1f} s"
