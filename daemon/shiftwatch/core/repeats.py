"""Readings that stopped changing: a run of one repeated value, too long for the stream's own noise.

A sensor that freezes at (or near) its level trips no test of the level: the
residuals of a frozen reading are calm.  So each engine counts, on every reading
it takes in, the current run of identical readings (:class:`RepeatWatch`), and
flags the stream while that run is improbable for the stream's own readings:

* the share of neighbouring readings before the run that repeat (Laplace's
  estimate ``(r + 1) / (n + 1)``, as :func:`.sensorcheck.repeat_share` gives it
  to the records), so that a coarse resolution, whose readings repeat often,
  needs a longer run; or, where larger, the share of those repeats that another
  repeat followed (shrunk towards the first share with the weight of
  :data:`REPEAT_PRIOR` repeats: a beta prior, common practice).  On a coarse
  resolution a run is likelier at the value nearest the level than the mean
  share says (readings of 0.4 g noise rounded to 0.5 g repeat 0.33 of the time,
  but 0.47 at the middle value), and the second share follows the runs that
  last: without it, 20 streams so rounded gave 224 flags where 67 were promised;
* raised to the run's repeats (``count - 1``; neighbouring pairs taken as
  independent, common practice), below the share of readings at which a run that
  long may start by chance: one in :data:`REPEAT_RARER` times as many readings as
  the plant's ``false_alarm_every`` holds at the stream's mean interval.  So on a
  stream whose readings are sound a flag comes about ten times less often than
  the false alarms the plant chose (a run of ``L`` or more readings begins at a
  given reading with probability ``(1 - p) p^(L - 1)`` at most ``p^(L - 1)``:
  Feller, An Introduction to Probability Theory, Vol. I, XIII.7, from memory).

A run that was flagged does not join the history the share is taken over (a
stuck sensor's readings are not the stream's noise), and no flag is raised
before :data:`REPEAT_HISTORY` neighbouring pairs are known.  Decisions fall on
readings, never on batch boundaries: fed in one batch or one reading at a
time, the same runs are flagged at the same readings (``tests/core/test_repeats.py``).

This is a flag of the stream, like a Sparkplug stream's ``stale``; it makes no
alert record (records are about steps in level and their phases).

Pure: samples in, numbers out.
"""

from __future__ import annotations

import math
from array import array
from typing import Any, NamedTuple, Self

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.sensorcheck import REPEAT_MIN, repeat_share

FloatArray = NDArray[np.float64]

#: A run is flagged at a chance this many times below the plant's false alarms.
REPEAT_RARER = 10.0
#: The fewest neighbouring pairs of readings the repeat share rests on before a flag.
REPEAT_HISTORY = 200
#: The weight, in repeats, of the repeat share in the share of repeats another repeat followed.
REPEAT_PRIOR = 10.0
#: Batches of at most this many readings go reading by reading (plain floats).
_SMALL = 8
#: A batch's repeats found by ``ndarray.nonzero`` (np.flatnonzero's array without its Python
#: wrappers; the steps between them by one subtraction, np.diff's without its wrapper), its
#: first reading compared as a float, and a batch whose runs are all of one
#: reading folded without working out the least limit (every limit is REPEAT_MIN or more,
#: so it cannot matter).  False: the reference.  The same state and spans bit for bit
#: (tests/core/test_repeats_lean.py); about 57,000 to 30,000 instructions a batch of 260
#: sound readings (callgrind, 2026-12-05).
LEAN_FEED = True
#: No run reaches this: the limit of a stream whose readings may not be flagged (yet).
_NEVER = 1 << 62
_ZERO = np.zeros(1, dtype=np.intp)


class RepeatSpan(NamedTuple):
    """A run of one repeated value that was flagged: the value, the time of its first
    reading (``since``), of the reading at which it became improbable (``flagged_at``),
    its readings then (or in all, once it ended), and the time of its last reading once a
    different one came (``until``; None while it goes on)."""

    value: float
    since: float
    flagged_at: float
    readings: int
    until: float | None


