"""systemd readiness and watchdog notifications, without libsystemd.

Implements the datagram protocol of ``sd_notify(3)``: newline-separated
``KEY=VALUE`` assignments sent to the ``AF_UNIX`` socket named by
``$NOTIFY_SOCKET`` (a filesystem path, or an abstract name written with a
leading ``@``).  Typical messages: ``READY=1``, ``STOPPING=1``, ``WATCHDOG=1``
and ``STATUS=...``.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Mapping

__all__ = ["sd_notify", "watchdog_interval"]


def sd_notify(message: str, *, env: Mapping[str, str] | None = None) -> bool:
    """Send ``message`` to the service manager.

    Parameters
    ----------
    message : e.g. ``"READY=1"`` or ``"WATCHDOG=1\\nSTATUS=watching 12 streams"``.
    env : where to read ``NOTIFY_SOCKET``; ``os.environ`` by default.

    Returns
    -------
    bool
        True when the datagram was sent; False when not running under a
        service manager (``NOTIFY_SOCKET`` unset or empty), when the address
        is not a supported kind, the message is empty, or sending failed.
        Never raises.

    Examples
    --------
    >>> sd_notify("READY=1", env={})
    False
    """
    addr = (os.environ if env is None else env).get("NOTIFY_SOCKET", "")
    if not message or not addr:
        return False
    if addr.startswith("@"):
        target = "\0" + addr[1:]  # abstract namespace (Linux)
    elif addr.startswith("/"):
        target = addr
    else:
        return False  # e.g. vsock: addresses, which this implementation does not speak
    try:
        data = message.encode("utf-8")
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
            return sock.sendto(data, target) == len(data)
    except (OSError, ValueError):
        return False


def watchdog_interval(env: Mapping[str, str] | None = None) -> float | None:
    """The watchdog timeout systemd expects, in seconds, or None when there is none.

    ``WATCHDOG_USEC`` gives the timeout; when ``WATCHDOG_PID`` is set it must
    be this process's id (otherwise the watchdog is meant for another
    process).  Send ``WATCHDOG=1`` at least every half of the returned interval.

    Parameters
    ----------
    env : where to read the variables; ``os.environ`` by default.

    Returns
    -------
    float or None
        None when unset, malformed, zero, or meant for another process.

    Examples
    --------
    >>> watchdog_interval({"WATCHDOG_USEC": "30000000"})
    30.0
    >>> watchdog_interval({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "0"}) is None
    True
    """
    e = os.environ if env is None else env
    usec = e.get("WATCHDOG_USEC", "")
    pid = e.get("WATCHDOG_PID")
    if pid is not None and pid != "" and (not _is_number(pid) or int(pid) != os.getpid()):
        return None
    if not _is_number(usec) or int(usec) <= 0:
        return None
    return int(usec) / 1_000_000


def _is_number(s: str) -> bool:
    return s.isascii() and s.isdigit()
