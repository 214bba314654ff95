"""Screening of incoming samples: every bad sample is rejected with a reason code.

Screening never raises on data.  It returns the good samples and, for each
rejected one, its position and a reason code from :data:`REASONS`.  The codes
are stable: the daemon uses them as the ``reason`` label of its rejection
counter and the replay command prints them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray

#: Reason codes, with the sentence an operator reads.
REASONS: dict[str, str] = {
    "not_a_number": "value is not a number",
    "nan": "value is NaN",
    "infinite": "value is infinite or beyond 1e150 in magnitude",
    "bad_time": "time stamp is missing, not finite or unreadable",
    "duplicate_time": "time stamp repeats one already accepted for this stream",
    "out_of_order": "time stamp is earlier than one already accepted for this stream",
    "spike": "lone outlier far from the current level (held one sample, then discarded)",
    "warmup_shift": ("sample before a shift in a new stream's warm-up, too few samples after its start "
                     "to report the shift at the plant's false-alarm rate: set aside, the warm-up "
                     "started again from the shift (its level is learned as the baseline)"),
    "time_ahead": "time stamp is too far ahead of the receiving clock",
    "time_behind": "time stamp is too far behind the receiving clock",
    "stream_cap": "stream limit reached; new stream not admitted",
}


#: Reasons the engine gives for real readings it sets aside (not bad input): a replay
#: counts them in its summary, not among the file's problems, and its report plots them.
READING_REASONS = frozenset(("spike", "warmup_shift"))


#: Largest magnitude of an accepted value.  Squares and sums of squares of
#: larger (finite) values overflow inside the baseline and the step fit; no
#: reading of a production line comes near it.
MAX_ABS_VALUE = 1e150


#: Batches of at most this many float64 samples are checked in plain floats first.
SMALL_BATCH = 8
_F64 = np.dtype(np.float64)
#: ndarray.all's reduction without its Python wrapper (numpy's _methods._all).
_all = np.logical_and.reduce


def _read_only_arange(n: int) -> NDArray[np.intp]:
    a = np.arange(n)
    a.flags.writeable = False
    return a


#: ``kept`` of a small batch that passes every check (shared, so read-only).
_ARANGE = tuple(_read_only_arange(n) for n in range(SMALL_BATCH + 1))
#: ``kept`` of a larger clean batch: a read-only prefix of this (a replay's batches are
#: 4,096 samples at most), so a clean batch makes no index array of its own.
_KEPT = _read_only_arange(4096)
#: Float batches with arrival limits (the daemon's) are screened on the arrays as they are;
#: False sends them down the full path, the reference (tests/core/test_screen_fast.py).
ARRIVAL_FAST = True


#: screen_samples checks a float batch's type once (not once for the small-batch path and
#: again for the array path) and reads its first and last time with item(); the same checks
#: on the same doubles.  False: the reference (tests/core/test_read_items.py holds the two
#: to each other).
READ_ONCE = True

#: One arrival time for a batch (a float: the daemon's batch from one message) is held to
#: the limits on the lags of the first and last time only: the times are finite and
#: strictly increasing there, ``arrived - t`` falls as ``t`` grows and rounding keeps that
#: order, so the last time's lag is the smallest and the first's the largest, the very
#: doubles the reductions over every lag find (no array of lags, no reduction).  False:
#: the lags of every sample, the reference (tests/core/test_screen_one_arrival.py).
ARRIVAL_ENDS = True


class Screened(NamedTuple):
    """Result of :func:`screen_samples`.

    ``times``/``values`` hold the accepted samples in order, ``kept`` their
    positions in the input, and ``rejected`` a list of ``(position, reason)``.
    (A named tuple: one is made on every engine call, and a frozen dataclass
    is made by four attribute writes through ``object.__setattr__``.)
    ``high`` and ``low`` are the largest and smallest value when the array fast
    path took the batch whole (NaN otherwise), so the engine need not take them
    again for its spike check.
    """

    times: NDArray[np.float64]
    values: NDArray[np.float64]
    kept: NDArray[np.intp]
    rejected: list[tuple[int, str]]
    high: float = math.nan
    low: float = math.nan


def coerce_values(values: Sequence[Any] | NDArray[Any]) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Turn values into float64, marking those that are not numbers.

    Only real numbers count (``bool`` and numeric text do not): text is the
    business of the payload decoders, which know their formats.

    Examples
    --------
    >>> v, bad = coerce_values([1, 2.5, "3", None, True])
    >>> v[:2].tolist(), bad.tolist()
    ([1.0, 2.5], [False, False, True, True, True])
    """
    if isinstance(values, np.ndarray) and values.dtype.kind in "fiu":
        return values.astype(np.float64, copy=False), np.zeros(values.shape[0], dtype=bool)
    out = np.empty(len(values), dtype=np.float64)
    bad = np.zeros(len(values), dtype=bool)
    for i, v in enumerate(values):
        if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_)):
            try:
                out[i] = float(v)
            except OverflowError:  # an int too large for a float
                out[i] = np.inf if v > 0 else -np.inf
        else:
            out[i] = np.nan
            bad[i] = True
    return out, bad


