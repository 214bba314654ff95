"""glibc's heap: giving freed memory back, and keeping it for a command that streams a file.

glibc's malloc serves a block of 128 KB or more with an mmap of its own and unmaps it when
it is freed, and gives the top of its heap back to the system when more than 128 KB of it
is free.  It raises the first limit to the largest block it has seen freed, and the second
to twice that, which is not enough for a replay: each chunk allocates and frees several
arrays of a few hundred kilobytes to a few megabytes, so the top of the heap is given back
and taken again chunk after chunk, a page fault for every page taken again.  Without
:func:`keep_freed_memory`: about 66,000 faults in a one-process replay of the
2.4-million-row benchmark file and 105,000 with ``--jobs 2``; with it 15,000 and 29,000
(``perf stat``, 2026-12-04), at the same peak size.

Everything here is a no-op where glibc is not the C library.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

#: mallopt's parameters (glibc's malloc.h).
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
#: A streaming command's limits: blocks below this are served from the heap, and this much
#: free memory at the top of the heap is kept (32 MB, the largest mmap threshold glibc's
#: documentation names for 64-bit systems).
KEEP_BYTES = 32 << 20


def _libc() -> Any:
    try:
        import ctypes

        return ctypes.CDLL("libc.so.6")
    except OSError:
        return None


def malloc_trim() -> Callable[[int], int] | None:
    """glibc's ``malloc_trim`` (give free heap memory back to the system), or None."""
    libc = _libc()
    return None if libc is None else getattr(libc, "malloc_trim", None)


def keep_freed_memory(limit: int = KEEP_BYTES) -> bool:
    """Serve blocks below ``limit`` from the heap and keep up to ``limit`` of freed memory, so a
    command that allocates and frees the same large arrays over and over reuses their pages
    instead of having them mapped again.  True when glibc took both settings.  For a command
    that runs to its end (a replay); the daemon gives freed memory back instead."""
    libc = _libc()
    mallopt = None if libc is None else getattr(libc, "mallopt", None)
    if mallopt is None:
        return False
    return bool(mallopt(M_MMAP_THRESHOLD, limit)) and bool(mallopt(M_TRIM_THRESHOLD, limit))
