"""The on-disk outbox of alert records, for at-least-once delivery across crashes.

The daemon hands an alert record to the MQTT client and adds it to the
outbox at once; the outbox is forced to disk before the messages that
produced the record are acknowledged (a crash before that means they are
delivered again and the record is made again).  A record is removed when the
broker has acknowledged it.  After a crash or a restart every record still
in the outbox is sent again, so a record may arrive twice but is never lost;
records carry a stable ``id`` for consumers to de-duplicate.

Layout: one file per record, named by a zero-padded sequence number
(``00000000000000000042.msg``) so the oldest-first order survives restarts.
A file holds one JSON header line and the payload::

    {"topic": "...", "qos": 1, "retain": false, "size": 123, "crc32": 456}\\n<payload bytes>

Each file is written to a temporary name, fsynced and renamed, and the
directory is fsynced, so :meth:`Outbox.add` returns only once the record is
durable.  A file that cannot be read back (bad header, wrong size or
checksum) is renamed to ``<name>.corrupt-<n>`` with one log line.
"""

from __future__ import annotations

import json
import logging
import os
import tempfile
import threading
import zlib
from dataclasses import dataclass
from pathlib import Path

from shiftwatch.fsutil import explain_os_error, fsync_dir

__all__ = ["Outbox", "OutboxItem"]

_SUFFIX = ".msg"
_TMP_PREFIX = ".outbox-"
_TMP_SUFFIX = ".tmp"
_WIDTH = 20  # digits: any 64-bit sequence number


@dataclass(frozen=True)
class OutboxItem:
    """One record waiting for delivery.

    Attributes
    ----------
    key : the item's identity in the outbox (its sequence number, zero-padded).
    topic, payload, qos, retain : what to publish.
    """

    key: str
    topic: str
    payload: bytes
    qos: int
    retain: bool


def _encode(item: OutboxItem) -> bytes:
    header = {"topic": item.topic, "qos": item.qos, "retain": item.retain,
              "size": len(item.payload), "crc32": zlib.crc32(item.payload)}
    return json.dumps(header, ensure_ascii=False).encode("utf-8") + b"\n" + item.payload


def _decode(key: str, data: bytes) -> OutboxItem:
    """Parse an item file; raises ValueError when it is damaged."""
    head, sep, payload = data.partition(b"\n")
    if not sep:
        raise ValueError("no header line")
    h = json.loads(head)
    if not isinstance(h, dict):
        raise ValueError("header is not an object")  # noqa: TRY004  damage is a ValueError (docstring)
    topic, qos, retain, size, crc = (h.get(k) for k in ("topic", "qos", "retain", "size", "crc32"))
    if (not isinstance(topic, str) or not topic or qos not in (0, 1, 2)
            or not isinstance(retain, bool) or not isinstance(size, int)
            or not isinstance(crc, int)):
        raise ValueError("malformed header")
    if len(payload) != size:
        raise ValueError(f"payload is {len(payload)} bytes, header says {size}")
    if zlib.crc32(payload) != crc:
        raise ValueError("payload checksum mismatch")
    return OutboxItem(key=key, topic=topic, payload=payload, qos=qos, retain=retain)


