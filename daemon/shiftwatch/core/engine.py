"""The per-stream engine: warm-up, watching, and events with their outcome.

One :class:`StreamEngine` watches one stream.  It is fed batches of samples
with their times and returns the alert records the batch produced.  The same
engine serves the daemon (live MQTT samples) and ``shiftwatch replay`` (CSV
files), so both give the same alerts for the same samples.

The engine moves through three states:

``warming_up``
    Collect ``warmup_samples`` and estimate a robust baseline (level, sigma,
    lag-1 autocorrelation, sampling interval).  Meanwhile each sample is
    measured self-starting against the samples before it
    (:mod:`.selfstart`) and fed to the test, so a new stream can alert within
    its first samples.
``watching``
    Standardise each sample on the baseline, prewhiten it when the feed is
    autocorrelated, clip it, and feed the sequential test.  Lone spikes are
    held for one sample and discarded when the next sample does not confirm
    them.  The baseline is refined now and then from samples old enough that
    a shift in progress cannot leak into it.  For
    :data:`YOUNG_END` samples after a step the level is young and measured
    self-starting.
``event_open``
    The test tripped: the step has been fitted and a ``detected`` record
    emitted.  Each later sample goes to the event's sequential decision
    (:class:`.events.EventTrial`); the event ends ``confirmed`` (or
    ``returned``, when the level goes back after an earlier step),
    ``dismissed`` or ``undecided``.  After a step the stream watches on at
    once from the new level, the noise estimates carried over.
"""

from __future__ import annotations

import math
import operator
from array import array
from bisect import bisect_left
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any, cast

import numpy as np
from numpy.typing import NDArray

from shiftwatch.core import baseline as _baseline
from shiftwatch.core import selfstart as _selfstart
from shiftwatch.core import sensorcheck as _sensorcheck
from shiftwatch.core.baseline import (
    _BOUNDS,
    HEAVY_TAIL_CLIP,
    Baseline,
    BaselineSums,
    _clip,
    clip_bounds,
    estimate_baseline,
    estimation_adjusted_arl,
    median,
    shared_value,
    sigma_floor,
)
from shiftwatch.core.calm import MAX_CHARTS as CALM_MAX_CHARTS
from shiftwatch.core.calm import CalmTerms
from shiftwatch.core.cusum import CusumTest
from shiftwatch.core.eventfit import _fit, _variance_factor, residual_phi_bound, young_variance
from shiftwatch.core.events import (
    LOOK,
    NO_STEP,
    RETURN_WAIT,
    STEP,
    EventTrial,
    OpenEvent,
    StepMemory,
)
from shiftwatch.core.follow import (
    FOLLOW_MARGIN,
    FOLLOW_RECENTER,
    Follower,
    _follow_key_terms,
    _follow_se,
    _follow_terms,
    follow_arl_factor,
    follow_delay,
    follow_path,
    follow_samples,
)
from shiftwatch.core.multicusum import MultiCusumTest
from shiftwatch.core.records import (
    _NO_COUNTS,
    PLANNED,
    AlertRecord,
    BatchResult,
    Rejection,
    _tally,
    event_id,
)
from shiftwatch.core.repeats import RepeatSpan, RepeatWatch
from shiftwatch.core.restore import (
    _baseline_from,
    _check_finite,
    _count,
    _finite_array,
    _finite_number,
    _positive,
    _time_array,
)
from shiftwatch.core.screen import screen_samples
from shiftwatch.core.selfstart import (
    SelfStart,
    split_critical_t,
    split_evidence,
)
from shiftwatch.core.sequential import SequentialTest
from shiftwatch.core.settings import ARL_RANGE, DetectionSettings
from shiftwatch.core.spikes import backed_by_prev, lone_outliers, spike_confirmed, young_spike_limit
from shiftwatch.core.stepfit import StepFit, StepFitter, anchor_step, supf_critical, supf_pvalue
from shiftwatch.core.window import Window
from shiftwatch.core.young import (
    IDLE_YOUNG,
    YOUNG_SPLIT_BEFORE,
    YOUNG_SPLIT_FROM,
    YOUNG_SPLIT_GATE,
    YOUNG_SPLIT_MARGIN,
    YOUNG_SPLIT_SCREEN,
    YOUNG_SPLIT_SHARE,
    YoungPhase,
    _four_terms,
    _small_bank,
    _SplitCalled,
    _young_fields,
    _young_put,
    provisional_baseline,
    weigh_splits,
    young_split,
)

FloatArray = NDArray[np.float64]

#: Rejections of samples whose time is not newer than the stream's newest; not in samples_total.
_NOT_NEW = frozenset(("duplicate_time", "out_of_order"))

WARMING_UP = "warming_up"
WATCHING = "watching"
EVENT_OPEN = "event_open"


def make_test(settings: DetectionSettings, arl0: float, shift_z: float, n_ref: float = math.inf,
              *, n_level: float | None = None) -> SequentialTest:
    """Build the configured sequential test for an in-control ARL of ``arl0`` samples.

    ``shift_z`` is the smallest shift of interest in units of the test's input
    (standardised, prewhitened residuals); CUSUM uses it for k.  ``n_ref`` is
    the number of samples the baseline rests on: while it is small the test
    is designed for a longer ARL (see :func:`estimation_adjusted_arl`), so the
    false-alarm rate the plant chose holds from the first minutes on.
    ``n_level`` is the number of samples behind the level when fewer (a
    level re-estimated after a step, the noise estimates carried over).
    """
    # Designs are cached; putting their inputs on grids lets thousands of
    # streams share a handful of them.  The ARL is rounded up (longer, the
    # safe side) and the smallest shift down (more sensitive) on a 10% grid.
    shift_z = _grid(max(shift_z, 0.05), up=False, step=0.1)
    n = int(min(n_ref, 1e9))
    nl = n if not n_level else int(min(n_level, n))  # 0 or None: the level rests on n samples
    if settings.test == "glr":
        from shiftwatch.core.glr import GlrTest

        # The GLR corrects for the error of the estimated mean itself.
        return GlrTest.design(_design_arl(arl0, n, None), window=settings.glr_window,
                              reference_size=min(n_ref, float(nl)))
    if settings.test == "multi_cusum":
        from shiftwatch.core.multicusum import DEFAULT_MULTIPLES, MultiCusumTest

        # The chart with the smallest reference value is the one most
        # sensitive to an error in the estimated mean.
        k_min = min(DEFAULT_MULTIPLES) * shift_z / 2.0
        target = _design_arl(arl0, n, k_min, nl)
        return MultiCusumTest.design(target, shift_z, approximate=target > 1.25 * arl0)
    if settings.test == "cusum":
        from shiftwatch.core.cusum import CusumTest

        return CusumTest.design(_design_arl(arl0, n, shift_z / 2.0, nl), shift_z)
    from shiftwatch.core.river_adapter import RiverTest

    return RiverTest(settings.test)


def steady_test(settings: DetectionSettings, arl0: float, shift_z: float, phi: float = 0.0) -> SequentialTest:
    """The test an established stream runs, its baseline resting on many samples and its
    level followed (designed for a longer ARL by :func:`follow_arl_factor`, so that the
    real one is ``arl0``).  What ``shiftwatch design`` and the suggestions state is this
    test's behaviour."""
    return make_test(settings, arl0 * follow_arl_factor(phi, arl0), shift_z)


#: Batches of at most this many samples are watched one sample at a time in
#: plain floats (:meth:`StreamEngine._watch_small`): a live stream brings one or
#: two samples per round, and a dozen array operations on them cost far more
#: than the arithmetic.
SMALL_BATCH = 8

#: A level re-estimated after a step is measured self-starting (see :mod:`.selfstart`)
#: until it rests on this many samples; then it becomes the baseline's fixed level.
YOUNG_END = 1000
#: The young phase runs through :meth:`StreamEngine._watch_young_fast`; False: through the
#: per-sample reference loop it is held to (tests/core/test_young_fast.py).
FAST_YOUNG = True

#: While the young test's statistic is at least this fraction of its threshold, the
#: samples are held back from the young level (see SelfStart.hold), at most
#: YOUNG_HOLD of them: a large step in progress is not absorbed before it is seen.
YOUNG_CALM = 0.5
YOUNG_HOLD = 8
#: A sample this many sigmas from the young level is held back too, whatever the
#: statistic: the first samples of a large step must not drag the level, inflate the
#: spread and fake an autocorrelation before the test has seen them.  (Beyond 2 sigma
#: falls one iid sample in 22; it is taken in with the next sample that is not.)
YOUNG_Z_HOLD = 2.0
#: Holding starts once the level rests on this many samples (the lag-1 autocorrelation
#: is estimated from 20 on), and only on noise with no significant autocorrelation: on
#: autocorrelated samples holding would feed the runs it is meant to wait out.
YOUNG_HOLD_FROM = 20

#: The name a record gives the split test when it tripped (its ``test``, ``statistic``:
#: the split's t, ``threshold``: the t its bound calls a step above).
SPLIT_TEST = "warmup_split"
#: The first warm-up's split tests are noted and weighed together (see
#: StreamEngine._watch_young_fast) on batches of at least this many samples, at most this
#: many rows at a time.
SPLIT_DEFER_FROM = 16
#: A first warm-up whose samples hold a clear shift at its end is stretched by this many
#: samples at a time, up to window_samples, while the young tests watch on (StreamEngine._warm).
WARM_STRETCH = 25
#: ... or whose split test's bound is below this (a step's samples read as autocorrelation
#: and can hide it from the end's step fit).  It stretched 36 of 1,000 iid new streams.
WARM_STRETCH_P = 0.1
#: ... and when the window is full, the split test looks once more at a bound of this share
#: of the warm-up's false-alarm budget (window_samples over the plant's ARL); a record of
#: that look names END_TEST.
WARM_END_SHARE = 0.1
END_TEST = "warmup_end"
#: The names a record gives what opened an event as the one before it was dismissed because
#: its refit placed the step after that detection (StreamEngine._decide): the refit, a clear
#: step (``statistic``: its sup-F, ``threshold``: the F whose p-value is confirm_p_value), or
#: else the trial's step evidence (its log-likelihood ratio against Wald's bound).
REFIT_TEST = "event_refit"
TRIAL_TEST = "event_trial"
#: The shortest segment an event's step fit allows on each side of the step, and the
#: fewest samples it can fit (``StepFitter``: at least 2 * min_segment + 1).
#: A pause in the readings before a step's shift-time interval of more than this many
#: usual sampling intervals is named in its records (``gap_from``).
GAP_FACTOR = 10.0
FIT_MIN_SEGMENT = 2
FIT_MIN = 2 * FIT_MIN_SEGMENT + 1
#: A segment that holds an outlier is split at its outliers only
#: (StreamEngine._split_spikes_sparse); False: the reference's passes over the segment.
SPARSE_SPIKES = True
#: A segment longer than the samples a stretch can keep is searched for outliers in
#: those samples first (StreamEngine._split_spikes); False: the whole segment, the
#: reference (tests/core/test_split_spikes.py holds the two to each other).
HEAD_SPIKES = True
SPLIT_DEFER_ROWS = 64
#: A batch that folds samples of the window and of its own into the baseline sums folds
#: them in one call (BaselineSums.add with a cut); False: two calls, the reference
#: (tests/core/test_batch_path.py holds the two to each other).
FOLD_TOGETHER = True
#: The follower offsets of the unfolded samples are moved and shifted inside their
#: array's own buffer (StreamEngine._keep_offsets, _refine); False: the reference, a
#: buffer emptied and filled again each batch and a new array at each refinement.
OFFSETS_IN_PLACE = True
_ONE_ZERO = array("d", [0.0])
#: The fixed work of one engine call on the established watch, trimmed: the clip ufunc
#: called without ndarray.clip's Python wrapper, the follower's delay and rate looked up
#: per phi, the window's unfolded offsets read through a view, the follower's one-block
#: path worked in place, and an empty batch's bookkeeping skipped; the same operations on
#: the same numbers.  False: the reference (tests/core/test_per_call.py holds the two to
#: each other).
LEAN_CALLS = True
#: The watch stretch's fixed work trimmed further, the same operations on the same numbers:
#: screening's largest and smallest value of the batch stand for the spike check on every
#: watch stretch of the call (a later stretch's samples are some of the batch's, so when the
#: batch lies inside the band so do they), not only the first; the follower's delay and
#: rate kept on the engine for its phi; the window's rows sliced once instead of through
#: their properties and then again.  False: the reference (tests/core/test_stretch_trim.py
#: holds the two to each other).
TRIM_STRETCH = True
#: A call's last time and last residual read with item() (no array scalar made and
#: converted), and the unfolded offsets not moved when every one of them leaves (a batch
#: of a guard or more): the same doubles.  False: the reference (tests/core/test_read_items.py
#: holds the two to each other).
READ_ITEMS = True
#: An established stream holds no young phase of its own (it shares young.IDLE_YOUNG, read-only,
#: and takes one of its own before writing one) and its follower keeps the one tuple of delay
#: and rate of every follower of the same phi and window (follow._follow_key_terms): about
#: 130 bytes a stream less.  False: the reference, a young phase and a tuple for each engine
#: (tests/core/test_shared_parts.py holds the two to each other).
SHARED_PARTS = True
#: The young loop (StreamEngine._young_loop) tells whether its bank's statistic reaches the
#: split screen's or the calm fraction of the threshold by comparing each sum, as the
#: recursion sets it, with the least sum that reaches it (_four_terms), in place of the
#: bank's eight divisions and their maximum per sample; the same answers.  False: the
#: divisions, the reference (tests/core/test_young_limits.py holds the two to each other).
YOUNG_LIMITS = True


#: Standard errors of the level after a step by which :meth:`StreamEngine._step_after` moves it
#: towards the reference before it weighs the samples after a detection (it rests on the
#: samples after the split only, a few dozen, and the split is where they look farthest
#: from the samples before it).
AFTER_MARGIN = 1.0
#: The samples after that split, in multiples of those before it, up to which
#: :meth:`StreamEngine._step_after` waits for them when the level as fitted says the step
#: began after the detection and the level moved by the margin does not yet (without a
#: limit a step at the bound's edge kept its event open to ``confirm_max_samples``).
AFTER_WAIT = 4
#: A step is confirmed only while the fit of the event's samples shows it at this
#: p-value (or ``confirm_p_value``, when larger): the trial alone confirmed wander of
#: young autocorrelated streams.  0.001 lost more real steps on AR(1) 0.8 noise
#: (1-sigma steps confirmed within 1,600 samples: 56 of 100, against 75 at 0.01
#: and 93 with no gate, when every sample was refitted; 69 at 0.01 with
#: ``EventTrial.reopen``'s spacing), for few fewer false confirmations (5 against 6
#: of 110).
CONFIRM_FIT_P = 0.01
#: The same once the baseline's phi rests on a window of samples or more: there the
#: trial's assumptions hold better, and 0.01 cost 1-sigma steps on AR(1) 0.8 noise
#: (bench_events: 88% confirmed within 1,000 samples instead of 99%; 93% at 0.1, until a
#: settled level stood in for the samples before a late-detected step: ``_anchored``).
CONFIRM_FIT_P_SETTLED = 0.1
#: A stream whose noise is heavy-tailed is clipped at 2 sigma (baseline.choose_clip), and
#: clipped increments reach the test's threshold less often than the Gaussian ones it is
#: designed for (clipping Gaussian noise at 2 left 0.18 of the nominal rate at 1h); the
#: heavy tails give some of it back.  Its test is designed for this factor times the ARL.
#: Measured at 1h with the factor 1 (2 M samples each, 2026-12-03): t(3) with spikes 0.44
#: of nominal, t(4) 0.55, Laplace 0.37; tests/bench/bench_events.py measures t(3) with
#: spikes at 1h and 7d with it.
HEAVY_ARL_FACTOR = 0.45
#: Which design rules a saved test was made by: a snapshot made under other rules (none
#: recorded: before the ARL-dependent follower factor and HEAVY_ARL_FACTOR) has its test
#: designed again on load, keeping its evidence, as a fresh stream's would be.
DESIGN_RULES = 2

