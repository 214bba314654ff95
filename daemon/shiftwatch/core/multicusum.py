"""Multi-chart CUSUM: a bank of two-sided CUSUMs with different reference values.

A single CUSUM with reference value ``k`` is optimal (Lorden 1971, Ann. Math.
Statist. 42:1897-1908; Moustakides 1986) for a shift of exactly ``2 k``
sigma and loses speed for shifts much smaller or larger.  The multi-chart
CUSUM runs several two-sided CUSUMs side by side on the same residuals, one
per shift of interest, and signals as soon as ANY of them signals (Lorden
1971 already noted that such a bank is asymptotically optimal over a range
of shifts; Han, Tsung, Li & Wang 2007, Naval Research Logistics 54:902-916,
"Comparisons of some cusum-type control charts", compare it with the
adaptive CUSUM and the GLR and find it close to the best over a range of
shifts).

Chart ``j`` has upper and lower sums::

    C+_j,t = max(0, C+_j,t-1 + z_t - k_j)
    C-_j,t = max(0, C-_j,t-1 - z_t - k_j)

and the bank trips at the first sample where some ``C+_j`` or ``C-_j`` is
strictly greater than its ``h_j`` (the convention of :mod:`.cusum` and
:mod:`.arl`).  Each chart is updated exactly as :class:`.cusum.CusumTest`
updates its sums (the running-minimum form of the Lindley recursion, in
blocks of :data:`.cusum.BLOCK` samples), so a bank with one chart gives the
same trip indices as ``CusumTest`` bit for bit.

Design and calibration
----------------------
:meth:`MultiCusumTest.design` gives every chart the same individual
two-sided in-control ARL ``A`` (so ``h_j = quick_design_h(A, k_j)``) and chooses
``A`` so that the JOINT in-control ARL of the bank is the requested one.
The charts watch the same data, so their alarms are strongly correlated and
the joint ARL has no closed form; it lies between ``A / m`` (Bonferroni,
``m`` charts) and ``A``.  The ratio ``r = joint ARL / A`` was simulated with
``tests/bench/calibrate_multicusum.py`` and fitted; see ``_CAL`` below.
"""

from __future__ import annotations

import functools
import math
import operator
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from shiftwatch.core.arl import quick_design_h, siegmund_h
from shiftwatch.core.cusum import BLOCK
from shiftwatch.core.sequential import FloatArray, SequentialTest

__all__ = ["DEFAULT_MULTIPLES", "MultiCusumTest", "joint_arl_ratio"]

#: Shifts watched by :meth:`MultiCusumTest.design`, as multiples of ``min_shift``.
DEFAULT_MULTIPLES: tuple[float, ...] = (0.75, 1.0, 1.5, 2.0)

# Calibration of r = joint ARL / individual ARL for DEFAULT_MULTIPLES, from
# tests/bench/calibrate_multicusum.py (``curve``), run 2026-12-02 with fixed
# random states: for min_shift in {0.3, 0.5, 1, 2, 3} and individual
# two-sided ARLs A in {1e2, 3e2, ..., 1e6} (every chart at design_h(A, k)),
# 3000 simulated in-control runs with resets per point (standard error
# about 1.8% of r).  Per min_shift, weighted least squares of
#
#     log r = c0 + c1 * u + c2 * u**2,      u = log10(A) - 4,
#
# fitted every point within 2.6% (min_shift 0.3, 0.5, 1, 3) and 4.1%
# (min_shift 2).  r falls from 0.61..0.77 at A = 100 to 0.36..0.42 at
# A = 1e6; it depends on min_shift by up to 25% at small A (the charts'
# discreteness), so it is interpolated in log(min_shift).  For min_shift 3
# the k = 3 chart cannot reach A < 370, so that row starts at A = 1e3.
# Extra point, min_shift 1 at A = 3e6 (2000 runs, beyond the fitted range):
# simulated r = 0.391 +- 0.009, the linear extension below gives 0.393.
_CAL: dict[float, tuple[float, float, float]] = {
    0.3: (-0.6093, -0.1505, 0.0148),
    0.5: (-0.6734, -0.1411, 0.0107),
    1.0: (-0.7618, -0.1155, 0.0194),
    2.0: (-0.8511, -0.1214, 0.0276),
    3.0: (-0.7262, -0.1595, 0.0412),
}
#: Range of u = log10(A) - 4 covered by the simulations; linear beyond.
_CAL_U_RANGE = (-2.0, 2.0)
#: The design aims this factor above the requested joint ARL (fewer false alarms).
_ARL_MARGIN = 1.03


