"""Robust estimates of a stream's in-control behaviour.

The baseline is what the sequential tests measure against: the level, the
noise sigma, the lag-1 autocorrelation and the sampling interval.  Robust
estimators keep a lone spike or a heavy tail from inflating sigma, and a floor
tied to the reading resolution keeps sigma from collapsing to zero on
quantised readings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

#: ndarray.sum's, min's and max's reductions, without their wrappers (BaselineSums.add).
_sum = np.add.reduce
_min = np.minimum.reduce
_max = np.maximum.reduce
#: np.dot's own C function and the clip ufunc that ndarray.clip reaches through a Python
#: wrapper (numpy's _methods._clip): the same functions on the same numbers, without the
#: dispatcher and the wrapper (a microsecond or so per call on an engine's every batch).
_dot: Any = getattr(np.dot, "_implementation", np.dot)
try:
    _clip: Any = np._core.umath.clip  # type: ignore[attr-defined]  # numpy 2's stubs omit _core
except AttributeError:  # numpy 1.x (the ufunc's module was numpy.core then)
    _clip = np.core.umath.clip  # type: ignore[attr-defined]
try:  # np.count_nonzero's C function, without the Python function that dispatches to it
    _count_nonzero: Any = np._core.multiarray.count_nonzero  # type: ignore[attr-defined]
except AttributeError:  # numpy 1.x
    _count_nonzero = np.core.multiarray.count_nonzero  # type: ignore[attr-defined]
#: BaselineSums.add calls _dot and _clip directly; False: np.dot and ndarray.clip, the
#: reference (tests/core/test_per_call.py holds the two to each other).
DIRECT_CALLS = True
#: The clip bounds and the tail bound that the engine's array calls take (BaselineSums.add,
#: the watch's and the event trial's clip) and the follower's rate (engine.follow_path)
#: handed over as read-only 0-d float64 arrays, one per value and shared by every stream,
#: instead of Python floats, which numpy turns into a 0-d array of the same double on every
#: call (some 1,000 to 1,900 instructions an operand, callgrind): the same loops on the
#: same doubles.  False: the floats, the reference (tests/core/test_shared_scalars.py
#: holds the two to each other).
SHARED_SCALARS = True
_BOUNDS: dict[float, tuple[FloatArray, FloatArray]] = {}

#: Positive numbers many streams hold equal (a baseline's sampling interval, the design ARL,
#: the refine block, a full window's count): one object for all the streams that hold an
#: equal one (shared_value), instead of a float of 24 bytes or an int above 256 of 32 bytes
#: each.  Equal positive floats (and ints) are the same bits, so nothing read from them
#: changes.  False: each engine's own, the reference (tests/core/test_shared_parts.py holds
#: the two to each other).
SHARED_VALUES = True
_SHARED_FLOATS: dict[float, float] = {}
_SHARED_INTS: dict[int, int] = {}


def shared_value(v: Any) -> Any:
    """``v``, or an equal number of the same type kept earlier (a positive float or int; any
    other value as it is: 0.0 and -0.0 are equal but not the same bits, NaN equals nothing).

    >>> a, b = 2.0 ** 0.5, 2.0 ** 0.5
    >>> shared_value(a) is shared_value(b), shared_value(-0.0)
    (True, -0.0)
    """
    if not SHARED_VALUES:
        return v
    kind = type(v)
    kept = _SHARED_FLOATS if kind is float else _SHARED_INTS if kind is int else None
    if kept is None or not v > 0:
        return v
    got = kept.get(v)
    if got is None:
        if len(kept) >= 1024:  # values of one stream each (a jittered interval): a bounded few
            kept.clear()
        got = kept[v] = v
    return got


def clip_bounds(c: float) -> tuple[FloatArray, FloatArray]:
    """``-c`` and ``c`` as read-only 0-d float64 arrays, shared: one pair per value of ``c``
    (a stream's clip is one of a few values).  Callers on a hot path look the pair up in
    ``_BOUNDS`` themselves and call this on a miss.  A zero is never kept (0.0 and -0.0
    are the same key, not the same double); a NaN, never found, makes a new pair each time.

    >>> lo, hi = clip_bounds(4.0)
    >>> float(lo), float(hi), lo.ndim, clip_bounds(4.0)[1] is hi
    (-4.0, 4.0, 0, True)
    """
    got = _BOUNDS.get(c)
    if got is not None:
        return got
    lo, hi = np.array(-c, dtype=np.float64), np.array(c, dtype=np.float64)
    lo.flags.writeable = hi.flags.writeable = False
    if c != 0.0:
        if len(_BOUNDS) >= 64:  # a few clips in practice; a bound on what it can hold
            _BOUNDS.clear()
        _BOUNDS[c] = (lo, hi)
    return lo, hi


#: huber_scale works each iteration's mean of clipped squares in one buffer by the ufuncs
#: np.mean and np.clip reach through their wrappers (the same floats); False: the
#: reference, np.mean(np.clip(r / s, -c, c) ** 2) (tests/core/test_lean_huber.py holds the
#: two to each other).
LEAN_HUBER = True

#: d2 for subgroups of two: E|X1 - X2| = 1.128 sigma for Gaussian noise.
#: A standard SPC constant (common practice).
D2_MOVING_RANGE = 1.128

#: MAD of a standard normal: 1 / Phi^-1(3/4) = 1.4826 (common practice).
MAD_TO_SIGMA = 1.482602218505602


def huber_beta(c: float) -> float:
    """E[clip(Z, -c, c)^2] for Z ~ N(0, 1); the consistency factor of Huber's scale.

    Examples
    --------
    >>> round(huber_beta(3.0), 4)
    0.995
    >>> round(huber_beta(50.0), 6)
    1.0
    """
    phi = math.exp(-0.5 * c * c) / math.sqrt(2.0 * math.pi)
    cdf = 0.5 * math.erfc(-c / math.sqrt(2.0))
    return (2.0 * cdf - 1.0) - 2.0 * c * phi + 2.0 * c * c * (1.0 - cdf)


def moving_range_sigma(x: FloatArray) -> float:
    """Moving-range estimate of sigma: mean |x_t - x_(t-1)| / d2, d2 = 1.128.

    Examples
    --------
    >>> moving_range_sigma(np.array([1.0, 2.0, 1.0, 2.0]))  # doctest: +ELLIPSIS
    0.886...
    """
    if x.shape[0] < 2:
        return 0.0
    return float(np.mean(np.abs(np.diff(x)))) / D2_MOVING_RANGE


#: The mean moving range is set aside for the robust start of a baseline's sigma when it is
#: more than this many times both the MAD and the median moving range (on independent normal
#: noise the three agree within a few percent at 200 samples).
MR_OUTLIER_RATIO = 4.0
#: Median of |X1 - X2| for independent N(0, 1): sqrt(2) times the normal's upper quartile.
MEDIAN_MR_TO_SIGMA = 1.0 / (math.sqrt(2.0) * 0.6744897501960817)


def median_moving_range_sigma(x: FloatArray) -> float:
    """Median-moving-range estimate of sigma: median |x_t - x_(t-1)| / 0.954, robust to a
    few wild readings (each spoils only its two moving ranges).

    >>> round(median_moving_range_sigma(np.array([1.0, 2.0, 1.0, 2.0, 1e9, 1e9, 2.0, 1.0])), 3)
    1.048
    """
    if x.shape[0] < 2:
        return 0.0
    return median(np.abs(np.diff(x))) * MEDIAN_MR_TO_SIGMA


def median(x: FloatArray) -> float:
    """The median of finite values, equal to ``np.median`` bit for bit.

    Like ``np.median``, the mean of the two middle order statistics for an
    even count (``(0 + a + b) / 2``, summed as ``np.mean`` sums); NaN for no
    values.  Written out because
    ``np.median`` imports ``numpy.ma`` on its first call, which costs the
    replay command and the daemon time and memory.

    Examples
    --------
    >>> median(np.array([3.0, 1.0, 2.0])), median(np.array([4.0, 1.0, 2.0, 3.0]))
    (2.0, 2.5)
    """
    n = x.shape[0]
    if n == 0:
        return math.nan
    h = n // 2
    # Summed from 0.0 as np.mean sums (so a median of -0.0 is 0.0 there too).
    if n % 2:
        return 0.0 + float(np.partition(x, h)[h])
    part = np.partition(x, (h - 1, h))
    return (0.0 + float(part[h - 1]) + float(part[h])) / 2.0


def mad_sigma(r: FloatArray) -> float:
    """Median absolute deviation around the median, scaled to sigma for Gaussian noise."""
    if r.shape[0] == 0:
        return 0.0
    return median(np.abs(r - median(r))) * MAD_TO_SIGMA


def huber_scale(r: FloatArray, c: float, s0: float, iterations: int = 30) -> float:
    """Huber's "proposal 2" scale of residuals ``r`` (already centred).

    Finds s with mean(clip(r/s, -c, c)^2) = E[clip(Z, -c, c)^2], Z ~ N(0, 1):
    the Gaussian sigma for Gaussian noise, and for heavy tails the scale at
    which clipped residuals vary like clipped Gaussian ones, which is what the
    sequential tests were calibrated for.
    """
    if r.shape[0] == 0 or s0 <= 0:
        return s0
    beta = huber_beta(c)
    s = s0
    # LEAN_HUBER: np.mean(np.clip(r / s, -c, c) ** 2) by the ufuncs it reaches through its
    # wrappers, in one buffer: the same quotients, clips and squares, summed by the same
    # pairwise reduction and divided by the count as np.mean divides, so the same float
    # (for the 1-D float64 residuals every caller in the package passes).
    buf = np.empty_like(r) if LEAN_HUBER and r.dtype == np.float64 and r.ndim == 1 else None
    count = r.shape[0]
    for _ in range(iterations):
        if buf is not None:
            np.true_divide(r, s, out=buf)
            _clip(buf, -c, c, out=buf)
            np.square(buf, out=buf)
            m2 = float(_sum(buf)) / count
        else:
            m2 = float(np.mean(np.clip(r / s, -c, c) ** 2))
        s_new = s * math.sqrt(m2 / beta)
        if s_new <= 0:
            return s
        if abs(s_new - s) <= 1e-9 * s:
            return s_new
        s = s_new
    return s


def lag1_autocorrelation(r: FloatArray) -> float:
    """Lag-1 autocorrelation of centred residuals (0.0 when undefined)."""
    if r.shape[0] < 3:
        return 0.0
    den = float(np.dot(r, r))
    if den <= 0:
        return 0.0
    return float(np.dot(r[1:], r[:-1])) / den


def reading_quantum(x: FloatArray) -> float:
    """The reading resolution, when readings are visibly quantised; else 0.

    Readings count as quantised when they take fewer distinct values than half
    the number of samples.  The resolution is the smallest gap between them.

    Examples
    --------
    >>> round(reading_quantum(np.array([1.0, 1.1, 1.1, 1.0, 1.2, 1.1])), 9)
    0.1
    >>> reading_quantum(np.array([1.0, 1.13, 1.71, 0.2]))
    0.0
    """
    # Sorted distinct values (np.unique would import numpy.ma on its first call).
    s = np.sort(x)
    gaps = np.diff(s)
    distinct = 1 + int(np.count_nonzero(gaps))
    if distinct < 2 or distinct * 2 > x.shape[0]:
        return 0.0
    return float(np.min(gaps[gaps != 0]))


@dataclass(frozen=True, slots=True)
class Baseline:
    """A stream's in-control reference.

    Attributes
    ----------
    level : robust level (Huber location).
    sigma : marginal noise sigma of the readings.
    phi : lag-1 autocorrelation used for prewhitening (0.0 when not significant).
    innovation_sigma : sigma of the prewhitened residuals x_t - level - phi (x_(t-1) - level).
    interval : median sampling interval in seconds.
    n : number of samples the estimate rests on.
    n_level : number of samples the level alone rests on, when fewer than ``n``
        (after a confirmed step the level is re-estimated from the samples
        after it while sigma and phi carry over); 0 means ``n``.
    quantum : reading resolution (0.0 when readings are not quantised).
    """

    level: float
    sigma: float
    phi: float
    innovation_sigma: float
    interval: float
    n: int
    quantum: float
    phi_raw: float = 0.0  # the lag-1 autocorrelation as estimated, before the significance rule
    clip: float = 3.0  # residuals are clipped here (lower for heavy-tailed noise)
    tail_fraction: float = 0.0  # share of residuals beyond TAIL_AT sigmas
    n_level: int = 0  # samples behind the level when fewer than n (0: n)

    def __post_init__(self) -> None:
        # the interval of every stream sampled alike: one float (SHARED_VALUES)
        object.__setattr__(self, "interval", shared_value(self.interval))

    @property
    def level_n(self) -> int:
        """How many samples the level rests on."""
        return self.n_level if 0 < self.n_level < self.n else self.n

    def to_dict(self) -> dict[str, float | int]:
        return {
            "n_level": self.n_level,
            "phi_raw": self.phi_raw,
            "clip": self.clip,
            "tail_fraction": self.tail_fraction,
            "level": self.level,
            "sigma": self.sigma,
            "phi": self.phi,
            "innovation_sigma": self.innovation_sigma,
            "interval": self.interval,
            "n": self.n,
            "quantum": self.quantum,
        }


def sigma_floor(level: float, quantum: float, min_sigma: float | None) -> float:
    """The smallest sigma we accept: the configured floor, else one set by the reading resolution.

    Rounding to a step q adds noise of sigma q / sqrt(12) (common practice); with
    no visible resolution a relative floor of 1e-6 of the level (or 1e-9) applies.
    """
    if min_sigma is not None and min_sigma > 0:
        return min_sigma
    if quantum > 0:
        return quantum / math.sqrt(12.0)
    return max(abs(level) * 1e-6, 1e-9)


#: Residuals beyond this many sigmas count as tail samples.
TAIL_AT = 2.5
_TAIL_AT = np.array(TAIL_AT)  # (a shared 0-d array for BaselineSums.add, see SHARED_SCALARS)
_TAIL_AT.flags.writeable = False
#: Gaussian noise puts 1.24% beyond 2.5 sigma (common practice).  A stream is treated
#: as heavy-tailed when its share lies beyond that of Student-t(8) noise: 2.1% of the
#: samples beyond 2.5 of Huber's scale at the configured clip (4), and 2.5% beyond 2.5 of
#: the scale at HEAVY_TAIL_CLIP, the share a heavy-tailed stream's sums count (measured
#: on 400,000 samples of each; t(6) 2.35% and 3.0%, Laplace 3.0% and 4.5%, t(3) 3.2% and
#: 4.9%).  One line of 3.1% on both scales made the choice stick where it began: t(3)
#: read 3.0% on the first and 4.3% on the second, so its streams stayed at the clip the
#: warm-up happened to choose, with four times the nominal false-alarm rate at clip 4.
#: Noise just under the line, clipped at 4, runs high: at 1h t(8) 1.58 of nominal,
#: t(10) 1.44, logistic 1.63 (t(6) at 2.35% gave 1.9 at clip 4, and 0.88 at clip 2).
HEAVY_TAIL_FRACTION = 0.021
HEAVY_TAIL_FRACTION_CLIPPED = 0.025
#: How much larger a share reads on the scale at HEAVY_TAIL_CLIP than at the configured
#: clip, for the edge noise (t(8)); used to carry a share over when the clip changes.
HEAVY_TAIL_SCALE = HEAVY_TAIL_FRACTION_CLIPPED / HEAVY_TAIL_FRACTION
#: Hysteresis of the choice once made (see :func:`choose_clip`).
HEAVY_TAIL_BAND = 1.15
#: Clipping constant used for heavy-tailed streams.
HEAVY_TAIL_CLIP = 2.0


def choose_clip(tail_fraction: float, clip: float, current: float | None = None) -> float:
    """The clipping constant for a stream: ``clip``, or 2.0 when its noise is heavy-tailed.

    ``tail_fraction`` is the share beyond 2.5 sigma on the scale at ``current`` (the
    clip it was measured at; the configured ``clip`` when absent).  Clipping at 2 sigma
    costs some speed on large steps, so it is used only where heavy tails would
    otherwise raise the false-alarm rate.

    >>> choose_clip(0.0126, 4.0), choose_clip(0.032, 4.0), choose_clip(0.020, 4.0, 2.0)
    (4.0, 2.0, 4.0)
    >>> choose_clip(0.023, 4.0, 4.0), choose_clip(0.024, 4.0, 2.0)   # within the band: kept
    (4.0, 2.0)
    """
    if current is None:
        return min(clip, HEAVY_TAIL_CLIP) if tail_fraction > HEAVY_TAIL_FRACTION else clip
    # A stream already clipped one way changes only when its share is HEAVY_TAIL_BAND
    # beyond the line: noise near the edge (t(6) to t(10)) would otherwise change clip, and its
    # test's design, whenever a block's share fell the other side.
    if current <= HEAVY_TAIL_CLIP < clip:
        return clip if tail_fraction < HEAVY_TAIL_FRACTION_CLIPPED / HEAVY_TAIL_BAND else current
    return min(clip, HEAVY_TAIL_CLIP) if tail_fraction > HEAVY_TAIL_FRACTION * HEAVY_TAIL_BAND else clip


def estimate_baseline(
    times: FloatArray,
    values: FloatArray,
    *,
    clip: float = 3.0,
    min_sigma: float | None = None,
) -> Baseline:
    """Estimate the baseline, choosing a lower clip for heavy-tailed noise (see :func:`choose_clip`)."""
    b = _estimate_baseline(times, values, clip=clip, min_sigma=min_sigma)
    c = choose_clip(b.tail_fraction, clip)
    if c != clip:
        # Its tail share is then the one on the new clip's scale, as its sums will count it.
        b = _estimate_baseline(times, values, clip=c, min_sigma=min_sigma)
    return b


def _estimate_baseline(
    times: FloatArray,
    values: FloatArray,
    *,
    clip: float = 3.0,
    min_sigma: float | None = None,
) -> Baseline:
    """Estimate the baseline of an in-control stretch of samples.

    Level: median, refined by a Huber step.  Sigma: Huber's proposal-2 scale,
    started from the moving-range estimate (d2 = 1.128).  Autocorrelation: the
    lag-1 autocorrelation of clipped residuals, kept only when it exceeds
    2/sqrt(n) (about a 5% test) in size, and capped at +-0.95.

    Examples
    --------
    >>> rng = np.random.default_rng(3)
    >>> x = 50.0 + 0.2 * rng.standard_normal(400)
    >>> b = estimate_baseline(np.arange(400.0), x)
    >>> round(b.level, 1), round(b.sigma, 2), b.interval, b.phi
    (50.0, 0.2, 1.0, 0.0)
    """
    n = int(values.shape[0])
    if n < 3:
        raise ValueError(f"need at least 3 samples for a baseline, got {n}")
    quantum = reading_quantum(values)
    level = median(values)
    s0 = max(moving_range_sigma(values), mad_sigma(values))
    s_robust = max(mad_sigma(values), median_moving_range_sigma(values))
    if s0 > MR_OUTLIER_RATIO * s_robust > 0.0:
        # A run of wild readings (a burst the warm-up kept) inflates the mean moving range
        # far beyond both robust estimates, and the Huber steps below, started from it,
        # would take the burst into the level: start from the robust ones instead.
        s0 = s_robust
    floor = sigma_floor(level, quantum, min_sigma)
    s0 = max(s0, floor)
    r = values - level
    # One Huber location step from the median, then the scale.
    level += s0 * float(np.mean(np.clip(r / s0, -clip, clip)))
    r = values - level
    sigma = max(huber_scale(r, clip, s0), floor)
    rc = np.clip(r / sigma, -clip, clip)
    phi_raw = float(np.clip(lag1_autocorrelation(rc), -0.95, 0.95))
    phi = phi_raw if abs(phi_raw) >= 2.0 / math.sqrt(n) else 0.0
    e = r[1:] - phi * r[:-1]
    s_e0 = sigma * math.sqrt(max(1.0 - phi * phi, 0.05))
    innovation_sigma = max(huber_scale(e, clip, s_e0), floor)
    dt = np.diff(times)
    interval = median(dt) if dt.shape[0] else 1.0
    if not interval > 0:
        interval = 1.0
    return Baseline(
        level=level,
        sigma=sigma,
        phi=phi,
        innovation_sigma=innovation_sigma,
        interval=interval,
        n=n,
        quantum=quantum,
        phi_raw=phi_raw,
        clip=clip,
        tail_fraction=float(np.mean(np.abs(r) > TAIL_AT * sigma)),
    )


class BaselineSums:
    """Running sums of in-control samples, relative to a fixed baseline.

    Samples are folded in as they age past the engine's guard, in any
    batches; :meth:`refine` turns the sums into one Huber step for level and
    scale, a lag-1 autocorrelation and a sampling interval, and merges them
    into the baseline.  The sums take a few floats, not a window of samples,
    and give the same result however the samples were batched.

    Examples
    --------
    >>> rng = np.random.default_rng(5)
    >>> b = estimate_baseline(np.arange(100.0), 10 + rng.standard_normal(100))
    >>> sums = BaselineSums()
    >>> x = 10 + rng.standard_normal(5000)
    >>> for a in range(0, 5000, 700):
    ...     sums.add(b, x[a:a + 700], np.arange(100.0 + a, 100.0 + min(a + 700, 5000)))
    >>> r = sums.refine(b, clip=4.0, floor=1e-9, max_weight=20000)
    >>> r.n, bool(abs(r.level - 10) < 0.05), bool(abs(r.sigma - 1) < 0.05)
    (5100, True, True)
    """

    __slots__ = ("n", "ndt", "prev_t", "prev_u", "sdt", "see", "slag", "su", "suu", "tail")

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.n = 0
        self.su = self.suu = self.slag = self.see = self.sdt = 0.0
        self.tail = self.ndt = 0
        self.prev_u: float | None = None
        self.prev_t: float | None = None

    def to_list(self) -> list[float | int | None]:
        return [self.n, self.su, self.suu, self.slag, self.see, self.tail, self.sdt, self.ndt,
                self.prev_u, self.prev_t]

    @classmethod
    def from_list(cls, d: list[Any]) -> BaselineSums:
        """Rebuild from :meth:`to_list` (as read back from a saved state)."""
        out = cls()
        (n, out.su, out.suu, out.slag, out.see, tail, out.sdt, ndt, out.prev_u, out.prev_t) = d
        out.n, out.tail, out.ndt = int(n or 0), int(tail or 0), int(ndt or 0)
        return out

    def add(self, b: Baseline, values: FloatArray, times: FloatArray, cut: int = 0) -> None:
        """Fold samples (in time order, continuing the previous ones) into the sums.

        With ``0 < cut < len(values)`` the samples are folded as two calls would fold
        ``values[:cut]`` and then ``values[cut:]`` (the engine folds the oldest samples of
        its window and the oldest of a batch together): the same sums, bit for bit, since
        the elementwise work is the same on either side of the cut and each sum is taken
        per part, in the same order; only the array calls are shared.
        """
        m = values.shape[0]
        if m == 0:
            return
        c = b.clip
        direct = DIRECT_CALLS
        dot = _dot if direct else np.dot
        dev = values - b.level
        dev *= 1.0 / b.sigma
        count = _count_nonzero if direct else np.count_nonzero
        lo: Any
        hi: Any
        if SHARED_SCALARS and direct:
            lo, hi = _BOUNDS.get(c) or clip_bounds(c)
            if c > TAIL_AT:
                u = _clip(dev, lo, hi)
                self.tail += int(count(np.abs(u) > _TAIL_AT))
            else:
                self.tail += int(count(np.abs(dev) > _TAIL_AT))
                u = _clip(dev, lo, hi)
        elif c > TAIL_AT:
            lo, hi = -c, c
            u = _clip(dev, -c, c) if direct else dev.clip(-c, c)
            self.tail += int(count(np.abs(u) > TAIL_AT))
        else:
            lo, hi = -c, c
            self.tail += int(count(np.abs(dev) > TAIL_AT))
            u = _clip(dev, -c, c) if direct else dev.clip(-c, c)
        phi = b.phi
        # The prewhitened residuals within the samples (both parts; the one across the
        # cut is the second part's first, as prev_u makes it in a call of its own).
        if phi == 0.0 or m < 2:
            e_all = None
        elif direct:
            e_all = u[1:] - phi * u[:-1]
            _clip(e_all, lo, hi, out=e_all)
        else:
            e_all = (u[1:] - phi * u[:-1]).clip(-c, c)
        # Sampling interval: gaps of ten intervals or more (stoppages) are left out, each
        # step judged on its own as add_one judges it, so the estimate does not depend on
        # where a batch ends.  (A block's mean step within 20% of the interval was once
        # taken whole: a 21 s gap in a long block counted, in a short one it did not, and
        # the design ARL, which follows the interval, differed by batching.)
        gap = 10.0 * b.interval
        dt_all = times[1:] - times[:-1] if m > 1 else None
        parts = ((0, cut), (cut, m)) if 0 < cut < m else ((0, m),)
        # Every step regular over both parts (the step across the cut included) means
        # every step regular within each part: one test for both in the common case.
        regular = dt_all is not None and 0.0 < float(_min(dt_all)) and float(_max(dt_all)) < gap
        for a, z in parts:
            k = z - a
            us = u[a:z]
            self.su += float(_sum(us))
            uu = float(dot(us, us))
            self.suu += uu
            lag = float(dot(us[1:], us[:-1]))
            if self.prev_u is not None:
                lag += us[0] * self.prev_u
            self.slag += lag
            if phi == 0.0:
                self.see += uu  # prewhitened residuals are the residuals themselves
            else:
                if e_all is not None:
                    e = e_all[a: z - 1]
                    self.see += float(dot(e, e))
                if self.prev_u is not None:
                    # clip of one number: min and max give the same float
                    ef = float(us[0] - phi * self.prev_u)
                    ef = -c if ef < -c else (c if ef > c else ef)
                    self.see += ef * ef
            if direct:
                # The same doubles read with item() (no array scalar made and converted), the
                # part's steps sliced only when they are looked at one by one.
                t_a, t_z = times.item(a), times.item(z - 1)
                if self.prev_t is not None:
                    d0 = t_a - self.prev_t
                    if 0.0 < d0 < gap:
                        self.sdt += d0
                        self.ndt += 1
                if k > 1:
                    assert dt_all is not None
                    if regular:
                        self.sdt += t_z - t_a
                        self.ndt += k - 1
                    else:
                        self._add_steps(dt_all[a: z - 1], gap, t_z - t_a, k)
                self.n += k
                self.prev_u = u.item(z - 1)
                self.prev_t = t_z
                continue
            if self.prev_t is not None:
                d0 = float(times[a]) - self.prev_t
                if 0.0 < d0 < gap:
                    self.sdt += d0
                    self.ndt += 1
            if k > 1:
                assert dt_all is not None
                dt = dt_all[a: z - 1]
                if regular or (0.0 < float(_min(dt)) and float(_max(dt)) < gap):
                    self.sdt += float(times[z - 1] - times[a])
                    self.ndt += k - 1
                else:
                    ok = dt[(dt > 0) & (dt < gap)]
                    self.sdt += float(ok.sum())
                    self.ndt += int(ok.shape[0])
            self.n += k
            self.prev_u = float(us[-1])
            self.prev_t = float(times[z - 1])

    def _add_steps(self, dt: FloatArray, gap: float, span: float, k: int) -> None:
        """:meth:`add`'s steps of one part that were not all regular over the whole call."""
        if 0.0 < float(_min(dt)) and float(_max(dt)) < gap:
            self.sdt += span
            self.ndt += k - 1
        else:
            ok = dt[(dt > 0) & (dt < gap)]
            self.sdt += float(ok.sum())
            self.ndt += int(ok.shape[0])

    def add_one(self, b: Baseline, value: float, time: float) -> None:
        """:meth:`add` of one sample, in plain floats: the same operations on the same
        numbers, without the dozen array calls that cost more than the sums themselves."""
        c = b.clip
        dev = (value - b.level) * (1.0 / b.sigma)
        u = -c if dev < -c else (c if dev > c else dev)
        if abs(u if c > TAIL_AT else dev) > TAIL_AT:
            self.tail += 1
        self.su += u
        uu = u * u
        self.suu += uu
        prev_u = self.prev_u
        if prev_u is not None:
            self.slag += u * prev_u
        if b.phi == 0.0:
            self.see += uu
        elif prev_u is not None:
            ef = u - b.phi * prev_u
            ef = -c if ef < -c else (c if ef > c else ef)
            self.see += ef * ef
        if self.prev_t is not None:
            # One step: regular when near the interval, else kept while shorter than ten
            # intervals (the two tests of add for a block of one).
            span = time - self.prev_t
            if abs(span - b.interval) < 0.2 * b.interval or 0 < span < 10.0 * b.interval:
                self.sdt += span
                self.ndt += 1
        self.n += 1
        self.prev_u = u
        self.prev_t = time

    def refine(self, b: Baseline, *, clip: float, floor: float, max_weight: int) -> Baseline:
        """The baseline with the folded samples merged in (weight of the old one capped at
        ``max_weight`` samples); the sums start again.  ``clip`` is the configured constant:
        when the tail share crosses the heavy-tail line the clip changes from the next block on."""
        n_blk = self.n
        if n_blk < 16:
            return b
        beta = huber_beta(b.clip)
        mean_u = self.su / n_blk
        level = b.level + b.sigma * mean_u
        sigma = max(b.sigma * math.sqrt(self.suu / n_blk / beta), floor)
        var_u = self.suu / n_blk - mean_u * mean_u
        phi_blk = ((self.slag / max(n_blk - 1, 1)) - mean_u * mean_u) / var_u if var_u > 0 else 0.0
        innov = max(b.sigma * math.sqrt(self.see / max(n_blk - 1, 1) / beta), floor)
        interval = self.sdt / self.ndt if self.ndt else b.interval
        tail_blk = self.tail / n_blk
        w_old = min(b.n, max_weight)
        w = w_old + n_blk
        # The level may rest on fewer samples than the rest (re-anchored after a step).
        wl_old = min(b.level_n, max_weight)

        def avg(a: float, c: float) -> float:
            return (a * w_old + c * n_blk) / w

        if DIRECT_CALLS:
            # np.clip of one float, in plain floats: the same bounds on the same number (a
            # NaN stays NaN, a zero keeps its sign), without some 10 us of the array call
            phi_raw = float(min(max(avg(b.phi_raw, phi_blk), -0.95), 0.95))
        else:
            phi_raw = float(np.clip(avg(b.phi_raw, phi_blk), -0.95, 0.95))
        n = min(b.n + n_blk, max_weight + n_blk)
        phi = phi_raw if abs(phi_raw) >= 2.0 / math.sqrt(n) else 0.0
        tail = avg(b.tail_fraction, tail_blk)
        new_clip = choose_clip(tail, clip, b.clip)
        if new_clip != b.clip:
            # The share so far was counted on the old clip's scale; the next blocks count
            # on the new one's.  Carried over at the ratio of the two lines (the edge
            # noise's), a share at one line lands on the other, so the choice is not
            # undone by the next refinement before the new blocks have spoken.
            tail *= (HEAVY_TAIL_SCALE if new_clip < b.clip else 1.0 / HEAVY_TAIL_SCALE)
        self.reset()
        n_level = b.level_n + n_blk
        return Baseline(
            level=(b.level * wl_old + level * n_blk) / (wl_old + n_blk),
            sigma=math.sqrt(avg(b.sigma**2, sigma**2)),
            phi=phi,
            innovation_sigma=math.sqrt(avg(b.innovation_sigma**2, innov**2)),
            interval=avg(b.interval, interval) if interval > 0 else b.interval,
            n=n,
            quantum=b.quantum,
            phi_raw=phi_raw,
            clip=new_clip,
            tail_fraction=tail,
            n_level=n_level if n_level < n else 0,
        )


def estimation_adjusted_arl(arl0: float, n: int, k_min: float | None,
                            n_level: int | None = None) -> float:
    """The design ARL that keeps the *real* in-control ARL near ``arl0`` when the
    baseline rests on only ``n`` samples.

    With ``a = log(arl0)``, the false-alarm rate of a test on standardised
    residuals behaves like ``exp(-a)``.  Two estimation errors raise it:

    * sigma estimated from ``nu = n - 1`` degrees of freedom scales the
      statistic by ``W = sigma_hat^2 / sigma^2 ~ chi2_nu / nu``; averaging
      ``exp(-a' W)`` over W gives ``(1 + 2 a'/nu)^(-nu/2)``, so the design uses
      ``a' = (nu/2) (exp(2a/nu) - 1)``;
    * for a CUSUM with reference value k, a mean error ``eps ~ N(0, 1/n)``
      changes its drift to ``k -+ eps``; with ``log ARL ~ 2 k H`` (Siegmund's
      approximation, H = h + 1.166) the averaged rate grows by
      ``exp(2 H^2 / n) = exp(a^2 / (2 k^2 n))``, added to ``a'``.

    ``k_min`` is the smallest reference value of the test (None for tests that
    correct for the mean error themselves).  ``n_level`` is the number of
    samples behind the level when it differs from ``n`` (a level re-estimated
    after a step, sigma carried over); the mean term then uses it.  Both
    terms vanish as n grows.

    Examples
    --------
    >>> round(estimation_adjusted_arl(604800, 10**9, 0.5) / 604800, 3)
    1.0
    >>> 10 < estimation_adjusted_arl(604800, 200, 0.5) / 604800 < 20
    True
    """
    a = math.log(arl0)
    nu = max(n - 1, 2)
    a_adj = 0.5 * nu * math.expm1(2.0 * a / nu) if 2.0 * a / nu < 50 else a + 50.0
    if k_min is not None and k_min > 0:
        n_mean = n if n_level is None else n_level
        a_adj += a * a / (2.0 * k_min * k_min * max(n_mean, 1))
    return float(min(math.exp(min(a_adj, 60.0)), 1e9))