def screen_samples(
    times: Sequence[Any] | NDArray[Any],
    values: Sequence[Any] | NDArray[Any],
    last_time: float = -np.inf,
    seen: NDArray[np.float64] | None = None,
    *,
    arrived: float | Sequence[float] | NDArray[np.float64] | None = None,
    max_ahead: float | None = None,
    max_behind: float | None = None,
) -> Screened:
    """Split a batch into accepted samples and rejections with reason codes.

    Times must be finite and strictly increasing, also relative to
    ``last_time``, the newest time already accepted for the stream.  A time
    that is not newer is ``duplicate_time`` when it equals one already
    accepted (``last_time``, the increasing times in ``seen``, for example the
    stream's window, or a sample earlier in the batch), as a message
    delivered twice does; otherwise it is ``out_of_order``.

    When ``arrived`` (the receiving clock's time of each sample, or one time
    for the batch) is given, a time more than ``max_ahead`` seconds after it
    is rejected as ``time_ahead`` and one more than ``max_behind`` seconds
    before it as ``time_behind`` (``None`` means no limit).  Such samples,
    like those rejected for their value, never advance the stream's clock: a
    sender whose clock jumped forward by a day does not lock its stream out
    once the clock is set right.  The clock is the caller's: screening reads
    none.

    Examples
    --------
    >>> s = screen_samples([1, 2, 2, 1.5, 3, 4], [1.0, float("nan"), 5.0, 2.0, "x", 7.0], last_time=0.5)
    >>> s.times.tolist(), s.values.tolist(), s.rejected
    ([1.0, 2.0, 4.0], [1.0, 5.0, 7.0], [(1, 'nan'), (3, 'out_of_order'), (4, 'not_a_number')])
    >>> screen_samples([5, 5], [1.0, 2.0]).rejected
    [(1, 'duplicate_time')]
    >>> screen_samples([3, 2, 2.5, 4, 3], [1.0] * 5, last_time=2, seen=np.array([1.0, 2.0])).rejected
    [(1, 'duplicate_time'), (2, 'out_of_order'), (4, 'duplicate_time')]

    A sample stamped a day ahead of its arrival is set aside; the next one,
    stamped right again, is accepted:

    >>> s = screen_samples([100.0, 86500.0, 102.0], [1.0, 2.0, 3.0], arrived=[100.5, 101.5, 102.5],
    ...                    max_ahead=600.0)
    >>> s.times.tolist(), s.rejected
    ([100.0, 102.0], [(1, 'time_ahead')])
    """
    if (type(times) is np.ndarray and type(values) is np.ndarray and times.dtype == _F64
            and values.dtype == _F64 and times.ndim == 1 and times.shape == values.shape):
        n = times.shape[0]
        if (0 < n <= SMALL_BATCH
                and _small_batch_clean(times.tolist(), values.tolist(), last_time, arrived, max_ahead,
                                       max_behind)):
            return Screened(times=times, values=values, kept=_ARANGE[n], rejected=[])
        if not READ_ONCE:
            return _screen_arrays_reference(times, values, last_time, seen, arrived, max_ahead, max_behind)
        # Float arrays: the checks of the fast path below on the arrays as they are (values
        # within the bound: the largest and the smallest, where a NaN fails the comparison
        # as it fails abs(v) <= bound).  Arrival limits (the daemon's batches) are checked
        # on the lags' smallest and largest, as _within does, once the times are known to
        # be finite and increasing; anything else takes the full path, which also says
        # what is wrong (ARRIVAL_FAST = False: always the full path when limits apply).
        # (a few samples that failed the plain-float checks come here too, as before)
        limits = arrived is not None and (max_ahead is not None or max_behind is not None)
        if n and times.item(0) > last_time:  # (item(): the same double, no array scalar)
            high = float(np.maximum.reduce(values))
            low = float(np.minimum.reduce(values))
            if (high <= MAX_ABS_VALUE and low >= -MAX_ABS_VALUE and math.isfinite(times.item(-1))
                    and (n == 1 or bool(_all(times[1:] > times[:-1])))
                    and (not limits or (ARRIVAL_FAST and _arrivals_within(arrived, times, max_ahead,
                                                                          max_behind)))):
                return Screened(times=times, values=values,
                                kept=_KEPT[:n] if n <= _KEPT.shape[0] else np.arange(n), rejected=[],
                                high=high, low=low)
    return _screen_full(times, values, last_time, seen, arrived, max_ahead, max_behind)