#: The baseline is refined at least every REFINE_BLOCK_MAX samples (more often while
#: it is young).  Each refinement ends a vectorised stretch of a batch, so a smaller
#: block costs replay speed: 128 made a slow ramp be followed (0.06 instead of 2
#: detections per stream-hour) but cut a stream's throughput fourteenfold.
REFINE_BLOCK_MAX = 65536

#: The settings of engines built without any (frozen, so one is shared).
_DEFAULT_SETTINGS = DetectionSettings()


def pause_before(times: np.ndarray, shift_at_low: float, shift_at_high: float) -> float | None:
    """The time of the last reading before the longest pause of ``times`` (sorted, at
    least 3), of more than GAP_FACTOR times their median interval, that ends at
    ``shift_at_low`` or inside the interval up to ``shift_at_high``; else None.  The
    event's records (``gap_from``) and ``shiftwatch fit`` name it: a step across a pause
    may have come at any moment of it.

    >>> t = np.array([0.0, 1.0, 2.0, 1802.0, 1803.0, 1804.0])
    >>> pause_before(t, 1802.0, 1802.0), pause_before(t, 1.0, 1802.0), pause_before(t, 1803.0, 1804.0)
    (2.0, 2.0, None)
    """
    j = int(np.searchsorted(times, shift_at_low, side="left"))
    if j < 1:
        return None
    k = max(int(np.searchsorted(times, shift_at_high, side="right")), j + 1)
    usual = float(np.median(np.diff(times)))
    gaps = np.diff(times[j - 1:k])
    i = int(np.argmax(gaps))
    return float(times[j - 1 + i]) if usual > 0.0 and gaps[i] > GAP_FACTOR * usual else None


