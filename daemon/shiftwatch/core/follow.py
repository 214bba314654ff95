"""The follower of slow change: the offset of an established level from its baseline's,
an exponentially weighted mean of the samples older than its delay, and its terms.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core import baseline as _baseline

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
