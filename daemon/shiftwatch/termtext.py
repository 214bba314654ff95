"""Text from files and the network made safe to print on a terminal.

A stream name, a header or a file name comes from the data, not from the person at the
terminal, and may hold control characters: ECMA-48's C0 (0x00-0x1F, DEL) and C1 (U+0080-U+009F)
controls, ESC opening a control sequence that a terminal emulator obeys (colours, cursor moves,
its window title).  :func:`printable` writes each character that is not printable
(``str.isprintable``: controls, format characters such as bidirectional overrides, and spaces
other than the ASCII space) as Python's ``repr`` would, ``\\x1b``, ``\\u202e``, and leaves the
rest as it was.
"""

from __future__ import annotations


def printable(text: str, keep: str = "") -> str:
    """``text`` with every character that is not printable (except those in ``keep``, such as
    the line breaks of a message of several lines) escaped as ``repr`` escapes it."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() or c in keep else repr(c)[1:-1] for c in text)


def log_text(text: str, limit: int = 120) -> str:
    """Topic or stream text made safe for one log line: at most ``limit`` characters (and
    ``...`` when cut), each one that is not printable written as ``?``."""
    clean = "".join(c if c.isprintable() else "?" for c in text[:limit])
    return clean if len(text) <= limit else clean + "..."


def one_line(exc: BaseException, limit: int = 300) -> str:
    """An exception as a short log phrase (its type when it has no message)."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= limit else text[:limit - 3] + "..."
