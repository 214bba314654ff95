"""The young level: an engine's young phase (:class:`YoungPhase`: the self-starting level
while it rests on few samples, whether the baseline is a provisional stand-in for it, the
split that opened its event), and the helpers of its loop (StreamEngine._young_loop): a
CUSUM bank's sums and rows for its recursion, the least sums that reach its limits, and
the young level's fields.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core.baseline import Baseline, median, sigma_floor
from shiftwatch.core.selfstart import SelfStart, SplitEvidence, split_evidence, split_screen
from shiftwatch.core.sequential import SequentialTest

FloatArray = NDArray[np.float64]

#: In the first warm-up the samples so far are also tested for one step at an unknown
#: point (:func:`.selfstart.split_evidence`), from this many samples on, whenever the
#: young test's statistic reaches YOUNG_SPLIT_SCREEN of its threshold or a sample lies
#: YOUNG_Z_HOLD sigmas out; a step is called at a p-value below YOUNG_SPLIT_SHARE over
#: the plant's ARL.  The self-starting test absorbs a step into the level it measures
#: against; this test does not, so a step in a stream's first samples is not lost.
YOUNG_SPLIT_FROM = 20
YOUNG_SPLIT_SCREEN = 0.1
YOUNG_SPLIT_SHARE = 0.5
YOUNG_SPLIT_MARGIN = 0.0
#: ... and only for a split with this many samples before it, whose autocorrelation is below
#: YOUNG_SPLIT_GATE standard errors (autocorrelated noise wanders like a step over a few dozen
#: samples; the t statistic allows for the autocorrelation as estimated, and the gate stands
#: aside where the estimate itself says the noise wanders).  Measured over 1,500 new streams of
#: 600 samples at false_alarm_every 1h: AR(1) phi 0.6 333 detections, phi 0.8 429 (nominal
#: 250; 410 and 550 before the split test and the bias correction); 3 sigma steps at sample
#: 20 found in 200 of 200 (gate 2: 198, with 321 and 395).  Measured again with the split's
#: pooled autocorrelation (selfstart.SPLIT_POOL_MARGIN), 1,500 streams each: iid 135,
#: phi 0.6 347, phi 0.8 497 (347 and 496 without it); 3 sigma steps at sample 20 found in
#: 1,000 of 1,000 (998 without it).
YOUNG_SPLIT_BEFORE = 15
YOUNG_SPLIT_GATE = 3.0


class _SplitCalled(Exception):
    """A split test noted by the young loop calls a step: the loop is run again."""


def young_split(values: FloatArray, arl0: float) -> SplitEvidence | None:
    """The first warm-up's split test on the samples so far (``values``, the window): the
    split :func:`.selfstart.split_evidence` finds, when it calls a step at the plant's
    rate (a p-value below YOUNG_SPLIT_SHARE over ``arl0``, the young test's ARL) on a
    split with YOUNG_SPLIT_BEFORE samples before it whose autocorrelation stays below
    YOUNG_SPLIT_GATE standard errors; else None."""
    ev = split_evidence(values, phi_margin=YOUNG_SPLIT_MARGIN,
                        p_below=YOUNG_SPLIT_SHARE / arl0 if arl0 > 0.0 else 1.0)
    if (ev is not None and ev.split_at >= YOUNG_SPLIT_BEFORE and ev.phi < YOUNG_SPLIT_GATE / math.sqrt(ev.split_at)
            and ev.p_value * arl0 < YOUNG_SPLIT_SHARE):
        return ev
    return None


def weigh_splits(values: FloatArray, deferred: list[tuple[int, float]]) -> None:
    """Weigh the split tests the young loop noted (``deferred``: the window's length at
    each, and the young test's ARL then) on the window's samples ``values`` (the window
    only grows in the first warm-up, so each test saw a prefix of them); raise
    :class:`_SplitCalled` when one of them calls a step (the first that would have, in
    order), else empty ``deferred``.  :func:`.selfstart.split_screen` settles most of them
    at once; :func:`young_split` weighs the rest."""
    if not deferred:
        return
    arl0 = deferred[0][1]
    if any(a != arl0 for _, a in deferred):  # never within one batch; each on its own
        for n, a in deferred:
            weigh_splits(values, [(n, a)])
        deferred.clear()
        return
    p_below = YOUNG_SPLIT_SHARE / arl0 if arl0 > 0.0 else 1.0
    lengths = np.array([n for n, _ in deferred], dtype=np.intp)
    sure = split_screen(values, lengths, p_below=p_below)
    for n, none in zip(lengths.tolist(), sure.tolist()):
        if none:
            continue
        if young_split(values[:n], arl0) is not None:
            raise _SplitCalled
    deferred.clear()


def provisional_baseline(ys: SelfStart, split: SplitEvidence | None, times: FloatArray,
                         min_sigma: float | None, clip: float) -> Baseline:
    """The baseline an event opened in the first warm-up stands on (provisional): the young
    level ``ys`` and its spread, or, when a split test opened it, the split's level before
    the step and spread; the sampling interval the median of the window's ``times``."""
    dt = np.diff(times)
    interval = median(dt) if dt.shape[0] else 1.0
    level = ys.mean if split is None else split.level_before
    spread = ys.spread() if split is None else split.sigma
    sd = max(spread, sigma_floor(level, 0.0, min_sigma))
    # The event is weighed on prewhitened residuals as an established stream's
    # would be, with the autocorrelation as far as the samples show it; while
    # it cannot be told from none, in units of its long-run variance at two
    # standard errors above the estimate (a step must not be confirmed on a
    # run of autocorrelated samples).
    if split is None:
        phi, vf = ys.phi_estimate(), ys.variance_factor(2.0)
    else:
        # The samples' own autocorrelation, around the two levels of the split.
        # The phi estimate rests on the samples before the split, or on both
        # segments pooled, where that is less (then it is 2 standard errors high
        # already, and the allowance below adds 2 more: on the safe side).
        n = split.split_at
        phi = split.phi if n >= 20 and abs(split.phi) >= 2.0 / math.sqrt(n) else 0.0
        up = min(0.95, max(split.phi, 0.0) + 2.0 / math.sqrt(n))
        vf = 1.0 if phi != 0.0 else (1.0 + up) / (1.0 - up)
    inn = sd * math.sqrt(1.0 - phi * phi) * math.sqrt(vf)
    return Baseline(level=level, sigma=sd, phi=phi, innovation_sigma=inn,
                    interval=interval if interval > 0 else 1.0, n=max(ys.n, 1), quantum=0.0,
                    clip=clip)


def _small_bank(test: SequentialTest) -> tuple[list[float] | None, tuple[float, ...],
                                              tuple[tuple[int, int, float, float], ...], float]:
    """For :meth:`StreamEngine._young_loop`: a CUSUM bank's sums as a list, its charts' h
    twice over (upper, lower), each chart's row for the recursion (:func:`_chart_rows`),
    and the test's threshold; the sums are None for a test that updates itself (any other
    test, or a bank of one chart)."""
    small = getattr(test, "small_sums", None)
    c = small() if small is not None else None
    if c is None:
        return None, (), (), test.threshold
    ks, hs = test.ks, test.hs  # type: ignore[attr-defined]
    return c, hs + hs, _chart_rows(ks, hs), test.threshold


def _least_reaching(h: float, frac: float) -> float:
    """The least double ``c`` for which ``c / h >= frac`` (``h`` and ``frac`` positive and finite):
    division by a positive ``h`` is correctly rounded and so never decreasing in ``c``,
    and for every ``c >= 0`` the comparison ``c >= _least_reaching(h, frac)`` is
    ``c / h >= frac``, whatever the rounding does near the boundary."""
    c = frac * h
    while c > 0.0 and c / h >= frac:
        c = math.nextafter(c, -math.inf)
    while not c / h >= frac:
        c = math.nextafter(c, math.inf)
    return c


@functools.lru_cache(maxsize=64)
def _four_terms(khs: tuple[tuple[int, int, float, float], ...], screen: float, calm: float, on: bool
                ) -> tuple[float, float, float, float, float, float, float, float, float, float, float, float,
                           float, float, float, float, bool]:
    """For :meth:`StreamEngine._young_loop`'s bank of four charts: each chart's k and h, and
    the least sums (:func:`_least_reaching`) at which its ``C / h`` reaches ``screen`` and
    ``calm`` (YOUNG_SPLIT_SCREEN and YOUNG_CALM times the threshold); last, whether those
    limits stand for the divisions (``on``: YOUNG_LIMITS, and the calm limit never below
    the screen's, as the loop checks it only past the screen's).  The young test's statistic is the largest
    ``C / h`` of the bank, and the loop only compares it with those fractions: a sum
    compared with its chart's limits as the recursion sets it gives the same answer as the
    eight divisions and their maximum (tests/core/test_young_limits.py)."""
    (_, _, k0, h0), (_, _, k1, h1), (_, _, k2, h2), (_, _, k3, h3) = khs
    # (each product of a fraction and an h a normal double far from overflow: then the least
    # sum lies within a few steps of it, and _least_reaching's loops end at once)
    ok = on and all(0.0 < v < math.inf for v in (screen, calm, h0, h1, h2, h3)) and all(
        1e-300 < f * h < 1e300 for f in (screen, calm) for h in (h0, h1, h2, h3))
    if not ok:
        inf = math.inf
        return k0, h0, inf, inf, k1, h1, inf, inf, k2, h2, inf, inf, k3, h3, inf, inf, False
    s = [_least_reaching(h, screen) for h in (h0, h1, h2, h3)]
    q = [_least_reaching(h, calm) for h in (h0, h1, h2, h3)]
    ok = all(a <= b for a, b in zip(s, q))
    return k0, h0, s[0], q[0], k1, h1, s[1], q[1], k2, h2, s[2], q[2], k3, h3, s[3], q[3], ok


def _young_fields(ys: SelfStart) -> tuple[int, float, float, int, float | None, float | None, float,
                                        float | None, float]:
    """The fields of a young level that :meth:`StreamEngine._young_loop` changes, for its
    local variables."""
    return ys.n, ys.mean, ys.ss, ys.df, ys.first, ys.prev, ys.lag, ys.last, ys.vm


def _young_put(ys: SelfStart, n: int, mean: float, ss: float, df: int, first: float | None,
               prev: float | None, lag: float, last: float | None, vm: float) -> None:
    """:meth:`StreamEngine._young_loop`'s local variables written back to the young level."""
    ys.n, ys.mean, ys.ss, ys.df, ys.first, ys.prev, ys.lag, ys.last, ys.vm = (
        n, mean, ss, df, first, prev, lag, last, vm)


def _chart_rows(ks: tuple[float, ...], hs: tuple[float, ...]) -> tuple[tuple[int, int, float, float], ...]:
    """For the young loop's CUSUM recursion: each chart's place among the sums (upper,
    lower), its k and its h."""
    m = len(ks)
    return tuple((j, m + j, k, h) for j, (k, h) in enumerate(zip(ks, hs)))


def _young_from(values: FloatArray) -> SelfStart:
    """A self-starting level of unknown spread over these samples."""
    ys = SelfStart(None)
    for v in values.tolist():
        ys.add(v)
    return ys


class YoungPhase:
    """The young phase of one stream's engine: the self-starting level (:attr:`level`, a
    :class:`.selfstart.SelfStart`, None once the level is established), whether the
    engine's baseline is a provisional stand-in for an event opened from the first
    warm-up (:attr:`provisional`), and the split that opened such an event, until the
    event takes it (:attr:`split`).

    The engine (StreamEngine) runs the phase's loop on the level (``_watch_young``,
    ``_young_loop``) and calls the transitions below; it saves and restores the level
    and the provisional flag as the fields ``young`` and ``provisional`` of its state
    (the split never outlives the call that sets it).

    >>> yp = YoungPhase()
    >>> yp.restart(np.array([1.0, 2.0, 3.0])).mean
    2.0
    >>> yp.take_back([4.0]); yp.level.n, yp.level.mean
    (4, 2.5)
    >>> ys = yp.settle(); yp.level is None, ys.n
    (True, 4)
    """

    # One per engine, thousands of them in the daemon: no per-instance dict.
    __slots__ = ("level", "provisional", "split")

    def __init__(self) -> None:
        self.level: SelfStart | None = None  # the level while it rests on few samples
        self.provisional = False  # the baseline is a stand-in for an event during the first warm-up
        self.split: SplitEvidence | None = None  # the split that opened a first-warm-up event

    def begin(self) -> SelfStart:
        """The first warm-up's level: a new one of unknown spread, unless one is young already."""
        if self.level is None:
            self.level = SelfStart(None)
        return self.level

    def restart(self, values: FloatArray) -> SelfStart:
        """The first warm-up starts again (spikes or a shift set aside) from these samples."""
        self.level = _young_from(values)
        return self.level

    def end(self) -> None:
        """The baseline is established: no young level, no provisional stand-in."""
        self.provisional = False
        self.level = None

    def settle(self) -> SelfStart:
        """A re-anchored level that rests on enough samples leaves the phase: its held
        samples taken in, it is returned for the baseline to take its level from."""
        ys = self.level
        assert ys is not None
        self.level = None
        ys.release()
        return ys

    def take_split(self) -> SplitEvidence | None:
        """The split that opened the event now opening (None: none), cleared."""
        split, self.split = self.split, None
        return split

    def take_back(self, values: list[float]) -> None:
        """An event that found no step: the held samples and the event's join the level."""
        ys = self.level
        assert ys is not None
        ys.release()
        for v in values:
            ys.add(v)

    def reanchor(self, values: list[float], known: tuple[float, float, int] | None) -> SelfStart:
        """A new young level after a step, of these samples: on a provisional baseline (the
        first warm-up, ``known`` None) a level of unknown spread whose spread and
        autocorrelation go on pooled over both regimes, the provisional flag cleared; else
        one of the known innovation sigma, phi and follow count in ``known`` (SelfStart's)."""
        if self.provisional:
            old = self.level
            ys = SelfStart(None) if old is None else old.carry_over()
            self.provisional = False
        else:
            assert known is not None
            ys = SelfStart(known[0], known[1], follow=known[2])
        for v in values:
            ys.add(v)
        self.level = ys
        return ys


class _IdleYoung(YoungPhase):
    """The young phase of every engine whose level is established (no young level, no
    provisional baseline, no split): one shared, read-only instance, :data:`IDLE_YOUNG`.
    An engine takes a :class:`YoungPhase` of its own before it writes one
    (StreamEngine._own_young) and shares this one again once its own holds nothing, so an
    established stream holds no young phase (56 bytes by tracemalloc, 10,000 streams 0.6 MB).

    >>> IDLE_YOUNG.level is None, IDLE_YOUNG.provisional, IDLE_YOUNG.take_split()
    (True, False, None)
    >>> IDLE_YOUNG.begin()
    Traceback (most recent call last):
    ...
    TypeError: the shared idle young phase is read-only (level)
    """

    __slots__ = ()

    def __setattr__(self, name: str, value: object) -> None:
        raise TypeError(f"the shared idle young phase is read-only ({name})")

    def __reduce__(self) -> str:  # (copies and pickles are the one instance)
        return "IDLE_YOUNG"

    def end(self) -> None:
        """Nothing to end."""

    def take_split(self) -> SplitEvidence | None:
        """No split."""
        return None


IDLE_YOUNG = _IdleYoung.__new__(_IdleYoung)
for _name in YoungPhase.__slots__:
    object.__setattr__(IDLE_YOUNG, _name, False if _name == "provisional" else None)
del _name