def _screen_arrays_reference(times: NDArray[np.float64], values: NDArray[np.float64], last_time: float,
                             seen: NDArray[np.float64] | None, arrived: Any, max_ahead: float | None,
                             max_behind: float | None) -> Screened:
    """:func:`screen_samples` as it was before ``READ_ONCE`` from its array path on (the
    float checks made again, the times read as array scalars); the reference."""
    if (type(times) is np.ndarray and type(values) is np.ndarray and times.dtype == _F64
            and values.dtype == _F64 and times.ndim == 1 and times.shape == values.shape):
        n = times.shape[0]
        limits = arrived is not None and (max_ahead is not None or max_behind is not None)
        if n and times[0] > last_time:
            high = float(np.maximum.reduce(values))
            low = float(np.minimum.reduce(values))
            if (high <= MAX_ABS_VALUE and low >= -MAX_ABS_VALUE and math.isfinite(times[-1])
                    and (n == 1 or bool(_all(times[1:] > times[:-1])))
                    and (not limits or (ARRIVAL_FAST and _arrivals_within(arrived, times, max_ahead,
                                                                          max_behind)))):
                return Screened(times=times, values=values,
                                kept=_KEPT[:n] if n <= _KEPT.shape[0] else np.arange(n), rejected=[],
                                high=high, low=low)
    return _screen_full(times, values, last_time, seen, arrived, max_ahead, max_behind)


def _screen_full(times: Sequence[Any] | NDArray[Any], values: Sequence[Any] | NDArray[Any], last_time: float,
                 seen: NDArray[np.float64] | None, arrived: Any, max_ahead: float | None,
                 max_behind: float | None) -> Screened:
    """:func:`screen_samples`' full path: any input, each sample checked and its rejection
    named."""
    t, bad_t = coerce_values(times)
    v, bad_v = coerce_values(values)
    n = t.shape[0]
    lag: NDArray[np.float64] | None = None  # arrival minus time stamp, when a limit applies
    if arrived is not None and (max_ahead is not None or max_behind is not None) and n:
        arr = np.asarray(arrived, dtype=np.float64)
        if arr.ndim and arr.shape != t.shape:
            raise ValueError(f"arrival times and times differ in length: {arr.shape[0]} != {n}")
        with np.errstate(invalid="ignore", over="ignore"):  # inf - inf: such times are rejected below
            lag = arr - t
    # Fast path for the common case: all finite, strictly increasing, within the limits.
    if (n and t.shape == v.shape and not bad_t.any() and not bad_v.any()
            and t[0] > last_time and bool((np.abs(v) <= MAX_ABS_VALUE).all()) and np.isfinite(t[-1])
            and (n == 1 or bool((t[1:] > t[:-1]).all()))
            and (lag is None or _within(lag, max_ahead, max_behind))):
        return Screened(times=t, values=v, kept=np.arange(n), rejected=[])
    if t.shape != v.shape:
        raise ValueError(f"times and values differ in length: {t.shape[0]} != {v.shape[0]}")
    n = t.shape[0]
    reason = np.zeros(n, dtype=np.int8)  # 0 = accepted
    codes = ["", "not_a_number", "nan", "infinite", "bad_time", "duplicate_time", "out_of_order",
             "time_ahead", "time_behind"]
    reason[~(np.abs(v) <= MAX_ABS_VALUE)] = 3  # infinite, or too large to compute with
    reason[np.isnan(v)] = 2
    reason[bad_v] = 1
    if lag is not None:
        with np.errstate(invalid="ignore"):
            if max_behind is not None:
                reason[(lag > max_behind) & (reason == 0)] = 8
            if max_ahead is not None:
                reason[(-lag > max_ahead) & (reason == 0)] = 7
    bad_time = bad_t | ~np.isfinite(t)
    reason[bad_time] = 4
    # Strictly increasing: compare each time with the newest earlier good time.
    # Samples rejected for their value do not advance the clock of the stream.
    tt = np.where(bad_time | (reason != 0), -np.inf, t)
    prev = np.maximum.accumulate(np.concatenate(([last_time], tt[:-1]))) if n else tt
    order_ok = tt > prev
    dup = ~order_ok & (tt == prev) & (reason == 0)
    ooo = ~order_ok & (tt < prev) & (reason == 0)
    if ooo.any():  # a repeat of any time already accepted is a duplicate, not disorder
        parts = [t[(reason == 0) & order_ok], np.array([last_time])]
        if seen is not None:
            parts.append(seen)
        known = np.sort(np.concatenate(parts))
        at = np.flatnonzero(ooo)
        j = np.minimum(np.searchsorted(known, t[at]), known.shape[0] - 1)
        again = at[known[j] == t[at]]
        dup[again] = True
        ooo[again] = False
    reason[dup] = 5
    reason[ooo] = 6
    keep = reason == 0
    kept = np.flatnonzero(keep)
    rej_idx = np.flatnonzero(~keep)
    rejected = [(int(i), codes[reason[i]]) for i in rej_idx]
    return Screened(times=t[kept], values=v[kept], kept=kept, rejected=rejected)


