"""Helpers of the young level's loop (StreamEngine._young_loop): a CUSUM bank's sums and
rows for its recursion, the least sums that reach its limits, and the young level's fields.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.selfstart import SelfStart
from shiftwatch.core.sequential import SequentialTest

FloatArray = NDArray[np.float64]

def _small_bank(test: SequentialTest) -> tuple[list[float] | None, tuple[float, ...],
                                              tuple[tuple[int, int, float, float], ...], float]:
    """For :meth:`StreamEngine._young_loop`: a CUSUM bank's sums as a list, its charts' h
    twice over (upper, lower), each chart's row for the recursion (:func:`_chart_rows`),
    and the test's threshold; the sums are None for a test that updates itself (any other
    test, or a bank of one chart)."""
    small = getattr(test, "small_sums", None)
    c = small() if small is not None else None
    if c is None:
        return None, (), (), test.threshold
    ks, hs = test.ks, test.hs  # type: ignore[attr-defined]
    return c, hs + hs, _chart_rows(ks, hs), test.threshold


def _least_reaching(h: float, frac: float) -> float:
    """The least double ``c`` for which ``c / h >= frac`` (``h`` and ``frac`` positive and finite):
    division by a positive ``h`` is correctly rounded and so never decreasing in ``c``,
    and for every ``c >= 0`` the comparison ``c >= _least_reaching(h, frac)`` is
    ``c / h >= frac``, whatever the rounding does near the boundary."""
    c = frac * h
    while c > 0.0 and c / h >= frac:
        c = math.nextafter(c, -math.inf)
    while not c / h >= frac:
        c = math.nextafter(c, math.inf)
    return c


@functools.lru_cache(maxsize=64)
def _four_terms(khs: tuple[tuple[int, int, float, float], ...], screen: float, calm: float, on: bool
                ) -> tuple[float, float, float, float, float, float, float, float, float, float, float, float,
                           float, float, float, float, bool]:
    """For :meth:`StreamEngine._young_loop`'s bank of four charts: each chart's k and h, and
    the least sums (:func:`_least_reaching`) at which its ``C / h`` reaches ``screen`` and
    ``calm`` (YOUNG_SPLIT_SCREEN and YOUNG_CALM times the threshold); last, whether those
    limits stand for the divisions (``on``: YOUNG_LIMITS, and the calm limit never below
    the screen's, as the loop checks it only past the screen's).  The young test's statistic is the largest
    ``C / h`` of the bank, and the loop only compares it with those fractions: a sum
    compared with its chart's limits as the recursion sets it gives the same answer as the
    eight divisions and their maximum (tests/core/test_young_limits.py)."""
    (_, _, k0, h0), (_, _, k1, h1), (_, _, k2, h2), (_, _, k3, h3) = khs
    # (each product of a fraction and an h a normal double far from overflow: then the least
    # sum lies within a few steps of it, and _least_reaching's loops end at once)
    ok = on and all(0.0 < v < math.inf for v in (screen, calm, h0, h1, h2, h3)) and all(
        1e-300 < f * h < 1e300 for f in (screen, calm) for h in (h0, h1, h2, h3))
    if not ok:
        inf = math.inf
        return k0, h0, inf, inf, k1, h1, inf, inf, k2, h2, inf, inf, k3, h3, inf, inf, False
    s = [_least_reaching(h, screen) for h in (h0, h1, h2, h3)]
    q = [_least_reaching(h, calm) for h in (h0, h1, h2, h3)]
    ok = all(a <= b for a, b in zip(s, q))
    return k0, h0, s[0], q[0], k1, h1, s[1], q[1], k2, h2, s[2], q[2], k3, h3, s[3], q[3], ok


def _young_fields(ys: SelfStart) -> tuple[int, float, float, int, float | None, float | None, float,
                                        float | None, float]:
    """The fields of a young level that :meth:`StreamEngine._young_loop` changes, for its
    local variables."""
    return ys.n, ys.mean, ys.ss, ys.df, ys.first, ys.prev, ys.lag, ys.last, ys.vm


def _young_put(ys: SelfStart, n: int, mean: float, ss: float, df: int, first: float | None,
               prev: float | None, lag: float, last: float | None, vm: float) -> None:
    """:meth:`StreamEngine._young_loop`'s local variables written back to the young level."""
    ys.n, ys.mean, ys.ss, ys.df, ys.first, ys.prev, ys.lag, ys.last, ys.vm = (
        n, mean, ss, df, first, prev, lag, last, vm)


def _chart_rows(ks: tuple[float, ...], hs: tuple[float, ...]) -> tuple[tuple[int, int, float, float], ...]:
    """For the young loop's CUSUM recursion: each chart's place among the sums (upper,
    lower), its k and its h."""
    m = len(ks)
    return tuple((j, m + j, k, h) for j, (k, h) in enumerate(zip(ks, hs)))


def _young_from(values: FloatArray) -> SelfStart:
    """A self-starting level of unknown spread over these samples."""
    ys = SelfStart(None)
    for v in values.tolist():
        ys.add(v)
    return ys