class StreamEngine:
    """Watches one stream for level shifts.

    Parameters
    ----------
    stream : the stream's name, carried into every record.
    settings : detection settings (defaults when omitted).
    unit : unit of the readings, carried into records when known.

    Examples
    --------
    A 1-sigma step after 600 in-control samples of a 1 Hz fill weight:

    >>> rng = np.random.default_rng(11)
    >>> t = 1764633600.0 + np.arange(1000.0)
    >>> x = 500.0 + 0.4 * rng.standard_normal(1000)
    >>> x[600:] += 0.4
    >>> eng = StreamEngine("filler3/weight")
    >>> recs = eng.process(t, x).records
    >>> [r.phase for r in recs]
    ['detected', 'confirmed']
    >>> bool(abs(recs[-1].shift_at - t[600]) <= 3), bool(abs(recs[-1].delta - 0.4) < 0.15)
    (True, True)
    """

    # One engine per stream, thousands of them in the daemon: no per-instance dict.
    __slots__ = (
        "_baseline",
        "_event",
        "_fitter",
        "_follower",
        "_last_step",
        "_last_time",
        "_next_refine",
        "_pending",
        "_prev_out",
        "_prev_r",
        "_refine_block",
        "_repeats",
        "_state",
        "_sums",
        "_test",
        "_test_arl0",
        "_test_n_level",
        "_test_n_ref",
        "_test_shift_z",
        "_unfolded",
        "_unfolded_u",
        "_watch_kept",
        "_window",
        "_young",
        "last_shift_at",
        "planned",
        "records_total",
        "rejected_total",
        "samples_total",
        "settings",
        "stream",
        "unit",
    )

    def __init__(self, stream: str, settings: DetectionSettings | None = None, *,
                 unit: str | None = None) -> None:
        self.stream = stream
        self.settings = settings if settings is not None else _DEFAULT_SETTINGS
        self.unit = unit
        #: Set by the shell (core/plans.py, FloorBook.plan_lookup): given a step's shift-time
        #: interval, the id of the planned window it meets, or None.
        self.planned: Callable[[float, float], str | None] | None = None
        self._reset()

    # ------------------------------------------------------------------ state
    def _reset(self) -> None:
        self._state = WARMING_UP
        self._window = Window(self.settings.window_samples)
        self._fitter: StepFitter | None = None  # only while an event is open
        self._sums = BaselineSums()
        self._baseline: Baseline | None = None
        self._test: SequentialTest | None = None
        self._test_arl0 = 0.0
        self._test_shift_z = 0.0
        self._test_n_ref = 0.0
        self._test_n_level = 0
        self._prev_r = 0.0
        self._follower = Follower()  # the followed level's offset, lag and spike centre (follow.py)
        self._pending: tuple[float, float] | None = None  # held possible spike
        self._prev_out = 0  # direction in which the last kept sample was an outlier (0: it was not)
        self._event: OpenEvent | None = None
        self._last_step: StepMemory | None = None  # the last confirmed step, to recognise its return
        # The young level, the provisional flag, the opening split (young.py): the shared idle
        # phase until the engine writes one (_own_young), and again once it holds nothing.
        self._young: YoungPhase = IDLE_YOUNG if SHARED_PARTS else YoungPhase()
        self._unfolded = 0  # newest samples not yet folded into the baseline sums
        # The follower's offset each was measured against, as C doubles: a deque of float
        # objects took four times the room (about 2 KB a stream of the daemon's 14).
        self._unfolded_u = array("d")
        self._watch_kept = 0  # samples kept while watching since the baseline was set
        self._next_refine = 0  # value of _watch_kept at which the baseline is refined next
        self._refine_block = 0
        self._last_time = -math.inf
        self._repeats = RepeatWatch()  # the current run of one repeated reading (core/repeats.py)
        self.samples_total = 0
        # Most streams never reject a sample or make a record: they share one
        # empty, read-only counter until their first count.
        self.rejected_total: Counter[str] = _NO_COUNTS
        self.records_total: Counter[str] = _NO_COUNTS
        self.last_shift_at: float | None = None

    @property
    def state(self) -> str:
        """``warming_up``, ``watching`` or ``event_open``."""
        return self._state

    @property
    def baseline(self) -> Baseline | None:
        return self._baseline

    @property
    def level(self) -> float | None:
        """Current in-control level (None during the first warm-up)."""
        return None if self._baseline is None else self._baseline.level

    @property
    def sigma(self) -> float | None:
        return None if self._baseline is None else self._baseline.sigma

    @property
    def statistic(self) -> float:
        return 0.0 if self._test is None else float(self._test.statistic)

    @property
    def threshold(self) -> float:
        return math.nan if self._test is None else float(self._test.threshold)

    @property
    def test_name(self) -> str:
        return self.settings.test

    @property
    def repeating(self) -> RepeatSpan | None:
        """The run of one repeated reading going on, while it is improbable for the stream's
        own readings (a stuck sensor is possible; core/repeats.py), else None."""
        return self._repeats.span

    def held_samples(self) -> tuple[FloatArray, FloatArray]:
        """Copies of the samples the engine holds now (its window): times and values, oldest first.

        Examples
        --------
        >>> eng = StreamEngine("s")
        >>> _ = eng.process([1.0, 2.0, 3.0], [5.0, 6.0, 7.0])
        >>> [a.tolist() for a in eng.held_samples()]
        [[1.0, 2.0, 3.0], [5.0, 6.0, 7.0]]
        """
        return self._window.times.copy(), self._window.values.copy()

    def calm_terms(self) -> CalmTerms | None:
        """What :class:`.calm.CalmPool` needs to hold this stream's next samples back,
        or None when the stream is not calm: no established baseline being watched, a
        young level, a sample held for the spike check, a test other than a CUSUM, or
        a baseline about to change within two samples."""
        b, test = self._baseline, self._test
        if (self._state != WATCHING or b is None or test is None or self._young.level is not None
                or self._pending is not None or self._event is not None):
            return None
        if isinstance(test, MultiCusumTest):
            ks, hs, cp, cm = test.ks, test.hs, test.c_plus, test.c_minus
        elif isinstance(test, CusumTest):
            ks, hs, cp, cm = (test.k,), (test.h,), (test.c_plus,), (test.c_minus,)
        else:
            return None
        s = self.settings
        fo = self._follower
        room = min(self._next_refine, fo.next_center) - self._watch_kept
        delay = follow_delay(b.phi, s.window_samples)
        if room < 2 or fo.lag > delay or len(ks) > CALM_MAX_CHARTS:
            return None
        span = s.spike_sigma * b.sigma
        fs = follow_samples(b.phi)
        lam = 0.0 if math.isinf(fs) else 1.0 / fs
        if lam == 0.0:
            offsets: tuple[float, ...] = (fo.offset,)
        else:
            # The next delay + 1 samples are measured against offsets the follower reaches
            # on samples the window holds now (see _follow_plan).
            lag = fo.lag
            w = self._window.values
            path = follow_path(fo.input(w[len(w) - lag:], b.level, span), fo.offset, lam)
            offsets = tuple(path[np.maximum(0, lag + np.arange(delay + 1) - delay)].tolist())
        rv, rl, rn, rf = self._repeats.pool_terms(s.false_alarm_every)
        return CalmTerms(level=b.level, offsets=offsets, lam=lam, delay=delay if lam else 0,
                         lo=b.level + fo.center - span, hi=b.level + fo.center + span,
                         inv=1.0 / b.innovation_sigma, phi=b.phi, prev_r=self._prev_r, clip=b.clip,
                         ks=tuple(ks), hs=tuple(hs), c_plus=tuple(cp), c_minus=tuple(cm), room=room,
                         last_time=self._last_time,
                         max_ahead=math.inf if s.max_time_ahead is None else s.max_time_ahead,
                         max_behind=math.inf if s.max_time_behind is None else s.max_time_behind,
                         run_value=rv, run_left=rl, run_new=rn, run_flagged=rf)

    # ------------------------------------------------------------- feeding
    def process(self, times: Sequence[Any] | FloatArray, values: Sequence[Any] | FloatArray,
                arrived: float | Sequence[float] | FloatArray | None = None) -> BatchResult:
        """Feed a batch of samples (times in epoch seconds) and collect the records.

        Bad samples are rejected with reason codes in the result; this method
        does not raise on bad data.  ``arrived`` is the receiving clock's time
        of each sample (or one for the batch): with it, times further ahead of
        or behind it than the settings' ``max_time_ahead`` / ``max_time_behind``
        are rejected (``time_ahead``, ``time_behind``).  Without it (replay),
        those limits do not apply.
        """
        st = self.settings
        scr = screen_samples(times, values, self._last_time, self._window.times, arrived=arrived,
                             max_ahead=st.max_time_ahead, max_behind=st.max_time_behind)
        if scr.rejected or not LEAN_CALLS:
            raw_t = np.asarray(times, dtype=object) if scr.rejected else None
            result = BatchResult(rejected=[Rejection(i, r, _time_or_nan(raw_t, i)) for i, r in scr.rejected])
        else:
            result = BatchResult()
        t, x = scr.times, scr.values
        if t.shape[0]:
            self._last_time = t.item(-1) if READ_ITEMS else float(t[-1])  # (the same double)
            spans = self._repeats.feed(t, x, st.false_alarm_every)
            if spans:
                result.repeats = spans
        kept = scr.kept
        pos = 0
        n = t.shape[0]
        while pos < n:
            # (the window's and the fitter's lengths read directly: this runs on every call)
            # (and the set-asides: a warm-up can take a held sample in and set a spike
            # aside in one turn, its window as long as before and the new sample not yet
            # taken; that is progress, and the next turn takes the sample)
            before = (pos, self._state, self._watch_kept, self._window._n,
                      -1 if self._fitter is None else len(self._fitter), len(result.rejected))
            if self._state == WARMING_UP:
                used = self._warm(t[pos:], x[pos:], kept[pos:], result)
            elif self._state == WATCHING:
                # (the batch's largest and smallest value, which screening took, stand for
                # the spike check's on the first stretch, and with TRIM_STRETCH on every one)
                bounds = (scr.high, scr.low) if (pos == 0 or TRIM_STRETCH) and LEAN_CALLS else None
                if pos == 0 and TRIM_STRETCH:  # (the arrays themselves: [0:] makes views of them)
                    used = self._watch(t, x, kept, result, bounds)
                else:
                    used = self._watch(t[pos:], x[pos:], kept[pos:], result, bounds)
            else:
                used = self._track(t[pos:], x[pos:], kept[pos:], result)
            pos += used
            if (pos, self._state, self._watch_kept, self._window._n,
                    -1 if self._fitter is None else len(self._fitter), len(result.rejected)) == before:
                # Nothing moved: a defect.  Refuse loudly instead of spinning.
                raise RuntimeError(f"engine for stream {self.stream!r} made no progress in state {self._state}")
        result.accepted = n
        # Each sample once: one whose time is not newer than the stream's newest
        # (a message delivered again, or a late one) is counted only among the
        # rejections, so a redelivery never counts twice.
        if scr.rejected or not LEAN_CALLS:
            self.samples_total += len(scr.kept) + sum(r not in _NOT_NEW for _, r in scr.rejected)
        else:
            self.samples_total += len(scr.kept)
        if result.rejected:
            self.rejected_total = _tally(self.rejected_total, (rej.reason for rej in result.rejected))
            result.rejected.sort()
        elif not LEAN_CALLS:
            result.rejected.sort()
        if result.records:
            self.records_total = _tally(self.records_total, (rec.phase for rec in result.records))
        return result

    # ------------------------------------------------------------ warm-up
    def _append(self, t: FloatArray, x: FloatArray, u: FloatArray) -> None:
        """Append kept samples while watching; fold those that age past the guard
        into the baseline sums, each less the follower's offset it was measured
        against (``u``, kept for the unfolded ones).  What is folded depends only on
        the samples, never on how they were batched."""
        b = self._baseline
        assert b is not None
        m = x.shape[0]
        guard = self.settings.baseline_guard
        fold = self._unfolded + m - guard
        w = self._window
        extended = False
        if fold > 0:
            old = min(self._unfolded, fold)
            new = fold - old
            if old:
                n = len(w)
                a = n - self._unfolded
                # (a view of the offsets' buffer when lean: every use below copies out of it
                # before _keep_offsets moves or replaces them)
                wu = np.frombuffer(self._unfolded_u, count=old) if LEAN_CALLS else \
                    np.array(self._unfolded_u[:old], dtype=np.float64)
                if new and FOLD_TOGETHER:
                    # The window's oldest unfolded samples and the batch's first, folded
                    # as two calls would fold them (BaselineSums.add's cut).  They are all
                    # the window's unfolded ones (old == unfolded here), so once the batch
                    # has joined the window they lie side by side in it, as long as the
                    # window keeps them (m + old samples at most).
                    if m + old <= w.keep:
                        w.extend(x, t)
                        extended = True
                        p0 = len(w) - m - old
                        if TRIM_STRETCH:  # the window's rows sliced once
                            rows = w._blk[w._i, :, p0: p0 + fold]
                            self._sums.add(b, rows[0] - np.concatenate((wu, u[:new])), rows[1], cut=old)
                        else:
                            self._sums.add(b, w.values[p0: p0 + fold] - np.concatenate((wu, u[:new])),
                                           w.times[p0: p0 + fold], cut=old)
                    else:
                        self._sums.add(b, np.concatenate((w.values[a: a + old], x[:new]))
                                       - np.concatenate((wu, u[:new])),
                                       np.concatenate((w.times[a: a + old], t[:new])), cut=old)
                else:
                    self._sums.add(b, w.values[a: a + old] - wu, w.times[a: a + old].copy())
                    if new:
                        self._sums.add(b, x[:new] - u[:new], t[:new])
            elif new:
                self._sums.add(b, x[:new] - u[:new], t[:new])
            if old:
                del wu  # no view of the offsets' buffer left: it may be resized now
            self._keep_offsets(old, u[new:] if new else u)
            self._unfolded -= fold
        else:
            self._keep_offsets(0, u)
        self._unfolded += m
        if not extended:
            w.extend(x, t)

    def _keep_offsets(self, drop: int, tail: FloatArray) -> None:
        """The follower offsets of the unfolded samples: the oldest ``drop`` leave, ``tail``
        joins.  Written into the array's own buffer when its length stays (a batch of a
        guard or more): a buffer freed and made again each round would land among the
        round's short-lived objects and keep their memory from going back to the system.
        The offsets' doubles are copied as they are (no float object per sample)."""
        uq = self._unfolded_u
        n = len(uq)
        if not OFFSETS_IN_PLACE:
            if drop:
                del uq[:drop]
            uq.frombytes(tail.tobytes())
            return
        if drop and tail.shape[0] == drop:
            v = np.frombuffer(uq)
            if n > drop or not READ_ITEMS:  # (all leave when the batch is a guard or more: none moves)
                v[: n - drop] = v[drop:]
            v[n - drop:] = tail
            del v  # the array can be resized again once no view of its buffer is left
            return
        # A new array of exactly the doubles it holds (frombytes would allot a tenth
        # more, and past 512 bytes a guard's worth would leave Python's small-object heap).
        out = array("d", _ONE_ZERO) * (n - drop + tail.shape[0])
        if len(out):
            v = np.frombuffer(out)
            v[: n - drop] = np.frombuffer(uq)[drop:]
            v[n - drop:] = tail
            del v
        self._unfolded_u = out

    def _append_one(self, t: float, x: float, u: float) -> None:
        """:meth:`_append` of one sample, in plain floats (the steady state: the
        sample that ages past the guard is folded in, the new one joins the window)."""
        fold = self._unfolded + 1 - self.settings.baseline_guard
        if fold > 1 or (fold == 1 and self._unfolded == 0):  # a guard that changed, or none
            self._append(np.array([t]), np.array([x]), np.array([u]))
            return
        if fold == 1:
            assert self._baseline is not None
            wt, wx = self._window.at(len(self._window) - self._unfolded)
            uq = self._unfolded_u
            first = uq[0]
            del uq[0]
            self._sums.add_one(self._baseline, wx - first, wt)
            self._unfolded -= 1
        self._unfolded += 1
        self._unfolded_u.append(u)
        self._window.push(x, t)

    def _warm(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], result: BatchResult) -> int:
        """The first warm-up: collect ``warmup_samples`` for a robust baseline, watching
        meanwhile with a self-starting test, so a new stream can alert within its
        first samples (see :mod:`.selfstart`)."""
        s = self.settings
        have = len(self._window)
        # Past warmup_samples the warm-up has been stretched (a clear shift, see below):
        # the next look is at the next multiple of WARM_STRETCH samples past it.
        need = (s.warmup_samples - have if have < s.warmup_samples
                else -(have - s.warmup_samples) % WARM_STRETCH)
        take = int(max(min(need, t.shape[0]), 0))
        self._own_young().begin()
        if need > 0:
            used = self._watch_young(t, x, idx, need, result)
            if self._state != WARMING_UP or len(self._window) < have + need:
                return used
            take = used
        wt, wx = self._window.times, self._window.values
        b = estimate_baseline(wt, wx, clip=s.clip_sigma, min_sigma=s.min_sigma)
        lone, last_open = lone_outliers((wx - b.level) / b.sigma, s.spike_sigma)
        if last_open:
            # The last sample was kept because the sample after it (not in the window
            # yet) deviates the same way: the start of a step, not a spike.
            lone[-1] = False
        if lone.any():
            # Spikes inside the warm-up: discard them and wait for more samples.
            result.rejected.extend(
                Rejection(_batch_position(t[:take], idx, float(wt[j])), "spike", float(wt[j]))
                for j in np.flatnonzero(lone))
            self._window.reset_to(wx[~lone].copy(), wt[~lone].copy())
            self._own_young().restart(self._window.values)
            return take
        # A warm-up that holds a clear shift is stretched, WARM_STRETCH samples at a time,
        # while the young tests (the split test above all, which weighs every sample so
        # far) gather the evidence to report it at the plant's false-alarm rate; the
        # baseline is never learned across it.  Once the window is full the split test
        # looks once more (below), and a shift not even that clear is set aside.
        # The baseline's phi is no guide to the shift's evidence here (a step in the
        # samples reads as autocorrelation), so a split that stands out at
        # WARM_STRETCH_P by the split test's own reckoning stretches the warm-up too.
        clipped = b.level + np.clip((wx - b.level) / b.sigma, -b.clip, b.clip) * b.sigma
        fit = _fit(clipped, wt, level=s.interval_level, variance_factor=_variance_factor(b.phi))
        clear = (fit is not None and fit.p_value < s.confirm_p_value
                 and abs(fit.delta) >= 0.5 * s.min_shift_sigma * b.sigma)
        if len(self._window) + WARM_STRETCH <= s.window_samples:
            ev = None if clear else split_evidence(wx, phi_margin=YOUNG_SPLIT_MARGIN, p_below=WARM_STRETCH_P)
            if clear or (ev is not None and ev.p_value < WARM_STRETCH_P
                         and abs(ev.level_after - ev.level_before) >= 0.5 * s.min_shift_sigma * ev.sigma):
                # (watched on at once: a look at the next multiple is the next look)
                return take + self._watch_young(t[take:], x[take:], idx[take:], WARM_STRETCH, result)
        if clear:
            assert fit is not None
            # The window is full and the young tests have not reported the shift: one last
            # look, once in a stream's life, by the split test at a bound of WARM_END_SHARE
            # of the warm-up's own false-alarm budget (its samples over the plant's ARL).
            n = len(self._window)
            p_end = WARM_END_SHARE * n / self._test_arl0 if self._test_arl0 > 0.0 else 1.0
            ev = split_evidence(wx, phi_margin=YOUNG_SPLIT_MARGIN, p_below=p_end)
            if (ev is not None and ev.p_value < p_end and ev.split_at >= YOUNG_SPLIT_BEFORE
                    and ev.phi < YOUNG_SPLIT_GATE / math.sqrt(ev.split_at)):
                self._young.split = ev
                at = float(wt[-1])
                self._young_event(at, result, at, (END_TEST, ev.t, split_critical_t(n, p_end)))
                return take
            # Not even that: the first level rests on too few samples to tell this shift
            # from noise at the plant's rate (see the README): start again from it.  The
            # samples before it are set aside with a reason, so the shift leaves a trace.
            result.rejected.extend(
                Rejection(_batch_position(t[:take], idx, tj), "warmup_shift", tj)
                for tj in wt[:fit.index].tolist())
            self._window.drop_front(fit.index)
            self._own_young().restart(self._window.values)
            return take
        self._start_watching(b)
        return take

    def _own_young(self) -> YoungPhase:
        """The engine's own young phase, taken in place of the shared idle one before it
        is written (:data:`.young.IDLE_YOUNG` is read-only)."""
        yp = self._young
        if yp is IDLE_YOUNG:
            yp = self._young = YoungPhase()
        return yp

    def _idle_young(self) -> None:
        """The shared idle young phase again once the engine's own holds nothing (no young
        level, no provisional baseline, no split): an established stream holds none."""
        yp = self._young
        if SHARED_PARTS and yp.level is None and not yp.provisional and yp.split is None:
            self._young = IDLE_YOUNG

    def _start_watching(self, b: Baseline) -> None:
        self._baseline = b
        self._young.end()
        self._idle_young()
        self._state = WATCHING
        # The self-starting test's evidence was measured against another level:
        # the test for the fixed baseline starts afresh.
        self._test = None
        self._design_test()
        self._prev_r = 0.0
        self._follower.restart()
        self._pending = None
        self._sums.reset()
        self._unfolded = 0  # the warm-up samples are in the baseline already
        del self._unfolded_u[:]
        self._prev_out = 0
        self._watch_kept = 0
        self._refine_block = 64
        self._next_refine = self.settings.baseline_guard + self._refine_block

    def _design_test(self) -> None:
        """(Re)build the test for the current baseline, keeping the evidence it holds."""
        b = self._baseline
        assert b is not None
        arl0 = self.settings.arl0(b.interval)
        shift_z = self.settings.min_shift_sigma * b.sigma * (1.0 - b.phi) / b.innovation_sigma
        old = self._test
        n_level = b.level_n
        # The followed level wanders by its own noise; the test is designed for a
        # longer ARL by the factor that keeps the measured false-alarm rate at the
        # plant's (see follow_arl_factor).
        arl0 *= follow_arl_factor(b.phi, arl0)
        if b.clip <= HEAVY_TAIL_CLIP < self.settings.clip_sigma:
            # Heavy-tailed noise, clipped at 2 sigma: see HEAVY_ARL_FACTOR (never below the
            # shortest ARL a test is designed for: one reading a minute at 1h is 60).
            arl0 = max(arl0 * HEAVY_ARL_FACTOR, ARL_RANGE[0])
        self._test = make_test(self.settings, arl0, shift_z, float(b.n), n_level=n_level)
        if old is not None and old.name == self._test.name:
            adopt = getattr(self._test, "adopt_state", None)
            if adopt is not None and type(old) is type(self._test):
                adopt(old)  # the same as the round trip below, for a bank of CUSUMs
            else:
                try:
                    self._test.set_state(old.get_state())
                except ValueError:
                    pass  # a test of another shape: start it afresh
        self._test_arl0 = shared_value(arl0)  # (the same for every stream of a phi and interval)
        self._test_shift_z = shift_z
        self._test_n_ref = float(b.n)
        self._test_n_level = n_level

    # ----------------------------------------------------------- watching
    def _split_spikes(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], center: float,
                      sigma: float, limit: int, bounds: tuple[float, float] | None = None
                      ) -> tuple[FloatArray, FloatArray, list[Rejection], int, NDArray[np.int8] | None,
                                 FloatArray | None]:
        """Drop lone spikes from a segment and keep at most ``limit`` samples.

        A sample further than ``spike_sigma`` from ``center`` is a lone spike
        unless a neighbour deviates the same way (then it is the start of a
        large step).  A trailing outlier is held until the next sample comes.
        A sample held from the previous call is put in front.

        Returns the kept times and values (at most ``limit``), the spikes
        dropped before the last kept sample, how many input samples were
        used, and for each kept sample the direction in which it was an
        outlier (0 if it was not; None when no sample was an outlier).  The
        caller records that of the last sample it consumes, so the next
        sample is judged with its left neighbour however the stream was cut
        into batches.  Last, for each kept sample, the time of the sample that
        settled its keeping: its own, or for an outlier kept because the next
        sample deviated the same way, that next one's (None when no sample
        was an outlier).  Counting kept samples, not input samples, makes the engine give
        the same result with the spikes present or taken out; stopping at a
        fixed count of kept samples makes it independent of batching.

        ``bounds``, when given, are the largest and smallest of ``x`` (taken by
        screening): with both inside the band no sample is an outlier, which is what
        the checks below would find on ``x`` or on its first ``limit`` samples.
        """
        s = self.settings
        n_in = t.shape[0]
        held_before = self._pending is not None
        if bounds is not None and not held_before:
            span = s.spike_sigma * sigma
            if bounds[0] <= center + span and bounds[1] >= center - span:
                if n_in >= limit:
                    return t[:limit], x[:limit], [], limit, None, None
                return t, x, [], n_in, None, None
        if self._pending is not None:
            t = np.concatenate(([self._pending[0]], t))
            x = np.concatenate(([self._pending[1]], x))
            idx = np.concatenate(([-1], idx))
            self._pending = None
        span = s.spike_sigma * sigma
        if HEAD_SPIKES and x.shape[0] > limit:
            # Only the first ``limit`` samples can be kept: when none of them is an outlier
            # they are all kept whatever follows (a sample is set aside only for being an
            # outlier, and a kept one's direction and settling time are its own), so the
            # outcome is the one below however many outliers the rest holds.
            head = x[:limit]
            if not (float(np.maximum.reduce(head)) > center + span
                    or float(np.minimum.reduce(head)) < center - span):
                return t[:limit], head, [], limit - int(held_before), None, None
        elif not (float(np.maximum.reduce(x)) > center + span or float(np.minimum.reduce(x)) < center - span):
            # Fast path: no outlier at all.
            if x.shape[0] >= limit:
                return t[:limit], x[:limit], [], limit - int(held_before), None, None
            return t, x, [], n_in, None, None
        if SPARSE_SPIKES:
            return self._split_spikes_sparse(t, x, idx, center, sigma, limit, n_in, held_before)
        pos = np.arange(-int(held_before), n_in, dtype=np.intp)
        dev = (x - center) / sigma
        prev_dev = self._prev_dev(center, sigma)
        lone, out_last = lone_outliers(dev, s.spike_sigma, prev_sign=self._prev_out, prev_dev=prev_dev)
        osign = (np.sign(dev) * (np.abs(dev) > s.spike_sigma)).astype(np.int8)
        # An outlier whose predecessor did not deviate the same way was kept on
        # the word of its successor: it was settled when that one came in.
        backed = backed_by_prev(dev, s.spike_sigma, self._prev_out, prev_dev)
        after = np.minimum(np.arange(1, t.shape[0] + 1), t.shape[0] - 1)
        settled = np.where((osign != 0) & ~backed, t[after], t)
        keep = ~lone
        held = False
        if out_last:
            lone[-1] = False
            keep[-1] = False
            held = True
        kept = np.flatnonzero(keep)
        if kept.shape[0] >= limit:
            # Stop at the limit: whatever follows (a held sample included) is fed again later.
            last = int(kept[limit - 1])
            kept = kept[:limit]
            spikes = [Rejection(int(idx[j]), "spike", float(t[j])) for j in np.flatnonzero(lone[:last])]
            return t[kept], x[kept], spikes, int(pos[last]) + 1, osign[kept], settled[kept]
        if held:
            self._pending = (float(t[-1]), float(x[-1]))
        spikes = [Rejection(int(idx[j]), "spike", float(t[j])) for j in np.flatnonzero(lone)]
        return t[kept], x[kept], spikes, n_in, osign[kept], settled[kept]

    def _young_prev(self) -> float | None:
        """The sample before the next one the young loop judges: one held for the spike
        check, else the window's last (None: none)."""
        if self._pending is not None:
            return self._pending[1]
        w = self._window
        return w.at(len(w) - 1)[1] if len(w) else None

    def _prev_dev(self, center: float, scale: float) -> float:
        """The deviation, on the band's centre and scale, of the sample before the next
        one judged for spikes: the last one the window holds (the last consumed: a
        batch never ends on a lone spike, a trailing outlier is held), 0 with none."""
        w = self._window
        return (w.at(len(w) - 1)[1] - center) / scale if len(w) else 0.0

    def _split_spikes_sparse(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], center: float,
                             sigma: float, limit: int, n_in: int, held_before: bool
                             ) -> tuple[FloatArray, FloatArray, list[Rejection], int, NDArray[np.int8],
                                        FloatArray]:
        """:meth:`_split_spikes`'s outcome when the segment holds an outlier, worked out at
        the outliers only: a segment of thousands of samples holds a handful, and the
        reference spends a dozen passes over the whole segment on them.

        The outliers are the samples whose ``(x - center) / sigma`` lies beyond
        ``spike_sigma``, found among the candidates ``|x - center| > spike_sigma sigma (1 -
        1e-9)`` (a superset: the division and the product are each correctly rounded) and
        judged by the same division on the same difference, so the same floats; their
        neighbours, signs and settling times follow :func:`lone_outliers` and the
        reference's arrays rule for rule (tests/core/test_split_spikes.py holds the two
        paths to each other).
        """
        k = self.settings.spike_sigma
        n = t.shape[0]
        d = x - center
        cand = np.flatnonzero(np.abs(d) > (k * sigma) * (1.0 - 1e-9))
        dev = (d[cand] / sigma).tolist()
        sign: dict[int, float] = {}
        devs: dict[int, float] = {}
        for i, v in zip(cand.tolist(), dev):
            if abs(v) > k:
                sign[i] = 1.0 if v > 0 else -1.0
                devs[i] = v
        prev = self._prev_out
        prev_dev = self._prev_dev(center, sigma)
        lone: list[int] = []
        late: list[int] = []  # outliers settled by the sample after them
        for i, sg in sign.items():
            same_prev = sign.get(i - 1) == sg if i > 0 else (prev != 0 and sg == prev)
            if not same_prev:  # (backed_by_prev: the sample before beyond the share of this one)
                pd = float(d[i - 1]) / sigma if i > 0 else prev_dev
                same_prev = spike_confirmed(pd, devs[i], k)
            if not same_prev and not (i + 1 < n and spike_confirmed(float(d[i + 1]) / sigma, devs[i], k)):
                lone.append(i)
            if not same_prev:
                late.append(i)
        held = bool(lone) and lone[-1] == n - 1
        removed = lone.copy()  # the samples not kept: the lone spikes and a held one
        if held:
            lone.pop()
        # The kept samples are the segment's up to ``cut`` less the removed ones among them:
        # the slices between those (a handful), with each outlier's sign and settling time
        # put at its place among the kept ones, instead of index arrays over the segment.
        full = n - len(removed) >= limit
        if full:
            # Stop at the limit: whatever follows (a held sample included) is fed again later.
            last = limit - 1
            for j in removed:
                if j > last:
                    break
                last += 1
            cut = last + 1
        else:
            cut = n
        gone = [j for j in removed if j < cut]
        if gone:
            segs = [(a, b) for a, b in zip([0, *(j + 1 for j in gone)], [*gone, cut]) if a < b]
            kt = np.concatenate([t[a:b] for a, b in segs]) if segs else t[:0]
            kx = np.concatenate([x[a:b] for a, b in segs]) if segs else x[:0]
        else:
            kt, kx = t[:cut], x[:cut]
        out = set(gone)
        osign = np.zeros(kt.shape[0], dtype=np.int8)
        for i, sg in sign.items():
            if i < cut and i not in out:
                osign[i - bisect_left(gone, i)] = sg
        settled = kt.copy()
        for i in late:
            if i < cut and i not in out:
                settled[i - bisect_left(gone, i)] = t[min(i + 1, n - 1)]
        if full:
            spikes = [Rejection(int(idx[j]), "spike", float(t[j])) for j in lone if j < last]
            return kt, kx, spikes, last - int(held_before) + 1, osign, settled
        if held:
            self._pending = (float(t[-1]), float(x[-1]))
        spikes = [Rejection(int(idx[j]), "spike", float(t[j])) for j in lone]
        return kt, kx, spikes, n_in, osign, settled

    def _young_test(self) -> SequentialTest:
        """The test for self-starting inputs: they are N(0, 1) however few samples the
        level rests on, so it is designed for the plant's ARL with no allowance."""
        if self._test is None:
            b = self._baseline
            if b is None:
                dt = np.diff(self._window.times)
                interval = median(dt) if dt.shape[0] else 1.0
                shift_z = self.settings.min_shift_sigma
            else:
                interval = b.interval
                shift_z = self.settings.min_shift_sigma * b.sigma * (1.0 - b.phi) / b.innovation_sigma
            arl0 = self.settings.arl0(interval if interval > 0 else 1.0)
            # Designed with no allowance for the young level; a snapshot rebuilds it so.
            self._test = make_test(self.settings, arl0, shift_z, 1e9)
            self._test_arl0, self._test_shift_z, self._test_n_ref = arl0, shift_z, 1e9
            self._test_n_level = 0
        return self._test

    def _watch_young(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], limit: int,
                     result: BatchResult) -> int:
        """Watch until ``limit`` samples are kept, one at a time against the young level.

        Each sample is judged with the level and spread known when it comes, so
        the outcome does not depend on batching.  Lone spikes are held one
        sample and set aside as in :meth:`_watch`; a kept sample is standardised
        against the samples before it (:class:`.selfstart.SelfStart`), clipped,
        and fed to the test.  Returns the input samples consumed: it stops after
        a trip, and after the sample that makes a re-anchored level old enough
        to be fixed.
        """
        if FAST_YOUNG:
            return self._watch_young_fast(t, x, idx, limit, result)
        ys = self._young.level
        assert ys is not None
        s = self.settings
        b = self._baseline
        clip = s.clip_sigma if b is None else b.clip
        kept = 0
        pend_pos = -1  # batch position of the held sample (-1: held from an earlier batch)
        pv = self._young_prev()  # the sample before this one (None: none)
        for i, (tv, xv) in enumerate(zip(t.tolist(), x.tolist())):
            if kept >= limit:
                return i
            spread = ys.spread() if b is None else b.sigma
            out = 0
            judged = spread > 0 and ys.n >= SelfStart.MIN_UNKNOWN
            dev = 0.0
            # The band allows for the young level's own error (its variance, vm) and, while
            # the spread is estimated, for that too: the predictive t beyond the t value
            # with spike_sigma's normal tail (young_spike_limit).
            scale, band = 1.0, s.spike_sigma
            back = False  # the sample before deviates the same way (backed_by_prev)
            if judged:
                scale = spread * math.sqrt(1.0 + ys.vm)
                band = young_spike_limit(s.spike_sigma, b is None and ys.sigma is None, ys.df)
                dev = (xv - ys.mean) / scale
                out = 1 if dev > band else (-1 if dev < -band else 0)
                if out != 0 and pv is not None:
                    back = spike_confirmed((pv - ys.mean) / scale, dev, band)
            pv = xv
            if self._pending is not None:
                pt, px = self._pending
                self._pending = None
                p_out = 1 if px > ys.mean else -1
                if judged and spike_confirmed(dev, (px - ys.mean) / scale, band):
                    # The next sample deviates the same way (spike_confirmed): the start
                    # of a step.  The held one is kept, settled by this one.
                    self._prev_out = p_out
                    kept += 1
                    if self._feed_young(pt, px, clip):
                        self._young_event(pt, result, tv)
                        return i
                    if kept >= limit or self._young_settled():
                        return i
                else:
                    result.rejected.append(Rejection(pend_pos, "spike", pt))
                    self._prev_out = 0
            if out != 0 and out != self._prev_out and not back:
                self._pending = (tv, xv)
                pend_pos = int(idx[i])
                continue
            self._prev_out = out
            kept += 1
            if self._feed_young(tv, xv, clip):
                self._young_event(tv, result, tv)
                return i + 1
            if self._young_settled():
                return i + 1
        return int(t.shape[0])

    def _watch_young_fast(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], limit: int,
                          result: BatchResult) -> int:
        """:meth:`_young_loop`, in the first warm-up with its split tests weighed together.

        The first warm-up asks :func:`.selfstart.split_evidence` about the window some fifty
        times in 200 samples, and almost always in vain (the answer None has no effect).  So
        on a batch of at least :data:`SPLIT_DEFER_FROM` samples the loop notes the window's
        length at each of those tests and goes on as if the answer were None; before it
        does anything that the answer could have prevented (a trip, a held spike settled,
        its return) it weighs the noted tests at once (:func:`.young.weigh_splits`:
        :func:`.selfstart.split_screen`, :func:`.young.young_split` for the few it cannot
        settle).  If one of them
        would have called a step, everything the loop changed is put back as it was at
        the start and the batch is watched again with each test asked as it comes.  The
        window only grows here (each test saw a prefix of it), so the records and the
        state are the same bit for bit (tests/core/test_young_fast.py).
        """
        yp = self._young
        ys = yp.level
        test = self._test
        span = min(limit, int(t.shape[0]))
        win = self._window
        if (ys is not None and ys.sigma is None and self._baseline is None and yp.split is None
                and span >= SPLIT_DEFER_FROM and len(win) + span + 1 <= win.capacity
                and (test is None or isinstance(test, MultiCusumTest))):
            mark = (ys.copy(), len(win), self._pending, self._prev_out, len(result.rejected),
                    len(result.records), test, None if test is None else test.mark(), self._test_arl0,
                    self._test_shift_z, self._test_n_ref, self._test_n_level)
            try:
                return self._young_loop(t, x, idx, limit, result, [])
            except _SplitCalled:
                (young, n, self._pending, self._prev_out, rejected, records, test, sums, self._test_arl0,
                 self._test_shift_z, self._test_n_ref, self._test_n_level) = mark
                self._young = yp  # (its own, as when the loop began)
                yp.level = young
                win._n = n
                del result.rejected[rejected:]
                del result.records[records:]
                self._test = test
                yp.split = None
                if test is not None and sums is not None:
                    test.back_to(sums)
        return self._young_loop(t, x, idx, limit, result, None)

    def _young_loop(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], limit: int,
                    result: BatchResult, deferred: list[tuple[int, float]] | None) -> int:
        """:meth:`_watch_young` in one loop: the same operations on the same floats in the
        same order, so the same records and state bit for bit (tests/core/test_young_fast.py
        holds it to the reference loop), at a fraction of the cost.

        Per kept sample the reference calls a dozen methods (SelfStart.standardise and
        its helpers, the window's push, the test's update_one, which turns the CUSUM
        bank's sums into a list and back) and works out the lag-1 autocorrelation
        twice.  Here the self-starting standardisation and update are written out on
        the young level's fields held in local variables (written back to the
        :class:`.selfstart.SelfStart` before anything else reads or changes it, and
        read again after), the window is written in place, and the bank's recursion
        (:meth:`.multicusum.MultiCusumTest._update_small`) runs on a list of its sums
        that is handed back to the test only when the loop leaves or something else
        reads the test; a bank of four charts (the default) has its recursion written
        out chart by chart.  Rare turns (a held spike that is settled, a split test, a
        trip, a held sample taken in) call the same methods the reference does.
        """
        ys = self._young.level
        assert ys is not None
        s = self.settings
        b = self._baseline
        clip = s.clip_sigma if b is None else b.clip
        nclip = -clip
        spike = s.spike_sigma
        no_base = b is None
        b_sigma = 0.0 if b is None else b.sigma
        known = ys.sigma  # a SelfStart's sigma never changes
        watching = self._state == WATCHING
        margin = _selfstart.PHI_MARGIN
        bias = _selfstart.BIAS_CORRECT
        min_unknown = SelfStart.MIN_UNKNOWN
        win = self._window
        cap = win.capacity
        wb = win.rows
        # The window's rows as 1-d views (the block never moves): an element set through a
        # plain integer index costs about half of one through a (row, column) tuple.
        wvals, wtimes = wb[0], wb[1]
        sqrt = math.sqrt
        log1p = math.log1p
        truediv = operator.truediv
        test = self._test
        # The bank's sums while its recursion runs here (None: the test's own update_one).
        c: list[float] | None = None
        h2: tuple[float, ...] = ()
        khs: tuple[tuple[int, int, float, float], ...] = ()  # each chart: its two sums' places, k, h
        thr = 1.0
        four = False  # a bank of four charts: k and h of each below
        k0 = k1 = k2 = k3 = h0 = h1 = h2_ = h3 = 0.0
        # ... and the least sums at which a chart's C / h reaches the split screen's and the
        # calm fractions of the threshold (see _four_terms); lim: they stand for the divisions.
        s0 = s1 = s2 = s3 = q0 = q1 = q2 = q3 = math.inf
        lim = False
        if test is not None:
            c, h2, khs, thr = _small_bank(test)
            four = lim = len(khs) == 4
            if four:
                (k0, h0, s0, q0, k1, h1, s1, q1, k2, h2_, s2, q2, k3, h3, s3, q3,
                 lim) = _four_terms(khs, YOUNG_SPLIT_SCREEN * thr, YOUNG_CALM * thr, YOUNG_LIMITS)
        # The young level's fields that change here (the others are fixed while it lives).
        yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm = _young_fields(ys)
        yphi, follow, pool_n, pool_c1 = ys.phi, ys.follow, ys.pool_n, ys.pool_c1
        held = ys.held  # changed in place only
        dirty = False  # c holds updates the test has not been handed yet
        kept = 0
        pend_pos = -1  # batch position of the held sample (-1: held from an earlier batch)
        total = int(t.shape[0])
        # The batch is turned into floats a piece at a time: the first warm-up takes a
        # few hundred samples of a batch of thousands.
        pv = self._young_prev()  # the sample before this one (None: none)
        at = end = 0
        xs: list[float] = []
        ts: list[float] = []
        for i in range(total):
            if kept >= limit:
                _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                if deferred:
                    weigh_splits(win.values, deferred)
                if dirty:
                    test.set_small_sums(c, False)  # type: ignore[union-attr]
                return i
            if i == end:
                at, end = i, min(total, i + 256)
                xs = x[at:end].tolist()
                ts = t[at:end].tolist()
            xv = xs[i - at]
            tv = ts[i - at]
            n = yn
            sd0 = -1.0  # sqrt(ss / df) of the level as it stands (-1: not worked out)
            if no_base:
                if known is not None:
                    spread = known
                else:
                    spread = sd0 = sqrt(yss / ydf) if ydf > 0 else 0.0
            else:
                spread = b_sigma
            out = 0
            judged = spread > 0 and n >= min_unknown
            dev = 0.0
            scale, band = 1.0, spike
            back = False
            if judged:
                scale = spread * sqrt(1.0 + yvm)
                dev = (xv - ymean) / scale
                # (the band is never narrower than spike: worked out only where it matters)
                if dev > spike or dev < -spike or self._pending is not None:
                    if known is None and no_base:
                        band = young_spike_limit(spike, True, ydf)
                    out = 1 if dev > band else (-1 if dev < -band else 0)
                    if out != 0 and pv is not None:
                        back = spike_confirmed((pv - ymean) / scale, dev, band)
            pv = xv
            if self._pending is not None:
                # A spike held from the sample before: the reference's own steps.
                _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                if dirty:
                    test.set_small_sums(c, False)  # type: ignore[union-attr]
                    dirty = False
                pt, px = self._pending
                self._pending = None
                p_out = 1 if px > ymean else -1
                if judged and spike_confirmed(dev, (px - ymean) / scale, band):
                    if deferred:
                        weigh_splits(win.values, deferred)
                    self._prev_out = p_out
                    kept += 1
                    if self._feed_young(pt, px, clip):
                        self._young_event(pt, result, tv)
                        return i
                    if kept >= limit or self._young_settled():
                        return i
                    if test is None and self._test is not None:
                        test = self._test
                    if test is not None:
                        c, h2, khs, thr = _small_bank(test)
                        four = lim = len(khs) == 4
                        if four:
                            (k0, h0, s0, q0, k1, h1, s1, q1, k2, h2_, s2, q2, k3, h3, s3, q3,
                             lim) = _four_terms(khs, YOUNG_SPLIT_SCREEN * thr, YOUNG_CALM * thr, YOUNG_LIMITS)
                    yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm = _young_fields(ys)
                    n = yn
                    sd0 = -1.0
                else:
                    result.rejected.append(Rejection(pend_pos, "spike", pt))
                    self._prev_out = 0
            if out != 0 and out != self._prev_out and not back:
                self._pending = (tv, xv)
                pend_pos = int(idx[i])
                continue
            self._prev_out = out
            kept += 1
            # ---- _feed_young, written out
            z: float | None = None
            phi = 0.0
            if known is not None:
                phi = yphi
                if n >= 1:
                    r = xv - ymean
                    if phi != 0.0 and ylast is not None:
                        r -= phi * (ylast - ymean)
                    z = r / (known * sqrt(1.0 + yvm))
            elif n >= min_unknown and ydf >= 2:
                sd = sd0 if sd0 >= 0.0 else sqrt(yss / ydf)
                if sd > 0:
                    # SelfStart._phi_raw, ._significant, ._long_run_factor and t_to_normal
                    nn = n + pool_n
                    if nn < 3 or not yss > 0:
                        raw = 0.0
                    else:
                        if n < 2 or yfirst is None or yprev is None:
                            c1 = 0.0
                        else:
                            mm = ymean - yfirst
                            lst = yprev - yfirst
                            c1 = ylag - mm * (2.0 * n * mm - lst) + (n - 1) * mm * mm
                        rr = (c1 + pool_c1) / yss
                        if bias:
                            rr += (1.0 + 3.0 * rr) / nn
                        raw = rr if -0.95 <= rr <= 0.95 else max(-0.95, min(0.95, rr))
                    # sqrt(nn) once for both of its uses; max(raw, 0.0) and min(0.95, v)
                    # written as the comparisons those builtins make (the same float, -0.0 too)
                    rn = sqrt(nn) if nn > 0 else 0.0
                    phi = raw if nn >= 20 and abs(raw) >= 2.0 / rn else 0.0
                    r = xv - ymean
                    dff = float(ydf)
                    if phi != 0.0 and ylast is not None:
                        r -= phi * (ylast - ymean)
                        sd *= sqrt(1.0 - phi * phi)
                        dff = max(2.0, dff * (1.0 - abs(phi)) / (1.0 + abs(phi)))
                    elif margin:
                        up = (0.0 if 0.0 > raw else raw) + (margin / rn if nn > 0 else 0.0)
                        if not up < 0.95:
                            up = 0.95
                        sd *= sqrt((1.0 + up) / (1.0 - up) if up > 0.0 else 1.0)
                    elif raw > 0.0:
                        # the same with no margin: raw lies in (0, 0.95], and a factor of 1
                        # leaves sd as it is
                        sd *= sqrt((1.0 + raw) / (1.0 - raw))
                    tt = r / (sd * sqrt(1.0 + 1.0 / n))
                    zz = sqrt(dff * log1p(tt * tt / dff)) * (8.0 * dff + 1.0) / (8.0 * dff + 3.0)
                    z = zz if tt >= 0 else -zz
            # Window.push
            wn = win._n
            if wn < cap:
                wvals[wn] = xv
                wtimes[wn] = tv
                win._n = wn + 1
            else:
                win.push(xv, tv)
            take = True  # the sample is taken into the level (SelfStart.add)
            tripped = False
            if z is not None:
                if test is None:
                    test = self._young_test()
                    c, h2, khs, thr = _small_bank(test)
                    four = lim = len(khs) == 4
                    if four:
                        (k0, h0, s0, q0, k1, h1, s1, q1, k2, h2_, s2, q2, k3, h3, s3, q3,
                         lim) = _four_terms(khs, YOUNG_SPLIT_SCREEN * thr, YOUNG_CALM * thr, YOUNG_LIMITS)
                zc = nclip if z < nclip else (clip if z > clip else z)
                stat = -1.0  # the test's statistic, worked out when needed
                screened = calm = False  # (with lim) its C / h reached the screen's, the calm fraction
                if c is not None:
                    # MultiCusumTest._update_small on one sample
                    # (a sum at zero never exceeds its h, which is positive, so each side
                    # is compared with h only when it is above zero)
                    if four:
                        v = c[0] + zc - k0
                        if v > 0.0:
                            c[0] = v
                            if v > h0:
                                tripped = True
                            if v >= s0:
                                screened = True
                                if v >= q0:
                                    calm = True
                        else:
                            c[0] = 0.0
                        v = c[4] - zc - k0
                        if v > 0.0:
                            c[4] = v
                            if v > h0:
                                tripped = True
                            if v >= s0:
                                screened = True
                                if v >= q0:
                                    calm = True
                        else:
                            c[4] = 0.0
                        v = c[1] + zc - k1
                        if v > 0.0:
                            c[1] = v
                            if v > h1:
                                tripped = True
                            if v >= s1:
                                screened = True
                                if v >= q1:
                                    calm = True
                        else:
                            c[1] = 0.0
                        v = c[5] - zc - k1
                        if v > 0.0:
                            c[5] = v
                            if v > h1:
                                tripped = True
                            if v >= s1:
                                screened = True
                                if v >= q1:
                                    calm = True
                        else:
                            c[5] = 0.0
                        v = c[2] + zc - k2
                        if v > 0.0:
                            c[2] = v
                            if v > h2_:
                                tripped = True
                            if v >= s2:
                                screened = True
                                if v >= q2:
                                    calm = True
                        else:
                            c[2] = 0.0
                        v = c[6] - zc - k2
                        if v > 0.0:
                            c[6] = v
                            if v > h2_:
                                tripped = True
                            if v >= s2:
                                screened = True
                                if v >= q2:
                                    calm = True
                        else:
                            c[6] = 0.0
                        v = c[3] + zc - k3
                        if v > 0.0:
                            c[3] = v
                            if v > h3:
                                tripped = True
                            if v >= s3:
                                screened = True
                                if v >= q3:
                                    calm = True
                        else:
                            c[3] = 0.0
                        v = c[7] - zc - k3
                        if v > 0.0:
                            c[7] = v
                            if v > h3:
                                tripped = True
                            if v >= s3:
                                screened = True
                                if v >= q3:
                                    calm = True
                        else:
                            c[7] = 0.0
                    else:
                        for j, mj, kj, hj in khs:
                            up = c[j] + zc - kj
                            if up > 0.0:
                                c[j] = up
                                if up > hj:
                                    tripped = True
                            else:
                                c[j] = 0.0
                            lo = c[mj] - zc - kj
                            if lo > 0.0:
                                c[mj] = lo
                                if lo > hj:
                                    tripped = True
                            else:
                                c[mj] = 0.0
                    if tripped:
                        cast(MultiCusumTest, test).set_small_sums(c, True)
                        dirty = False
                    else:
                        dirty = True
                else:
                    tripped = test.update_one(zc)
                    thr = test.threshold
                az = z if z >= 0.0 else -z  # compared only: abs(z) up to the sign of a zero
                if not tripped and no_base and n >= YOUNG_SPLIT_FROM:
                    if az >= YOUNG_Z_HOLD:
                        near = True
                    elif lim:
                        near = screened
                    else:
                        stat = max(map(truediv, c, h2)) if c is not None else test.statistic
                        near = stat >= YOUNG_SPLIT_SCREEN * thr
                    if deferred is not None and near:
                        deferred.append((win._n, self._test_arl0))
                        if len(deferred) >= SPLIT_DEFER_ROWS:
                            weigh_splits(win.values, deferred)
                    elif near:
                        ev = young_split(win.values, self._test_arl0)
                        if ev is not None:
                            self._young.split = ev
                            tripped = True
                if az > spike:
                    ylast = xv  # the start of a large step: fed, never taken into the level
                    take = False
                elif n >= YOUNG_HOLD_FROM and phi == 0.0 and (
                        tripped or az >= YOUNG_Z_HOLD
                        or (calm if lim else
                            (stat if stat >= 0.0 else (max(map(truediv, c, h2)) if c is not None
                                                       else test.statistic)) >= YOUNG_CALM * thr)):
                    # SelfStart.hold
                    take = False
                    held.append(xv)
                    ylast = xv
                    if len(held) > YOUNG_HOLD:
                        _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                        ys._take(held.pop(0))
                        yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm = _young_fields(ys)
                elif held:
                    _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                    ys.release()
                    yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm = _young_fields(ys)
            if take:
                # SelfStart.add
                if yfirst is None:
                    yfirst = xv
                elif yprev is not None:
                    ylag += (xv - yfirst) * (yprev - yfirst)
                yn += 1
                d = xv - ymean
                if follow and yn > follow:
                    lam = 1.0 / follow
                    ymean += lam * d
                    yvm = (1.0 - lam) ** 2 * yvm + lam * lam
                else:
                    ymean += d / yn
                    yvm = 1.0 / yn
                if yn > 1:
                    yss += d * (xv - ymean)
                    ydf += 1
                yprev = xv
                ylast = xv
            if tripped:
                _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                if deferred:
                    weigh_splits(win.values, deferred)
                if dirty and c is not None:
                    cast(MultiCusumTest, test).set_small_sums(c, False)
                    dirty = False
                self._young_event(tv, result, tv)
                return i + 1
            if watching and yn >= YOUNG_END:
                _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
                if deferred:
                    weigh_splits(win.values, deferred)
                if dirty:
                    test.set_small_sums(c, False)  # type: ignore[union-attr]
                self._settle_young()
                return i + 1
        _young_put(ys, yn, ymean, yss, ydf, yfirst, yprev, ylag, ylast, yvm)
        if deferred:
            weigh_splits(win.values, deferred)
        if dirty:
            test.set_small_sums(c, False)  # type: ignore[union-attr]
        return total

    def _feed_young(self, tv: float, xv: float, clip: float) -> bool:
        """One kept sample of the young phase; True when the test trips on it."""
        ys = self._young.level
        assert ys is not None
        z = ys.standardise(xv)
        self._window.push(xv, tv)
        if z is None:
            ys.add(xv)
            return False
        test = self._young_test()
        tripped = test.update_one(-clip if z < -clip else (clip if z > clip else z))
        if (not tripped and self._baseline is None and ys.n >= YOUNG_SPLIT_FROM
                and (abs(z) >= YOUNG_Z_HOLD or test.statistic >= YOUNG_SPLIT_SCREEN * test.threshold)):
            ev = young_split(self._window.values, self._test_arl0)
            if ev is not None:
                self._young.split = ev
                tripped = True
        if abs(z) > self.settings.spike_sigma:
            ys.last = xv  # the start of a large step: fed, never taken into the level
        elif ((tripped or abs(z) >= YOUNG_Z_HOLD or test.statistic >= YOUNG_CALM * test.threshold)
              and ys.n >= YOUNG_HOLD_FROM and ys.phi_estimate() == 0.0):
            ys.hold(xv, YOUNG_HOLD)
        else:
            ys.release()
            ys.add(xv)
        return tripped

    def _young_settled(self) -> bool:
        """After a re-anchor: fix the level once it rests on :data:`YOUNG_END` samples."""
        ys = self._young.level
        if self._state == WATCHING and ys is not None and ys.n >= YOUNG_END:
            self._settle_young()
            return True
        return False

    def _young_event(self, detected_at: float, result: BatchResult, as_of: float,
                     tripped: tuple[str, float, float] | None = None) -> None:
        """Open an event from the young phase, the baseline standing at the young level.

        A young level re-anchored after an event can trip its test within a few
        samples; while the window holds fewer than the step fit needs (``FIT_MIN``),
        no event opens and the young phase goes on: its test's sums stay over the
        limit, so it trips again as the next samples come unless they pull it back.
        """
        yp = self._young
        ys = yp.level
        assert ys is not None
        if len(self._window) < FIT_MIN:
            return
        b = self._baseline
        split = yp.take_split()
        if b is None:
            b = provisional_baseline(ys, split, self._window.times, self.settings.min_sigma,
                                     self.settings.clip_sigma)
            yp.provisional = True
        else:
            b = replace(b, level=ys.mean, n_level=ys.level_n() if ys.level_n() < b.n else 0)
        self._baseline = b
        self._prev_r = 0.0 if ys.last is None else ys.last - b.level
        if split is not None and tripped is None:
            # The split test tripped, not the sequential test: the record names it, with
            # its t and the t its bound called a step above (the test's own statistic
            # may be anywhere below its threshold).
            p_below = YOUNG_SPLIT_SHARE / self._test_arl0 if self._test_arl0 > 0.0 else 1.0
            tripped = (SPLIT_TEST, split.t, split_critical_t(len(self._window), p_below))
        self._open_event(detected_at, result, as_of, tripped, by_fit=tripped is not None and tripped[0] == END_TEST)

    def _settle_young(self) -> None:
        """A re-anchored level that rests on enough samples becomes the baseline's level."""
        b = self._baseline
        assert b is not None
        ys = self._young.settle()
        self._idle_young()
        self._baseline = replace(b, level=ys.mean, n_level=ys.level_n() if ys.level_n() < b.n else 0)
        self._prev_r = 0.0 if ys.last is None else ys.last - ys.mean
        self._follower.restart()
        self._sums.reset()
        self._unfolded = 0
        del self._unfolded_u[:]
        self._watch_kept = 0
        self._refine_block = 64
        self._next_refine = self.settings.baseline_guard + self._refine_block
        self._test = None
        self._design_test()

    def _watch(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], result: BatchResult,
               bounds: tuple[float, float] | None = None) -> int:
        if self._young.level is not None:
            return self._watch_young(t, x, idx, t.shape[0], result)
        if t.shape[0] <= SMALL_BATCH and self._pending is None:
            used = self._watch_small(t, x, result)
            if used:
                return used
        b = self._baseline
        test = self._test
        assert b is not None and test is not None
        # Stop at the next refinement point so the baseline changes at the
        # same sample however the stream is batched.
        # (After an event the count may already be past the refinement point:
        # then one sample is taken and the refinement follows at once.)
        fo = self._follower
        stop = min(self._next_refine, fo.next_center)
        kt, kx, spikes, used, osign, settled = self._split_spikes(t, x, idx, b.level + fo.center, b.sigma,
                                                         max(stop - self._watch_kept, 1), bounds)
        if kt.shape[0] == 0:
            result.rejected.extend(spikes)
            return used
        # Each sample against the followed level as it stood before the sample: fed
        # with the samples FOLLOW_DELAY and more before it.
        feed, path, before = self._follow_plan(kx, b.level, b.phi)
        r = kx - b.level
        r -= before  # in place: the same subtraction, without a third array
        if b.phi != 0.0:
            e = r.copy()
            e[0] -= b.phi * self._prev_r
            e[1:] -= b.phi * r[:-1]
        else:
            e = r
        z = e * (1.0 / b.innovation_sigma)
        if LEAN_CALLS and _baseline.SHARED_SCALARS:  # the bounds as shared 0-d arrays
            _clip(z, *(_BOUNDS.get(b.clip) or clip_bounds(b.clip)), out=z)
        elif LEAN_CALLS:
            _clip(z, -b.clip, b.clip, out=z)  # the ufunc ndarray.clip reaches through _methods._clip
        else:
            z.clip(-b.clip, b.clip, out=z)  # the method: np.clip's own, without its dispatcher
        trip = test.update(z)
        if trip < 0:
            self._kept_all(spikes, osign, r, result)
            self._append(kt, kx, before)
            fo.offset = float(path[-1])
            fo.lag += kx.shape[0] - feed
            self._count_watched(kt.shape[0])
            return used
        # The rest is fed to the event that opens now; the follower stands still
        # from the sample that tripped.
        t_trip = self._kept_to(trip, kt, spikes, osign, r, result)
        fed = max(0, fo.lag + trip - follow_delay(b.phi, self.settings.window_samples))
        fo.offset = float(path[fed])
        fo.lag += trip + 1 - fed
        self._append(kt[: trip + 1], kx[: trip + 1], before[: trip + 1])
        self._watch_kept += trip + 1
        self._open_event(t_trip, result, t_trip if settled is None else float(settled[trip]))
        return int(np.searchsorted(t, t_trip, side="right"))

    def _kept_all(self, spikes: list[Rejection], osign: NDArray[np.int8] | None, r: FloatArray,
                  result: BatchResult) -> None:
        """Every kept sample of a :meth:`_split_spikes` segment was consumed."""
        result.rejected.extend(spikes)
        self._prev_out = 0 if osign is None else int(osign[-1])
        self._prev_r = r.item(-1) if READ_ITEMS else float(r[-1])  # (the same double)

    def _kept_to(self, i: int, kt: FloatArray, spikes: list[Rejection], osign: NDArray[np.int8] | None,
                 r: FloatArray, result: BatchResult) -> float:
        """Kept samples up to and including ``i`` were consumed (a trip or a decision fell
        there); the rest, a sample held for the spike check included, is fed again.
        Returns the time of sample ``i``."""
        t_i = float(kt[i])
        result.rejected.extend(rj for rj in spikes if rj.time < t_i)
        self._pending = None
        self._prev_out = 0 if osign is None else int(osign[i])
        self._prev_r = float(r[i])
        return t_i

    def _watch_small(self, t: FloatArray, x: FloatArray, result: BatchResult) -> int:
        """:meth:`_watch` for a few samples, one at a time in plain floats.

        The same arithmetic as the array path, for the common case only: no
        sample held for the spike check and none beyond ``spike_sigma``.  It
        stops before the first outlier (the array path takes it on), after a
        trip and after a refinement of the baseline, and returns how many
        samples it consumed.
        """
        b = self._baseline
        test = self._test
        assert b is not None and test is not None
        fo = self._follower
        span = self.settings.spike_sigma * b.sigma
        hi, lo = b.level + fo.center + span, b.level + fo.center - span
        f_hi, f_lo = fo.center + span, fo.center - span  # the follower's band (Follower.input)
        level, phi, clip = b.level, b.phi, b.clip
        inv = 1.0 / b.innovation_sigma
        lam = 1.0 / follow_samples(b.phi)
        keep = 1.0 - lam
        delay = follow_delay(phi, self.settings.window_samples)
        used = 0
        for tv, xv in zip(t.tolist(), x.tolist()):
            if xv > hi or xv < lo:
                break
            w = self._window
            while fo.lag > delay:  # the delay shrank (phi was refined): catch up first
                fr = w.at(len(w) - fo.lag)[1] - level
                fo.offset = keep * fo.offset + lam * (f_hi if fr > f_hi else (f_lo if fr < f_lo else fr))
                fo.lag -= 1
            u = fo.offset
            r = xv - level - u
            z = (r - phi * self._prev_r if phi != 0.0 else r) * inv
            z = -clip if z < -clip else (clip if z > clip else z)
            tripped = test.update_one(z)
            self._prev_out = 0
            self._prev_r = r
            self._append_one(tv, xv, u)
            used += 1
            fo.lag += 1
            if tripped:
                self._watch_kept += 1
                self._open_event(tv, result, tv)
                break
            if fo.lag > delay:
                fr = w.at(len(w) - fo.lag)[1] - level
                fo.offset = keep * u + lam * (f_hi if fr > f_hi else (f_lo if fr < f_lo else fr))
                fo.lag -= 1
            refine = self._watch_kept + 1 >= min(self._next_refine, fo.next_center)
            self._count_watched(1)
            if refine:
                break
        return used

    def _follow_plan(self, kx: FloatArray, level: float, phi: float) -> tuple[int, FloatArray, FloatArray]:
        """The follower over a stretch of kept samples ``kx``: how many samples it is
        fed (the lagging ones in the window first, then the stretch's own, all but the
        newest FOLLOW_DELAY), its path over them (``u`` before the first and after each),
        and the offset each sample of the stretch is measured against."""
        m = kx.shape[0]
        fo = self._follower
        lag = fo.lag
        if TRIM_STRETCH and LEAN_CALLS:
            ft = fo.terms
            if ft[0] != phi or ft[1] != self.settings.window_samples:  # (phi: refined now and then)
                ft = fo.terms = (_follow_key_terms(phi, self.settings.window_samples) if SHARED_PARTS else
                                 (phi, self.settings.window_samples, *_follow_terms(phi, self.settings.window_samples)))
            delay, lam = ft[2], ft[3]
        elif LEAN_CALLS:
            delay, lam = _follow_terms(phi, self.settings.window_samples)
        else:
            delay, lam = follow_delay(phi, self.settings.window_samples), 1.0 / follow_samples(phi)
        feed = max(0, lag + m - delay)
        if feed == 0:
            return 0, np.array([fo.offset]), np.full(m, fo.offset)
        w = self._window
        from_window = min(lag, feed)
        if from_window == 0:
            y = kx[: feed - from_window]
        elif TRIM_STRETCH:
            a = w._n - lag  # the window's values row, sliced once
            y = np.concatenate((w._blk[w._i, 0, a: a + from_window], kx[: feed - from_window]))
        else:
            y = np.concatenate((w.values[len(w) - lag: len(w) - lag + from_window], kx[: feed - from_window]))
        b = self._baseline
        assert b is not None
        path = follow_path(fo.input(y, b.level, self.settings.spike_sigma * b.sigma), fo.offset, lam)
        # Sample i of the stretch is measured once max(0, lag + i - delay) samples are fed.
        k0 = max(0, delay - lag)
        if k0 == 0:
            return feed, path, path[lag - delay: lag - delay + m]
        before = np.empty(m)
        before[:k0] = path[0]
        before[k0:] = path[: m - k0]
        return feed, path, before

    def _count_watched(self, m: int) -> None:
        self._watch_kept += m
        if self._watch_kept >= self._next_refine:
            self._refine()
            # Refine often while the baseline rests on few samples, then rarely.
            self._refine_block = shared_value(min(2 * self._refine_block, REFINE_BLOCK_MAX))
            self._next_refine = self._watch_kept + self._refine_block
        fo = self._follower
        if self._watch_kept >= fo.next_center:
            fo.recenter(self._watch_kept)

    def _refine(self) -> None:
        """Merge the samples folded since the last refinement into the baseline.

        The test is redesigned when the baseline's sample count has grown
        enough to change the design ARL by more than 5%, when the sampling
        interval has moved by more than 10%, or when phi or the clip changed.
        """
        s = self.settings
        b = self._baseline
        assert b is not None
        floor = sigma_floor(b.level, b.quantum, s.min_sigma)
        nb = self._sums.refine(b, clip=s.clip_sigma, floor=floor, max_weight=s.baseline_memory)
        if nb is b:
            return
        self._baseline = nb
        # The sums were of the samples less the follower's offset: the refined level is
        # the baseline's part of the followed level, which stays where it was.
        off = math.isinf(follow_samples(nb.phi))
        fo = self._follower
        if off:
            # Not followed (strongly autocorrelated noise): the refined level is the level
            # (from the followed one, so it does not jump when following stops).
            if not math.isinf(follow_samples(b.phi)):
                self._baseline = nb = replace(nb, level=b.level + fo.offset)
            fo.clear()
            if self._unfolded_u and OFFSETS_IN_PLACE:  # in place, as in _keep_offsets
                v = np.frombuffer(self._unfolded_u)
                v[:] = 0.0
                del v
            elif self._unfolded_u:
                self._unfolded_u = array("d", bytes(8 * len(self._unfolded_u)))
        else:
            shift = b.level - nb.level
            fo.shift(shift)
            if self._unfolded_u and OFFSETS_IN_PLACE:
                # v + shift for each, in place (IEEE addition: the same doubles as in floats)
                v = np.frombuffer(self._unfolded_u)
                v += shift
                del v
            elif self._unfolded_u:
                self._unfolded_u = array("d", [v + shift for v in self._unfolded_u])
        k_min = None if s.test == "glr" else 0.5
        grown = abs(math.log(estimation_adjusted_arl(1e6, nb.n, k_min, nb.level_n)
                             / estimation_adjusted_arl(1e6, int(self._test_n_ref), k_min,
                                                       self._test_n_level))) > 0.05
        if (grown or abs(nb.interval - b.interval) > 0.1 * b.interval or (nb.phi == 0) != (b.phi == 0)
                or nb.clip != b.clip or off != math.isinf(follow_samples(b.phi))):
            self._design_test()

    # ------------------------------------------------------------- events
    def _open_event(self, detected_at: float, result: BatchResult, as_of: float,
                    tripped: tuple[str, float, float] | None = None, by_fit: bool = False) -> None:
        """Fit the step and emit the ``detected`` record.  ``as_of`` is the time of the
        sample that completed the detection: the tripping sample's, or the next one's
        when the tripping sample was an outlier kept because that one confirmed it.
        ``tripped``: the name, statistic and threshold of the test that tripped, when it
        is not the stream's sequential test."""
        s = self.settings
        b = self._baseline
        assert b is not None
        n = len(self._window)
        start = max(0, n - s.window_samples)
        # Samples still inside the guard may hold the start of the step, and
        # the event's own samples a short excursion: none of them is folded
        # into the baseline.  The next sample folded is not the neighbour of the last
        # one folded: neither the time step nor the lag product across the event counts
        # (a block folded after it would otherwise count the gap, one by one would not).
        self._unfolded = 0
        del self._unfolded_u[:]
        self._sums.prev_t = None
        self._sums.prev_u = None
        self._fitter = StepFitter(self._window.values[start:].copy(), self._window.times[start:].copy())
        # An open event measures from the baseline's level (see _track); the last
        # residual was from the followed level.
        self._prev_r += self._follower.offset
        self._begin_event(detected_at, result, as_of, by_fit=by_fit, tripped=tripped)

    def _begin_event(self, detected_at: float, result: BatchResult, as_of: float,
                     by_fit: bool = False, tripped: tuple[str, float, float] | None = None,
                     first_split: int = 0) -> None:
        """Open an event over the fitter as it stands (its last sample is the detection).
        Its direction is the test's, or the fitted step's when ``by_fit`` (or the test
        cannot tell).  ``first_split``: the first sample its fits may place the step at
        (:class:`.events.OpenEvent`)."""
        b = self._baseline
        test = self._test
        assert b is not None and test is not None and self._fitter is not None
        fit = self._fit(b, first_split)
        if self.planned is not None and self._adopt_if_planned(fit, detected_at, result, as_of):
            return
        sign = (0 if by_fit else test.direction) or (1 if fit.delta > 0 else -1)
        name, stat, thr = tripped if tripped is not None else (test.name, test.statistic, test.threshold)
        ev = OpenEvent(
            id=event_id(self.stream, detected_at),
            detected_at=detected_at,
            test=name,
            statistic=float(stat),
            threshold=float(thr),
            trip_len=len(self._fitter),
            # The trial's reference: the baseline's level once it rests on more samples
            # than the window (a fitted level before the step is biased by the very
            # samples that tripped the test), else the fitted one (a young level).
            # With the follower's offset: the level as it stood when the test tripped,
            # moved against the event's direction by FOLLOW_MARGIN standard errors of the
            # followed level.  A false trip comes most often when the follower happens
            # to lag, so the followed level is biased towards the trip exactly when an
            # event is open; the margin keeps the trial from confirming that lag.
            level_before=(b.level + self._follower.offset
                          + sign * FOLLOW_MARGIN * b.sigma * _follow_se(b.phi)
                          if b.level_n >= 2 * self.settings.window_samples else fit.level_before),
            level_after=fit.level_after,
            # On a provisional baseline (the first warm-up: level, sigma and phi from a
            # few dozen samples) the trial measures from a fitted level of that many
            # samples and allows for its error and for a phi estimated low (events.py,
            # "a reference known from few samples").  Elsewhere the plain trial: see
            # DEVELOPERS.md for what the allowance cost on later young levels.
            trial=(self._new_trial(sign, young_ref=max(1, fit.n_before)) if self._young.provisional
                   else self._new_trial(sign)),
            n_after=max(1, fit.n_after),
            first_split=first_split,
        )
        self._event = ev
        self._state = EVENT_OPEN
        result.records.append(self._record(ev, fit, "detected", as_of))

    def _adopt_if_planned(self, fit: StepFit, detected_at: float, result: BatchResult | None,
                          as_of: float, ev: OpenEvent | None = None) -> AlertRecord | None:
        """A step whose shift-time interval meets a planned window: one ``planned`` record
        (the fit as it stands), no event, and the stream watches on from the new level at
        once, as after a confirmed step.  None when no planned window covers it."""
        assert self.planned is not None and self._test is not None
        plan = self.planned(min(fit.shift_at_low, detected_at), min(fit.shift_at_high, detected_at))
        if plan is None:
            return None
        if ev is None:
            ev = OpenEvent(id=event_id(self.stream, detected_at), detected_at=detected_at,
                           test=self._test.name, statistic=float(self._test.statistic),
                           threshold=float(self._test.threshold), trip_len=0, level_before=fit.level_before,
                           level_after=fit.level_after, trial=self._new_trial(1))
        rec = self._record(ev, fit, PLANNED, as_of, plan_id=plan)
        if result is not None:
            result.records.append(rec)
        self._event = None
        self._last_step = None  # the reference moved on purpose: no excursion to return from
        self._reanchor(fit.index)
        return rec

    def adopt_planned_event(self, as_of: float) -> AlertRecord | None:
        """An event open when a planned window covering its step is announced ends as
        ``planned`` now (its record returned); None when no event is open or no window
        covers it."""
        ev = self._event
        b = self._baseline
        if ev is None or b is None or self._fitter is None or self.planned is None:
            return None
        fit = self._fit(b, ev.first_split)
        rec = self._adopt_if_planned(fit, ev.detected_at, None, max(as_of, ev.detected_at), ev)
        if rec is not None:
            self.records_total = _tally(self.records_total, (PLANNED,))
        return rec

    def _new_trial(self, sign: int, young_ref: int = 0) -> EventTrial:
        """The decision for an event in direction ``sign``: the smallest step of interest in
        the units of the trial's inputs (prewhitened residuals over the innovation sigma).

        ``young_ref``: the samples of the fitted level the trial measures from, when
        the baseline is provisional; the trial then weighs that level's error, the
        inputs' variance per sample taken at :func:`young_variance` for as many samples
        as the level rests on (the baseline's phi rests on the samples before the split,
        however many the young level holds), and pooled with its own inputs' as they
        come (:meth:`.events.EventTrial.variance`)."""
        s = self.settings
        b = self._baseline
        d = self._test_shift_z if b is None else s.min_shift_sigma * b.sigma * (1.0 - b.phi) / b.innovation_sigma
        if young_ref <= 0 or b is None:
            return EventTrial(sign, max(d, 0.05), s.confirm_p_value, s.confirm_max_samples, s.confirm_min_samples)
        return EventTrial(sign, max(d, 0.05), s.confirm_p_value, s.confirm_max_samples, s.confirm_min_samples,
                          n_ref=float(young_ref), lam=young_variance(b), n_lam=float(min(b.n, young_ref)))

    def _fit(self, b: Baseline, first_split: int = 0) -> StepFit:
        """Fit the step over the event's window, reusing the fitter's running sums; its
        split at ``first_split`` or after (:class:`.events.OpenEvent`)."""
        assert self._fitter is not None
        return self._fitter.fit(level=self.settings.interval_level, min_segment=FIT_MIN_SEGMENT,
                                variance_factor=_variance_factor(b.phi), first_split=first_split or None)

    def _track(self, t: FloatArray, x: FloatArray, idx: NDArray[np.intp], result: BatchResult) -> int:
        """Feed an open event: every kept sample goes to the step fit and to the
        event's sequential decision (:class:`.events.EventTrial`), which stops at
        the sample that decides, however the stream is batched."""
        ev = self._event
        b = self._baseline
        assert ev is not None and b is not None and self._fitter is not None
        center, scale = self._event_band(ev, b)
        kt, kx, spikes, used, osign, _ = self._split_spikes(t, x, idx, center, scale,
                                                         max(ev.trial.limit - ev.trial.m, 1))
        if kt.shape[0] == 0:
            result.rejected.extend(spikes)
            return used
        r = kx - b.level
        e = r.copy()
        if b.phi != 0.0:
            e[0] -= b.phi * self._prev_r
            e[1:] -= b.phi * r[:-1]
        # Residuals from the level fitted before the step, not the baseline's.
        e -= (1.0 - b.phi) * (ev.level_before - b.level)
        z = e * (1.0 / b.innovation_sigma)
        if LEAN_CALLS and _baseline.SHARED_SCALARS:  # the bounds as shared 0-d arrays
            _clip(z, *(_BOUNDS.get(b.clip) or clip_bounds(b.clip)), out=z)
        elif LEAN_CALLS:
            _clip(z, -b.clip, b.clip, out=z)  # the ufunc ndarray.clip reaches through _methods._clip
        else:
            z.clip(-b.clip, b.clip, out=z)  # the method: np.clip's own, without its dispatcher
        i, outcome = ev.trial.feed(z)
        if i < 0:
            self._kept_all(spikes, osign, r, result)
            self._fitter.extend(kx, kt)
            self._window.extend(kx, kt)
            return used
        t_dec = self._kept_to(i, kt, spikes, osign, r, result)
        self._fitter.extend(kx[: i + 1], kt[: i + 1])
        self._window.extend(kx[: i + 1], kt[: i + 1])
        self._decide(outcome, result, t_dec)
        return int(np.searchsorted(t, t_dec, side="right"))

    def _event_band(self, ev: OpenEvent, b: Baseline) -> tuple[float, float]:
        """The spike band while an event is open, as a centre and a scale (the band is
        ``spike_sigma`` scales either side): the union of the bands around the level
        before the step and around the level after it.  A sample near either level is
        never a spike; the level after rests on the few samples fitted at the detection
        (``n_after``), so its band allows for its error; and a provisional baseline's
        sigma (first warm-up) rests on few samples too, so the band is as wide as the
        t value with spike_sigma's normal tail (:func:`young_spike_limit`).  Centred on
        the level after alone, with such a sigma, the band set ordinary readings aside
        for the whole event (the outside measurement of 2026-12-05)."""
        k = self.settings.spike_sigma
        wide = young_spike_limit(k, True, b.n - 1) / k if self._young.provisional else 1.0
        wb = k * wide * b.sigma * math.sqrt(1.0 + 1.0 / max(b.n, 1))
        wa = k * wide * b.sigma * math.sqrt(1.0 + 1.0 / ev.n_after)
        hi = max(ev.level_before + wb, ev.level_after + wa)
        lo = min(ev.level_before - wb, ev.level_after - wa)
        return 0.5 * (hi + lo), (hi - lo) / (2.0 * k)

    def _decide(self, outcome: str, result: BatchResult, as_of: float) -> None:
        """End the open event as its trial decided (see :mod:`.events`)."""
        ev = self._event
        b = self._baseline
        assert ev is not None and b is not None and self._fitter is not None
        fit = self._fit(b, ev.first_split)
        if self._spread_ends(ev, fit, b, outcome, result, as_of):
            return
        late = fit.index >= ev.trip_len
        p = self._fit_p_value(fit, b)
        young = b.n < self.settings.window_samples
        shows = p < max(self.settings.confirm_p_value, CONFIRM_FIT_P if young else CONFIRM_FIT_P_SETTLED)
        clear = (p < self.settings.confirm_p_value
                 and abs(fit.delta) >= 0.5 * self.settings.min_shift_sigma * b.sigma)
        # A look (a trial on a young reference: the plain evidence for a step, not yet
        # the evidence that allows for the reference's error) is weighed as a "step"
        # is, but never confirms: the late step and the conflict end the event as
        # after a "step", else the trial goes on.
        looked = outcome == LOOK
        stepped = outcome == STEP or looked
        # The refit of every sample may place the step at or before the detection where
        # the samples after the detection show it began later: a false trip raised the
        # samples before it, and the fit merged them with the step that came while the
        # event was open (it dated that step at the false trip's split).
        after, wait = self._step_after(ev, b) if stepped and not late else (None, False)
        if wait:
            # They lean that way, on the few samples after that split: more will tell.
            ev.trial.reopen()
            return
        if (late and ((stepped and shows) or clear)) or after is not None:
            # The step the samples show began after the detection (in the detected
            # direction, or clearly in the other): that detection was not this step.
            # It ends as dismissed (with the fit it had), and the step gets an event
            # of its own, detected now, so nothing is thrown away.
            self._end_event(ev, "dismissed", self._event_fit(ev, b, fit, end=ev.trip_len), result, as_of)
            self._state = EVENT_OPEN
            if self._young.level is None:
                # The samples since the first trip are not followed yet either.
                self._follower.lag += len(self._fitter) - ev.trip_len
            # The new event's record names what opened it, not the sequential test (whose
            # statistic was reset at the first trip and may be anywhere below its threshold):
            # the refit's sup-F against the F whose p-value is confirm_p_value, or else the
            # trial's evidence for a step against Wald's bound.
            if after is not None:
                # Its fits split after that detection, as the samples after it show.
                tripped = (REFIT_TEST, after.f_stat, supf_critical(self.settings.confirm_p_value, after.pi0))
            elif clear:
                tripped = (REFIT_TEST, fit.f_stat, supf_critical(self.settings.confirm_p_value, fit.pi0))
            else:
                tripped = (TRIAL_TEST, ev.trial.llr_plain() if looked else ev.trial.llr_step(), ev.trial.bound)
            self._begin_event(as_of, result, as_of, by_fit=True, tripped=tripped,
                              first_split=ev.first_split if after is None else ev.trip_len)
            return
        shown = self._event_fit(ev, b, fit)  # what the record says
        conflict = stepped and self._conflicts(fit, ev.trial.sign, b)
        if looked and not conflict:
            ev.trial.reopen()
            return
        if outcome == STEP and (conflict or not shows):
            anchored = self._anchored(ev, shown, b)
            if anchored is not None:
                # The fit's window may hold few samples from before the step (a step
                # detected late: 1 sigma on AR(1) 0.8 noise, a median 228 samples after
                # it), so its sup-F cannot show it; the baseline's settled level, the
                # trial's own reference, can.  Confirmed on the fit measured from it.
                fit, shows, conflict = anchored, True, False
        if outcome == STEP and not conflict and not shows:
            # The trial says "step", but the fit of all the event's samples does not show
            # one at the decision's error rate (its p-value, with the autocorrelation
            # allowed for at an upper bound while it rests on few samples).  Not
            # confirmed on that: the event stays open and the trial goes on, sample by
            # sample, until both agree, the trial turns to "no step", or the limit.
            ev.trial.reopen()
            return
        if outcome == NO_STEP or conflict:
            # (conflict: the trial, on clipped, robust inputs, says step, but the least-squares
            # fit of the samples shows less than half of min_shift, or the other way; heavy
            # tails can do that.  No step is confirmed on conflicting evidence: the event
            # ends undecided and the stream watches on from its level, as after a dismissal.)
            self._end_event(ev, "undecided" if conflict else "dismissed", shown, result, as_of)
            self._state = WATCHING
            yp = self._young
            if yp.level is None:
                self._follow_catch_up(ev, b)
            else:
                # The level held: the held samples and the event's belong to it.
                yp.take_back(self._fitter.values[ev.trip_len:].tolist())
                if yp.provisional:
                    self._baseline = None
                    yp.provisional = False
                    self._state = WARMING_UP
            self._fitter = None
            assert self._test is not None
            self._test.reset()
            return
        if outcome == STEP:
            phase = "confirmed"
            last = self._last_step
            waited = len(self._fitter) - ev.trip_len
            if (last is not None and waited < RETURN_WAIT and ev.trial.m < ev.trial.limit
                    and last.return_unclear(level_after=fit.level_after, delta=fit.delta,
                                            level_after_se=fit.level_after_se)):
                # A step back whose level lies near the line between a return and a step
                # of its own, within its standard error: the kind waits for more samples
                # (the way back is confirmed on a few, chosen by the detection), but its
                # next verdict comes no later than RETURN_WAIT samples after the detection
                # nor than the trial's limit (confirm_max_samples), where the kind is named
                # as the fit then stands: without that bound the wait ran to 61 to 63
                # samples, and at a limit below it ended the step "undecided".
                ev.trial.reopen(by=min(ev.trial.m + RETURN_WAIT - waited, ev.trial.limit))
                return
            extra: dict[str, Any] = {}
            if last is not None and last.is_return(level_after=fit.level_after, delta=fit.delta):
                phase = "returned"
                extra = {"excursion_id": last.id, "excursion_start": last.shift_at}
                self._last_step = None
            else:
                self._last_step = StepMemory(ev.id, shift_at=fit.shift_at,
                                             level_before=fit.level_before, delta=fit.delta)
            self.last_shift_at = fit.shift_at
            self._end_event(ev, phase, fit, result, as_of, **extra)
        else:
            self._end_event(ev, "undecided", shown, result, as_of)
        # A step that stands at a wider spread (its record names it): the stream watches on
        # at that spread too, or the wider noise is detected again (as _spread_ends does).
        self._adopt_spread(ev, b, _sensorcheck.event_spread(self._fitter.values, ev.trip_len, b,
                                                            self.settings.confirm_p_value))
        self._reanchor(fit.index)

    def _spread_ends(self, ev: OpenEvent, fit: StepFit, b: Baseline, outcome: str, result: BatchResult,
                     as_of: float) -> bool:
        """End the event ``undecided`` when its samples show the noise's spread grew, unless
        the trial says "step" and the step stands at the new spread; the stream watches
        on at the new sigma.  A verdict while the spread looks wider but is not yet clear
        waits, the trial going on, unless the step stands even at that spread
        (core/sensorcheck.py).  False (nothing done) otherwise."""
        assert self._fitter is not None
        vals = self._fitter.values
        spread = _sensorcheck.event_spread(vals, ev.trip_len, b, self.settings.confirm_p_value)
        waits = outcome in (STEP, NO_STEP)
        vf = _variance_factor(b.phi)
        if spread is None:
            unclear = _sensorcheck.spread_unclear(vals, ev.trip_len, b) if waits else None
            if unclear is not None and not _sensorcheck.step_stands(self._event_fit(ev, b, fit), b.sigma, unclear,
                                                                    vf, self.settings.confirm_p_value):
                ev.trial.reopen()
                return True
            return False
        if waits and len(vals) - ev.trip_len < _sensorcheck.SPREAD_SETTLE:
            ev.trial.reopen()  # enough samples to measure the new spread by
            return True
        shown = self._event_fit(ev, b, fit)
        if (outcome == STEP and not self._conflicts(shown, ev.trial.sign, b)
                and _sensorcheck.step_stands(shown, b.sigma, spread, vf, self.settings.confirm_p_value)):
            return False  # a step that stands at the new spread too: decided as ever, the spread named
        self._end_event(ev, "undecided", shown, result, as_of)
        self._adopt_spread(ev, b, spread)
        self._reanchor(fit.index)
        return True

    def _adopt_spread(self, ev: OpenEvent, b: Baseline, spread: _sensorcheck.Spread | None) -> None:
        """Watch on at the spread an ending event's samples show (sigma and innovation sigma
        times its ratio), when they show one; called before :meth:`_reanchor`."""
        if spread is None:
            return
        assert self._fitter is not None
        # The new sigma rests on the samples the spread was measured on, not on the old
        # baseline's: so many it weighs in the refinements to come (with b.n, a sigma from
        # some 60 samples outweighed thousands of later ones) and in the test's allowance.
        rests_on = len(self._fitter.values) - max(0, ev.trip_len - _sensorcheck.SPREAD_LEAD)
        self._baseline = replace(b, sigma=b.sigma * spread.ratio, innovation_sigma=b.innovation_sigma * spread.ratio,
                                 n=max(1, min(b.n, rests_on)))

    def _step_after(self, ev: OpenEvent, b: Baseline) -> tuple[StepFit | None, bool]:
        """Whether the event's samples after its detection (not raised by the selection
        that tripped the test, as the ones before it are) say the step began after the
        detection: the fit of those samples alone, before whose split they favour the
        trial's reference level over the level after the split by Wald's bound, the
        trial's own (the log-likelihood ratio of the two levels, normal noise of the
        baseline's long-run variance), the level after at least half of min_shift_sigma
        from the reference in the trial's direction and the level before the split less
        than that, on at least as many samples before the split as the trial needs to
        confirm its design step (``2 bound / d^2``).  Returns that fit when they do with
        the level after moved
        :data:`AFTER_MARGIN` standard errors towards the reference and resting on as
        many samples as the segment before the split at least, and whether to wait for
        more samples: when they do with the level as fitted, while the level after rests
        on fewer than :data:`AFTER_WAIT` times the samples before the split.

        Were the step at or before the detection, every sample after it would lie at
        the level after, and the likelihood ratio of the two levels over its first
        samples, a martingale if both levels were known, would reach the bound with
        probability at most the trial's error rate (Ville's inequality, as the trial's own
        bound); the level after is estimated from the same samples, at the split where
        the two segments differ most, hence the margin, the wait and the least count
        (without that count one of ``bench_events.py``'s 600 real steps and one of
        ``test_warmup_steps.py``'s 300 had their detection moved to a later split, each
        on 8 samples before it)."""
        assert self._fitter is not None
        start = ev.trip_len
        if len(self._fitter) - start < 2 * FIT_MIN_SEGMENT + 1 or not b.sigma > 0.0:
            return None, False
        post = self._fitter.fit_from(start, level=self.settings.interval_level, min_segment=FIT_MIN_SEGMENT,
                                     variance_factor=_variance_factor(b.phi))
        var = b.sigma * b.sigma * _variance_factor(b.phi)
        half = 0.5 * self.settings.min_shift_sigma * b.sigma
        sign = ev.trial.sign
        if (post.level_before - ev.level_before) * sign >= half:
            return None, False  # the samples before the split show a step already (this event's)

        def llr(margin: float) -> float:
            # over the samples before the split, sum ((x - after)^2 - (x - ref)^2) / (2 var)
            after = post.level_after - sign * margin * math.sqrt(var / post.n_after)
            step = after - ev.level_before
            if step * sign < half:
                return -math.inf
            return post.index * step * (after + ev.level_before - 2.0 * post.level_before) / (2.0 * var)

        bound = ev.trial.bound
        if post.index < 2.0 * bound / (ev.trial.d * ev.trial.d):
            # Fewer samples before the split than the trial needs to confirm a step of its
            # design size (Wald's expected number, bound over drift): too few to tell the
            # two levels apart, whatever a few samples after them show.
            return None, False
        if post.n_after >= post.index and llr(AFTER_MARGIN) >= bound:
            return post, False
        # Too few samples after the split to weigh them by yet (a few wild ones make a level
        # far out), or to tell the level after from the margin: wait while the level as
        # fitted reaches the bound, up to AFTER_WAIT times the segment before the split.
        return None, post.n_after < AFTER_WAIT * post.index and llr(0.0) >= bound

    def _conflicts(self, fit: StepFit, sign: int, b: Baseline) -> bool:
        """Whether ``fit`` contradicts a trial's "step" in direction ``sign``: a step
        the other way, or less than half of min_shift_sigma (in the baseline's sigma or
        in the fit's own)."""
        half = 0.5 * self.settings.min_shift_sigma
        return (fit.delta * sign <= 0.0 or abs(fit.delta) < half * b.sigma
                or abs(fit.delta_sigma) < half)

    def _anchored(self, ev: OpenEvent, fit: StepFit, b: Baseline) -> StepFit | None:
        """The event's fit measured from the trial's reference level, when that is the
        baseline's settled level (it rests on at least two windows of samples), if that
        shows the step in the trial's direction at ``confirm_p_value`` and at least half
        of min_shift_sigma (:func:`.stepfit.anchor_step`); else None."""
        if (b.level_n < 2 * self.settings.window_samples or self._young.level is not None
                or self._young.provisional or fit.n_after < 1 or not b.sigma > 0.0):
            return None
        a = anchor_step(fit, ev.level_before, b.level_n, b.sigma, _variance_factor(b.phi))
        if a.p_value < self.settings.confirm_p_value and not self._conflicts(a, ev.trial.sign, b):
            return a
        return None

    def _fit_p_value(self, fit: StepFit, b: Baseline) -> float:
        """The p-value of the fit of the event's samples ("one step against none") on
        which the event is decided.

        The fit's own p-value allows for autocorrelation at the baseline's phi.  While
        that phi rests on fewer samples than the window (the first warm-up, a
        provisional baseline), it is biased low and uncertain, and a few dozen
        samples of autocorrelated noise look like a step; then the allowance is
        the larger of it and an upper bound from the fit's own residuals
        (:func:`residual_phi_bound`)."""
        p = fit.p_value
        if b.n < self.settings.window_samples and self._fitter is not None:
            up = residual_phi_bound(self._fitter.values, fit.index)
            if up > b.phi:
                p = supf_pvalue(fit.f_stat * _variance_factor(b.phi) / _variance_factor(up), fit.pi0)
        return p

    def end_event(self, as_of: float) -> AlertRecord | None:
        """End the open event now as ``undecided``, and return its record (None when no
        event is open).  For a stream whose settings change or that is removed on a
        reload: every event ends with a record.  The stream watches on from its
        baseline, or goes on warming up."""
        ev = self._event
        b = self._baseline
        if ev is None or b is None or self._fitter is None:
            return None
        fit = self._fit(b, ev.first_split)
        shown = self._event_fit(ev, b, fit)
        rec = self._record(ev, shown, "undecided", max(as_of, ev.detected_at))
        yp = self._young
        if yp.level is not None:  # as for a dismissal: the held and event samples join the young level
            yp.take_back(self._fitter.values[ev.trip_len:].tolist())
        elif not yp.provisional:
            self._follow_catch_up(ev, b)
        self._event = None
        self._fitter = None
        self._pending = None
        if yp.provisional:
            self._baseline = None
            yp.provisional = False
            self._state = WARMING_UP
        else:
            self._state = WATCHING
        if self._test is not None:
            self._test.reset()
        self.records_total = _tally(self.records_total, ("undecided",))
        return rec

    def _follow_catch_up(self, ev: OpenEvent, b: Baseline) -> None:
        """After an event that found no step: the level went on moving, if at all,
        slowly.  The follower catches up with the event's samples as if no event had
        been open (all but the newest FOLLOW_DELAY), and the watch goes on from it."""
        assert self._fitter is not None
        fo = self._follower
        fo.catch_up(self._fitter.values, ev.trip_len, follow_delay(b.phi, self.settings.window_samples),
                    1.0 / follow_samples(b.phi), b.level, self.settings.spike_sigma * b.sigma)
        self._prev_r -= fo.offset

    def _event_fit(self, ev: OpenEvent, b: Baseline, fit: StepFit, end: int | None = None) -> StepFit:
        """The fit a final record carries: the detected step as the samples up to ``end``
        (default: every sample the event holds at its decision) show it, its split at or
        before the detection (the record is of the step detected).  ``fit``, the refit
        of every sample, when it places the step there already.  Before, a refit that
        placed its split after the detection left an ``undecided`` record with the fit
        up to the detection: after 1,000 samples it said "after 3 samples"."""
        assert self._fitter is not None
        n = len(self._fitter) if end is None else end
        if n == len(self._fitter) and fit.index < ev.trip_len:
            return fit
        last = ev.trip_len - 1
        if last < max(FIT_MIN_SEGMENT, ev.first_split) or n < 2 * FIT_MIN_SEGMENT + 1:
            return fit if n == len(self._fitter) else self._fit(b, ev.first_split)  # too few: clamped on output
        from shiftwatch.core.stepfit import fit_step

        return fit_step(self._fitter.values[:n], self._fitter.times[:n], level=self.settings.interval_level,
                        min_segment=FIT_MIN_SEGMENT, variance_factor=_variance_factor(b.phi),
                        last_split=last, first_split=ev.first_split or None)

    def _end_event(self, ev: OpenEvent, phase: str, fit: StepFit, result: BatchResult, as_of: float,
                   **extra: Any) -> None:
        result.records.append(self._record(ev, fit, phase, as_of, **extra))
        self._event = None

    def _reanchor(self, index: int) -> None:
        """Watch on from the next sample with the level the samples after the step show.

        Sigma, autocorrelation, clip and sampling interval describe the noise,
        which a step in level does not change: they carry over.  The level
        starts from the samples after the step and is measured self-starting
        (:mod:`.selfstart`) until it rests on :data:`YOUNG_END` samples, so a
        second step, or the return of an excursion, is found at once and the
        false-alarm rate holds meanwhile.  During the first warm-up (no
        baseline yet) the warm-up simply goes on from the step, the spread
        pooled over both levels.
        """
        b = self._baseline
        assert b is not None and self._fitter is not None and self._test is not None
        vals = self._fitter.values[index:].copy()
        times = self._fitter.times[index:].copy()
        self._window.reset_to(vals, times)
        self._fitter = None
        self._pending = None
        self._prev_out = 0
        self._sums.reset()
        self._unfolded = 0
        del self._unfolded_u[:]
        self._watch_kept = 0
        self._follower.restart()
        yp = self._own_young()
        if yp.provisional:
            ys = yp.reanchor(vals.tolist(), None)
            self._baseline = None
            self._state = WARMING_UP
        else:
            tau = follow_samples(b.phi)
            follow = 0 if math.isinf(tau) else int(tau) + follow_delay(b.phi, self.settings.window_samples)
            ys = yp.reanchor(vals.tolist(), (b.innovation_sigma, b.phi, follow))
            self._state = WATCHING
        if self._baseline is not None:
            self._baseline = replace(b, level=ys.mean, n_level=ys.level_n() if ys.level_n() < b.n else 0)
            self._prev_r = float(vals[-1] - ys.mean)
        # Self-starting inputs need no allowance for the young level: the test is
        # designed for the plant's ARL and starts afresh.
        self._test = None
        self._young_test()

    # ------------------------------------------------------------ snapshots
    def get_state(self, *, arrays: bool = False) -> dict[str, Any]:
        """Everything needed to carry on after a restart, as plain JSON-able data.

        The window is included, so a restored engine does not warm up again,
        and an open event is decided as if nothing had happened.

        ``arrays``: the window's and the event's samples and the follower offsets as
        float64 arrays (copies) instead of lists of floats, for a writer that packs
        them as bytes anyway (``statestore``): the same numbers, without a float
        object per sample made and read again.
        """
        ev = self._event
        win, fitter, fo = self._window, self._fitter, self._follower
        if arrays:
            times: Any = win.times.copy()
            values: Any = win.values.copy()
            ev_times: Any = None if fitter is None else fitter.times.copy()
            ev_values: Any = None if fitter is None else fitter.values.copy()
            follow: Any = np.array(self._unfolded_u, dtype=np.float64)
        else:
            times, values = win.times.tolist(), win.values.tolist()
            ev_times = None if fitter is None else fitter.times.tolist()
            ev_values = None if fitter is None else fitter.values.tolist()
            follow = list(self._unfolded_u)
        return {
            "stream": self.stream,
            "state": self._state,
            "times": times,
            "values": values,
            "event_times": ev_times,
            "event_values": ev_values,
            "sums": self._sums.to_list(),
            "unfolded": self._unfolded,
            "unfolded_follow": follow,
            "baseline": None if self._baseline is None else self._baseline.to_dict(),
            "test": None if self._test is None else {
                "name": self._test.name, "arl0": self._test_arl0, "shift_z": self._test_shift_z,
                "n_ref": self._test_n_ref, "n_level": self._test_n_level, "rules": DESIGN_RULES,
                "state": self._test.get_state()},
            "prev_r": self._prev_r,
            "follow": fo.offset,
            "follow_lag": fo.lag,
            "center": fo.center,
            "next_center": fo.next_center,
            "pending": None if self._pending is None else list(self._pending),
            "prev_out": self._prev_out,
            "event": None if ev is None else ev.get_state(),
            "last_step": None if self._last_step is None else self._last_step.get_state(),
            "young": None if self._young.level is None else self._young.level.get_state(),
            "provisional": self._young.provisional,
            "watch_kept": self._watch_kept,
            "next_refine": self._next_refine,
            "refine_block": self._refine_block,
            "last_time": None if not math.isfinite(self._last_time) else self._last_time,
            "samples_total": self.samples_total,
            "rejected_total": dict(self.rejected_total),
            "records_total": dict(self.records_total),
            "last_shift_at": self.last_shift_at,
            "repeats": self._repeats.get_state(),
        }

    def set_state(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`get_state` produced (this version's or an earlier one's).

        Every field is checked: a malformed state raises ``ValueError`` whose
        message names the field, and leaves the engine as new (warming up).
        """
        field_name = "state"
        try:
            self._reset()
            _check_finite(state, "")
            st = str(state["state"])
            if st not in (WARMING_UP, WATCHING, EVENT_OPEN):
                raise ValueError(f"state: unknown engine state {st!r}")
            self._state = st
            field_name = "times"
            times = _time_array(state["times"], "times")
            field_name = "values"
            values = _finite_array(state["values"], "values")
            if times.shape != values.shape:
                raise ValueError("times, values: differ in length")
            self._window.reset_to(values, times)
            field_name = "event_times"
            ev_t, ev_v = state["event_times"], state["event_values"]
            if (ev_t is None) != (ev_v is None):
                raise ValueError("event_times, event_values: one is missing")
            if ev_t is not None:
                et, evv = _time_array(ev_t, "event_times"), _finite_array(ev_v, "event_values")
                if et.shape != evv.shape:
                    raise ValueError("event_times, event_values: differ in length")
                self._fitter = StepFitter(evv, et)
            field_name = "sums"
            sums = list(state["sums"])
            if len(sums) != 10 or not all(v is None or math.isfinite(float(v)) for v in sums):
                raise ValueError(f"sums: expected 10 finite numbers or nulls, got {sums!r:.80}")
            self._sums = BaselineSums.from_list(sums)
            field_name = "unfolded"
            self._unfolded = _count(state["unfolded"], "unfolded")
            field_name = "unfolded_follow"
            uf = state.get("unfolded_follow")
            # Snapshots before the follower have none: the samples were measured against the level.
            uf = [0.0] * self._unfolded if uf is None else list(_finite_array(uf, "unfolded_follow"))
            if len(uf) != self._unfolded:
                raise ValueError(f"unfolded_follow: expected {self._unfolded} values, got {len(uf)}")
            self._unfolded_u = array("d", [float(v) for v in uf])
            field_name = "baseline"
            b = state["baseline"]
            self._baseline = None if b is None else _baseline_from(b)
            field_name = "test"
            ts = state["test"]
            if ts is not None:
                if ts["name"] != self.settings.test:
                    raise ValueError(f"test: the snapshot was made with test {ts['name']!r}, settings say "
                                     f"{self.settings.test!r}")
                arl0, shift_z, n_ref = (_positive(ts[k], f"test.{k}") for k in ("arl0", "shift_z", "n_ref"))
                # Snapshots before level re-anchoring have no n_level: the level rested on n_ref.
                n_level = _count(ts.get("n_level", int(min(n_ref, 1e9))), "test.n_level")
                self._test = make_test(self.settings, arl0, shift_z, n_ref, n_level=n_level)
                self._test_arl0, self._test_shift_z, self._test_n_ref = shared_value(arl0), shift_z, n_ref
                self._test_n_level = n_level
                self._test.set_state(ts["state"])
            field_name = "prev_r"
            self._prev_r = _finite_number(state["prev_r"], "prev_r")
            field_name = "follow"
            # Snapshots before the follower have none: the level was the baseline's.
            fo = self._follower
            fo.offset = _finite_number(state.get("follow", 0.0), "follow")
            field_name = "pending"
            p = state["pending"]
            if p is not None:
                if len(p) != 2:
                    raise ValueError(f"pending: expected [time, value], got {p!r:.80}")
                self._pending = (float(_time_array([p[0]], "pending")[0]), _finite_number(p[1], "pending"))
            field_name = "prev_out"
            self._prev_out = int(state["prev_out"])
            if self._prev_out not in (-1, 0, 1):
                raise ValueError(f"prev_out: must be -1, 0 or 1, got {self._prev_out}")
            field_name = "event"
            e = state["event"]
            if e is not None:
                sign = 1 if float(e.get("level_after", 0.0)) >= (
                    self._baseline.level if self._baseline is not None else 0.0) else -1
                self._event = OpenEvent.from_state(
                    e, lambda: self._new_trial(sign),
                    self._baseline.level if self._baseline is not None else 0.0)
            field_name = "last_step"
            ls_ = state.get("last_step")
            self._last_step = None if ls_ is None else StepMemory.from_state(ls_)
            field_name = "young"
            yg = state.get("young")
            young_level = None if yg is None else SelfStart.from_state(yg)
            provisional = bool(state.get("provisional", False))
            yp = self._own_young()
            yp.level, yp.provisional = young_level, provisional
            self._idle_young()
            if (st != WARMING_UP and (self._baseline is None or self._test is None)) or \
                    (st == EVENT_OPEN) != (self._event is not None) or \
                    (self._event is None) != (self._fitter is None):
                raise ValueError("state: the snapshot is inconsistent with its state")
            field_name = "watch_kept"
            self._watch_kept = _count(state["watch_kept"], "watch_kept")
            self._next_refine = _count(state["next_refine"], "next_refine")
            self._refine_block = shared_value(_count(state["refine_block"], "refine_block"))
            field_name = "follow_lag"
            fo.lag = _count(state.get("follow_lag", 0), "follow_lag")
            # Not yet followed: samples of the window, or of an open event (up to its trip).
            room = self._event.trip_len if self._event is not None else len(self._window)
            if fo.lag > room or (fo.lag and yp.level is not None):
                raise ValueError(f"follow_lag: {fo.lag} samples not yet followed, but there "
                                 f"are {room}" + (" and the level is young" if yp.level is not None else ""))
            field_name = "center"
            fo.center = _finite_number(state.get("center", fo.offset), "center")
            field_name = "next_center"
            fo.next_center = _count(state.get("next_center", self._watch_kept + FOLLOW_RECENTER),
                                    "next_center")
            field_name = "last_time"
            lt = state["last_time"]
            self._last_time = -math.inf if lt is None else _finite_number(lt, "last_time")
            field_name = "samples_total"
            self.samples_total = _count(state["samples_total"], "samples_total")
            field_name = "rejected_total"
            self.rejected_total = (Counter({str(k): int(v) for k, v in state["rejected_total"].items()})
                                   or _NO_COUNTS)
            field_name = "records_total"
            self.records_total = (Counter({str(k): int(v) for k, v in state["records_total"].items()})
                                  or _NO_COUNTS)
            field_name = "last_shift_at"
            ls = state["last_shift_at"]
            self.last_shift_at = None if ls is None else _finite_number(ls, "last_shift_at")
            field_name = "repeats"
            rs = state.get("repeats")  # (snapshots before it have none: the count starts again)
            if rs is not None:
                self._repeats = RepeatWatch.from_state(rs)
            if (self._baseline is not None and yp.level is None and self._test is not None
                    and state["test"].get("rules") != DESIGN_RULES):
                # A snapshot made under other design rules (before the follower, its test was
                # designed for a fixed level; before DESIGN_RULES 2, with one follower factor
                # for every ARL): the test is designed as this version designs it.
                field_name = "test"
                self._design_test()
        except ValueError as exc:
            self._reset()
            if str(exc).startswith(field_name.split(".")[0]):
                raise
            raise ValueError(f"{field_name}: {exc}") from None
        except (KeyError, TypeError, AttributeError, IndexError, OverflowError) as exc:
            self._reset()
            if isinstance(exc, KeyError):
                raise ValueError(f"{field_name}: {exc.args[0]} is missing from the saved state") from None  # noqa: TRY004  every bad field is a ValueError
            raise ValueError(f"{field_name}: malformed ({exc!r:.120})") from None

    def _gap_from(self, shift_at_low: float, shift_at_high: float) -> float | None:
        """The time of the last reading before the longest pause of the readings, of more
        than GAP_FACTOR times their median interval (the event's window), that ends at
        ``shift_at_low`` or inside the interval up to ``shift_at_high``; else None.  A step
        across a pause (a line stopped overnight) may have come at any moment of it; the
        fit can date only readings, and its interval may begin before the pause (outside
        trial of 2026-12-05: 26 of 60 steps in a pause, none named before)."""
        f = self._fitter
        if f is None or len(f) < 3:
            return None
        return pause_before(f.times, shift_at_low, shift_at_high)

    def _record(self, ev: OpenEvent, fit: StepFit, phase: str, as_of: float,
                **extra: Any) -> AlertRecord:
        # A step is never dated after the detection that reported it: the fit of
        # the event's samples can reach past it only at its upper bound.
        low = min(fit.shift_at_low, ev.detected_at)
        return AlertRecord(
            id=ev.id,
            phase=phase,
            stream=self.stream,
            detected_at=ev.detected_at,
            shift_at=min(fit.shift_at, ev.detected_at),
            shift_at_low=low,
            shift_at_high=min(fit.shift_at_high, ev.detected_at),
            level_before=fit.level_before,
            level_after=fit.level_after,
            delta=fit.delta,
            delta_sigma=fit.delta_sigma,
            sigma=fit.sigma,
            n_before=fit.n_before,
            n_after=fit.n_after,
            test=ev.test,
            statistic=ev.statistic,
            threshold=ev.threshold,
            as_of=as_of,
            interval_level=fit.interval_level,
            level_before_se=fit.level_before_se,
            level_after_se=fit.level_after_se,
            f_stat=fit.f_stat,
            p_value=fit.p_value,
            direction="up" if fit.delta > 0 else "down",
            unit=self.unit,
            gap_from=self._gap_from(low, min(fit.shift_at_high, ev.detected_at)),
            **extra,
            **_sensorcheck.fit_fields(None if self._fitter is None else self._fitter.values, fit,
                                      ev.trip_len, phase, self._baseline, self.settings.confirm_p_value),
        )


def _design_arl(arl0: float, n: int, k_min: float | None, n_level: int | None = None) -> float:
    """The in-control ARL a test is designed for: adjusted for the baseline's
    estimation error and rounded up on a grid, within the calibrated range.

    While the baseline is young the allowance is coarse (steps of 22%); once
    it is within 25% of the plant's ARL the grid is fine (5%), so an
    established stream runs at almost exactly the chosen false-alarm rate.
    """
    adj = estimation_adjusted_arl(arl0, n, k_min, n_level)
    step = 0.2 if adj > 1.25 * arl0 else 0.05
    return min(_grid(adj, step=step), 1e9)


def _grid(x: float, *, up: bool = True, step: float = 0.05) -> float:
    """Round a positive number to a geometric grid of ``exp(step)`` (up or down).

    Examples
    --------
    >>> _grid(604800.0) >= 604800.0, _grid(604800.0) / 604800.0 < 1.052
    (True, True)
    """
    q = math.log(x) / step
    q = math.ceil(q - 1e-9) if up else math.floor(q + 1e-9)
    return math.exp(q * step)


def _batch_position(t: FloatArray, idx: NDArray[np.intp], time: float) -> int:
    """The batch position of the kept sample at ``time`` among ``t`` (-1: an earlier batch's)."""
    j = int(np.searchsorted(t, time))
    return int(idx[j]) if j < t.shape[0] and t[j] == time else -1


def _time_or_nan(raw: NDArray[Any] | None, i: int) -> float:
    try:
        return float(raw[i]) if raw is not None else math.nan
    except (TypeError, ValueError, OverflowError):
        return math.nan