class MultiCusumTest(SequentialTest):
    """A bank of two-sided CUSUMs that trips when any chart trips.

    Parameters
    ----------
    ks : sequence of float
        Reference values of the charts in sigma units, each finite and
        ``>= 0`` (``k = d / 2`` is optimal for a shift of ``d`` sigma).
    hs : sequence of float
        Decision intervals of the charts in sigma units, each finite and
        ``> 0``; same length as ``ks``.

    Attributes
    ----------
    ks, hs : tuple of float
        The design parameters, as given (same order).

    Notes
    -----
    :attr:`statistic` is the largest of ``C / h`` over the charts and both
    sides, so :attr:`threshold` is 1.0 and the bank trips when the statistic
    exceeds 1.  At a trip, :attr:`tripped_k` is the reference value of the
    chart with the largest ``C / h`` at the tripping sample (a chart that
    exceeds its ``h`` there) and :attr:`direction` is the side of that chart
    that exceeded.

    Examples
    --------
    >>> import numpy as np
    >>> t = MultiCusumTest(ks=[0.25, 1.0], hs=[8.0, 3.0])
    >>> t.update(np.array([0.0, 0.5, -3.0, -3.0, -3.0]))
    3
    >>> t.direction, t.tripped_k, t.statistic
    (-1, 1.0, 1.3333333333333333)
    >>> t.reset(); t.statistic, t.tripped_k
    (0.0, None)
    """

    name: ClassVar[str] = "multi_cusum"

    __slots__ = ("_bank", "_c", "_dir", "_stat", "_tripped")
    _bank: _Bank
    _c: FloatArray  # upper sums of the charts, then the lower sums
    _stat: float
    _dir: int
    _tripped: int

    def __init__(self, ks: Sequence[float], hs: Sequence[float]) -> None:
        kl = _float_list("ks", ks)
        hl = _float_list("hs", hs)
        if not kl:
            raise ValueError(f"ks must hold at least one reference value, got {ks!r}")
        if len(kl) != len(hl):
            raise ValueError(
                f"ks and hs must have the same length, got {len(kl)} ks and {len(hl)} hs"
            )
        if not all(math.isfinite(v) and v >= 0.0 for v in kl):
            raise ValueError(f"every k in ks must be a finite number >= 0 (sigma units), got {ks!r}")
        if not all(math.isfinite(v) and v > 0.0 for v in hl):
            raise ValueError(f"every h in hs must be a finite number > 0 (sigma units), got {hs!r}")
        # The charts' fixed arrays are shared by every bank of the same design
        # (thousands of streams use a handful of designs).
        self._bank = _bank(tuple(kl), tuple(hl))
        self.reset()

    @property
    def ks(self) -> tuple[float, ...]:
        """Reference values of the charts, as given."""
        return self._bank.ks

    @property
    def hs(self) -> tuple[float, ...]:
        """Decision intervals of the charts, as given."""
        return self._bank.hs

    # ------------------------------------------------------------------ design
    @classmethod
    def design(
        cls,
        arl0: float,
        min_shift: float,
        *,
        multiples: Sequence[float] = DEFAULT_MULTIPLES,
        approximate: bool = False,
    ) -> MultiCusumTest:
        """Build a bank whose joint in-control ARL on iid N(0, 1) is ``arl0``.

        With ``approximate=True`` each chart's h comes from Siegmund's
        approximation instead of the Markov chain (a few percent off, and
        fast); the engine uses that for the interim designs of a young
        baseline, whose target ARL is an allowance anyway.

        Charts watch the shifts ``min_shift * multiples`` with
        ``k = shift / 2``; every chart gets the same individual two-sided ARL
        ``A`` and ``h = quick_design_h(A, k)``.  For the default multiples ``A``
        solves ``A * joint_arl_ratio(A, min_shift) = 1.03 * arl0`` by
        bisection (the 3% margin makes the real ARL slightly higher than
        requested).  For other multiples there is no calibration and the
        Bonferroni bound ``A = m * 1.03 * arl0`` is used (``m`` charts), which
        errs on the safe side by a factor of about 2 at ARLs near 1e6; a
        single multiple gives a plain two-sided CUSUM.  Designs are cached on
        the inputs rounded to 10 significant digits.

        The calibration was fitted to individual ARLs 1e2..1e6 (joint ARLs
        ~60..4e5) for ``min_shift`` 0.3..3 and checked at 3e6 (joint 1.2e6)
        for ``min_shift`` 1.  Simulated real/requested
        joint ARL: 1.018 +- 0.023 at 1e5 and 1.006 +- 0.030 at 604,800 (min_shift 1,
        tests/bench/calibrate_multicusum.py ``direct``).  Beyond 3e6 the fitted
        ``log r`` is extended linearly in ``log A`` (about -4% per decade),
        an extrapolation that is not checked by simulation: above
        ``arl0 ~ 1e6`` treat the joint ARL as approximate (within perhaps
        +-15% at 1e9).  Outside ``min_shift`` 0.3..3 the nearest calibrated
        row is used.

        Parameters
        ----------
        arl0 : float
            Joint in-control ARL in samples, in [50, 1e9].
        min_shift : float
            Smallest shift watched, in sigma units (> 0).
        multiples : sequence of float, default (0.75, 1.0, 1.5, 2.0)
            Shifts of the charts as multiples of ``min_shift`` (each > 0).

        Returns
        -------
        MultiCusumTest

        Raises
        ------
        ValueError
            On arguments outside these ranges.  A chart whose ``k`` cannot
            reach the needed individual ARL (small ``arl0`` with a large
            ``min_shift``) gets the smallest h, :data:`H_LOWEST`: it alarms
            less often than asked even so.

        Examples
        --------
        >>> t = MultiCusumTest.design(604800, 1.0)
        >>> t.ks
        (0.375, 0.5, 0.75, 1.0)
        >>> [round(h, 3) for h in t.hs]
        [17.164, 13.157, 8.923, 6.689]
        """
        key = (arl0, min_shift, multiples, approximate)
        plain = (cls is MultiCusumTest and type(arl0) is float and type(min_shift) is float
                 and type(multiples) is tuple and type(approximate) is bool)
        if plain:
            # An engine redesigns its test at every refinement, nearly always to a design
            # already made: the same inputs give the same charts, without the checks.
            made = _DESIGNS.get(key)
            if made is not None:
                return cls._of(*made)
        try:
            a = float(arl0)
        except (TypeError, ValueError):
            raise ValueError(f"arl0 must be a number in [50, 1e9] (samples), got {arl0!r}") from None
        if not (50.0 <= a <= 1e9):
            raise ValueError(f"arl0 must be a number in [50, 1e9] (samples), got {arl0!r}")
        try:
            s = float(min_shift)
        except (TypeError, ValueError):
            raise ValueError(
                f"min_shift must be a finite number > 0 (sigma units), got {min_shift!r}"
            ) from None
        if not (math.isfinite(s) and s > 0.0):
            raise ValueError(
                f"min_shift must be a finite number > 0 (sigma units), got {min_shift!r}"
            )
        try:
            mult = tuple(float(v) for v in multiples)
        except (TypeError, ValueError):
            raise ValueError(
                f"multiples must be a sequence of finite numbers > 0, got {multiples!r}"
            ) from None
        if not mult or not all(math.isfinite(v) and v > 0.0 for v in mult):
            raise ValueError(f"multiples must be a sequence of finite numbers > 0, got {multiples!r}")
        ks, hs = _design_cached(
            float(f"{a:.10g}"), float(f"{s:.10g}"), tuple(float(f"{v:.10g}") for v in mult),
            bool(approximate),
        )
        if plain:
            if len(_DESIGNS) >= 4096:
                _DESIGNS.clear()
            _DESIGNS[key] = (ks, hs)
        return cls(ks=ks, hs=hs)

    @classmethod
    def _of(cls, ks: tuple[float, ...], hs: tuple[float, ...]) -> MultiCusumTest:
        """A bank of charts that :meth:`design` made (checked then), its sums at zero."""
        out = cls.__new__(cls)
        out._bank = _bank(ks, hs)
        out.reset()
        return out

    def adopt_state(self, other: MultiCusumTest) -> bool:
        """``self.set_state(other.get_state())`` without the round trip: False (and nothing
        taken) where that would raise, a bank of another number of charts."""
        if other._bank.m != self._bank.m:
            return False
        self._c[:] = other._c
        self._stat = float(other._stat)
        self._dir = int(other._dir)
        self._tripped = int(other._tripped)
        return True

    def mark(self) -> tuple[FloatArray, float, int, int]:
        """The state as it stands, for :meth:`back_to` (the engine's young loop, which may
        have to watch a batch again)."""
        return self._c.copy(), self._stat, self._dir, self._tripped

    def back_to(self, mark: tuple[FloatArray, float, int, int]) -> None:
        """The state :meth:`mark` returned, exactly."""
        self._c[:] = mark[0]
        self._stat, self._dir, self._tripped = mark[1], mark[2], mark[3]

    # -------------------------------------------------------------- properties
    @property
    def threshold(self) -> float:
        """Trip level of :attr:`statistic`: always 1.0 (``C / h`` of a chart)."""
        return 1.0

    @property
    def statistic(self) -> float:
        """Largest ``C / h`` over charts and sides (held at a trip until reset)."""
        return self._stat

    @property
    def direction(self) -> int:
        """+1 or -1: the side of :attr:`tripped_k` at the last trip, else 0."""
        return self._dir

    @property
    def tripped_k(self) -> float | None:
        """Reference value of the chart that tripped (None if no trip since reset)."""
        return None if self._tripped < 0 else self.ks[self._tripped]

    @property
    def tripped_chart(self) -> int:
        """Index into :attr:`ks` of the chart that tripped, or -1."""
        return self._tripped

    @property
    def c_plus(self) -> tuple[float, ...]:
        """Current upper sums, one per chart (sigma units)."""
        return tuple(float(v) for v in self._c[: self._bank.m])

    @property
    def c_minus(self) -> tuple[float, ...]:
        """Current lower sums, one per chart (sigma units, non-negative)."""
        return tuple(float(v) for v in self._c[self._bank.m :])

    # ------------------------------------------------------------------ core
    def update(self, z: FloatArray) -> int:
        """Feed residuals; return the index of the first trip or -1.

        Each block of up to :data:`.cusum.BLOCK` samples costs a handful of
        vector operations on a ``(2 m, block)`` array (``m`` charts, both
        sides); samples after the trip index are not consumed.
        """
        if AS_GIVEN and type(z) is np.ndarray and z.ndim == 1 and z.dtype == _F64:
            x = z  # (the engine's residuals: what asarray and ravel would give, as they are)
        else:
            x = np.asarray(z, dtype=np.float64).ravel()
        n = x.shape[0]
        bank = self._bank
        m = bank.m
        kc = bank.k_col
        h2 = bank.h2
        start = 0
        if n <= SMALL and m > 1:
            return self._update_small(x.tolist())
        while start < n:
            stop = min(n, start + BLOCK)
            blk = x if AS_GIVEN and start == 0 and stop == n else x[start:stop]
            if bank.ascending and stop - start >= FAST_FROM:
                i = self._block_lean(blk) if LEAN_BLOCK else self._block_fast(blk)
                if i == -2:
                    pass  # the fast path declined: exact path below
                elif i >= 0:
                    return start + i
                else:
                    start = stop
                    continue
            if SIGNED_ROWS:
                # Each row's increments z - k (upper) and -z - k (lower) in two array calls:
                # z times +1 or -1 is z or -z exactly, then the same subtraction.
                d = np.multiply(blk, bank.sign_col)
                np.subtract(d, bank.k2_col, out=d)
            else:
                d = np.empty((2 * m, stop - start))
                np.subtract(blk[None, :], kc, out=d[:m])
                np.subtract(-blk[None, :], kc, out=d[m:])
            # running-minimum form of the Lindley recursion, row by row (the running sum
            # in place: each element is the same sum of the same two numbers)
            s = np.add.accumulate(d, axis=1, out=d)
            floor = np.minimum.accumulate(s, axis=1)
            np.minimum(floor, -self._c[:, None], out=floor)
            np.subtract(s, floor, out=s)
            # A chart trips in this block only if its largest sum exceeds its limit: the
            # per-row maxima are 2 m numbers, where the sample-by-sample test is 2 m n.
            if any(map(operator.gt, np.maximum.reduce(s, axis=1).tolist(), bank.h2_list)):
                hit = (s > bank.h2_col).any(axis=0)
                i = int(np.argmax(hit))
                col = self._c
                col[:] = s[:, i]
                ratio = col / h2
                # first maximum: upper sums come first, so a tie goes up (as in CusumTest)
                row = int(np.argmax(ratio))
                j = row % m
                self._stat = float(ratio[row])
                self._tripped = j
                self._dir = 1 if row < m else -1
                return start + i
            last = s[:, -1]
            self._c[:] = last
            # the largest C / h in plain floats: the same divisions, and max is exact
            self._stat = max(map(operator.truediv, last.tolist(), bank.h2_list))
            start = stop
        return -1

    def update_one(self, z: float) -> bool:
        """One residual: the plain-Python recursion of :meth:`update` for a few samples."""
        if self._bank.m > 1:
            return self._update_small([z]) == 0
        return self.update(np.array([z])) == 0

    def _update_small(self, x: list[float]) -> int:
        """The recursion sample by sample in plain Python: for the few samples a
        live stream brings per round, cheaper than a dozen array operations."""
        bank = self._bank
        m = bank.m
        ks = bank.ks
        hs = bank.hs
        c = self._c.tolist()
        for j, z in enumerate(x):
            tripped = False
            for i in range(m):
                up = c[i] + z - ks[i]
                c[i] = up if up > 0.0 else 0.0
                lo = c[m + i] - z - ks[i]
                c[m + i] = lo if lo > 0.0 else 0.0
                if c[i] > hs[i] or c[m + i] > hs[i]:
                    tripped = True
            if tripped:
                self.set_small_sums(c, True)
                return j
        self.set_small_sums(c, False)
        return -1

    def small_sums(self) -> list[float] | None:
        """The sums as a list, for a caller that runs :meth:`_update_small`'s recursion
        itself (the engine's young phase) and hands them back with :meth:`set_small_sums`;
        None for a bank of one chart (whose updates take the array path)."""
        return self._c.tolist() if self._bank.m > 1 else None

    def set_small_sums(self, c: list[float], tripped: bool) -> None:
        """The state :meth:`_update_small` leaves after its last sample: ``c`` the sums
        after it, ``tripped`` whether a chart exceeded its h on it."""
        bank = self._bank
        self._c[:] = c
        if tripped:
            ratio = self._c / bank.h2
            row = int(np.argmax(ratio))
            self._stat = float(ratio[row])
            self._tripped = row % bank.m
            self._dir = 1 if row < bank.m else -1
            return
        self._stat = max(map(operator.truediv, c, bank.h2_list))

    def _block_fast(self, blk: FloatArray) -> int:
        """One block in a few passes when no chart can be near its limit.

        The chart with the smallest k is followed exactly.  The others are
        never larger than it (same data, larger k, and their sums start no
        higher), and chart i can only exceed h_i through a run of at least
        ``L_i`` samples, where ``L_i`` follows from the largest residual in
        the block; over such a run it lies at least ``(k_i - k_1) L_i`` below
        the first chart.  So chart i can trip only where the first chart
        exceeds ``h_i + (k_i - k_1) L_i``.  At those few samples (if any) its
        exact value comes from prefix minima (``minimum.reduceat``), and its
        value at the end of the block from one minimum: no running minimum
        is needed for it.  The result equals the exact recursion up to
        rounding.

        Returns the trip index, -1 for no trip, or -2 when the sums do not
        satisfy the ordering the argument needs (the caller then takes the
        exact path).
        """
        bank = self._bank
        m = bank.m
        ks, hs = bank.k_arr, bank.h_arr
        c = self._c
        n: int = blk.shape[0]
        for side in (0, 1):
            cs = c[side * m:(side + 1) * m]
            if np.any(cs[1:] > cs[0]) or np.any(cs >= hs):
                return -2
        total = np.cumsum(blk)
        best_t = n
        first_c: list[FloatArray] = []
        signs: list[FloatArray] = []
        # per side: chart index -> its S - k_i t (computed only when needed)
        tilde: list[dict[int, FloatArray]] = []
        for side in (0, 1):
            cs = c[side * m:(side + 1) * m]
            if side == 0:
                d0 = blk - ks[0]
                signed = total
                zmax = float(blk.max())
            else:
                d0 = -blk
                d0 -= ks[0]
                signed = -total
                zmax = float(-blk.min())
            signs.append(signed)
            s0 = np.cumsum(d0)
            floor0 = np.minimum.accumulate(s0)
            np.minimum(floor0, -cs[0], out=floor0)
            c1 = np.subtract(s0, floor0, out=s0)
            first_c.append(c1)
            c1max = float(c1.max())
            c1end = float(c1[-1])
            if c1max > hs[0]:
                best_t = min(best_t, int(np.argmax(c1 > hs[0])))
            rows: dict[int, FloatArray] = {}
            for i in range(1, m):
                g = zmax - ks[i]
                if g > 0:
                    lag = min(math.floor(hs[i] / g) + 1, math.floor((hs[i] - cs[i]) / g) + 1)
                    bound = hs[i] + (ks[i] - ks[0]) * max(lag, 1)
                else:
                    bound = math.inf  # this chart can only fall in this block
                if c1max <= bound and c1end <= 0.0:
                    continue  # cannot trip, and ends at zero like the first chart
                st = signed - ks[i] * _STEPS[:n]
                rows[i] = st
                if c1max <= bound:
                    continue
                sus = np.flatnonzero(c1 > bound)
                # exact values at the suspicious samples from prefix minima
                cuts = sus + 1
                cuts = cuts[cuts < n]
                seg = np.minimum.reduceat(st, np.concatenate(([0], cuts)))
                pre = np.minimum.accumulate(seg)[: sus.shape[0]]
                ci = st[sus] - np.minimum(pre, -cs[i])
                hit = np.flatnonzero(ci > hs[i])
                if hit.shape[0]:
                    best_t = min(best_t, int(sus[hit[0]]))
            tilde.append(rows)
        t = best_t if best_t < n else n - 1
        col = np.zeros(2 * m)
        for side in (0, 1):
            cs = c[side * m:(side + 1) * m]
            col[side * m] = first_c[side][t]
            if first_c[side][t] <= 0.0:
                continue  # every chart of this side is at zero
            for i in range(1, m):
                kept = tilde[side].get(i)
                st = signs[side] - ks[i] * _STEPS[:n] if kept is None else kept
                low = float(st[: t + 1].min()) if t < n - 1 else float(st.min())
                col[side * m + i] = st[t] - min(-float(cs[i]), low)
        self._c[:] = col
        ratio = col / bank.h2
        if best_t < n:
            row = int(np.argmax(ratio))
            self._stat = float(ratio[row])
            self._tripped = row % m
            self._dir = 1 if row < m else -1
            return best_t
        self._stat = float(np.max(ratio))
        return -1

    def _block_lean(self, blk: FloatArray) -> int:
        """:meth:`_block_fast` with its fixed work trimmed: the sums' order checked on a
        list of them, the charts' k and h read as floats, and the reductions and running
        sums called as the ufuncs that ndarray.max, .min and np.cumsum reach through their
        Python wrappers; the same operations on the same numbers, so the same sums and
        trip (tests/core/test_lean_block.py holds the two to each other)."""
        bank = self._bank
        m = bank.m
        ks, hs = bank.ks, bank.hs
        c = self._c
        cl = c.tolist()
        for side in (0, 1):
            cs = cl[side * m:(side + 1) * m]
            first = cs[0]
            for i in range(m):
                v = cs[i]
                if (i and v > first) or v >= hs[i]:
                    return -2
        n: int = blk.shape[0]
        acc = np.add.accumulate
        run_min = np.minimum.accumulate
        top = np.maximum.reduce
        low_of = np.minimum.reduce
        total = acc(blk)
        best_t = n
        first_c: list[FloatArray] = []
        signs: list[FloatArray] = []
        tilde: list[dict[int, FloatArray]] = []
        k0 = ks[0]
        for side in (0, 1):
            cs = cl[side * m:(side + 1) * m]
            if side == 0:
                d0 = blk - k0
                signed = total
                zmax = float(top(blk))
            else:
                d0 = -blk
                d0 -= k0
                signed = -total
                zmax = float(-low_of(blk))
            signs.append(signed)
            s0 = acc(d0)
            floor0 = run_min(s0)
            np.minimum(floor0, -cs[0], out=floor0)
            c1 = np.subtract(s0, floor0, out=s0)
            first_c.append(c1)
            c1max = float(top(c1))
            c1end = float(c1[-1])
            if c1max > hs[0]:
                best_t = min(best_t, int(np.argmax(c1 > hs[0])))
            rows: dict[int, FloatArray] = {}
            for i in range(1, m):
                g = zmax - ks[i]
                if g > 0:
                    lag = min(math.floor(hs[i] / g) + 1, math.floor((hs[i] - cs[i]) / g) + 1)
                    bound = hs[i] + (ks[i] - k0) * max(lag, 1)
                else:
                    bound = math.inf  # this chart can only fall in this block
                if c1max <= bound and c1end <= 0.0:
                    continue  # cannot trip, and ends at zero like the first chart
                st = signed - ks[i] * _STEPS[:n]
                rows[i] = st
                if c1max <= bound:
                    continue
                sus = np.flatnonzero(c1 > bound)
                cuts = sus + 1
                cuts = cuts[cuts < n]
                seg = np.minimum.reduceat(st, np.concatenate(([0], cuts)))
                pre = run_min(seg)[: sus.shape[0]]
                ci = st[sus] - np.minimum(pre, -cs[i])
                hit = np.flatnonzero(ci > hs[i])
                if hit.shape[0]:
                    best_t = min(best_t, int(sus[hit[0]]))
            tilde.append(rows)
        t = best_t if best_t < n else n - 1
        col = np.zeros(2 * m)
        for side in (0, 1):
            cs = cl[side * m:(side + 1) * m]
            f = first_c[side][t]
            col[side * m] = f
            if f <= 0.0:
                continue  # every chart of this side is at zero
            for i in range(1, m):
                kept = tilde[side].get(i)
                st = signs[side] - ks[i] * _STEPS[:n] if kept is None else kept
                low = float(low_of(st[: t + 1])) if t < n - 1 else float(low_of(st))
                col[side * m + i] = st[t] - min(-cs[i], low)
        self._c[:] = col
        ratio = col / bank.h2
        if best_t < n:
            row = int(np.argmax(ratio))
            self._stat = float(ratio[row])
            self._tripped = row % m
            self._dir = 1 if row < m else -1
            return best_t
        self._stat = float(top(ratio))
        return -1

    def reset(self) -> None:
        """Set every sum to zero; keep ``ks`` and ``hs``."""
        self._c = np.zeros(2 * self._bank.m)
        self._stat = 0.0
        self._dir = 0
        self._tripped = -1

    def get_state(self) -> dict[str, Any]:
        return {
            "c_plus": [float(v) for v in self._c[: self._bank.m]],
            "c_minus": [float(v) for v in self._c[self._bank.m :]],
            "statistic": float(self._stat),
            "direction": int(self._dir),
            "tripped_chart": int(self._tripped),
        }

    def set_state(self, state: dict[str, Any]) -> None:
        cp = [float(v) for v in state["c_plus"]]
        cm = [float(v) for v in state["c_minus"]]
        m = self._bank.m
        if len(cp) != m or len(cm) != m:
            raise ValueError(
                f"state holds {len(cp)} upper and {len(cm)} lower sums; this bank has "
                f"{m} charts"
            )
        self._c = np.asarray(cp + cm, dtype=np.float64)
        self._stat = float(state.get("statistic", float(np.max(self._c / self._bank.h2))))
        self._dir = int(state.get("direction", 0))
        self._tripped = int(state.get("tripped_chart", -1))

    def __repr__(self) -> str:
        return f"MultiCusumTest(ks={list(self.ks)!r}, hs={list(self.hs)!r})"