def screen_series(times: NDArray[np.float64], values: NDArray[np.float64], window: int,
                  batch: int = 4096) -> tuple[NDArray[np.intp], list[tuple[int, str]]]:
    """What an engine fed a whole series in its order, ``batch`` samples a call, keeps.

    Each batch is screened as :meth:`StreamEngine.process` screens it: against the newest
    time accepted so far and the last ``window`` accepted times (the engine's window of
    ``window_samples``), so a time set aside gets the reason replay gives it.  Returns the
    positions kept (in order) and ``(position, reason)`` of each sample set aside.  (The
    engine's spike rule, which depends on its level, is not applied.)

    >>> kept, rejected = screen_series(np.array([1.0, 2.0, 2.0, 0.5, 3.0]), np.array([1.0, 2.0, 3.0, 4.0, np.nan]), 400)
    >>> kept.tolist(), rejected
    ([0, 1], [(2, 'duplicate_time'), (3, 'out_of_order'), (4, 'nan')])
    """
    n = times.shape[0]
    kept: list[NDArray[np.intp]] = []
    rejected: list[tuple[int, str]] = []
    last = -np.inf
    seen = np.empty(0, dtype=np.float64)
    for a in range(0, n, batch):
        scr = screen_samples(times[a:a + batch], values[a:a + batch], last, seen)
        kept.append(scr.kept + a)
        rejected.extend((a + i, reason) for i, reason in scr.rejected)
        if scr.times.shape[0]:
            last = float(scr.times[-1])
            seen = np.concatenate([seen, scr.times])[-window:]
    return (np.concatenate(kept) if kept else np.empty(0, dtype=np.intp)), rejected


def _small_batch_clean(ts: list[float], vs: list[float], last_time: float, arrived: Any,
                       max_ahead: float | None, max_behind: float | None) -> bool:
    """Whether a few samples pass every check, tested in plain floats: the fast
    path of :func:`screen_samples` without its array operations.  False sends the
    batch down the full path (which also reports what is wrong)."""
    prev = last_time
    for t, v in zip(ts, vs):
        if not (t > prev and abs(v) <= MAX_ABS_VALUE):
            return False
        prev = t
    if not math.isfinite(prev):
        return False
    if arrived is None or (max_ahead is None and max_behind is None):
        return True
    arr = np.asarray(arrived, dtype=np.float64)
    if arr.ndim == 0:
        arrivals = [float(arr)] * len(ts)
    elif arr.shape == (len(ts),):
        arrivals = arr.tolist()
    else:
        return False
    for a, t in zip(arrivals, ts):
        lag = a - t
        if max_ahead is not None and not lag >= -max_ahead:
            return False
        if max_behind is not None and not lag <= max_behind:
            return False
    return True


def _arrivals_within(arrived: Any, times: NDArray[np.float64], max_ahead: float | None,
                     max_behind: float | None) -> bool:
    """Whether every ``arrival - time`` of a batch of finite, increasing float times lies
    within the limits: :func:`_within` on the same lags (one arrival for the batch, or one
    float per sample; any other shape is left to the full path, which reports it)."""
    if type(arrived) is float:
        if ARRIVAL_ENDS:  # (times finite and increasing here: see ARRIVAL_ENDS)
            if max_ahead is not None and not arrived - times.item(-1) >= -max_ahead:
                return False
            return max_behind is None or arrived - times.item(0) <= max_behind
        lag = arrived - times
    else:
        arr = np.asarray(arrived)
        if arr.dtype != _F64 or (arr.ndim and arr.shape != times.shape):
            return False
        lag = arr - times
    if max_ahead is not None and not bool(np.minimum.reduce(lag) >= -max_ahead):
        return False
    return max_behind is None or bool(np.maximum.reduce(lag) <= max_behind)


def _within(lag: NDArray[np.float64], max_ahead: float | None, max_behind: float | None) -> bool:
    """Whether every ``arrival - time`` lies within the limits."""
    if max_ahead is not None and not bool(lag.min() >= -max_ahead):
        return False
    return max_behind is None or bool(lag.max() <= max_behind)
