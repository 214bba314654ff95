"""Self-starting standardisation of a young level (Hawkins 1987).

A stream's level is known only from the samples seen so far: at the start
of a stream, and again after every confirmed step, when the level is new
but the noise is not.  Measuring each sample against a level estimated
once from a few samples would share that estimate's error among all later
inputs, and the sequential test would false-alarm far more often than
designed.  The self-starting answer (Hawkins 1987, "Self-starting CUSUM
charts for location and scale", The Statistician 36:299-316; Hawkins &
Olwell 1998, "Cumulative Sum Charts and Charting for Quality Improvement",
ch. 7) is to measure each sample against the mean of the samples *before*
it, and to scale by the predictive spread::

    T_n = (x_n - mean_(n-1)) / (s * sqrt(1 + 1/(n-1)))

For independent Gaussian samples the ``T_n`` are independent; with sigma
known they are N(0, 1) exactly, and with sigma estimated on ``df`` degrees
of freedom they are Student-t with ``df`` degrees of freedom, turned into
N(0, 1) by :func:`t_to_normal`.  So the sequential test sees standard
normal inputs from the first samples on and keeps its designed false-alarm
rate, at the cost that a step arriving while the level rests on ``n``
samples is partly absorbed into the mean (by ``m / (n + m)`` after ``m``
samples at the new level).

Autocorrelated noise would break that independence, so the samples are
prewhitened first (``e_n = r_n - phi r_(n-1)``, residuals from the running
mean, scaled by the innovation spread ``s sqrt(1 - phi^2)``): with phi
carried over from an established baseline, or, at the start of a stream,
with the lag-1 autocorrelation of the samples so far once it is
significant (beyond ``2 / sqrt(n)``, from 20 samples on; the same rule as
the baseline's).  The inputs are then approximately N(0, 1).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

#: While the autocorrelation cannot be told from none, the test's inputs allow for
#: it at its estimate plus this many standard errors (0: at the estimate, so a new
#: stream can alert early); the decision on an event allows for it at two.
PHI_MARGIN = 0.0
BIAS_CORRECT = True


def t_to_normal(t: float, df: float) -> float:
    """The standard normal quantile with the same tail probability as Student-t ``t`` on ``df``.

    Wallace's approximation (D. L. Wallace 1959, "Bounds on normal
    approximations to Student's and the chi-square distributions", Ann.
    Math. Statist. 30:1121-1130): ``z = sign(t) (8 df + 1) / (8 df + 3)
    sqrt(df log(1 + t^2 / df))``.  ``df`` infinite returns ``t``.

    Examples
    --------
    >>> round(t_to_normal(2.228, 10), 2)   # the two-sided 5% point of t(10) -> about 1.96
    1.96
    >>> t_to_normal(1.5, math.inf)
    1.5
    """
    if math.isinf(df):
        return t
    z = math.sqrt(df * math.log1p(t * t / df)) * (8.0 * df + 1.0) / (8.0 * df + 3.0)
    return z if t >= 0 else -z


@functools.lru_cache(maxsize=4096)
def normal_to_t(z: float, df: float) -> float:
    """The Student-t value on ``df`` degrees of freedom with the tail probability of the
    standard normal ``z``: :func:`t_to_normal` inverted (Wallace 1959, the same
    approximation), so ``t_to_normal(normal_to_t(z, df), df) == z`` up to rounding.

    The spike band of a level whose spread is estimated: a sample lies beyond ``z``
    sigmas on the normal scale when its predictive t lies beyond this.

    Examples
    --------
    >>> round(normal_to_t(1.96, 10), 2)   # the two-sided 5% point of t(10) is 2.228
    2.23
    >>> normal_to_t(5.0, math.inf)
    5.0
    """
    if math.isinf(df):
        return z
    w = z * (8.0 * df + 3.0) / (8.0 * df + 1.0)
    return math.copysign(math.sqrt(df * math.expm1(min(w * w / df, 700.0))), z)


class SelfStart:
    """Running level (and, unless known, spread) of one level regime.

    Parameters
    ----------
    sigma : the innovation sigma when known (an established baseline), else None.
    phi : lag-1 autocorrelation to prewhiten with (0 when unknown).
    ss, df : pooled sum of squares and its degrees of freedom carried in from
        earlier regimes (sigma unknown only).
    follow : with sigma known, the level follows slow change once it rests on this
        many samples: the running mean becomes an exponentially weighted one of
        weight ``1 / follow`` (0: a plain running mean throughout).  The predictive
        spread allows for the weighted mean's own variance, tracked exactly.

    Examples
    --------
    >>> ss = SelfStart(sigma=None)
    >>> [ss.standardise(v) for v in (10.0, 10.2)]
    [None, None]
    >>> ss.add(10.0); ss.add(10.2); ss.add(9.9)
    >>> round(ss.mean, 4), ss.n, round(ss.spread(), 4)
    (10.0333, 3, 0.1528)
    """

    __slots__ = (
        "df", "first", "follow", "held", "lag", "last", "mean", "n", "phi", "pool_c1", "pool_n", "prev",
        "sigma", "ss", "vm",
    )

    #: samples before the first standardised input when sigma is unknown (phi is estimated from 20 samples on)
    MIN_UNKNOWN = 5

    def __init__(self, sigma: float | None, phi: float = 0.0, ss: float = 0.0, df: int = 0,
                 follow: int = 0) -> None:
        self.sigma = sigma
        self.follow = follow if sigma is not None else 0
        self.vm = 0.0  # variance of the mean in units of sigma^2 (1/n for a plain mean)
        self.phi = phi
        self.n = 0
        self.mean = 0.0
        self.ss = ss  # pooled within-regime sum of squared deviations
        self.df = df
        self.prev: float | None = None  # the last sample added (for prewhitening)
        self.first: float | None = None  # the first sample of the regime
        self.lag = 0.0  # sum of products of consecutive samples, relative to the first
        self.last: float | None = None  # the last sample seen, taken in or not (for prewhitening)
        self.held: list[float] = []  # samples seen but not yet taken in (see hold)
        # lag-1 cross products and samples of earlier regimes, pooled like ss (see carry_over)
        self.pool_c1 = 0.0
        self.pool_n = 0

    def spread(self) -> float:
        """The current sigma: the known one, or the pooled estimate (0 before two samples)."""
        if self.sigma is not None:
            return self.sigma
        return math.sqrt(self.ss / self.df) if self.df > 0 else 0.0

    def standardise(self, x: float) -> float | None:
        """``x`` measured against the samples before it, as a N(0, 1) input; None while
        too few samples are known (or the spread is still zero)."""
        n = self.n
        if self.sigma is not None:
            if n < 1:
                return None
            r = x - self.mean
            if self.phi != 0.0 and self.last is not None:
                r -= self.phi * (self.last - self.mean)
            return r / (self.sigma * math.sqrt(1.0 + self.vm))
        if n < self.MIN_UNKNOWN or self.df < 2:
            return None
        s = math.sqrt(self.ss / self.df)
        if not s > 0:
            return None
        raw = self._phi_raw()
        phi = self._significant(raw)
        r = x - self.mean
        df = float(self.df)
        if phi != 0.0 and self.last is not None:
            r -= phi * (self.last - self.mean)
            s *= math.sqrt(1.0 - phi * phi)
            # Autocorrelated samples carry less information about the spread:
            # count the degrees of freedom at their effective number.
            df = max(2.0, df * (1.0 - abs(phi)) / (1.0 + abs(phi)))
        else:
            # Too few samples to tell positive autocorrelation from none: allow for
            # it by its long-run variance factor (1 + phi) / (1 - phi) at the estimate
            # plus PHI_MARGIN standard errors (1 / sqrt(n)), so runs of autocorrelated
            # samples do not read as a step.
            s *= math.sqrt(self._long_run_factor(raw, PHI_MARGIN))
        return t_to_normal(r / (s * math.sqrt(1.0 + 1.0 / n)), df)

    def level_n(self) -> int:
        """How many samples the level is worth: n for a plain running mean, 1 / its
        variance factor once it follows (an exponentially weighted mean)."""
        if self.follow and self.vm > 0.0:
            return max(1, min(self.n, int(1.0 / self.vm)))
        return self.n

    def phi_estimate(self) -> float:
        """The lag-1 autocorrelation of the regime's samples when significant, else 0
        (the known phi when sigma is known)."""
        if self.sigma is not None:
            return self.phi
        return self._significant(self._phi_raw())

    def _significant(self, raw: float) -> float:
        """``raw`` when it is significant (beyond 2 / sqrt(n), from 20 samples on), else 0."""
        n = self.n + self.pool_n
        return raw if n >= 20 and abs(raw) >= 2.0 / math.sqrt(n) else 0.0

    def variance_factor(self, margin: float) -> float:
        """(1 + phi) / (1 - phi) for positive autocorrelation that cannot yet be told
        from none, phi taken at the estimate plus ``margin`` standard errors (1 when
        the estimate is significant: then the samples are prewhitened instead)."""
        if self.sigma is not None:
            return 1.0
        raw = self._phi_raw()
        return 1.0 if self._significant(raw) != 0.0 else self._long_run_factor(raw, margin)

    def _long_run_factor(self, raw: float, margin: float) -> float:
        n = self.n + self.pool_n
        up = min(0.95, max(raw, 0.0) + (margin / math.sqrt(n) if n > 0 else 0.0))
        return (1.0 + up) / (1.0 - up) if up > 0.0 else 1.0

    def _c1(self) -> float:
        """Sum over this regime's consecutive pairs of (x_t - mean)(x_(t-1) - mean)."""
        n = self.n
        if n < 2 or self.first is None or self.prev is None:
            return 0.0
        m = self.mean - self.first
        last = self.prev - self.first
        return self.lag - m * (2.0 * n * m - last) + (n - 1) * m * m

    def _phi_raw(self) -> float:
        """The lag-1 autocorrelation as estimated, pooled over earlier regimes (0 before 3
        samples), corrected for its small-sample bias.

        The sample autocorrelation of an AR(1) series of ``n`` samples around its own
        mean falls short of phi by about ``(1 + 3 phi) / n`` (Kendall 1954, "Note on
        bias in the estimation of autocorrelation", Biometrika 41:403-404; Marriott &
        Pope 1954): at 30 samples, 0.09 at phi 0.6.  Left uncorrected, a young
        stream's autocorrelated noise is prewhitened too little and reads as runs.
        """
        n = self.n + self.pool_n
        if n < 3 or not self.ss > 0:
            return 0.0
        r = (self._c1() + self.pool_c1) / self.ss
        if BIAS_CORRECT:
            r += (1.0 + 3.0 * r) / n
        return max(-0.95, min(0.95, r))

    def copy(self) -> SelfStart:
        """An independent copy (the held samples too)."""
        out = SelfStart.__new__(SelfStart)
        for name in SelfStart.__slots__:
            setattr(out, name, getattr(self, name))
        out.held = list(self.held)
        return out

    def carry_over(self) -> SelfStart:
        """A new regime (the level stepped) of unknown spread: the spread and the
        autocorrelation go on being estimated from both regimes, pooled."""
        new = SelfStart(None, ss=self.ss, df=self.df)
        new.pool_c1 = self.pool_c1 + self._c1()
        new.pool_n = self.pool_n + self.n
        return new

    def add(self, x: float) -> None:
        """Take ``x`` into the running mean and spread (Welford's update)."""
        if self.first is None:
            self.first = x
        elif self.prev is not None:
            self.lag += (x - self.first) * (self.prev - self.first)
        self.n += 1
        d = x - self.mean
        if self.follow and self.n > self.follow:
            lam = 1.0 / self.follow
            self.mean += lam * d
            self.vm = (1.0 - lam) ** 2 * self.vm + lam * lam
        else:
            self.mean += d / self.n
            self.vm = 1.0 / self.n
        if self.n > 1:
            self.ss += d * (x - self.mean)
            self.df += 1
        self.prev = x
        self.last = x

    def hold(self, x: float, limit: int) -> None:
        """See ``x`` without taking it in yet: while the test's evidence of a change
        builds up, the samples that carry it must not move the level they are
        measured against.  At most ``limit`` are held; the oldest is taken in
        beyond that."""
        self.held.append(x)
        self.last = x
        if len(self.held) > limit:
            self._take(self.held.pop(0))

    def release(self) -> None:
        """Take in the held samples, oldest first (the evidence died down)."""
        if self.held:
            last = self.last
            for v in self.held:
                self._take(v)
            self.held.clear()
            self.last = last

    def _take(self, x: float) -> None:
        last = self.last
        self.add(x)
        self.last = last

    def get_state(self) -> dict[str, Any]:
        return {"sigma": self.sigma, "phi": self.phi, "n": self.n, "mean": self.mean, "ss": self.ss,
                "follow": self.follow, "vm": self.vm,
                "df": self.df, "prev": self.prev, "first": self.first, "lag": self.lag,
                "last": self.last, "held": list(self.held), "pool_c1": self.pool_c1,
                "pool_n": self.pool_n}

    @classmethod
    def from_state(cls, d: dict[str, Any]) -> SelfStart:
        """Rebuild from :meth:`get_state`; ``ValueError`` names a bad field."""
        sigma = d["sigma"]
        out = cls(None if sigma is None else float(sigma), float(d["phi"]), float(d["ss"]), int(d["df"]))
        out.n = int(d["n"])
        # Snapshots before following: a plain running mean.
        out.follow = int(d.get("follow", 0)) if out.sigma is not None else 0
        out.vm = float(d.get("vm", 1.0 / out.n if out.n else 0.0))
        if out.follow < 0 or not (math.isfinite(out.vm) and 0.0 <= out.vm <= 1.0):
            raise ValueError("young.follow/vm: must be a non-negative count and a variance factor in [0, 1]")
        out.mean = float(d["mean"])
        out.prev = None if d["prev"] is None else float(d["prev"])
        out.first = None if d.get("first") is None else float(d["first"])
        out.lag = float(d.get("lag", 0.0))
        out.last = out.prev if d.get("last") is None else float(d["last"])
        out.held = [float(v) for v in d.get("held", [])]
        out.pool_c1 = float(d.get("pool_c1", 0.0))
        out.pool_n = int(d.get("pool_n", 0))
        if not all(math.isfinite(v) for v in out.held):
            raise ValueError("young.held: holds a value that is not a finite number")
        for name in ("phi", "ss", "mean", "lag", "pool_c1"):
            if not math.isfinite(getattr(out, name)):
                raise ValueError(f"young.{name}: not a finite number")
        if out.sigma is not None and not (math.isfinite(out.sigma) and out.sigma > 0):
            raise ValueError(f"young.sigma: must be a positive number, got {out.sigma!r}")
        for name in ("n", "df", "pool_n"):
            if not 0 <= getattr(out, name) <= 2**53:
                raise ValueError(f"young.{name}: must be a whole number from 0 to 2**53")
        if out.ss < 0:
            raise ValueError("young.ss: must not be negative")
        if not -0.95 <= out.phi <= 0.95:
            raise ValueError(f"young.phi: must lie in [-0.95, 0.95], got {out.phi!r}")
        return out