class _Bank:
    """The fixed part of a bank: the charts' ``k`` and ``h`` and arrays derived
    from them, shared (read-only) by every :class:`MultiCusumTest` built with
    the same charts."""

    __slots__ = ("ascending", "h2", "h2_col", "h2_list", "h_arr", "hs", "k2_col", "k_arr", "k_col", "ks", "m",
                 "sign_col")

    def __init__(self, ks: tuple[float, ...], hs: tuple[float, ...]) -> None:
        self.ks = ks
        self.hs = hs
        self.m = len(ks)
        self.k_arr = _frozen(np.asarray(ks, dtype=np.float64))
        self.h_arr = _frozen(np.asarray(hs, dtype=np.float64))
        # rows 0..m-1 are the upper sums, rows m..2m-1 the lower sums
        self.k_col = self.k_arr[:, None]
        # Both sides' rows at once: +1 for the upper sums' rows, -1 for the lower ones',
        # and each row's k (see MultiCusumTest.update).
        self.sign_col = _frozen(np.repeat(np.array([1.0, -1.0]), self.m))[:, None]
        self.k2_col = _frozen(np.concatenate((self.k_arr, self.k_arr)))[:, None]
        self.h2 = _frozen(np.concatenate((self.h_arr, self.h_arr)))
        self.h2_col = self.h2[:, None]
        self.h2_list = tuple(self.h2.tolist())  # the same, for plain-Python divisions
        # The in-control fast path needs the charts in ascending order of k.
        self.ascending = bool(np.all(np.diff(self.k_arr) > 0)) and self.m > 1


