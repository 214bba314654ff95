"""The follower of slow change: the offset of an established level from its baseline's,
an exponentially weighted mean of the samples older than its delay, and its terms.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core import baseline as _baseline
from shiftwatch.core.baseline import _clip

FloatArray = NDArray[np.float64]

#: An established level follows slow change: the level a sample is measured against
#: is the baseline's plus an exponentially weighted offset (weight 1/FOLLOW_SAMPLES
#: per sample) of the samples older than FOLLOW_DELAY.  A drift, a slow cycle or a
#: wander is followed, FOLLOW_SAMPLES + FOLLOW_DELAY samples behind; a step is not:
#: the follower sees none of its first FOLLOW_DELAY samples, by when a step of 0.75
#: sigma or more is usually detected, and it stands still while an event is open.
#: See the README's "Slow change" for where the line between slow and sudden lies.
FOLLOW_SAMPLES = 110
FOLLOW_DELAY = 40
FOLLOW_DELAY_MAX = 300
FOLLOW_PHI_MAX = 0.7
#: Lone spikes are judged against the followed level as it stood at the last of these
#: points (every FOLLOW_RECENTER watched samples, so the same samples are spikes however
#: the stream is batched, and the level judged against is never more than that old:
#: on a drift of 0.0004 sigma a sample, 1.6 sigma at most, against spike_sigma 5).  Each
#: point ends a vectorised stretch: 1,024 halved a stream's throughput on history.
FOLLOW_RECENTER = 4096
#: Standard errors of the followed level by which an event's trial moves the level
#: before the step against the event's direction (StreamEngine._begin_event).
FOLLOW_MARGIN = 2.0
#: The follower's design factor for iid noise, ``exp(a + b (log10 arl0 - u0))``
#: (see :func:`follow_arl_factor`): (a, b, u0).
FOLLOW_ARL_FIT = (0.157, 0.231, 2.78)
#: ... measured from 600 to 604,800 samples (log10), held at its ends beyond.
FOLLOW_ARL_RANGE = (2.78, 5.78)


#: follow_path's one-block path worked in place: its share of engine.LEAN_CALLS (the
#: reference guards set both; tests/core/test_per_call.py).
LEAN_CALLS = True
_FOLLOW_BLOCK = 2048
#: follow_path works out a long stretch's blocks together; False: one block at a time
#: (the reference, tests/core/test_follow_path.py).
FOLLOW_BLOCKS_TOGETHER = True


def _long_run(phi: float) -> float:
    return (1.0 + phi) / (1.0 - phi) if phi > 0.0 else 1.0


def follow_samples(phi: float) -> float:
    """The follower's time constant for noise of lag-1 autocorrelation ``phi``: longer
    by the long-run variance factor (1 + phi) / (1 - phi), as a step takes that much
    longer to be told from autocorrelated noise (an AR(1) stream of phi 0.6 follows
    four times as slowly).  Beyond FOLLOW_PHI_MAX, infinite: the level is not
    followed, since a step of min_shift takes longer to find than any delay the
    window allows, and the follower would absorb it."""
    if phi > FOLLOW_PHI_MAX:
        return math.inf
    return FOLLOW_SAMPLES * _long_run(phi)


def _follow_se(phi: float) -> float:
    """Standard error of the followed level in sigmas: sqrt(lam / (2 - lam)) for iid noise,
    times sqrt((1 + phi) / (1 - phi)) for AR(1) noise (the long-run variance)."""
    return math.sqrt(_long_run(phi) / (2.0 * follow_samples(phi) - 1.0))


def follow_delay(phi: float, window: int) -> int:
    """How many of the newest samples the follower has not been fed, scaled like
    :func:`follow_samples`; they are read back from the window, so at most
    FOLLOW_DELAY_MAX and half the window."""
    return int(min(FOLLOW_DELAY * _long_run(phi), FOLLOW_DELAY_MAX, window // 2))
_follow_powers: dict[float, tuple[FloatArray, FloatArray]] = {}
_follow_terms_of: dict[tuple[float, int], tuple[int, float]] = {}


def _follow_terms(phi: float, window: int) -> tuple[int, float]:
    """``follow_delay(phi, window)`` and the follower's rate ``1 / follow_samples(phi)``,
    kept per phi (refined now and then: a few distinct values a stream)."""
    key = (phi, window)
    got = _follow_terms_of.get(key)
    if got is None:
        if len(_follow_terms_of) > 256:  # phi is per stream: keep a bounded few (some 50 kB)
            _follow_terms_of.clear()
        got = _follow_terms_of[key] = (follow_delay(phi, window), 1.0 / follow_samples(phi))
    return got


_follow_kept: dict[tuple[float, int], tuple[float, int, int, float]] = {}


def _follow_key_terms(phi: float, window: int) -> tuple[float, int, int, float]:
    """``(phi, window, delay, rate)`` with :func:`_follow_terms`'s delay and rate, as a
    :class:`Follower` keeps them (:attr:`Follower.terms`): one tuple for all the followers
    of the same phi and window (a tuple of its own took 72 bytes a stream by tracemalloc)."""
    key = (phi, window)
    got = _follow_kept.get(key)
    if got is None:
        if len(_follow_kept) > 256:  # (bounded as _follow_terms_of)
            _follow_kept.clear()
        got = _follow_kept[key] = (phi, window, *_follow_terms(phi, window))
    return got


def follow_arl_factor(phi: float, arl0: float) -> float:
    """How much longer an ARL the test of a followed level is designed for, at the
    plant's ARL ``arl0`` (in samples).

    Measured, not derived.  On iid noise the follower (FOLLOW_SAMPLES 110, FOLLOW_DELAY
    40) raises the in-control detections of the test designed for ``arl0`` by a factor
    that grows with ``arl0`` (the reference's own wander matters more the longer the
    test's sums run): 1.17 at 600 samples, 1.29 at 3,600, 1.69 at 28,800, 1.86 at 86,400
    and 2.34 at 604,800 (0.6 to 16 M samples each, 2026-12-03).  ``log`` of it is close
    to linear in ``log10 arl0`` (FOLLOW_ARL_FIT, within 9% of every point), and the
    detections fall about in proportion to the design ARL, so the iid factor is that
    fit, held at its ends beyond the measured range.  Autocorrelated noise needs less (its
    steps take longer to tell, the follower is slower): the extra over 1 is divided by the
    square root of the long-run variance factor (chosen by measurement: with the factor
    itself, AR(1) phi 0.6 ran at 1.51 of nominal at 7d, with its root 1.26, and 0.94 to
    1.08 at 1h and 8h), and nothing is followed above FOLLOW_PHI_MAX.  tests/bench/bench_events.py measures the resulting rates on every
    noise kind at 7d and 1h.  (A single factor of 2.4 for every ARL gave 0.56 of the
    nominal rate at 1h on iid noise.)

    >>> round(follow_arl_factor(0.0, 604800.0), 2), round(follow_arl_factor(0.0, 3600.0), 2)
    (2.34, 1.4)
    """
    if phi > FOLLOW_PHI_MAX:
        return 1.0
    a, b, u0 = FOLLOW_ARL_FIT
    u = min(max(math.log10(max(arl0, 1.0)), FOLLOW_ARL_RANGE[0]), FOLLOW_ARL_RANGE[1])
    iid = math.exp(a + b * (u - u0))
    return 1.0 + max(iid - 1.0, 0.0) / math.sqrt(_long_run(phi))


def follow_path(r: FloatArray, u0: float, lam: float) -> FloatArray:
    """The follower's offset before each of the samples ``r`` and after the last
    (``m + 1`` values): ``u_i = (1 - lam) u_(i-1) + lam r_i``, an exponentially
    weighted mean, vectorised in blocks as ``a^(i+1) (u0 + lam cumsum(r_j a^-(j+1)))``
    with ``a = 1 - lam`` (blocks short enough that ``a^-2048`` stays well in range).

    >>> follow_path(np.array([1.0, 1.0, 1.0]), 0.0, 0.5).tolist()
    [0.0, 0.5, 0.75, 0.875]
    """
    m = r.shape[0]
    if lam <= 0.0:
        return np.full(m + 1, u0)
    out = np.empty(m + 1)
    out[0] = u0
    # Blocks of about 4 / lam samples: a^-(block) stays below e^4, so the cumulative
    # sum loses no more than a few units in the 14th digit against the recursion
    # sample by sample (records are rounded to 6).
    block = max(16, min(_FOLLOW_BLOCK, int(4.0 / lam)))
    got = _follow_powers.get(lam)
    if got is None:
        if len(_follow_powers) > 64:  # lam follows phi, refined now and then: keep a few
            _follow_powers.clear()
        lam_a = np.array(lam, dtype=np.float64)  # lam as a shared 0-d array (SHARED_SCALARS)
        lam_a.flags.writeable = False
        got = _follow_powers[lam] = ((1.0 - lam) ** np.arange(1, block + 1, dtype=np.float64), lam_a)
    p = got[0]
    if m <= block:
        # One block (a live batch, or a stretch shorter than 4 / lam): the loop's one
        # step, its product written in place.
        if LEAN_CALLS:
            # The same quotients, sums and products, in one buffer (lam * s is s * lam and
            # u0 + v is v + u0 exactly: IEEE addition and multiplication commute).
            pm = p[:m]
            q = np.divide(r, pm)
            np.add.accumulate(q, out=q)
            q *= got[1] if _baseline.SHARED_SCALARS else lam
            q += u0
            np.multiply(pm, q, out=out[1:])
        else:
            np.multiply(p[:m], u0 + lam * np.add.accumulate(r / p[:m]), out=out[1:])
        return out
    if not FOLLOW_BLOCKS_TOGETHER:
        for a in range(0, m, block):
            blk = r[a: a + block]
            k = blk.shape[0]
            pk = p[:k]
            out[a + 1: a + k + 1] = pk * (out[a] + lam * np.add.accumulate(blk / pk))
        return out
    # The same per block, all blocks at once: a block's cumulative sum does not depend on
    # the offset it starts from, so the sums are one array operation (a row per block,
    # the last one padded; a row's running sum is its own, summed in order), and only the
    # offset carried from block to block runs in plain floats, by the same operations on
    # the same numbers as the array's last element.  The same floats, in about a fifth of
    # the array calls (a stretch of 4,096 samples is some ten blocks).
    nb = -(-m // block)
    rows = np.zeros(nb * block)
    rows[:m] = r
    sums = np.add.accumulate(rows.reshape(nb, block) / p, axis=1)
    sums *= lam
    last = float(p[block - 1])
    starts = [u0]
    u = u0
    for s_last in sums[: nb - 1, block - 1].tolist():
        u = last * (u + s_last)
        starts.append(u)
    out[1:] = (p * (np.array(starts)[:, None] + sums)).ravel()[:m]
    return out


_NO_TERMS = (math.nan, 0, 0, 0.0)  # Follower.terms before a stretch (NaN matches no phi)


class Follower:
    """The follower of one stream's established level: the offset of the followed level
    from the baseline's (:attr:`offset`), how many of the newest kept samples in the window
    it has not been fed yet (:attr:`lag`, at most :func:`follow_delay`), the offset lone
    spikes are judged against (:attr:`center`, taken every FOLLOW_RECENTER watched samples)
    and the count of watched samples at which it is taken next (:attr:`next_center`), and
    the delay and rate last looked up, with the phi and window they are for (:attr:`terms`).

    The engine (StreamEngine) plans each watch stretch's path from these
    (``_follow_plan``, ``_watch_small``), and saves and restores them as the fields
    ``follow``, ``follow_lag``, ``center`` and ``next_center`` of its state.

    >>> f = Follower()
    >>> f.input(np.array([10.5, 30.0, 9.0]), 10.0, 2.0).tolist()
    [0.5, 2.0, -1.0]
    >>> f.catch_up(np.array([11.0, 11.0, 11.0, 11.0]), 0, 2, 0.5, 10.0, 2.0)
    >>> f.offset, f.lag, f.center
    (0.75, 2, 0.75)
    """

    # One per engine, thousands of them in the daemon: no per-instance dict.
    __slots__ = ("center", "lag", "next_center", "offset", "terms")

    def __init__(self) -> None:
        self.offset = 0.0
        self.lag = 0
        self.terms: tuple[float, int, int, float] = _NO_TERMS  # (shared until the first stretch)
        self.center = 0.0
        self.next_center = FOLLOW_RECENTER

    def restart(self) -> None:
        """A new level (a baseline just set, a young level settled, a level re-anchored
        after a step): nothing followed yet, spikes judged against the level itself."""
        self.offset = 0.0
        self.lag = 0
        self.center = 0.0
        self.next_center = FOLLOW_RECENTER

    def clear(self) -> None:
        """The level is no longer followed (its phi went past FOLLOW_PHI_MAX): no offset."""
        self.offset = self.center = 0.0

    def shift(self, by: float) -> None:
        """The baseline's level moved by ``-by`` (a refinement): the followed level, and the
        level spikes are judged against, stay where they were."""
        self.offset += by
        self.center += by

    def recenter(self, watch_kept: int) -> None:
        """Spikes are judged against the followed level as it stands now, until
        FOLLOW_RECENTER more samples are watched (``watch_kept``: those watched so far)."""
        self.center = self.offset
        self.next_center = watch_kept + FOLLOW_RECENTER

    def input(self, x: FloatArray, level: float, span: float) -> FloatArray:
        """What the follower is fed of samples ``x``: each less the baseline's ``level``, held
        within the spike band (``span``: ``spike_sigma`` sigmas, about the level plus the
        centre spikes are judged against).  A sample beyond the band is kept only as part of a
        run (a step's first samples, a burst of outliers); before, a burst of three
        samples 100 sigma out moved the follower by 3 x 100 / 110 sigma once the
        follower reached it, and the stream then detected the burst's "step" again and
        again (30 events for three samples of 1e9 on a level of 20).  Inside the band,
        where every sample of a calm stream lies, the floats are those of ``x - level``."""
        r = x - level
        _clip(r, self.center - span, self.center + span, out=r)
        return r

    def catch_up(self, values: FloatArray, trip_len: int, delay: int, lam: float, level: float,
                 span: float) -> None:
        """After an event that found no step: fed the event's samples ``values`` as if no
        event had been open, those from the first it had not been fed (of the ``trip_len``
        up to the trip) to all but the newest ``delay``, at the rate ``lam``; the centre
        spikes are judged against taken there."""
        start = max(0, trip_len - self.lag)
        end = max(start, values.shape[0] - delay)
        self.offset = float(follow_path(self.input(values[start:end], level, span), self.offset, lam)[-1])
        self.lag = values.shape[0] - end
        self.center = self.offset