#: The pooled estimate is taken this many of its standard errors high.
SPLIT_POOL_MARGIN = 2.0


class SplitEvidence(NamedTuple):
    """The strongest single split of a young level's samples (see :func:`split_evidence`)."""

    split_at: int  # first sample after the split
    t: float  # two-sample t of the split, on the long-run spread
    p_value: float  # Bonferroni bound over every split tried
    level_before: float
    level_after: float
    sigma: float  # pooled within-segment sigma
    phi: float  # lag-1 autocorrelation of the within-segment residuals, bias-corrected


def student_t_tail(t: float, df: float) -> float:
    """P(T > t) for Student-t on ``df`` degrees of freedom, through :func:`t_to_normal`.

    >>> round(student_t_tail(2.228, 10), 4)   # the upper 2.5% point of t(10)
    0.025
    """
    return 0.5 * math.erfc(t_to_normal(t, df) / math.sqrt(2.0))


@functools.lru_cache(maxsize=4096)
def _split_grid(n: int, m: int) -> tuple[FloatArray, FloatArray]:
    """The splits :func:`split_evidence` tries on ``n`` samples (``k`` from ``m`` to ``n - m``)
    and ``k (n - k)`` for each, read-only."""
    ks = np.arange(m, n - m + 1, dtype=np.float64)
    weight = ks * (n - ks)
    ks.flags.writeable = False
    weight.flags.writeable = False
    return ks, weight


