"""Calm streams, pooled: a round's samples for many watching streams go through
their CUSUM charts together, as arrays, and reach each stream's engine later in
one batch.

A live round brings each stream one or two samples.  Handed to its engine one
call at a time, a sample costs the call (tens of microseconds) whatever it
carries; the engine's batch path costs about a microsecond a sample.  Most
samples of most streams change nothing but a test statistic.  So a watching
stream whose engine says it is *calm* (:meth:`.StreamEngine.calm_terms`: no
event open, no young level, no sample held for the spike check, a CUSUM-type
test) joins the pool, and its samples wait there while an upper bound of its
charts shows that no trip is possible.  The moment the bound could reach a
threshold, or a sample is anything but plain (outside the spike band, not
newer than the last, not a finite number, too far from its arrival), the
stream's samples are taken out (:meth:`CalmPool.take`) and fed to its engine
in that same round.  Its engine then processes exactly the samples it would
have processed one by one, in the same order (the engine's records do not
depend on batching), so the records are the same and come out in the same
round.

The charts.  The pool runs each stream's charts (upper and lower sums, one per
reference value ``k`` of the bank) on the residuals the engine would compute:
each sample less the baseline's level and the follower's offset as it will
stand at that sample, prewhitened, scaled and clipped.  The follower is fed
samples ``delay`` samples old, so its offsets for the next ``delay + 1``
samples depend only on samples the engine holds already: the engine states
them when the stream joins (``offsets``).  Past them the pool moves the
offset as the engine does, ``u <- (1 - lam) u + lam (x - level)`` with the
pooled sample ``delay + 1`` places back.  So the pool's sums are the
engine's, up to the order of floating-point sums, and it hands a stream over
when a sum comes within a hair (``MARGIN``) of its threshold ``h``.

A stream is handed over too at a reading that could make its run of one repeated
value improbable, and at the first reading unlike a run that was (core/repeats.py:
the engine counts the run; the pool knows from its ``run_*`` terms how many more
readings of the value may wait), so that a frozen sensor is flagged, and its flag
taken down, in the round its reading came and not a batch later.

A stream leaves the pool after at most ``room`` samples (the engine refines
its baseline or re-centres its spike band at a count of samples: that
sample ends a batch), at most ``max_samples``, or when its oldest waiting
sample is ``max_age`` old on the caller's clock (times are passed in: the
core reads no clock).  Both limits are spread over the streams by a hash of
the name (over their top quarter: from 3/4 of ``max_samples`` and of
``max_age`` up), so streams that joined together do not all leave together.

Pure: no I/O, no clock.
"""

from __future__ import annotations

import math
import zlib
from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.screen import MAX_ABS_VALUE

FloatArray = NDArray[np.float64]

#: Most charts a pooled test may have (the default bank has 4).
MAX_CHARTS = 4
#: Slack on the threshold (relative and absolute) for the order in which the engine's
#: array path takes floating-point sums.
MARGIN = 1e-9


class CalmTerms(NamedTuple):
    """What a calm engine states about itself for the pool (see the module's text)."""

    level: float  # the baseline's level
    offsets: tuple[float, ...]  # the follower's offset at each of the next samples (one: it stays)
    lam: float  # the follower's weight per sample (0: the offset stays)
    delay: int  # how many samples old the samples the follower is fed are (len(offsets) - 1)
    lo: float  # the spike band: a sample outside it goes to the engine at once
    hi: float
    inv: float  # 1 / the prewhitened residuals' sigma
    phi: float  # prewhitening coefficient
    prev_r: float  # the last kept sample's residual
    clip: float  # residuals are clipped to +-clip
    ks: tuple[float, ...]  # the charts' reference values
    hs: tuple[float, ...]  # and thresholds (a chart trips when its sum exceeds h)
    c_plus: tuple[float, ...]  # the sums now
    c_minus: tuple[float, ...]
    room: int  # samples the engine takes before its baseline or band may change
    last_time: float  # newest accepted time
    max_ahead: float  # arrival checks (inf: none)
    max_behind: float
    # The run of one repeated reading (core/repeats.py, RepeatWatch.pool_terms): the last value,
    # how many more of it may come before the run could be flagged, how many of a new run,
    # and whether the run going on is flagged (then the first other value ends the flag).
    run_value: float = math.nan
    run_left: float = math.inf
    run_new: float = math.inf
    run_flagged: bool = False


