"""Small helpers for files that must survive a power cut."""

from __future__ import annotations

import os
from pathlib import Path


def fsync_dir(directory: Path) -> None:
    """Force a directory's entries (a rename, a new file) to disk."""
    fd = os.open(directory, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def explain_os_error(exc: OSError, directory: Path) -> str:
    """What went wrong with a file in ``directory``, in an operator's words.

    A directory (or its parent) that is a file gives EEXIST or ENOTDIR, which
    name no culprit; that case names the file in the way.
    """
    for d in (directory, *list(directory.parents)[:1]):
        if os.path.lexists(d) and not os.path.isdir(d):
            return f"{d} is a file, not a directory; move it away"
    return str(exc.strerror or exc)


#: The file in ``state.dir`` that one running daemon holds locked.
LOCK_NAME = "lock"


class StateDirInUse(RuntimeError):
    """Another process holds the state directory; the message names it."""


class StateDirLock:
    """An exclusive lock on a state directory, held for the life of one daemon.

    ``flock`` on ``<dir>/lock``: the kernel releases it when the process ends
    in any way (SIGKILL included), so a stale lock file never blocks a start.
    The holder writes its pid, host and start time into the file, which is how
    a second daemon names it in its refusal.

    Examples
    --------
    >>> import tempfile
    >>> d = tempfile.mkdtemp()
    >>> first = StateDirLock(d)
    >>> try:
    ...     StateDirLock(d)
    ... except StateDirInUse as exc:
    ...     print(str(exc).split(" (")[0])  # doctest: +ELLIPSIS
    state directory ... is in use by another shiftwatch
    >>> first.release()
    >>> StateDirLock(d).release()
    """

    def __init__(self, directory: str | Path) -> None:
        import fcntl
        import socket
        import time

        self.directory = Path(directory)
        self.path = self.directory / LOCK_NAME
        self.directory.mkdir(parents=True, exist_ok=True, mode=0o700)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                holder = os.pread(fd, 512, 0).decode("utf-8", "replace").strip()
            finally:
                os.close(fd)
            raise StateDirInUse(f"state directory {self.directory} is in use by another shiftwatch "
                                f"({holder or 'holder unknown'}); two daemons must not share one "
                                "state.dir") from None
        except BaseException:
            os.close(fd)
            raise
        stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        text = f"pid {os.getpid()} on host {socket.gethostname()}, started {stamp}\n".encode()
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, text, 0)
        except OSError:
            pass  # the lock itself is what counts; the text only names the holder
        self._fd: int | None = fd

    def release(self) -> None:
        """Give the lock up (the file stays; it is never read for anything but the name)."""
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)
