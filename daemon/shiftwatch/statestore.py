"""Snapshots of every stream's engine state, written atomically.

The daemon saves the states periodically and on shutdown, and loads them at
start, so a restart carries on where it stopped instead of warming up again.

File format
-----------
One gzip member (``streams.json.gz``) holding JSON lines::

    {"format": "shiftwatch-state", "schema_version": 1, "streams": N, "meta": {...}}
    ["<stream name>", {<engine state>}]        N lines, one per stream
    {"end": N}

The last line proves the file is complete.  ``meta`` is the caller's; the
daemon keeps there ``saved_at``, ``journal`` (the token of the journal that
belongs to the snapshot) and ``filters`` (stream name to the ``topic`` of the
config entry its engine was made for; older snapshots lack it).  Engine states are plain JSON data
except that lists of 8 or more floats (the sample windows) are stored as
``{"$f64": "<base64 of little-endian float64>"}``.  On 1,000 streams of 2,400
floats this made saving about 1.5-3 times faster than writing the floats as
JSON text (the float-to-text conversion dominates), loading no slower, and
kept every bit of every float, NaN and infinities included.  A dict whose only
key is ``$f64`` or ``$dict`` is wrapped as ``{"$dict": {...}}`` so no state can
be mistaken for an encoded list.  Compression is gzip level 1: the windows are
noisy floats that higher levels barely shrink but take longer over.

Writing is atomic: a temporary file in the same directory is written, flushed
and fsynced, renamed over the snapshot and the directory is fsynced, so the
snapshot on disk is always a complete old one or a complete new one.
"""

from __future__ import annotations

import base64
import gzip
import json
import logging
import os
import tempfile
import zlib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from shiftwatch.fsutil import fsync_dir

__all__ = ["SCHEMA_VERSION", "SNAPSHOT_NAME", "StateStore"]

#: Version of the snapshot layout; a snapshot with another version is set aside, not read.
SCHEMA_VERSION = 1

#: File name of the snapshot inside the store's directory.
SNAPSHOT_NAME = "streams.json.gz"

_FORMAT = "shiftwatch-state"
_TMP_PREFIX = f".{SNAPSHOT_NAME}."
_TMP_SUFFIX = ".tmp"
_MIN_PACKED = 8  # shorter float lists stay readable JSON
#: Float lists from this length on are packed (a float64 array is packed at any length).
PACKED_FROM = _MIN_PACKED
_COMPRESSLEVEL = 1


class _BadSnapshot(Exception):
    """The snapshot's content cannot be used; ``kind`` says how it is set aside."""

    def __init__(self, kind: str, reason: str) -> None:
        super().__init__(reason)
        self.kind = kind


# ------------------------------------------------------------------ encoding
def _is_float_list(o: Any) -> bool:
    # The element types are gathered in C (map, set); a window of 400 floats
    # has one, so the check costs a fraction of a test per element.
    return len(o) >= _MIN_PACKED and all(issubclass(t, float) for t in set(map(type, o)))


#: Types _encode gives back as they are, tested before the call (most of a state's
#: entries are numbers: about 60 of the 72 calls a stream's state made).
_PLAIN = frozenset((float, int, str, bool, type(None)))


def _encode(o: Any) -> Any:
    """Replace long float lists by packed base64 and escape marker-like dicts."""
    if isinstance(o, dict):
        plain = _PLAIN
        d = {k: v if type(v) in plain else _encode(v) for k, v in o.items()}
        if len(d) == 1 and ("$f64" in d or "$dict" in d):
            return {"$dict": d}
        return d
    if isinstance(o, (list, tuple)):
        if _is_float_list(o):
            return {"$f64": base64.b64encode(np.array(o, dtype="<f8").tobytes()).decode("ascii")}
        plain = _PLAIN
        return [x if type(x) in plain else _encode(x) for x in o]
    if isinstance(o, np.ndarray) and o.ndim == 1 and o.dtype.kind == "f":
        return {"$f64": base64.b64encode(o.astype("<f8").tobytes()).decode("ascii")}
    return o


class _Packed(bytes):
    """A packed float list, checked when the snapshot is read and unpacked when its
    stream's state is (see :class:`SavedStates`)."""

    __slots__ = ()