def continue_share(pairs: int, repeats: int, triples: int) -> float:
    """The chance that a run goes on: the repeat share of ``pairs`` neighbouring readings
    with ``repeats`` repeats (:func:`.sensorcheck.repeat_share`), or, where larger, the
    share of those repeats that another repeat followed (``triples``), shrunk towards it
    with the weight of :data:`REPEAT_PRIOR` repeats.

    >>> round(continue_share(10_000, 0, 0), 6), round(continue_share(10_000, 3_300, 1_280), 3)
    (0.0001, 0.388)
    """
    p = repeat_share(repeats, pairs)
    return max(p, (triples + REPEAT_PRIOR * p) / (repeats + REPEAT_PRIOR))


def run_limit(pairs: int, repeats: int, triples: int, interval: float, every: float) -> int:
    """The fewest readings of a run that are improbable for a stream whose ``pairs``
    neighbouring readings held ``repeats`` repeats, ``triples`` of them after another
    repeat, at a mean ``interval`` (seconds) between readings and the plant's ``every``
    (``false_alarm_every``, seconds): the least ``L`` (at least ``REPEAT_MIN``) with
    ``p^(L - 1)`` below ``interval / (REPEAT_RARER every)``, ``p`` the
    :func:`continue_share`.  :data:`_NEVER` with too little history, or when the
    readings repeat always.

    >>> run_limit(10_000, 0, 0, 1.0, 7 * 86400.0)      # no repeats in 10,000 readings
    3
    >>> run_limit(10_000, 70, 0, 1.0, 7 * 86400.0)     # 0.01 g on 0.4 g of noise
    5
    >>> run_limit(10_000, 3_300, 1_280, 1.0, 7 * 86400.0)  # 0.5 g on 0.4 g of noise
    18
    >>> run_limit(50, 0, 0, 1.0, 7 * 86400.0) == _NEVER
    True
    """
    if pairs < REPEAT_HISTORY or not interval > 0.0:
        return _NEVER
    p = continue_share(pairs, repeats, triples)
    if p >= 1.0:
        return _NEVER
    budget = interval / (REPEAT_RARER * every)
    if budget >= 1.0:
        return REPEAT_MIN
    need = math.log(budget) / math.log(p)
    return max(REPEAT_MIN, math.floor(need) + 2)


#: The state's places in a RepeatWatch's array.
_V, _C, _S, _L, _FL, _P, _R, _T, _N, _F0, _LIM = range(11)
_FRESH = [math.nan, 0.0, math.nan, math.nan, math.nan, 0.0, 0.0, 0.0, 0.0, math.nan, 0.0]


def _field(i: int, doc: str) -> Any:
    def get(self: array[float]) -> float:
        return self[i]

    def put(self: array[float], v: float) -> None:
        self[i] = v

    return property(get, put, doc=doc)


def _count(i: int, doc: str) -> Any:
    def get(self: array[float]) -> int:
        return int(self[i])

    def put(self: array[float], v: int) -> None:
        self[i] = v

    return property(get, put, doc=doc)


def _rebuilt(state: list[Any]) -> RepeatWatch:
    return RepeatWatch.from_state(state)


