"""Two-sided CUSUM test on standardised residuals.

The upper and lower sums are::

    C+_t = max(0, C+_{t-1} + z_t - k)
    C-_t = max(0, C-_{t-1} - z_t - k)

and the test trips at the first sample where either exceeds ``h`` (strictly,
the convention of the run-length tables in :mod:`shiftwatch.core.arl`).

:meth:`CusumTest.update` is vectorised with the running-minimum form of the
Lindley recursion: with ``S_t = sum_{i<=t} (z_i - k)`` and ``S_0 = 0``,
``C+_t = S_t - min(min_{1<=j<=t} S_j, S_0 - C+_0)``; the lower side is the
same with ``-z``.  Batches are processed in blocks of at most
:data:`BLOCK` samples, so the cumulative sums stay small (rounding does not
grow with the batch length) and a trip early in a long batch stops the work.
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

from shiftwatch.core.arl import design_h
from shiftwatch.core.sequential import SequentialTest

FloatArray = NDArray[np.float64]

__all__ = ["BLOCK", "CusumTest", "tabular_cusum"]

#: Samples processed per vectorised block inside :meth:`CusumTest.update`.
BLOCK = 4096


def _lindley(d: FloatArray, c0: float) -> FloatArray:
    """``C_t = max(0, C_{t-1} + d_t)`` from ``C_0 = c0``, vectorised."""
    s = np.cumsum(d)
    floor = np.minimum.accumulate(s)
    np.minimum(floor, -c0, out=floor)
    out: FloatArray = s - floor
    return out


class CusumTest(SequentialTest):
    """Two-sided CUSUM on standardised residuals.

    Parameters
    ----------
    k : float
        Reference value (allowance) in sigma units, ``k >= 0``; ``k = d/2``
        is optimal for detecting a shift of ``d`` sigma.
    h : float
        Decision interval in sigma units, ``h > 0``.

    Attributes
    ----------
    k, h : float
        The design parameters, as given.

    Examples
    --------
    >>> import numpy as np
    >>> t = CusumTest(k=0.5, h=4.0)
    >>> t.update(np.array([0.1, -0.3, 2.0, 2.0, 2.0, 2.0, 2.0]))
    4
    >>> t.statistic, t.direction
    (4.5, 1)
    >>> t.reset(); t.statistic
    0.0
    """

    name: ClassVar[str] = "cusum"

    def __init__(self, k: float, h: float) -> None:
        kf = float(k)
        hf = float(h)
        if not (math.isfinite(kf) and kf >= 0.0):
            raise ValueError(f"k must be a finite number >= 0 (sigma units), got {k!r}")
        if not (math.isfinite(hf) and hf > 0.0):
            raise ValueError(f"h must be a finite number > 0 (sigma units), got {h!r}")
        self.k = kf
        self.h = hf
        self._c_plus = 0.0
        self._c_minus = 0.0
        self._direction = 0
        self.reset()

    @classmethod
    def design(cls, arl0: float, min_shift: float) -> CusumTest:
        """Build the test for a target in-control ARL and smallest shift.

        Uses ``k = min_shift / 2`` and ``h = design_h(arl0, k)``.

        Parameters
        ----------
        arl0 : float
            Two-sided in-control ARL in samples (> 1).
        min_shift : float
            Smallest shift worth detecting quickly, in sigma units (> 0).

        Returns
        -------
        CusumTest

        Examples
        --------
        >>> t = CusumTest.design(arl0=168.3, min_shift=1.0)
        >>> t.k, round(t.h, 2)
        (0.5, 4.0)
        """
        ms = float(min_shift)
        if not (math.isfinite(ms) and ms > 0.0):
            raise ValueError(
                f"min_shift must be a finite number > 0 (sigma units), got {min_shift!r}"
            )
        a = float(arl0)
        if not (math.isfinite(a) and a > 1.0):
            raise ValueError(f"arl0 must be a finite number > 1 (samples), got {arl0!r}")
        k = ms / 2.0
        return cls(k=k, h=design_h(a, k))

    @property
    def threshold(self) -> float:
        return self.h

    @property
    def statistic(self) -> float:
        return max(self._c_plus, self._c_minus)

    @property
    def direction(self) -> int:
        return self._direction

    @property
    def c_plus(self) -> float:
        """Current upper sum (sigma units)."""
        return self._c_plus

    @property
    def c_minus(self) -> float:
        """Current lower sum (sigma units, non-negative)."""
        return self._c_minus

    def update(self, z: FloatArray) -> int:
        x = np.asarray(z, dtype=np.float64).ravel()
        n = x.shape[0]
        k = self.k
        h = self.h
        start = 0
        while start < n:
            stop = min(n, start + BLOCK)
            blk = x[start:stop]
            up = _lindley(blk - k, self._c_plus)
            lo = _lindley(-blk - k, self._c_minus)
            hit = (up > h) | (lo > h)
            if hit.any():
                i = int(np.argmax(hit))
                cu = float(up[i])
                cl = float(lo[i])
                self._c_plus = cu
                self._c_minus = cl
                self._direction = 1 if cu > h and cu >= cl else -1
                return start + i
            self._c_plus = float(up[-1])
            self._c_minus = float(lo[-1])
            start = stop
        return -1

    def reset(self) -> None:
        self._c_plus = 0.0
        self._c_minus = 0.0
        self._direction = 0

    def get_state(self) -> dict[str, Any]:
        return {
            "c_plus": float(self._c_plus),
            "c_minus": float(self._c_minus),
            "direction": int(self._direction),
        }

    def set_state(self, state: dict[str, Any]) -> None:
        self._c_plus = float(state["c_plus"])
        self._c_minus = float(state["c_minus"])
        self._direction = int(state.get("direction", 0))

    def __repr__(self) -> str:
        return f"CusumTest(k={self.k!r}, h={self.h!r})"


def tabular_cusum(
    x: ArrayLike,
    target: float,
    sigma: float,
    k: float,
    h: float,
) -> tuple[FloatArray, FloatArray, int]:
    """The textbook tabular CUSUM, in the original units of the data.

    With ``K = k sigma`` and ``H = h sigma``::

        C+_i = max(0, x_i - (target + K) + C+_{i-1})
        C-_i = max(0, (target - K) - x_i + C-_{i-1})

    starting from zero, as in Montgomery's *Introduction to Statistical
    Quality Control* and the NIST/SEMATECH e-Handbook (section 6.3.2.3).

    Parameters
    ----------
    x : array_like
        Observations (or sample means) in original units.
    target : float
        In-control mean.
    sigma : float
        Standard deviation of ``x`` (> 0).
    k, h : float
        Reference value and decision interval in sigma units.

    Returns
    -------
    c_plus, c_minus : ndarray
        The upper and lower sums for every sample, in the ORIGINAL units of
        ``x`` (divide by ``sigma`` for sigma units).  ``c_minus`` is
        non-negative.
    first_signal : int
        0-based index of the first sample where either sum exceeds ``H``,
        or -1 if none does.  The sums are computed for the whole series
        (they are not reset after a signal).

    Examples
    --------
    >>> cp, cm, i = tabular_cusum([10.0, 12.0, 13.0, 9.0], 10.0, 1.0, 0.5, 3.0)
    >>> cp.tolist(), cm.tolist(), i
    ([0.0, 1.5, 4.0, 2.5], [0.0, 0.0, 0.0, 0.5], 2)
    """
    xs = np.asarray(x, dtype=np.float64).ravel()
    s = float(sigma)
    if not (math.isfinite(s) and s > 0.0):
        raise ValueError(f"sigma must be a finite number > 0, got {sigma!r}")
    kf, hf, t = float(k), float(h), float(target)
    if not (math.isfinite(kf) and kf >= 0.0):
        raise ValueError(f"k must be a finite number >= 0 (sigma units), got {k!r}")
    if not (math.isfinite(hf) and hf > 0.0):
        raise ValueError(f"h must be a finite number > 0 (sigma units), got {h!r}")
    big_k = kf * s
    big_h = hf * s
    c_plus = np.empty_like(xs)
    c_minus = np.empty_like(xs)
    cp = cm = 0.0
    first = -1
    for i, xi in enumerate(xs.tolist()):
        cp = max(0.0, xi - (t + big_k) + cp)
        cm = max(0.0, (t - big_k) - xi + cm)
        c_plus[i] = cp
        c_minus[i] = cm
        if first < 0 and (cp > big_h or cm > big_h):
            first = i
    return c_plus, c_minus, first