def _decode(o: Any, packed: bool = False) -> Any:
    if isinstance(o, dict):
        if len(o) == 1:
            if "$f64" in o:
                raw = base64.b64decode(o["$f64"], validate=True)
                if len(raw) % 8:
                    raise ValueError("packed float list has a partial float")
                return _Packed(raw) if packed else np.frombuffer(raw, dtype="<f8").tolist()
            if "$dict" in o:
                inner = o["$dict"]
                if not isinstance(inner, dict):
                    raise ValueError("escaped dict is not a dict")
                return {k: _decode(v, packed) for k, v in inner.items()}
        return {k: _decode(v, packed) for k, v in o.items()}
    if isinstance(o, list):
        return [_decode(x, packed) for x in o]
    return o


def _unpack(o: Any) -> Any:
    if isinstance(o, _Packed):
        return np.frombuffer(o, dtype="<f8").tolist()
    if isinstance(o, dict):
        return {k: _unpack(v) for k, v in o.items()}
    if isinstance(o, list):
        return [_unpack(x) for x in o]
    return o


class SavedStates(Mapping[str, dict[str, Any]]):
    """The streams' states of a snapshot, by name; each is unpacked when it is read.

    Every packed float list was decoded and checked when the snapshot was read,
    and is held as its 8 bytes a float until then.  Unpacked all at once, the
    windows of 10,000 streams were lists of float objects 3 to 4 times that size
    (about 270 MB for a moment at every start); read one stream at a time, as
    the daemon restores them, only the stream at hand is.
    """

    __slots__ = ("_packed",)

    def __init__(self, packed: dict[str, dict[str, Any]]) -> None:
        self._packed = packed

    def __getitem__(self, name: str) -> dict[str, Any]:
        state: dict[str, Any] = _unpack(self._packed[name])
        return state

    def __iter__(self) -> Iterator[str]:
        return iter(self._packed)

    def __len__(self) -> int:
        return len(self._packed)

    def __repr__(self) -> str:
        return repr(dict(self.items()))


def _dumps(o: Any) -> bytes:
    return json.dumps(o, separators=(",", ":"), ensure_ascii=False).encode("utf-8") + b"\n"


def _lines(streams: Mapping[str, Mapping[str, Any]], meta: Mapping[str, Any]) -> Iterator[bytes]:
    yield _dumps({"format": _FORMAT, "schema_version": SCHEMA_VERSION, "streams": len(streams),
                  "meta": _encode(dict(meta))})
    for name, state in streams.items():
        if not isinstance(name, str):
            raise TypeError(f"stream names must be str, got {name!r}")
        yield _dumps([name, _encode(dict(state))])
    yield _dumps({"end": len(streams)})


def _parse(lines: Iterator[bytes]) -> tuple[SavedStates, dict[str, Any]]:
    """Decode the snapshot's lines; raises _BadSnapshot for anything unusable."""
    first = next(lines, None)
    if first is None:
        raise _BadSnapshot("corrupt", "empty")
    header = json.loads(first)
    if not isinstance(header, dict) or header.get("format") != _FORMAT:
        raise _BadSnapshot("corrupt", "not a shiftwatch state snapshot")
    version = header.get("schema_version")
    if version != SCHEMA_VERSION:
        raise _BadSnapshot("unknown", f"schema version {version!r}, this build reads {SCHEMA_VERSION}")
    count = header.get("streams")
    meta = _decode(header.get("meta"))
    if not isinstance(count, int) or count < 0 or not isinstance(meta, dict):
        raise _BadSnapshot("corrupt", "malformed header")
    streams: dict[str, dict[str, Any]] = {}
    for _ in range(count):
        line = next(lines, None)
        if line is None:
            raise _BadSnapshot("corrupt", f"ends after {len(streams)} of {count} streams")
        item = json.loads(line)
        if (not isinstance(item, list) or len(item) != 2 or not isinstance(item[0], str)
                or not isinstance(item[1], dict)):
            raise _BadSnapshot("corrupt", "malformed stream entry")
        streams[item[0]] = _decode(item[1], packed=True)
    last = next(lines, None)
    if last is None or json.loads(last) != {"end": count}:
        raise _BadSnapshot("corrupt", "the end marker is missing")
    if next(lines, None) is not None:
        raise _BadSnapshot("corrupt", "data after the end marker")
    return SavedStates(streams), meta


