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

    ``flock`` on the directory itself (which needs no write permission, so a
    read-only state directory still runs, as the README promises): the kernel
    releases it when the process ends in any way (SIGKILL included), so
    nothing stale ever blocks a start.  The holder writes its pid, host and
    start time into ``<dir>/lock`` where it can, which is how a second daemon
    names it in its refusal.  A directory that cannot be made at all is not
    locked (``problem`` says why): nothing can be written in it anyway.

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
        self.problem: str | None = None
        self._fd: int | None = None
        try:
            self.directory.mkdir(parents=True, exist_ok=True, mode=0o700)
        except OSError as exc:
            self.problem = f"state.dir {directory} cannot be made ({explain_os_error(exc, self.directory)})"
            return
        fd = os.open(self.directory, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            try:
                holder = self.path.read_bytes()[:512].decode("utf-8", "replace").strip()
            except OSError:
                holder = ""
            raise StateDirInUse(f"state directory {self.directory} is in use by another shiftwatch "
                                f"({holder or 'it did not say which'}); two daemons must not share one "
                                "state.dir") from None
        except BaseException:
            os.close(fd)
            raise
        self._fd = fd
        stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        text = f"pid {os.getpid()} on host {socket.gethostname()}, started {stamp}\n"
        try:  # only names the holder; the lock is on the directory
            wfd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                os.write(wfd, text.encode())
            finally:
                os.close(wfd)
        except OSError:
            pass

    def release(self) -> None:
        """Give the lock up."""
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)