def split_evidence(values: FloatArray, min_segment: int = 3, phi_margin: float = 0.0,
                   p_below: float = 1.0) -> SplitEvidence | None:
    """How strongly ``values`` (one young level's samples, in order) show one step.

    Every split with at least ``min_segment`` samples on each side is tried; the
    best one (largest explained sum of squares, the least-squares step) gives the
    two-sample t statistic on the pooled spread, ``t^2 = E_k (n - 2) / (SS - E_k)``.
    Its p-value is bounded by Bonferroni over the splits tried, each two-sided on
    ``n - 2`` degrees of freedom: conservative, since neighbouring splits are
    strongly correlated, so a young stream's false-alarm budget is kept.  This is
    the changepoint form of self-starting control (Hawkins, Qiu & Kang 2003, "The
    changepoint model for statistical process control", J. Quality Technology
    35:355-366), with a bound in place of simulated thresholds.

    Autocorrelation is estimated from the samples before the split (the split is
    chosen to explain as much as it can, so residuals around both fitted levels
    would understate a slow wander's), or from both segments' residuals where they
    show less, corrected for its small-sample bias, and the
    t statistic is divided by the square root of the long-run variance factor at
    the estimate plus ``phi_margin`` standard errors.

    With ``p_below``, None also when the bound cannot fall below it (checked first
    with no allowance for autocorrelation, which only raises it): a caller that calls
    a step only below ``p_below`` gets the same answer for less work.
    """
    n = int(values.shape[0])
    m = max(int(min_segment), 2)
    if n < 2 * m + 1:
        return None
    # The first warm-up calls this on about a third of a new stream's samples: the splits
    # and their weights come from a cache, and the arrays' own methods stand in for
    # numpy's functions (the same operations, in about half the time).
    ks, weight = _split_grid(n, m)
    v = values - values[0]
    c = v.cumsum()
    total = float(c[-1])
    dev = c[m - 1: n - m] - ks * (total / n)
    explained = dev * dev * n / weight
    j = int(explained.argmax())
    k = m + j
    ss = float(((v - total / n) ** 2).sum())
    e = float(explained[j])
    rss = ss - e
    if not rss > 0.0:
        return None
    df = n - 2.0
    splits = n - 2 * m + 1
    if p_below < 1.0 and splits * 2.0 * student_t_tail(math.sqrt(e * df / rss), df) >= p_below:
        # Even with no allowance for autocorrelation the bound is not below p_below:
        # the caller would not call a step, so the rest is not worked out.
        return None
    before = float(values[:k].mean())
    after = float(values[k:].mean())
    # The autocorrelation of the samples before the split: the split is chosen to
    # explain as much as it can, so residuals around both fitted levels would
    # understate a slow wander's autocorrelation.
    head = values[:k] - before
    hss = float(np.dot(head, head))
    hc1 = float(np.dot(head[1:], head[:-1]))
    r = hc1 / hss if hss > 0.0 else 0.0
    r += (1.0 + 3.0 * r) / k  # Kendall's small-sample bias correction, as in SelfStart
    # ... unless both segments together show less: a run in 20 samples before a step
    # looks like autocorrelation (about 1 iid series in 100 reads 0.7), and the samples
    # after the step, as many or more, say whether the noise wanders.  Pooled over both
    # segments' residuals, corrected the same way on all n; the smaller of the two is
    # taken, so a wander that shows in both is still allowed for in full.
    tail = values[k:] - after
    tss = float(np.dot(tail, tail))
    if hss + tss > 0.0:
        rp = (hc1 + float(np.dot(tail[1:], tail[:-1]))) / (hss + tss)
        r = min(r, rp + (1.0 + 3.0 * rp) / n + SPLIT_POOL_MARGIN / math.sqrt(n))
    phi = min(0.95, r + phi_margin / math.sqrt(k))
    vf = (1.0 + phi) / (1.0 - phi) if phi > 0.0 else 1.0
    t = math.sqrt(e * df / rss / vf)
    p = min(1.0, splits * 2.0 * student_t_tail(t, df))
    return SplitEvidence(k, t, p, before, after, math.sqrt(rss / df), max(-0.95, min(0.95, r)))