def _frozen(a: FloatArray) -> FloatArray:
    a.flags.writeable = False
    return a


@functools.lru_cache(maxsize=256)
def _bank(ks: tuple[float, ...], hs: tuple[float, ...]) -> _Bank:
    return _Bank(ks, hs)


#: 1, 2, ..., BLOCK: a chart's drift over a block is ``k * _STEPS[:n]``, worked out where
#: it is needed (a table of them per design took 128 kB a bank of four charts).
_STEPS = _frozen(np.arange(1.0, BLOCK + 1.0))


#: Batches up to this size take the plain-Python path.
SMALL = 32
#: Blocks of at least this many samples take the few-pass path (_block_fast); shorter
#: ones the running minimum of every chart, which costs fewer array calls (measured
#: here: 33 against 82 us at 72 samples, 60 against 93 at 400, even at 1,000).
FAST_FROM = 1024
#: MultiCusumTest.update's exact path builds the increments of both sides' rows with one
#: multiplication by the rows' signs (False: the two subtractions, the reference).
SIGNED_ROWS = True
#: Blocks that take the few-pass path take it with its fixed work trimmed
#: (MultiCusumTest._block_lean); False: _block_fast, the reference.
LEAN_BLOCK = True
#: MultiCusumTest.update takes a 1-D float64 array as it is, without asarray and ravel
#: (False: through them, the reference; tests/core/test_stretch_trim.py).
AS_GIVEN = True
_F64 = np.dtype(np.float64)