class RepeatWatch(array):  # type: ignore[type-arg]
    """The current run of identical readings of one stream, and the repeat share before it.

    ``feed(times, values, every)`` takes readings (screened: finite, in time order) and
    returns the flagged runs that began or ended among them (each a :class:`RepeatSpan`;
    one that began is returned with ``until`` None), or None.  :attr:`span` is the
    flagged run going on, if any.

    >>> w = RepeatWatch()
    >>> rng = np.random.default_rng(7)
    >>> x = np.round(500 + 0.4 * rng.standard_normal(600), 2)
    >>> x[400:] = x[399]
    >>> t = np.arange(600.0)
    >>> [(s.value == float(x[399]), s.since, s.flagged_at, s.until) for s in w.feed(t, x, 7 * 86400.0)]
    [(True, 399.0, 403.0, None)]
    >>> w.span.readings
    201
    >>> w.feed(np.array([600.0]), np.array([500.1]), 7 * 86400.0)[0].until
    599.0
    >>> w.span is None
    True
    """

    # The state in one array of doubles (counts are exact in them up to 2^53): an object
    # with a slot a field held 2.6 MB for 10,000 streams, this 1.8 MB (tracemalloc).
    __slots__ = ()

    def __new__(cls) -> Self:
        return super().__new__(cls, "d", _FRESH)  # type: ignore[return-value]

    def __init__(self) -> None:
        super().__init__()

    def __reduce_ex__(self, protocol: Any) -> Any:  # (array's own would rebuild a plain array)
        return (_rebuilt, (self.get_state(),))

    def __copy__(self) -> RepeatWatch:  # (array's own copies make plain arrays)
        return _rebuilt(self.get_state())

    def __deepcopy__(self, memo: Any) -> RepeatWatch:
        return _rebuilt(self.get_state())

    value = _field(_V, "the current run's value (NaN: no reading yet)")
    count = _count(_C, "its readings")
    since = _field(_S, "the time of its first reading")
    last_time = _field(_L, "the time of the newest reading")

    @property
    def pairs(self) -> int:
        """Neighbouring pairs before the current run, flagged runs left out: the readings
        before it less those of flagged runs (kept in the array), so that a reading unlike
        the last, the common case, moves no count but ``seen``."""
        return int(self[_N] - self[_C] - self[_P])

    @pairs.setter
    def pairs(self, v: int) -> None:
        self[_P] = self[_N] - self[_C] - v
    repeats = _count(_R, "and the repeats among them")
    triples = _count(_T, "and the repeats that followed a repeat")
    seen = _count(_N, "readings in all")
    first_time = _field(_F0, "the time of the first reading")
    limit = _count(_LIM, "the current run's limit once worked out (0: not yet)")

    @property
    def flagged_at(self) -> float | None:
        """When the current run was flagged, if it was."""
        v = self[_FL]
        return None if math.isnan(v) else v

    @flagged_at.setter
    def flagged_at(self, v: float | None) -> None:
        self[_FL] = math.nan if v is None else v

    @property
    def span(self) -> RepeatSpan | None:
        """The flagged run going on, or None."""
        if self.flagged_at is None:
            return None
        return RepeatSpan(self.value, self.since, self.flagged_at, self.count, None)

    def _limit(self, every: float) -> int:
        """The current run's limit, kept for the run (worked out for runs of REPEAT_MIN or more
        readings only: a run of one moves on in feed's fast path without clearing it)."""
        if not self.limit:
            start = self.seen - self.count
            interval = (self.since - self.first_time) / start if start > 0 else 0.0
            self.limit = run_limit(self.pairs, self.repeats, self.triples, interval, every)
        return int(self[_LIM])

    def pool_terms(self, every: float) -> tuple[float, float, float, bool]:
        """What the pool of calm streams (core/calm.py) needs to hand the stream to its engine
        no later than the reading at which a run is flagged, or at the first reading unlike a
        flagged run: the current value, the readings of that value that may follow before
        the run could be flagged, those of a run beginning at the next reading (each one
        early, so that a share moved by the readings meanwhile is allowed for; infinite when
        no flag can come), and whether the run going on is flagged."""
        if self.flagged_at is not None:
            return self.value, math.inf, math.inf, True
        if not self.count:
            return math.nan, math.inf, math.inf, False
        start = self.seen - self.count
        now = run_limit(self.pairs, self.repeats, self.triples,
                        (self.since - self.first_time) / start if start > 0 else 0.0, every)  # (not kept:
        # the fast path of feed starts a new run without clearing a kept limit)
        interval = (self.last_time - self.first_time) / self.seen if self.seen > 1 else 0.0
        new = run_limit(self.pairs + self.count, self.repeats + self.count - 1,
                        self.triples + max(self.count - 2, 0), interval, every)
        return (self.value, math.inf if now >= _NEVER else float(now - self.count - 1),
                math.inf if new >= _NEVER else float(new - 2), False)

    def _end(self, out: list[RepeatSpan]) -> None:
        """The current run ends: named when it was flagged, else folded into the history."""
        if self.flagged_at is not None:
            out.append(RepeatSpan(self.value, self.since, self.flagged_at, self.count, self.last_time))
            self.flagged_at = None
            self[_P] += self[_C]  # its pairs are left out of the history
        elif self.count:
            self.repeats += self.count - 1
            if self.count > 2:
                self.triples += self.count - 2
        self.limit = 0

    def _take(self, v: float, t: FloatArray, a: int, m: int, every: float, out: list[RepeatSpan]) -> None:
        """``m`` readings of value ``v`` at ``t[a: a + m]``, a run of their own or the current
        run's continuation."""
        if v == self.value:
            c0 = self.count
            self.count = c0 + m
        else:
            self._end(out)
            if math.isnan(self.first_time):
                self.first_time = float(t[a])
            self.value, self.count, self.since, c0 = v, m, float(t[a]), 0
        self.seen += m
        self.last_time = float(t[a + m - 1])
        if self.flagged_at is None and self.count >= REPEAT_MIN and self.count >= self._limit(every):
            k = max(self.limit - c0, 1)  # the reading of the batch at which the run reached its limit
            self.flagged_at = float(t[a + k - 1])
            out.append(RepeatSpan(v, self.since, self.flagged_at, c0 + k, None))

    def feed(self, t: FloatArray, x: FloatArray, every: float) -> list[RepeatSpan] | None:
        """Take readings ``x`` at times ``t`` (float64 arrays, oldest first); ``every`` is the
        plant's ``false_alarm_every`` in seconds.  Returns the flagged runs that began or
        ended among them, or None."""
        n = x.shape[0]
        out: list[RepeatSpan] = []
        if n <= _SMALL:
            if n == 1:
                v = x.item(0)
                if self[1] == 1.0 and v != self[0]:
                    # The steady state of a sound stream: a reading unlike the last, which was
                    # unlike the one before (a run of one is never flagged): the run moves on and
                    # the history with it (``pairs`` follows ``seen``).  (Places as _V, _C, _N, _S, _L.)
                    self[0] = v
                    self[8] += 1.0
                    self[2] = self[3] = t.item(0)
                    return None
                self._take(v, t, 0, 1, every, out)
                return out or None
            for i, v in enumerate(x.tolist()):
                self._take(v, t, i, 1, every, out)
            return out or None
        if math.isnan(self[_F0]):
            self[_F0] = t.item(0)
        eq = x[1:] == x[:-1]
        if LEAN_FEED:
            r = eq.nonzero()[0]  # (np.flatnonzero's array, without its two Python wrappers)
            cont = x.item(0) == self[_V]  # (the same double compared, no array scalar)
            if math.isnan(self[_FL]):
                longest = self._longest(r, cont)
                # Every limit is REPEAT_MIN or more (run_limit's least, and so _least_limit's):
                # a batch whose runs are all of one reading folds whatever the limit, which is
                # then not worked out (the steady state of a sound stream), unless working it
                # out would raise, as the reference then does: _least_limit takes logarithms of
                # its budget, interval / (REPEAT_RARER every), only with enough history and a
                # positive interval, and they raise only for a budget of 0 or NaN (an every
                # past about 1.8e307 s makes the divisor infinite), or it divides by zero for
                # an every of 0.  The same numbers as there, in the same order.
                if longest < REPEAT_MIN - 1:
                    seen = self[_N]
                    rarer = REPEAT_RARER * every
                    if seen - self[_P] + n < REPEAT_HISTORY or (
                            not (interval := (t.item(-1) - self[_F0]) / max(seen - self[_C], 1.0)) > 0.0
                            or (rarer > 0.0 and interval / rarer > 0.0)):
                        self._fold(t, x, r, cont, n)
                        return None
                low = self._least_limit(t, n, every)
                if longest < low - 1:
                    self._fold(t, x, r, cont, n)
                    return None
            else:
                low = self._least_limit(t, n, every)
        else:
            r = np.flatnonzero(eq)  # i: reading i + 1 repeats reading i
            cont = bool(x[0] == self[_V])
            low = self._least_limit(t, n, every)
            if math.isnan(self[_FL]) and self._longest(r, cont) < low - 1:
                self._fold(t, x, r, cont, n)
                return None
        # Run by run where a run could reach its limit (and the first, which may go on a
        # flagged run); the runs between, which cannot, folded together.
        starts = np.flatnonzero(~eq) + 1
        firsts = np.concatenate((_ZERO, starts))
        lengths = np.diff(np.concatenate((firsts, [n])))
        pos = int(lengths[0])
        self._take(x.item(0), t, 0, pos, every, out)
        if low < _NEVER:
            for k in (np.flatnonzero(lengths[1:] >= low - 1) + 1).tolist():
                a, m = int(firsts[k]), int(lengths[k])
                if a > pos:
                    self._fold_part(t, x, eq, pos, a, out)
                self._take(x.item(a), t, a, m, every, out)
                pos = a + m
        if pos < n:
            self._fold_part(t, x, eq, pos, n, out)
        return out or None

    def _longest(self, r: NDArray[np.intp], cont: bool) -> int:
        """The longest run among a batch's readings whose repeats are ``r`` (``cont``: its
        first reading continues the current run)."""
        count = int(self[_C])
        longest = count + 1 if cont else 1
        if r.shape[0]:
            brk = ((r[1:] - r[:-1]) != 1).nonzero()[0] if LEAN_FEED else np.flatnonzero(np.diff(r) != 1)
            firsts = np.concatenate((r[:1], r[brk + 1]))
            lasts = np.concatenate((r[brk], r[-1:]))
            lengths = lasts - firsts + 2
            if cont and firsts.item(0) == 0:
                lengths[0] += count
            longest = max(longest, int(lengths.max()))
        return longest

    def _least_limit(self, t: FloatArray, n: int, every: float) -> int:
        """A limit no run among ``n`` new readings at ``t`` can be below: that of the least
        share the readings can give (the most pairs, the fewest repeats) at the longest
        interval; :data:`_NEVER` when none of them can be flagged."""
        seen, count, repeats, triples = self[_N], self[_C], int(self[_R]), int(self[_T])
        most = int(seen - self[_P]) + n  # (pairs + count + n)
        if most < REPEAT_HISTORY:
            return _NEVER
        start = max(seen - count, 1.0)
        interval = (t.item(-1) - self[_F0]) / start
        low = run_limit(most, repeats, triples, interval, every)
        if low < _NEVER:  # (the repeats may grow: the least share another repeat follows)
            p = repeat_share(repeats, most)
            q = max(p, (triples + REPEAT_PRIOR * p) / (repeats + count + n + REPEAT_PRIOR))
            budget = interval / (REPEAT_RARER * every)
            if q < 1.0 and budget < 1.0:
                low = min(low, max(REPEAT_MIN, math.floor(math.log(budget) / math.log(q)) + 2))
        return low

    def _fold_part(self, t: FloatArray, x: FloatArray, eq: NDArray[np.bool_], a: int, b: int,
                   out: list[RepeatSpan]) -> None:
        """The readings ``a`` to ``b`` of a batch, whose runs cannot reach their limits, the
        first of them beginning a run: the run going on ends (named when flagged), then
        :meth:`_fold`."""
        if not math.isnan(self[_FL]):
            self._end(out)
            self[_C] = 0.0  # (left out of the history: see _end)
        self._fold(t[a:b], x[a:b], np.flatnonzero(eq[a:b - 1]), False, b - a)

    def _fold(self, t: FloatArray, x: FloatArray, r: NDArray[np.intp], cont: bool, n: int) -> None:
        """Readings none of whose runs reaches its limit (and no flagged run going on):
        the history takes every run but the last, which becomes the current run."""
        k = r.shape[0]
        # The last run's first reading: after the last reading unlike its successor.
        j = n - 1
        if k and r.item(-1) == n - 2:
            tail = ((r[1:] - r[:-1]) != 1).nonzero()[0] if LEAN_FEED else np.flatnonzero(np.diff(r) != 1)
            g = r.item(int(tail[-1]) + 1) if tail.shape[0] else r.item(0)
            j = g
        count = self[_C]
        if cont and j == 0:
            # Every reading continues the current run.
            self[_C] = count + n
            self[_N] += n
            self[_L] = t.item(-1)
            return
        rr = r[r < j] if k else r  # the repeats among the batch's pairs before j
        added = max(count - 1.0, 0.0) + (1.0 if cont else 0.0) + rr.shape[0]
        # Runs of two or more among them: the current run's, and the groups of rr (the first
        # of which is the current run's when it goes on into the batch).
        if not rr.shape[0]:
            groups = 0
        elif LEAN_FEED:  # (np.diff's subtraction, without its Python wrapper)
            groups = 1 + int(np.count_nonzero((rr[1:] - rr[:-1]) != 1))
        else:
            groups = 1 + int(np.count_nonzero(np.diff(rr) != 1))
        if cont and rr.shape[0] and rr.item(0) == 0:
            groups -= 1
        groups += 1 if count >= 2.0 or cont else 0
        self[_R] += added
        self[_T] += added - groups
        self[_V] = x.item(j)
        self[_C] = n - j
        self[_S] = t.item(j)
        self[_N] += n
        self[_L] = t.item(-1)
        self[_LIM] = 0.0

    # ---------------------------------------------------------------- state
    def get_state(self) -> list[Any]:
        """Plain JSON: ``[value, count, since, flagged_at, pairs, repeats, seen, first_time,
        last_time, triples]`` (None for what is not known)."""
        def num(v: float) -> float | None:
            return None if math.isnan(v) else v
        return [num(self.value), self.count, num(self.since), self.flagged_at, self.pairs, self.repeats,
                self.seen, num(self.first_time), num(self.last_time), self.triples]

    @classmethod
    def from_state(cls, s: Any) -> RepeatWatch:
        """What :meth:`get_state` gave; ``ValueError`` names what is wrong."""
        if not isinstance(s, list) or len(s) != 10:
            raise ValueError(f"repeats: expected a list of 10 entries, got {s!r:.80}")
        w = cls()

        def num(v: Any, what: str) -> float:
            if v is None:
                return math.nan
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ValueError(f"repeats: {what} must be a finite number or null, got {v!r:.40}")
            return float(v)

        def whole(v: Any, what: str) -> int:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or v != int(v) or v < 0:
                raise ValueError(f"repeats: {what} must be a whole number of at least 0, got {v!r:.40}")
            return int(v)

        w.value = num(s[0], "value")
        w.count = whole(s[1], "count")
        w.since = num(s[2], "since")
        fa = num(s[3], "flagged_at")
        w.flagged_at = None if math.isnan(fa) else fa
        w.seen, w.repeats = whole(s[6], "seen"), whole(s[5], "repeats")
        pairs = whole(s[4], "pairs")
        if pairs + w.count > w.seen:
            raise ValueError(f"repeats: the counts disagree ({s!r:.80})")
        w.pairs = pairs
        w.first_time, w.last_time = num(s[7], "first_time"), num(s[8], "last_time")
        w.triples = whole(s[9], "triples")
        if w.triples > w.repeats or w.repeats > w.pairs or w.count > w.seen or (w.count == 0) != math.isnan(w.value):
            raise ValueError(f"repeats: the counts disagree ({s!r:.80})")
        return w
