"""The window of a stream's newest samples, and the blocks of memory windows are held in.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core import baseline as _baseline

FloatArray = NDArray[np.float64]

class Window:
    """The newest samples of one stream: values and times, the two rows of one small array.

    Holds at least the last ``keep`` samples (up to ``keep + slack`` between
    trims, so long streams shift memory rarely).  Memory per stream is about
    ``16 (keep + slack)`` bytes; the step fitter with its running sums is
    only built while an event is open.

    Examples
    --------
    >>> w = Window(4, slack=2)
    >>> w.extend(np.arange(5.0), np.arange(5.0)); w.values.tolist()
    [1.0, 2.0, 3.0, 4.0]
    >>> w.extend(np.array([9.0]), np.array([5.0])); w.values.tolist()
    [1.0, 2.0, 3.0, 4.0, 9.0]
    >>> w.drop_front(3); w.values.tolist()
    [4.0, 9.0]
    """

    # The window's (2, capacity) rows are row ``_i`` of a block of _WindowStore.BLOCK
    # windows, reached through the block: a view of its own per window would cost an
    # array object and its shape (about 130 bytes a stream).
    __slots__ = ("_blk", "_i", "_n", "keep")

    def __init__(self, keep: int, slack: int = 8) -> None:
        self.keep = keep
        self._blk, self._i = _WindowStore.of(keep + slack).take()
        self._n = 0

    def __del__(self) -> None:
        try:
            _WindowStore.of(self._blk.shape[2]).give(self._blk, self._i)
        except (AttributeError, TypeError):  # half-built, or the interpreter is shutting down
            pass

    def __len__(self) -> int:
        return self._n

    @property
    def capacity(self) -> int:
        return int(self._blk.shape[2])

    @property
    def rows(self) -> FloatArray:
        """The (2, capacity) array itself: row 0 the values, row 1 the times (a view)."""
        rows: FloatArray = self._blk[self._i]
        return rows

    @property
    def values(self) -> FloatArray:
        return self._blk[self._i, 0, : self._n]

    @property
    def times(self) -> FloatArray:
        return self._blk[self._i, 1, : self._n]

    def extend(self, x: FloatArray, t: FloatArray) -> None:
        m = x.shape[0]
        b = self._blk
        i = self._i
        if m >= self.keep:
            b[i, 0, : self.keep] = x[-self.keep:]
            b[i, 1, : self.keep] = t[-self.keep:]
            self._n = self.keep
            return
        n = self._n
        if n + m > b.shape[2]:
            shift = n + m - self.keep
            b[i, :, : n - shift] = b[i, :, shift:n]
            n -= shift
        b[i, 0, n: n + m] = x
        b[i, 1, n: n + m] = t
        n += m
        # a full window's count: the int of the settings, not one of 32 bytes of its own
        self._n = self.keep if n == self.keep and _baseline.SHARED_VALUES else n

    def push(self, x: float, t: float) -> None:
        """:meth:`extend` by one sample."""
        n = self._n
        b = self._blk
        i = self._i
        if n >= b.shape[2]:
            if self.keep < 2:
                self.extend(np.array([x]), np.array([t]))
                return
            shift = n + 1 - self.keep
            b[i, :, : n - shift] = b[i, :, shift:n]
            n -= shift
        b[i, 0, n] = x
        b[i, 1, n] = t
        self._n = n + 1

    def at(self, j: int) -> tuple[float, float]:
        """The time and value of sample ``j`` (0 is the oldest held)."""
        return float(self._blk[self._i, 1, j]), float(self._blk[self._i, 0, j])

    def drop_front(self, k: int) -> None:
        k = min(k, self._n)
        if k:
            self._blk[self._i, :, : self._n - k] = self._blk[self._i, :, k: self._n]
            self._n -= k

    def reset_to(self, x: FloatArray, t: FloatArray) -> None:
        """Hold exactly these samples (the newest ones, if they do not all fit)."""
        cap = self._blk.shape[2]
        xs = np.asarray(x, dtype=np.float64)[-cap:]
        ts = np.asarray(t, dtype=np.float64)[-cap:]
        self._n = xs.shape[0]
        self._blk[self._i, 0, : self._n] = xs
        self._blk[self._i, 1, : self._n] = ts


class _WindowStore:
    """Memory for the windows of one capacity, handed out from large blocks.

    A daemon holds thousands of windows for as long as it runs.  One small
    allocation each would sit between the short-lived arrays of batch
    processing and keep the memory freed around them from being returned to
    the system; blocks of :attr:`BLOCK` windows keep them together instead.
    A window's row goes back to the store when the window is dropped.
    """

    BLOCK = 128
    _stores: ClassVar[dict[int, _WindowStore]] = {}

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self._free: list[tuple[FloatArray, int]] = []

    @classmethod
    def of(cls, capacity: int) -> _WindowStore:
        store = cls._stores.get(capacity)
        if store is None:
            store = cls._stores[capacity] = cls(capacity)
        return store

    def take(self) -> tuple[FloatArray, int]:
        """A block of (BLOCK, 2, capacity) and the row of it that holds the values and
        times of one window (contents undefined)."""
        if not self._free:
            block = np.empty((self.BLOCK, 2, self.capacity))
            self._free.extend((block, i) for i in range(self.BLOCK - 1, -1, -1))
        return self._free.pop()

    def give(self, block: FloatArray, i: int) -> None:
        self._free.append((block, i))