def _float_list(name: str, values: Sequence[float]) -> list[float]:
    if isinstance(values, (str, bytes)):
        raise ValueError(f"{name} must be a sequence of numbers, got {values!r}")  # noqa: TRY004  as below
    try:
        return [float(v) for v in values]
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a sequence of numbers, got {values!r}") from None


def joint_arl_ratio(individual_arl: float, min_shift: float) -> float:
    """Calibrated ``r = joint ARL / individual ARL`` for the default multiples.

    The bank has charts ``k = min_shift * m / 2`` for ``m`` in
    :data:`DEFAULT_MULTIPLES`, each with two-sided in-control ARL
    ``individual_arl``.  ``log r`` is the fitted quadratic in
    ``u = log10(individual_arl) - 4`` at each calibrated ``min_shift``
    (see ``_CAL``), extended linearly (with the slope at the end) outside
    ``_CAL_U_RANGE`` and interpolated linearly in ``log(min_shift)``
    between calibrated values (flat outside them).  The conservative margin
    of :meth:`MultiCusumTest.design` is NOT included.

    Parameters
    ----------
    individual_arl : float
        Two-sided in-control ARL of every chart (> 1).
    min_shift : float
        Smallest shift of the bank in sigma units (> 0).

    Returns
    -------
    float
        The ratio, between ``1 / len(DEFAULT_MULTIPLES)`` and 1.

    Examples
    --------
    >>> round(joint_arl_ratio(1e4, 1.0), 3)   # simulated: 0.459 +- 0.008
    0.467
    >>> round(joint_arl_ratio(3e6, 1.0), 3)   # simulated: 0.391 +- 0.009
    0.393
    """
    u = math.log10(float(individual_arl)) - 4.0
    ls = math.log(float(min_shift))
    keys = sorted(_CAL)
    logs = [math.log(v) for v in keys]
    if ls <= logs[0]:
        lr = _log_ratio(_CAL[keys[0]], u)
    elif ls >= logs[-1]:
        lr = _log_ratio(_CAL[keys[-1]], u)
    else:
        i = max(j for j in range(len(keys) - 1) if logs[j] <= ls)
        w = (ls - logs[i]) / (logs[i + 1] - logs[i])
        lr = (1.0 - w) * _log_ratio(_CAL[keys[i]], u) + w * _log_ratio(_CAL[keys[i + 1]], u)
    m = len(DEFAULT_MULTIPLES)
    return min(1.0, max(1.0 / m, math.exp(lr)))