class StateStore:
    """Saves and loads the engine states of all streams in one snapshot file.

    Parameters
    ----------
    directory : where the snapshot lives; created on the first save.
    logger : where to log moved-aside snapshots and removed leftovers.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     store = StateStore(d)
    ...     store.load()
    ...     store.save({"line1/fill_g": {"state": "warming_up", "values": [1.0, 2.0]}}, {"at": 1.5})
    ...     store.load()
    ({}, {})
    ({'line1/fill_g': {'state': 'warming_up', 'values': [1.0, 2.0]}}, {'at': 1.5})
    """

    def __init__(self, directory: str | Path, *, logger: logging.Logger | None = None) -> None:
        self.directory = Path(directory)
        self.path = self.directory / SNAPSHOT_NAME
        self._log = logger if logger is not None else logging.getLogger(__name__)

    def save(self, streams: Mapping[str, Mapping[str, Any]], meta: Mapping[str, Any]) -> None:
        """Write a new snapshot, replacing the old one atomically.

        Parameters
        ----------
        streams : engine state (``StreamEngine.get_state()``) by stream name.
        meta : JSON-able facts about the snapshot (e.g. when it was taken).

        Raises
        ------
        OSError
            If the snapshot could not be written; the previous one is then untouched.
        TypeError, ValueError
            If a state holds something JSON cannot represent.
        """
        self.directory.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=_TMP_PREFIX, suffix=_TMP_SUFFIX, dir=self.directory)
        try:
            with open(fd, "wb") as raw:
                with gzip.GzipFile(filename="", mode="wb", fileobj=raw,
                                   compresslevel=_COMPRESSLEVEL, mtime=0) as gz:
                    for line in _lines(streams, meta):
                        gz.write(line)
                raw.flush()
                os.fsync(raw.fileno())
            os.replace(tmp, self.path)
        except BaseException:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise
        fsync_dir(self.directory)

    def load(self) -> tuple[Mapping[str, dict[str, Any]], dict[str, Any]]:
        """Read the snapshot.

        Leftover temporary files of an interrupted save are removed.  A snapshot
        that is corrupt or truncated is renamed to ``<name>.corrupt-<n>``, one
        with an unknown schema version to ``<name>.unknown-<n>``, with one log
        line, and nothing is loaded.

        Returns
        -------
        tuple of (streams, meta)
            ``({}, {})`` when there is no usable snapshot; ``streams`` is a
            :class:`SavedStates`, whose states are unpacked as they are read.

        Raises
        ------
        OSError
            Only when the file exists but cannot be read at all (e.g. an I/O
            error); bad content never raises.
        """
        self._remove_leftovers()
        try:
            f = open(self.path, "rb")  # noqa: SIM115  opened apart for FileNotFoundError; closed by the with
        except FileNotFoundError:
            return {}, {}
        try:
            with f, gzip.GzipFile(filename="", mode="rb", fileobj=f) as gz:
                return _parse(iter(gz))
        except _BadSnapshot as exc:
            self._set_aside(exc.kind, str(exc))
        except (gzip.BadGzipFile, EOFError, zlib.error, ValueError, TypeError,
                RecursionError) as exc:
            # ValueError covers JSON, UTF-8 and base64 errors.
            self._set_aside("corrupt", f"{type(exc).__name__}: {exc}")
        return {}, {}

    def _set_aside(self, kind: str, reason: str) -> None:
        n = 1
        while (aside := self.path.with_name(f"{SNAPSHOT_NAME}.{kind}-{n}")).exists():
            n += 1
        what = "has an unknown schema" if kind == "unknown" else "is unreadable"
        try:
            os.replace(self.path, aside)
        except OSError as exc:
            self._log.error("state snapshot %s %s (%s) and could not be moved aside (%s); "
                            "starting without saved state", self.path, what, reason, exc)
            return
        self._log.warning("state snapshot %s %s (%s); moved to %s, starting without saved state",
                          self.path, what, reason, aside.name)

    def _remove_leftovers(self) -> None:
        try:
            names = os.listdir(self.directory)
        except FileNotFoundError:
            return
        for name in names:
            if name.startswith(_TMP_PREFIX) and name.endswith(_TMP_SUFFIX):
                try:
                    os.unlink(self.directory / name)
                except OSError as exc:
                    self._log.warning("could not remove leftover %s of an interrupted snapshot: %s",
                                      name, exc)
                else:
                    self._log.info("removed leftover %s of an interrupted snapshot", name)


#: An engine state made JSON-ready (packed float lists) and back: the cluster state
#: (shiftwatch.clusterstate) keeps each stream's state in this form.
encode_state = _encode
decode_state = _decode