class CalmPool:
    """The calm streams' charts and waiting samples, in arrays (one row a stream).

    Examples
    --------
    A stream with one chart (k 0.5, h 2) joins with empty sums; a sample
    within half a sigma cannot trip it, a second of 4 sigma (clipped to 3) could:

    >>> pool = CalmPool(max_samples=64, max_age=60.0)
    >>> terms = CalmTerms(level=10.0, offsets=(0.0,), lam=0.0, delay=0, lo=5.0, hi=15.0, inv=1.0, phi=0.0,
    ...                   prev_r=0.0, clip=3.0, ks=(0.5,), hs=(2.0,), c_plus=(0.0,), c_minus=(0.0,),
    ...                   room=1000, last_time=0.0, max_ahead=math.inf, max_behind=math.inf)
    >>> pool.join("s", terms)
    >>> out = pool.offer(["s"], np.array([1.0]), np.array([10.4]), np.array([1.0]), now=0.0)
    >>> out.tolist()
    [False]
    >>> pool.offer(["s"], np.array([2.0]), np.array([14.0]), np.array([2.0]), now=0.0).tolist()
    [True]
    >>> [a.tolist() for a in pool.take("s")]
    [[1.0, 2.0], [10.4, 14.0], [1.0, 2.0]]
    """

    def __init__(self, *, max_samples: int, max_age: float, capacity: int = 64) -> None:
        if max_samples < 2:
            raise ValueError(f"max_samples must be at least 2, got {max_samples}")
        self.max_samples = int(max_samples)
        self.max_age = float(max_age)
        self._slot: dict[str, int] = {}
        self._names: list[str | None] = []
        self._free: list[int] = []
        self._alloc(capacity)

    # ------------------------------------------------------------ storage
    def _alloc(self, n: int) -> None:
        """Room for ``n`` streams (the arrays keep their rows; new slots are free)."""
        old = len(self._names)
        m, w = MAX_CHARTS, self.max_samples
        self._level = _grown(self, "_level", (n,), 0.0)
        self._lam = _grown(self, "_lam", (n,), 0.0)
        self._keep = _grown(self, "_keep", (n,), 1.0)
        self._lo = _grown(self, "_lo", (n,), 0.0)
        self._hi = _grown(self, "_hi", (n,), 0.0)
        self._inv = _grown(self, "_inv", (n,), 0.0)
        self._phi = _grown(self, "_phi", (n,), 0.0)
        self._prev = _grown(self, "_prev", (n,), 0.0)
        self._clip = _grown(self, "_clip", (n,), 0.0)
        self._last_t = _grown(self, "_last_t", (n,), 0.0)
        self._ahead = _grown(self, "_ahead", (n,), 0.0)
        self._behind = _grown(self, "_behind", (n,), 0.0)
        self._first_at = _grown(self, "_first_at", (n,), 0.0)
        self._last_a = _grown(self, "_last_a", (n,), 0.0)
        self._age = _grown(self, "_age", (n,), 0.0)
        self._rv = _grown(self, "_rv", (n,), 0.0)
        self._rl = _grown(self, "_rl", (n,), 0.0)
        self._rn = _grown(self, "_rn", (n,), 0.0)
        self._rf = _grown(self, "_rf", (n,), 0.0)
        self._k = _grown(self, "_k", (n, m), 0.0)
        self._h = _grown(self, "_h", (n, m), math.inf)
        self._cp = _grown(self, "_cp", (n, m), 0.0)
        self._cm = _grown(self, "_cm", (n, m), 0.0)
        self._u = _grown(self, "_u", (n, w), 0.0)
        # Only rows with samples waiting are copied: a stream whose samples come in
        # batches never has any, and its rows cost nothing.
        live = None if not old else np.flatnonzero(self._cnt[:old] > 0)
        self._t = _grown(self, "_t", (n, w), 0.0, live)
        self._x = _grown(self, "_x", (n, w), 0.0, live)
        cnt: NDArray[np.intp] = np.zeros(n, dtype=np.intp)
        cap: NDArray[np.intp] = np.zeros(n, dtype=np.intp)
        stated: NDArray[np.intp] = np.zeros(n, dtype=np.intp)
        delay: NDArray[np.intp] = np.zeros(n, dtype=np.intp)
        if old:
            cnt[:old] = self._cnt
            cap[:old] = self._cap
            stated[:old] = self._stated
            delay[:old] = self._delay
        self._cnt: NDArray[np.intp] = cnt
        self._cap: NDArray[np.intp] = cap
        self._stated: NDArray[np.intp] = stated  # offsets stated by the engine (the rest computed)
        self._delay: NDArray[np.intp] = delay
        self._free.extend(range(n - 1, old - 1, -1))
        self._names.extend([None] * (n - old))

    def __len__(self) -> int:
        return len(self._slot)

    def __contains__(self, name: object) -> bool:
        return name in self._slot

    def waiting(self, name: str) -> int:
        """How many samples of the stream wait (0 when it is not pooled)."""
        slot = self._slot.get(name)
        return 0 if slot is None else int(self._cnt[slot])

    def total_waiting(self) -> int:
        """Samples waiting, over every stream."""
        return int(self._cnt.sum())

    def names(self) -> list[str]:
        return list(self._slot)

    # ------------------------------------------------------------ joining
    def join(self, name: str, terms: CalmTerms) -> None:
        """The stream's engine is calm and has every sample so far: it waits here from now on."""
        if name in self._slot:
            raise ValueError(f"stream {name!r} is pooled already")
        if len(terms.ks) > MAX_CHARTS or len(terms.ks) != len(terms.hs):
            raise ValueError(f"a pooled test has 1 to {MAX_CHARTS} charts, got {len(terms.ks)}")
        if not self._free:
            self._alloc(2 * len(self._names))
        slot = self._free.pop()
        self._slot[name] = slot
        self._names[slot] = name
        m = len(terms.ks)
        self._level[slot] = terms.level
        k = min(len(terms.offsets), self.max_samples)
        self._u[slot, :k] = terms.offsets[:k]
        if terms.lam > 0.0:
            if len(terms.offsets) != terms.delay + 1:
                raise ValueError(f"a followed stream states delay + 1 offsets, got {len(terms.offsets)}")
            self._stated[slot] = k
        else:
            self._u[slot, k:] = terms.offsets[-1]
            self._stated[slot] = self.max_samples
        self._lam[slot] = terms.lam
        self._keep[slot] = 1.0 - terms.lam
        self._delay[slot] = terms.delay
        self._lo[slot] = terms.lo
        self._hi[slot] = terms.hi
        self._inv[slot] = terms.inv
        self._phi[slot] = terms.phi
        self._prev[slot] = terms.prev_r
        self._clip[slot] = terms.clip
        self._last_t[slot] = terms.last_time
        self._ahead[slot] = terms.max_ahead
        self._behind[slot] = terms.max_behind
        self._rv[slot] = terms.run_value
        self._rl[slot] = terms.run_left
        self._rn[slot] = terms.run_new
        self._rf[slot] = 1.0 if terms.run_flagged else 0.0
        self._k[slot] = 0.0
        self._h[slot] = math.inf
        self._cp[slot] = 0.0
        self._cm[slot] = 0.0
        self._k[slot, :m] = terms.ks
        self._h[slot, :m] = terms.hs
        self._cp[slot, :m] = terms.c_plus
        self._cm[slot, :m] = terms.c_minus
        spread = (zlib.crc32(name.encode("utf-8", "surrogatepass")) % 1024) / 1024.0
        # Over the top quarter: the rows hold max_samples anyway, and each batch handed
        # over costs an engine call and a calm_terms(); a quarter still spreads them.
        low = self.max_samples - self.max_samples // 4
        self._cap[slot] = max(1, min(terms.room, low + int(spread * (self.max_samples - low))))
        self._age[slot] = self.max_age * (0.75 + 0.25 * spread)
        self._cnt[slot] = 0

    def take(self, name: str) -> tuple[FloatArray, FloatArray, FloatArray]:
        """The stream leaves the pool: its waiting samples (times, values, arrivals), oldest first."""
        slot = self._slot.pop(name)
        self._names[slot] = None
        self._free.append(slot)
        n = int(self._cnt[slot])
        self._cnt[slot] = 0
        return self._columns(slot, n)

    def _columns(self, slot: int, n: int) -> tuple[FloatArray, FloatArray, FloatArray]:
        """A stream's waiting samples: times, values and arrival times.  Every sample but
        the newest passed the arrival checks when it came, so its own time stands in
        for its arrival (the engine checks nothing else of it); the newest's is kept."""
        t = self._t[slot, :n].copy()
        a = t.copy()
        if n:
            a[-1] = self._last_a[slot]
        return t, self._x[slot, :n].copy(), a

    def waiting_samples(self) -> dict[str, tuple[FloatArray, FloatArray, FloatArray]]:
        """Copies of every stream's waiting samples (for a snapshot), streams with none left out."""
        out = {}
        for name, slot in self._slot.items():
            n = int(self._cnt[slot])
            if n:
                out[name] = self._columns(slot, n)
        return out

    # ------------------------------------------------------------ a round
    def slots(self, names: list[str]) -> NDArray[np.intp]:
        return np.fromiter((self._slot[n] for n in names), dtype=np.intp, count=len(names))

    def offer(self, names: list[str], t: FloatArray, x: FloatArray, a: FloatArray, *,
              now: float) -> NDArray[np.bool_]:
        """One sample for each of ``names`` (pooled streams, each once): add it to the
        stream's waiting samples and advance the stream's charts.  Returns, per stream,
        whether it must go to its engine now: its charts could trip, the sample is not
        plain, or the stream has waited its most samples."""
        s = self.slots(names)
        cnt = self._cnt[s]
        level = self._level[s]
        past = cnt >= self._stated[s]
        if past.any():
            # The follower's offset past those the engine stated: fed the pooled sample
            # delay + 1 places back, as the engine feeds it.
            sp, cp_ = s[past], cnt[past]
            self._u[sp, cp_] = self._keep[sp] * self._u[sp, cp_ - 1] \
                + self._lam[sp] * (self._x[sp, cp_ - self._delay[sp] - 1] - level[past])
        r = (x - level) - self._u[s, cnt]
        plain = (np.abs(x) <= MAX_ABS_VALUE) & (t > self._last_t[s]) & (t - a <= self._ahead[s]) \
            & (a - t <= self._behind[s]) & (x >= self._lo[s]) & (x <= self._hi[s])
        # (NaN fails every comparison above; a time of -inf fails the order check.  The
        # decoders give finite times only; an infinite one would pass only with no
        # max_time_ahead, and the engine would set it aside when the stream is fed.)
        phi = self._phi[s]
        inv = self._inv[s]
        clip = self._clip[s]
        z = np.clip(np.where(plain, (r - phi * self._prev[s]) * inv, 0.0), -clip, clip)
        zc = z[:, None]
        k = self._k[s]
        h = self._h[s]
        cp = np.maximum(self._cp[s] + zc - k, 0.0)
        cm = np.maximum(self._cm[s] - zc - k, 0.0)
        self._cp[s] = cp
        self._cm[s] = cm
        limit = h * (1.0 - MARGIN) - MARGIN
        could_trip = ((cp >= limit) | (cm >= limit)).any(axis=1)
        first = cnt == 0
        if first.any():
            self._first_at[s[first]] = now
        self._t[s, cnt] = t
        self._x[s, cnt] = x
        self._last_a[s] = a
        cnt = cnt + 1
        self._cnt[s] = cnt
        self._last_t[s] = t
        self._prev[s] = r
        # A run of one value that could be flagged at this reading, or the first other
        # value after a flagged run (the status page and the gauge show it at once).
        same = x == self._rv[s]
        left = np.where(same, self._rl[s] - 1.0, self._rn[s])
        self._rl[s] = left
        self._rv[s] = x
        run = (left <= 0.0) | ((self._rf[s] > 0.0) & ~same)
        out: NDArray[np.bool_] = ~plain | could_trip | (cnt >= self._cap[s]) | run
        return out

    def due(self, now: float, *, most: int | None = None) -> list[str]:
        """Streams whose oldest waiting sample is older than their share of ``max_age``
        (``now`` infinite: every stream with samples waiting), oldest first; at most
        ``most`` of them."""
        live = self._cnt > 0
        if not live.any():
            return []
        old = np.flatnonzero(live & (now - self._first_at >= self._age))
        if old.shape[0] > 1:
            order = np.argsort(self._first_at[old], kind="stable")
            old = old[order[:most]] if most is not None else old[order]
        names = self._names
        return [n for n in (names[i] for i in old.tolist()) if n is not None]


def _grown(pool: CalmPool, attr: str, shape: tuple[int, ...], fill: float,
           rows: NDArray[np.intp] | None = None) -> FloatArray:
    """``pool``'s array ``attr`` with room for ``shape[0]`` rows, the new ones ``fill``; of
    the old rows those in ``rows`` are kept (all when None).  Zeros come from the
    allocator untouched: rows never written cost no memory."""
    out = np.zeros(shape) if fill == 0.0 else np.full(shape, fill)
    old: FloatArray | None = getattr(pool, attr, None)
    if old is not None:
        if rows is None:
            out[: old.shape[0]] = old
        else:
            out[rows] = old[rows]
    return out
