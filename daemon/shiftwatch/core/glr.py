"""Window-limited GLR test for a mean shift of unknown size and sign.

The input is a stream of standardised residuals ``z`` that are iid N(0, 1)
in control (known mean 0).  With ``S_t`` the cumulative sum since the last
reset, the test statistic at time ``t`` is the generalised log-likelihood
ratio for "the last ``L`` samples have a common mean ``mu != 0``",
maximised over the change lag ``L``::

    G_t = max_{L in lags, L <= n_t}  (S_t - S_{t-L})**2 / (2 L)

where ``n_t`` is the number of samples since the last reset and every lag is
at most ``window``.  The maximising ``L`` estimates how long ago the shift
started and ``(S_t - S_{t-L}) / L`` estimates its size; its sign is the
direction.  The test is two-sided by construction.

Evaluating every lag up to ``window`` would cost ``window`` operations per
sample.  The default lag set keeps every lag from 1 to 10 and then grows
geometrically by a factor 1.15 up to ``window`` (37 lags for the default
window of 400): neighbouring long lags estimate almost the same segment
mean, so the sparse set gives up very little power.  A denser set (every lag
to 24, then factor 1.12; 49 lags) gave the same median delays within one
sample at a 0.07 higher threshold for the same ARL.

Threshold calibration
---------------------
There is no exact formula for the in-control average run length (ARL) of this
statistic.  :meth:`GlrTest.design` uses the asymptotic shape of the
Siegmund & Venkatraman (1995) approximation (Ann. Statist. 23:255-271) for
the window-limited GLR: the false-alarm rate per sample behaves like
``c**(1/2) * exp(-c) * I(c)`` with ``I`` a slowly varying integral of
``x * nu(x)**2``, so ``log ARL = c - 1/2 log c + (slowly varying terms)``.
The slowly varying terms depend on the exact lag set, so they were fitted
to simulations of this very implementation (see ``_CAL_A`` below and
the script ``tests/bench/calibrate_glr.py``).

Checks with fresh simulations (tests/bench/calibrate_glr.py, 2026-12-02,
window 400, real ARL / requested): 1.072 +- 0.011 at 200, 1.060 +- 0.011 at
1e3, 1.044 +- 0.013 at 1e4, 1.050 +- 0.017 at 1e5 and 1.082 +- 0.024 at
604,800 (threshold 13.672).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from shiftwatch.core.sequential import FloatArray, SequentialTest
from shiftwatch.core.settings import GLR_WINDOW_RANGE

#: Default longest lag.  A 0.5-sigma shift needs about 2 c / 0.25 ~ 110
#: samples to reach the threshold ``c ~ 13.7`` used at ARL 604,800 (simulated
#: median delay 96), so a window of 400 still catches it with room to spare.
DEFAULT_WINDOW = 400

#: Every lag from 1 to this value is evaluated.
DENSE_LAGS = 10

#: Growth factor of the sparse lags above ``DENSE_LAGS``.
LAG_RATIO = 1.15


def default_lags(window: int) -> tuple[int, ...]:
    """Return the default lag set for a given ``window``.

    Every lag from 1 to ``min(window, 10)``, then lags growing geometrically
    by a factor 1.15 (rounded, duplicates removed), always ending with
    ``window`` itself.

    Parameters
    ----------
    window : int
        Longest lag (at least 1).

    Returns
    -------
    tuple of int
        Strictly increasing lags.

    Examples
    --------
    >>> default_lags(10)
    (1, 2, 3, 4, 5, 6, 7, 8, 9, 10)
    >>> default_lags(40)
    (1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 12, 13, 15, 17, 20, 23, 27, 31, 35, 40)
    """
    if window < 1:
        raise ValueError(f"window must be an integer >= 1, got {window!r}")
    lags = list(range(1, min(window, DENSE_LAGS) + 1))
    x = float(DENSE_LAGS)
    while True:
        x *= LAG_RATIO
        lag = round(x)
        if lag >= window:
            break
        if lag > lags[-1]:
            lags.append(lag)
    if lags[-1] != window:
        lags.append(window)
    return tuple(lags)


# Calibration of the threshold c against the two-sided in-control ARL on
# iid N(0, 1), for the DEFAULT lag set (dense 1..10, ratio 1.15):
#
#     log ARL(c) = c - 0.5 * log(c) + A(window) + D / c
#
# The c - 0.5 log c part is the shape of the Siegmund & Venkatraman (1995)
# approximation (Ann. Statist. 23:255-271) with the lag integral treated as
# constant; a free extra B*log(c) term fitted to B = 0.012, so it was
# dropped.  A and D come from our own simulations with
# tests/bench/calibrate_glr.py, run 2026-12-02 (fixed random state):
#   * window 400: direct simulation with resets, 2000 runs at each c in
#     4.0..10.0 (step 0.5, ARL 79..1.8e4) plus the exceedance method on
#     3e9 samples for c in 11..19 (ARL 4.9e4..1e8, >= 30 trips);
#     weighted least squares gives A = 0.9648, D = 0.4366; the fit is
#     within +-4% of every point up to c = 15.25 (ARL 2.9e6) and within
#     the simulation error (5-14%) above;
#   * other windows: exceedance method on 6e8 samples, c in 11..15.5, A
#     fitted with D fixed (residuals within +-6%).
# _ARL_MARGIN is subtracted from every A so the real ARL comes out about 5%
# above the requested one (the product prefers fewer false alarms).
_CAL_A: dict[int, float] = {
    50: 1.0235,
    100: 0.9837,
    200: 0.9625,
    400: 0.9648,
    1000: 0.9423,
    2000: 0.9401,
}
_CAL_D = 0.4366
_ARL_MARGIN = math.log(1.05)


def _log_arl(c: float, window: int) -> float:
    """Calibrated log of the in-control ARL at threshold ``c`` (minus the margin)."""
    return c - 0.5 * math.log(c) + _calibration_constant(window) - _ARL_MARGIN + _CAL_D / c


def _calibration_constant(window: int) -> float:
    """A(window): linear in log(window) between calibrated windows, flat outside."""
    keys = sorted(_CAL_A)
    if window <= keys[0]:
        return _CAL_A[keys[0]]
    if window >= keys[-1]:
        return _CAL_A[keys[-1]]
    for lo, hi in itertools.pairwise(keys):
        if lo <= window <= hi:
            w = (math.log(window) - math.log(lo)) / (math.log(hi) - math.log(lo))
            return (1 - w) * _CAL_A[lo] + w * _CAL_A[hi]
    return _CAL_A[keys[-1]]  # not reached


class GlrTest(SequentialTest):
    """Window-limited two-sided GLR test for a shift in the mean.

    Parameters
    ----------
    threshold : float
        The test trips at the first sample where the statistic (a log
        likelihood ratio) is strictly greater than this value.  Must be
        finite and > 0.  Use :meth:`design` to pick it from a target
        in-control ARL.
    window : int, default 400
        Longest lag considered: only the last ``window`` samples are kept.
    lags : sequence of int, optional
        Lags to evaluate.  Defaults to :func:`default_lags` of ``window``.
        Every lag must be an integer between 1 and ``window``; they are
        sorted and de-duplicated.

    Attributes
    ----------
    window : int
        As given.
    lags : tuple of int
        The lag set actually used (sorted, unique).

    Examples
    --------
    >>> import numpy as np
    >>> test = GlrTest(threshold=10.0, window=100)
    >>> z = np.r_[np.zeros(50), np.full(50, 1.0)]
    >>> test.update(z)
    71
    >>> test.direction, test.onset_lag, round(test.estimated_shift, 3)
    (1, 23, 0.957)
    >>> round(test.statistic, 2)
    10.52
    """

    name = "glr"

    def __init__(
        self,
        threshold: float,
        window: int = DEFAULT_WINDOW,
        lags: Sequence[int] | None = None,
        reference_size: float = math.inf,
    ) -> None:
        try:
            thr = float(threshold)
        except (TypeError, ValueError):
            raise ValueError(
                f"threshold must be a finite number > 0, got {threshold!r}"
            ) from None
        if not (math.isfinite(thr) and thr > 0):
            raise ValueError(f"threshold must be a finite number > 0, got {threshold!r}")
        if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or window < 1:
            raise ValueError(f"window must be an integer >= 1, got {window!r}")
        window = int(window)
        if lags is None:
            lag_tuple = default_lags(window)
        else:
            try:
                raw = list(lags)
            except TypeError:
                raise ValueError(
                    f"lags must be a sequence of integers in 1..window, got {lags!r}"
                ) from None
            if not raw or any(
                isinstance(v, bool)
                or not isinstance(v, (int, np.integer))
                or not 1 <= v <= window
                for v in raw
            ):
                raise ValueError(
                    f"lags must be a non-empty sequence of integers in 1..{window} "
                    f"(the window), got {lags!r}"
                )
            lag_tuple = tuple(sorted({int(v) for v in raw}))
        self._threshold = thr
        self.window = window
        self.lags = lag_tuple
        self._lag_arr = np.asarray(lag_tuple, dtype=np.int64)
        try:
            ref = float(reference_size)
        except (TypeError, ValueError):
            ref = -1.0
        if not ref > 0:
            raise ValueError(f"reference_size must be > 0 (math.inf for a known mean), got {reference_size!r}")
        self.reference_size = ref
        # With the in-control mean estimated from n samples, the sum of L
        # standardised residuals has variance L + L^2 / n, not L: the common
        # error of the estimate adds up over the segment.  Dividing by the
        # true variance keeps the statistic calibrated while the baseline is
        # young, and changes nothing once n is large.
        lag_f = self._lag_arr.astype(np.float64)
        self._half_inv = 0.5 / (lag_f + lag_f * lag_f / ref)
        self.reset()

    # ------------------------------------------------------------------ design
    @classmethod
    def design(cls, arl0: float, window: int = DEFAULT_WINDOW,
               reference_size: float = math.inf) -> GlrTest:
        """Build a test whose two-sided in-control ARL on iid N(0, 1) is ``arl0``.

        Uses the default lag set for ``window``.  The threshold solves the
        calibrated relation ``ARL(c) = arl0`` (see the module docstring).
        Simulated real ARLs are 0-10% above ``arl0`` for ``arl0`` in
        1e2..3e6 (the design aims 5% high); beyond that the relation is
        extrapolated with the theoretical slope.

        Parameters
        ----------
        arl0 : float
            Target in-control average run length in samples, between 50 and
            1e10.
        window : int, default 400
            Longest lag, between 50 and 2000 (the calibrated range).

        Returns
        -------
        GlrTest

        Examples
        --------
        >>> t = GlrTest.design(604800)
        >>> t.window, round(t.threshold, 2)
        (400, 13.67)
        """
        try:
            target = float(arl0)
        except (TypeError, ValueError):
            raise ValueError(f"arl0 must be a number in [50, 1e10], got {arl0!r}") from None
        if not (50 <= target <= 1e10):
            raise ValueError(f"arl0 must be a number in [50, 1e10], got {arl0!r}")
        low, high = GLR_WINDOW_RANGE  # one range: the configuration is refused with it at load
        if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or not (
            low <= window <= high
        ):
            raise ValueError(f"window must be an integer in [{low}, {high}], got {window!r}")
        return cls(threshold_for_arl(target, int(window)), window=int(window),
                   reference_size=reference_size)

    # -------------------------------------------------------------- properties
    @property
    def threshold(self) -> float:
        """Trip level of :attr:`statistic` (a log likelihood ratio)."""
        return self._threshold

    @property
    def statistic(self) -> float:
        """GLR statistic at the last consumed sample (0.0 after reset)."""
        return self._stat

    @property
    def direction(self) -> int:
        """Sign of the maximising segment sum at the last trip, else 0."""
        return self._dir

    @property
    def estimated_shift(self) -> float:
        """Mean of the maximising segment at the last consumed sample.

        In units of the residuals (sigmas).  0.0 after reset.
        """
        return self._shift

    @property
    def onset_lag(self) -> int:
        """Maximising lag at the last consumed sample (0 after reset).

        The shift is estimated to have started ``onset_lag`` samples before
        the sample after the last consumed one, i.e. the last ``onset_lag``
        samples are the shifted segment.
        """
        return self._lag

    # ------------------------------------------------------------------ core
    def reset(self) -> None:
        """Forget all samples; keep threshold, window and lags."""
        self._tail = np.zeros(1, dtype=np.float64)
        self._n = 0
        self._stat = 0.0
        self._dir = 0
        self._shift = 0.0
        self._lag = 0

    def update(self, z: FloatArray) -> int:
        """Feed residuals; return the index of the first trip or -1.

        Vectorised over the batch: one pass of vector operations per lag.
        Samples after the trip index are not consumed.
        """
        x = np.asarray(z, dtype=np.float64).reshape(-1)
        m = x.size
        if m == 0:
            return -1
        tail = self._tail
        t0 = tail.size
        c = np.empty(t0 + m, dtype=np.float64)
        c[:t0] = tail
        np.cumsum(x, out=c[t0:])
        c[t0:] += tail[-1]
        best = _max_stat(c, t0, self.lags, self._half_inv)
        over = np.flatnonzero(best > self._threshold)
        if over.size:
            k = int(over[0])
            tripped = True
        else:
            k = m - 1
            tripped = False
        p = t0 + k
        self._n += k + 1
        self._describe(c, p)
        if not tripped:
            self._dir = 0
        keep = min(self._n, self.window) + 1
        new_tail = c[p + 1 - keep : p + 1].copy()
        new_tail -= new_tail[-1]
        self._tail = new_tail
        return k if tripped else -1

    def _describe(self, c: FloatArray, p: int) -> None:
        """Set statistic, shift, lag and direction for position ``p`` of ``c``."""
        nl = int(np.searchsorted(self._lag_arr, p, side="right"))
        if nl == 0:
            self._stat, self._shift, self._lag, self._dir = 0.0, 0.0, 0, 0
            return
        lags = self._lag_arr[:nl]
        d = c[p] - c[p - lags]
        v = d * d * self._half_inv[:nl]
        j = int(np.argmax(v))
        self._stat = float(v[j])
        self._lag = int(lags[j])
        self._shift = float(d[j] / lags[j])
        self._dir = 1 if d[j] > 0 else (-1 if d[j] < 0 else 0)

    # ----------------------------------------------------------------- state
    def get_state(self) -> dict[str, Any]:
        """Return the changing state as a JSON-serialisable dict.

        Holds the last ``min(n, window) + 1`` cumulative sums (rebased so the
        newest is 0) plus the reported statistic, direction, shift and lag.
        """
        return {
            "n": int(self._n),
            "tail": [float(v) for v in self._tail],
            "statistic": float(self._stat),
            "direction": int(self._dir),
            "estimated_shift": float(self._shift),
            "onset_lag": int(self._lag),
        }

    def set_state(self, state: dict[str, Any]) -> None:
        """Restore a state from :meth:`get_state` of an identically built test."""
        tail = np.asarray(state["tail"], dtype=np.float64).reshape(-1)
        n = int(state["n"])
        if tail.size != min(n, self.window) + 1:
            raise ValueError(
                "state does not match this test: tail length must be "
                f"min(n, window) + 1 = {min(n, self.window) + 1}, got {tail.size}"
            )
        self._tail = tail.copy()
        self._n = n
        self._stat = float(state["statistic"])
        self._dir = int(state["direction"])
        self._shift = float(state["estimated_shift"])
        self._lag = int(state["onset_lag"])


#: Rows per chunk in the strided evaluation (bounds the scratch matrix).
_CHUNK = 4096


def _max_stat(
    c: FloatArray, t0: int, lags: Sequence[int], half_inv: FloatArray
) -> FloatArray:
    """GLR statistic for every position ``t0 .. len(c)-1`` of cumulative sums ``c``.

    Position ``p`` uses lag ``L`` only when ``p - L >= 0``; ``c[:t0]`` is the
    history carried over from earlier batches.  Positions where every lag is
    available are evaluated as one (rows x lags) matrix gathered from a
    strided view of ``c``; the warm-up positions right after a reset loop
    over the lags.  Both paths do the same float operations in the same
    order, so results do not depend on how the stream is split in batches.
    """
    n = c.size
    m = n - t0
    best = np.empty(m, dtype=np.float64)
    maxlag = int(lags[-1])
    full = max(t0, maxlag)  # first position at which every lag is usable
    if full > t0:
        best[: min(full, n) - t0] = _max_stat_warmup(c[: min(full, n)], t0, lags, half_inv)
    if full < n:
        cols = maxlag - np.asarray(lags, dtype=np.intp)
        width = maxlag + 1
        step = c.strides[0]
        for a in range(full, n, _CHUNK):
            b = min(a + _CHUNK, n)
            # rows[i] = c[a - maxlag + i : a + i + 1] (a strided view, no copy)
            rows = np.ndarray(
                (b - a, width), np.float64, c, (a - maxlag) * step, (step, step)
            )
            g = rows[:, cols]
            np.subtract(c[a:b, None], g, out=g)
            np.multiply(g, g, out=g)
            g *= half_inv
            g.max(axis=1, out=best[a - t0 : b - t0])
    return best


def _max_stat_warmup(
    c: FloatArray, t0: int, lags: Sequence[int], half_inv: FloatArray
) -> FloatArray:
    """Lag-by-lag version of :func:`_max_stat` for positions with missing lags."""
    n = c.size
    m = n - t0
    best = np.zeros(m, dtype=np.float64)
    buf = np.empty(m, dtype=np.float64)
    for j, lag in enumerate(lags):
        start = lag - t0 if lag > t0 else 0
        if start >= m:
            break
        seg = buf[: m - start]
        np.subtract(c[t0 + start :], c[t0 + start - lag : n - lag], out=seg)
        np.multiply(seg, seg, out=seg)
        seg *= half_inv[j]
        tgt = best[start:]
        np.maximum(tgt, seg, out=tgt)
    return best


def threshold_for_arl(arl0: float, window: int = DEFAULT_WINDOW) -> float:
    """Threshold of the default-lag GLR with two-sided in-control ARL ``arl0``.

    Solves the calibrated relation for ``log ARL(c)`` (module docstring) by
    bisection; ``log ARL`` is increasing in ``c`` over the range used.

    Parameters
    ----------
    arl0 : float
        Target ARL in samples (> 1).
    window : int, default 400
        Longest lag.

    Returns
    -------
    float

    Examples
    --------
    >>> threshold_for_arl(1e4) < threshold_for_arl(1e5)
    True
    """
    target = math.log(arl0)
    lo, hi = 0.5, 60.0
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        if _log_arl(mid, window) < target:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)