@functools.lru_cache(maxsize=4096)
def split_critical_t(n: int, p_below: float, min_segment: int = 3) -> float:
    """The t statistic :func:`split_evidence` must exceed on ``n`` samples for its
    Bonferroni bound to fall below ``p_below``: the largest t (to 1e-12 of itself, by
    bisection) whose bound is still at least ``p_below``, so a split called at that bound
    has ``t`` above it.  The threshold a record names for the split test (``warmup_split``).

    >>> round(split_critical_t(200, 0.5 / 604800.0), 2)
    6.15
    """
    df = n - 2.0
    splits = n - 2 * max(int(min_segment), 2) + 1

    def bound(t: float) -> float:
        return splits * 2.0 * student_t_tail(t, df)

    t = _last_t_holding(bound, p_below)
    assert t is not None  # no cap
    return t


def _last_t_holding(bound: Callable[[float], float], goal: float, cap: float = math.inf) -> float | None:
    """The largest t (to 1e-12 of itself, by doubling then bisection) at which ``bound``,
    falling as t grows, is still at least ``goal``; None when that t passes ``cap``."""
    lo, hi = 0.0, 1.0
    while bound(hi) >= goal:
        lo, hi = hi, hi * 2.0
        if hi > cap:
            return None
    while hi - lo > 1e-12 * hi:
        mid = 0.5 * (lo + hi)
        if bound(mid) >= goal:
            lo = mid
        else:
            hi = mid
    return lo