def _log_ratio(coef: tuple[float, float, float], u: float) -> float:
    c0, c1, c2 = coef
    lo, hi = _CAL_U_RANGE
    if u < lo:
        return c0 + c1 * lo + c2 * lo * lo + (c1 + 2.0 * c2 * lo) * (u - lo)
    if u > hi:
        return c0 + c1 * hi + c2 * hi * hi + (c1 + 2.0 * c2 * hi) * (u - hi)
    return c0 + c1 * u + c2 * u * u


#: design()'s inputs, as given, and the charts made from them.
_DESIGNS: dict[tuple[Any, ...], tuple[tuple[float, ...], tuple[float, ...]]] = {}


@functools.lru_cache(maxsize=256)
def _design_cached(
    arl0: float, min_shift: float, multiples: tuple[float, ...], approximate: bool = False
) -> tuple[tuple[float, ...], tuple[float, ...]]:
    ks = tuple(min_shift * v / 2.0 for v in multiples)
    m = len(ks)
    target = arl0 * _ARL_MARGIN
    if m == 1:
        ind = target
    elif tuple(sorted(multiples)) != DEFAULT_MULTIPLES:
        # no calibration for this bank: Bonferroni, joint ARL >= A / m
        ind = m * target
    else:
        # A * r(A) = target; A * r(A) increases with A, and A lies
        # between target and m * target
        lo, hi = math.log(target), math.log(m * target)
        for _ in range(100):
            mid = 0.5 * (lo + hi)
            a = math.exp(mid)
            if a * joint_arl_ratio(a, min_shift) < target:
                lo = mid
            else:
                hi = mid
            if hi - lo < 1e-12:
                break
        ind = math.exp(hi)
    solve = siegmund_h if approximate else quick_design_h
    hs = tuple(_h_or_lowest(solve, ind, k) for k in ks)
    return ks, hs


#: The h of a chart whose k is so large that even h -> 0 alarms less often than asked.
H_LOWEST = 1e-3


def _h_or_lowest(solve: Any, ind: float, k: float) -> float:
    """The h of one chart for an individual ARL of ``ind``; :data:`H_LOWEST` for a chart
    that cannot alarm that often: a two-sided chart signals at each step with probability
    about 2 P(Z > k) as h -> 0, so its ARL never falls below 1 / (2 P(Z > k)) (4,100 samples
    for k = 3.67).  Such a chart already alarms less often than asked, the safe side, so the
    bank keeps it at its most sensitive instead of being refused (a large min_shift_sigma with
    a short false_alarm_every stopped the engine)."""
    try:
        h: float = solve(ind, k)
    except ValueError:
        return H_LOWEST
    return h