class Outbox:
    """Alert records waiting for the broker's acknowledgement, kept on disk.

    Safe to use from several threads (paho calls ``on_publish`` from its own).

    Parameters
    ----------
    directory : where the item files live; created if missing.  Items already
        there are loaded, oldest first.
    max_items : most items kept; adding beyond it discards the oldest.
    logger : where to log discarded and damaged items.

    Attributes
    ----------
    dropped : items discarded because ``max_items`` was exceeded.
    on_disk : False when the directory could not be created or listed (read-only,
        full): the outbox then keeps its records in memory only, says so once
        in the log, and never raises for it.

    Raises
    ------
    ValueError
        If ``max_items`` is less than 1.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     box = Outbox(d)
    ...     item = box.add("shiftwatch/alerts/line1", b'{"phase": "detected"}')
    ...     [i.topic for i in Outbox(d).pending()]
    ...     box.remove(item.key)
    ...     len(Outbox(d))
    ['shiftwatch/alerts/line1']
    0
    """

    def __init__(self, directory: str | Path, *, max_items: int = 10000,
                 logger: logging.Logger | None = None) -> None:
        if max_items < 1:
            raise ValueError(f"max_items must be at least 1, got {max_items}")
        self.directory = Path(directory)
        self.max_items = max_items
        self.dropped = 0
        self._log = logger if logger is not None else logging.getLogger(__name__)
        self._lock = threading.Lock()
        self._add_lock = threading.Lock()
        self._items: dict[str, OutboxItem] = {}  # always in key (= age) order
        self._unsynced: list[str] = []  # written with sync=False, not yet forced to disk
        self._unlink: list[str] = []  # removed with defer=True, file not yet deleted
        self.on_disk = True
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
            self._next = self._load()
        except OSError as exc:
            self.on_disk = False
            self._next = 0
            self._log.error("outbox: directory %s cannot be used (%s); alert records are kept in "
                            "memory only and do not survive a restart", self.directory,
                            explain_os_error(exc, self.directory))
        with self._lock:
            self._trim()

    # ----------------------------------------------------------------- loading
    def _load(self) -> int:
        highest = -1
        keys = []
        for name in os.listdir(self.directory):
            if name.startswith(_TMP_PREFIX) and name.endswith(_TMP_SUFFIX):
                self._unlink_quietly(name, "leftover of an interrupted add")
                continue
            stem, _dot, rest = name.partition(".")
            if stem.isdigit() and len(stem) == _WIDTH:
                highest = max(highest, int(stem))  # set-aside files too: never reuse a number
                if "." + rest == _SUFFIX:
                    keys.append(stem)
        for key in sorted(keys):
            path = self._path(key)
            try:
                item = _decode(key, path.read_bytes())
            except (ValueError, UnicodeDecodeError) as exc:
                self._set_aside(path, str(exc))
                continue
            self._items[key] = item
        return highest + 1

    def _unlink_quietly(self, name: str, why: str) -> None:
        try:
            os.unlink(self.directory / name)
        except OSError as exc:
            self._log.warning("outbox: could not remove %s (%s): %s", name, why, exc)
        else:
            self._log.info("outbox: removed %s (%s)", name, why)

    def _set_aside(self, path: Path, reason: str) -> None:
        n = 1
        while (aside := path.with_name(f"{path.name}.corrupt-{n}")).exists():
            n += 1
        try:
            os.replace(path, aside)
        except OSError as exc:
            self._log.error("outbox: item %s is unreadable (%s) and could not be moved aside: %s",
                            path.name, reason, exc)
        else:
            self._log.warning("outbox: item %s is unreadable (%s); moved to %s",
                              path.name, reason, aside.name)

    def _path(self, key: str) -> Path:
        return self.directory / (key + _SUFFIX)

    # -------------------------------------------------------------- operations
    def add(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False,
            sync: bool = True) -> OutboxItem:
        """Store a record durably and return it; the oldest is discarded beyond ``max_items``.

        With ``sync=False`` the record is written but not yet forced to disk;
        :meth:`sync` does that for every such record at once (the daemon calls
        it once per round, before it acknowledges the round's messages, so a
        crash in between only means the messages are delivered again).

        Raises
        ------
        OSError
            If the record could not be written; nothing is then stored.
        ValueError
            If the topic is empty or qos is not 0, 1 or 2.
        """
        if not topic:
            raise ValueError("topic must not be empty")
        if qos not in (0, 1, 2):
            raise ValueError(f"qos must be 0, 1 or 2, got {qos!r}")
        # Adds take turns (so items reach the disk and the list in key order), and the
        # file is written outside the lock that remove(), called from paho's thread,
        # takes: that thread never waits for the disk.  An item can only be removed
        # once add() has returned its key.
        with self._add_lock:
            with self._lock:
                key = f"{self._next:0{_WIDTH}d}"
                self._next += 1
            item = OutboxItem(key=key, topic=topic, payload=bytes(payload), qos=qos,
                              retain=bool(retain))
            if self.on_disk:
                self._write(item, sync=sync)
            with self._lock:
                self._items[key] = item
                if self.on_disk and not sync:
                    self._unsynced.append(key)
                self._trim()
        return item

    def sync(self) -> None:
        """Force the records added with ``sync=False`` (and the directory) to disk.

        Then deletes the files of records removed with ``defer=True``
        (:meth:`purge`).  The lock is held only to take the list:
        :meth:`remove`, which the daemon calls from paho's network thread,
        must not wait for the disk.  A record removed meanwhile is skipped or
        its file is gone, both fine.
        """
        if not self.on_disk:
            return
        with self._lock:
            keys, self._unsynced = self._unsynced, []
            keys = [k for k in keys if k in self._items]  # the others were delivered and removed
        try:
            self._fsync(keys)
        finally:
            self.purge()

    def _fsync(self, keys: list[str]) -> None:
        for key in keys:
            try:
                fd = os.open(self._path(key), os.O_RDONLY)
            except FileNotFoundError:
                continue
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        if keys:
            fsync_dir(self.directory)

    def _write(self, item: OutboxItem, sync: bool = True) -> None:
        fd, tmp = tempfile.mkstemp(prefix=_TMP_PREFIX, suffix=_TMP_SUFFIX, dir=self.directory)
        try:
            with open(fd, "wb") as f:
                f.write(_encode(item))
                f.flush()
                if sync:
                    os.fsync(f.fileno())
            os.replace(tmp, self._path(item.key))
        except BaseException:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise
        if sync:
            fsync_dir(self.directory)

    def _trim(self) -> None:
        while len(self._items) > self.max_items:
            key = next(iter(self._items))
            item = self._items.pop(key)
            self.dropped += 1
            self._log.warning("outbox: full (%d items); discarded the oldest record, %s for %s",
                              self.max_items, key, item.topic)
            try:
                os.unlink(self._path(key))
            except FileNotFoundError:
                pass

    def remove(self, key: str, *, defer: bool = False) -> None:
        """Forget an item the broker has acknowledged; an unknown key is ignored.

        The removal is not fsynced: after a power cut an acknowledged record may
        come back and be sent again, which at-least-once delivery allows.  With
        ``defer=True`` only the list changes at once and the file is deleted by
        the next :meth:`purge` (or :meth:`sync`): paho's network thread then never
        waits for the disk, which can take tens of milliseconds while another
        thread forces it.  A record whose file outlives a crash is sent again.

        Raises
        ------
        OSError
            If the item's file exists but cannot be removed (not with ``defer``).
        """
        with self._lock:
            if self._items.pop(key, None) is None or not self.on_disk:
                return
            if defer:
                self._unlink.append(key)
                return
            try:
                os.unlink(self._path(key))
            except FileNotFoundError:
                pass

    @property
    def purge_waiting(self) -> bool:
        """Whether files of records removed with ``defer=True`` are still to be deleted."""
        return bool(self._unlink)

    def purge(self) -> None:
        """Delete the files of the records removed with ``defer=True``.

        Raises
        ------
        OSError
            If a file exists but cannot be removed (the others are still deleted).
        """
        with self._lock:
            keys, self._unlink = self._unlink, []
        failed: OSError | None = None
        for key in keys:
            try:
                os.unlink(self._path(key))
            except FileNotFoundError:
                pass
            except OSError as exc:
                failed = exc
        if failed is not None:
            raise failed

    def pending(self) -> list[OutboxItem]:
        """Items not yet acknowledged, oldest first."""
        with self._lock:
            return list(self._items.values())

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)