#: :func:`split_screen` trusts its sum of squares to this relative error (the sums of the same
#: non-negative terms in two orders differ by at most ``2 (n - 1)`` units in the last place,
#: 2e-11 of the sum at 100,000 samples), and its critical t to these margins.
_SCREEN_SS = 1e-9
_SCREEN_P = 1e-7
_SCREEN_T = 1e-9


@functools.lru_cache(maxsize=8192)
def _split_t2_none(n: int, m: int, p_below: float) -> float:
    """A squared t statistic at or below which :func:`split_evidence`'s first check on ``n``
    samples surely returns None: the Bonferroni bound of a t a little above it is still at
    least ``p_below``, by a margin far beyond the rounding of either side.  Found by
    bisection (the bound falls as t grows); 0 when no t qualifies."""
    df = n - 2.0
    splits = n - 2 * m + 1
    goal = p_below * (1.0 + _SCREEN_P)

    def bound(t: float) -> float:
        return splits * 2.0 * student_t_tail(t, df)

    if bound(0.0) < goal:
        return 0.0
    lo = _last_t_holding(bound, goal, cap=1e12)
    if lo is None:
        return 0.0
    t = lo * (1.0 - _SCREEN_T)
    return t * t


def split_screen(values: FloatArray, lengths: NDArray[np.intp], min_segment: int = 3,
                 p_below: float = 1.0) -> NDArray[np.bool_]:
    """For each ``n`` in ``lengths``: True where ``split_evidence(values[:n], min_segment,
    p_below=p_below)`` surely returns None, whatever ``phi_margin`` (False: not known, ask it).

    The engine's first warm-up asks :func:`split_evidence` about every growing prefix of
    its window that its screen lets through, some fifty times in 200 samples, and almost
    every answer is None: the best split's bound is not below ``p_below``.  Here all the
    prefixes are weighed at once, as rows of one array: the splits' explained sums of
    squares by the same operations on the same numbers (the same floats), the total sum
    of squares in another order of summation (so trusted only to :data:`_SCREEN_SS`), and
    a row is called None only when its t statistic, worked out with the sum of squares at
    the low end of that error, lies below :func:`_split_t2_none`'s critical value.  Rows
    near the critical value, or whose split explains nearly all of the variation, are left
    to :func:`split_evidence` itself.
    """
    ns = np.asarray(lengths, dtype=np.intp)
    m = max(int(min_segment), 2)
    out = ns < 2 * m + 1
    if p_below >= 1.0 or bool(out.all()):
        return out
    big = int(ns.max())
    v = values[:big] - values[0]
    c = v.cumsum()
    nf = ns.astype(np.float64)
    mean = c[np.maximum(ns, 1) - 1] / nf  # split_evidence's total / n, per row
    ks = np.arange(m, big - m + 1, dtype=np.float64)
    col = nf[:, None]
    # The arrays are worked in place and the cells beyond a row's length are zeroed by
    # multiplying with the row's mask, not by np.where, which broadcasts its scalar cell by
    # cell (a call took 4 to 5 times as long).  Every cell a row uses holds the same float as
    # before (and as split_evidence's): dev * dev * n / (k (n - k)), and the squares
    # summed in the same order, the ones beyond the row's length zero.
    with np.errstate(invalid="ignore", over="ignore"):
        dev = ks * mean[:, None]
        np.subtract(c[m - 1: big - m], dev, out=dev)
        np.multiply(dev, dev, out=dev)
        np.multiply(dev, col, out=dev)
        weight = col - ks
        np.multiply(ks, weight, out=weight)
        valid = ks <= (nf - m)[:, None]
        np.divide(dev, weight, out=dev, where=valid)
        dev *= valid  # a cell left undivided: finite times 0 (an inf gives nan: split_evidence decides)
        e = dev.max(axis=1)
        d = v - mean[:, None]
        d *= np.arange(big) < ns[:, None]
        np.multiply(d, d, out=d)
        ss = d.sum(axis=1)
    rss = ss * (1.0 - _SCREEN_SS) - e
    crit = np.array([_split_t2_none(int(n), m, p_below) if n >= 2 * m + 1 else 0.0 for n in ns.tolist()])
    with np.errstate(invalid="ignore", over="ignore"):
        sure: NDArray[np.bool_] = (rss > 0.0) & (e * (nf - 2.0) <= crit * rss)
    return out | sure
