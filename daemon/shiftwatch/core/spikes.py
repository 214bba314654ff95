"""Lone spikes: which samples beyond the band a neighbour backs (a step's samples) and
which stand alone (set aside), and the band of a young level.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.selfstart import normal_to_t

FloatArray = NDArray[np.float64]

#: A sample beyond the spike band is a sample of a step, not a lone spike, when the next
#: one, or the one before, deviates the same way beyond the band or beyond this share of
#: the outlier's own deviation (the midpoint between the level and the outlier).
#: Requiring the next one beyond the band too set aside the first sample of 13% of
#: 4-sigma steps; looking at the next one only set aside a 5-sigma step's second sample
#: (5.73 sigma) after a first at 4.86 and before a third at 2.84.
SPIKE_CONFIRM_SHARE = 0.5


def young_spike_limit(spike_sigma: float, estimated: bool, df: float) -> float:
    """The spike band of a young level, in units of its predictive spread: ``spike_sigma``
    when sigma is known, else the Student-t value on the spread's ``df`` degrees of
    freedom with the same normal tail (:func:`.selfstart.normal_to_t`).  A spread from a
    few samples is often small by chance; 5 of it set ordinary readings aside.

    >>> young_spike_limit(5.0, False, 4), round(young_spike_limit(5.0, True, 23), 2)
    (5.0, 6.84)
    """
    return normal_to_t(spike_sigma, float(df)) if estimated and df > 0 else spike_sigma


def spike_confirmed(dev_next: float, dev_out: float, limit: float) -> bool:
    """Whether the sample after an outlier (deviation ``dev_out`` beyond ``limit``, in
    the band's units) deviates the same way: beyond ``limit``, or beyond
    SPIKE_CONFIRM_SHARE of the outlier's own deviation.  Then the outlier is the
    first sample of a step, not a lone spike (:func:`lone_outliers`, rule for rule).
    Asked of the sample before an outlier (``dev_next`` its deviation), the same rule
    says the outlier is a step's second or later sample (:func:`backed_by_prev`).

    >>> spike_confirmed(-3.3, -5.3, 5.0), spike_confirmed(0.4, -5.3, 5.0), spike_confirmed(6.0, 30.0, 5.0)
    (True, False, True)
    """
    return (dev_next if dev_out > 0 else -dev_next) > min(limit, SPIKE_CONFIRM_SHARE * abs(dev_out))


def backed_by_prev(dev: FloatArray, limit: float, prev_sign: int = 0, prev_dev: float = 0.0
                   ) -> NDArray[np.bool_]:
    """The outliers among standardised deviations (beyond ``limit``) whose predecessor
    deviates the same way beyond ``limit`` or beyond SPIKE_CONFIRM_SHARE of the outlier's
    own deviation (:func:`spike_confirmed`, the same rule looking back): such an outlier
    is a step's second (or later) sample, never a lone spike.  ``prev_sign`` is the
    direction in which the sample before the first one was an outlier (0 if it was not),
    ``prev_dev`` that sample's deviation on the same scale (0 if there was none).

    >>> backed_by_prev(np.array([4.86, 5.73, 2.84]), 5.0).tolist()
    [False, True, False]
    >>> backed_by_prev(np.array([5.73, 2.84]), 5.0, prev_dev=4.86).tolist()
    [True, False]
    """
    out = np.abs(dev) > limit
    back = np.zeros_like(out)
    if not out.any():
        return back
    sign = np.sign(dev)
    thr = np.minimum(limit, SPIKE_CONFIRM_SHARE * np.abs(dev))
    back[1:] = out[1:] & (dev[:-1] * sign[1:] > thr[1:])
    back[0] = bool(out[0]) and (sign[0] == prev_sign or bool(prev_dev * sign[0] > thr[0]))
    return back


def lone_outliers(dev: FloatArray, limit: float, prev_sign: int = 0, prev_dev: float = 0.0
                  ) -> tuple[NDArray[np.bool_], bool]:
    """Flag lone outliers among standardised deviations.

    A deviation beyond ``limit`` is a lone outlier unless a neighbour deviates the
    same way beyond ``limit`` or beyond half of the outlier's own deviation: the
    sample after it (:func:`spike_confirmed`: the start of a step) or the sample
    before it (:func:`backed_by_prev`).  Returns the
    mask and whether the last sample is an outlier whose next neighbour is not
    yet known (the caller may hold it).  ``prev_sign`` is the direction in
    which the sample before the first one was an outlier (0 if it was not),
    ``prev_dev`` its deviation (0 if there was none).

    Examples
    --------
    >>> m, last = lone_outliers(np.array([0.1, 9.0, 0.2, 7.0, 8.0, -0.3, 6.0]), 5.0)
    >>> m.tolist(), last
    ([False, True, False, False, False, False, True], True)
    >>> lone_outliers(np.array([0.1, -5.3, -3.3, -4.1]), 5.0)[0].tolist()  # a step's first sample
    [False, False, False, False]
    >>> lone_outliers(np.array([0.1, 4.86, 5.73, 2.84]), 5.0)[0].tolist()  # and its second
    [False, False, False, False]
    """
    out = np.abs(dev) > limit
    if not out.any():
        return out, False
    sign = np.sign(dev)
    same_prev = backed_by_prev(dev, limit, prev_sign, prev_dev)
    same_next = np.zeros_like(out)
    # The next sample confirms an outlier when it deviates the same way beyond the
    # band, or beyond half the outlier's own deviation (SPIKE_CONFIRM_SHARE).
    same_next[:-1] = out[:-1] & (dev[1:] * sign[:-1] > np.minimum(limit, SPIKE_CONFIRM_SHARE * np.abs(dev[:-1])))
    lone = out & ~same_prev & ~same_next
    return lone, bool(lone[-1])
