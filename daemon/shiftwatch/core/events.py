"""The life of one event: the sequential decision after the test trips.

An event opens when the stream's sequential test trips (the ``detected``
record).  From then on every new sample is evidence about one question:
is there a lasting step of at least the size of interest, or not?  The
answer is a pair of Wald sequential probability ratio tests (Wald 1945,
"Sequential tests of statistical hypotheses", Ann. Math. Statist.
16:117-186) run on the samples that arrive *after* the trip, so the samples
that tripped the test (and are biased towards a step by that selection) are
not counted twice.

The inputs are the same standardised, prewhitened, clipped residuals the
sequential test sees, relative to the level before the trip; ``sign`` is
the direction of the trip, and ``d`` the smallest step of interest in those
units.  With ``S_m`` the sum of ``sign * z`` over ``m`` samples:

* **step**: the log-likelihood ratio of "mean ``d``" against "mean 0",
  ``d S_m - m d^2 / 2``.  At ``log((1 - beta) / alpha)`` the event is
  *confirmed*.
* **no step**: the log-likelihood ratio of "mean 0" against "mean
  ``DISMISS_AT * d``", ``-c S_m + m c^2 / 2`` with ``c = DISMISS_AT * d``.
  At the same bound the event is *dismissed*.
* neither after ``limit`` samples: the event ends *undecided*.

The engine accepts a "step" only while the least-squares fit of all the
event's samples shows the step too (``engine.StreamEngine._fit_p_value``;
on a settled baseline also the fit measured from the baseline's level,
``engine.StreamEngine._anchored``); otherwise it takes the verdict back (:meth:`EventTrial.reopen`) and the
trial goes on.  The bounds below are for the trial alone.

Wald's inequalities bound the error rates: an event on an unchanged level
is confirmed with probability at most ``alpha``; a step of ``d`` or more is
dismissed with probability at most ``alpha`` (both rates are set to the
``confirm_p_value`` setting).  A real step smaller than ``d`` lies between
the two hypotheses: the "no step" test drifts away from its bound for any
step above ``DISMISS_AT * d / 2``, so such a step is not dismissed; it is
confirmed at its fitted size or, if the evidence stays thin, ends
undecided.  Either way the stream re-anchors on the new level (see
:mod:`.engine`), so the same step is never detected twice.

Expected samples to a decision (Wald's approximation ``bound / drift``,
d = 1, bound 6.9): 3 for a 3 sigma step, 7 for 1.5 sigma, 14 for 1 sigma,
and 25 to dismiss an event on an unchanged level.

**A reference known from few samples** (``n_ref``, given on a provisional
baseline, a new stream's first warm-up: the trial measures from the level
fitted before the step on a few dozen samples).  That level's own error, the
same for every sample of the trial, and a phi estimated low both make the
inputs of an unchanged level drift.  With the inputs' variance per sample
``lam_m`` and the reference's error ``N(0, lam_m / n_ref)`` integrated out,
the log-likelihood ratio for a mean ``d_j`` is ``(d_j S_m - m d_j^2 / 2)
* w_m``, ``w_m = n_ref / (lam_m (n_ref + m))`` (the reference's share of
the evidence); with ``lam`` fixed each is the likelihood ratio of the
samples so far, a martingale under no step.  ``lam_m`` pools ``lam`` (the
engine's: the long-run variance at the baseline's phi one standard error
up, over the one the inputs are scaled by, at least 1), resting on
``n_lam`` samples, with the trial's own inputs' variance times ``(1 + r) /
(1 - r)``, ``r`` their lag-1 autocorrelation one standard error up
(:meth:`EventTrial.variance`): a baseline whose spread holds the start of
the step scales the inputs down, and the trial learns that from its own
samples.  That evidence is bounded by about ``n_ref (d_j mu - d_j^2 / 2) /
lam_m`` for a step ``mu`` however long the trial runs, so one design step
alone cannot confirm a large step measured from 20 samples; the trial
weighs the steps ``d_j = d, 2d, 4d, 8d`` (:data:`STEP_MULTIPLES`) and says
"step" when the largest of the four reaches the bound plus ``log 4``: then
their equal mixture, itself a martingale, has reached the bound, and
Ville's inequality (Ville 1939) keeps the error rate under ``alpha``
(``tests/core/test_young_trial.py`` simulates it).  Where the plain evidence
for ``d`` (as above) reaches the bound and this one does not, the trial says
*look* (:data:`LOOK`): the engine ends the event undecided when the fit of
its samples contradicts a step, as it does after a "step", and otherwise
lets the trial go on (:meth:`EventTrial.reopen`); so a false event whose
evidence the reference's error keeps from a decision is not held open to
the limit.  Without ``n_ref`` the trial is the single design step above,
unchanged.

The decision falls on a fixed sample whatever the batching: the sums are
advanced sample by sample (vectorised as cumulative sums) and the first
sample at which a bound is crossed decides.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from shiftwatch.core.sequential import FloatArray

#: The "no step" hypothesis is tested against a step of this fraction of ``d``.
DISMISS_AT = 0.75

#: Standard errors above its estimate at which a young reference's trial takes the lag-1
#: autocorrelation of its own inputs.
PHI_MARGIN = 1.0
#: The least variance per sample a young reference's trial allows for.
LAM_FLOOR = 0.05

#: The step sizes, as multiples of ``d``, a trial on a young reference weighs (see above).
STEP_MULTIPLES = (1.0, 2.0, 4.0, 8.0)
_LOG_MULTIPLES = math.log(len(STEP_MULTIPLES))

#: Outcomes of :meth:`EventTrial.feed`.
PENDING = ""
STEP = "step"
NO_STEP = "no_step"
NO_DECISION = "no_decision"
LOOK = "look"  # (a trial on a young reference: the plain evidence for d reached the bound)


class EventTrial:
    """The two sequential tests of one open event.

    Parameters
    ----------
    sign : +1 for an upward trip, -1 for a downward one.
    d : the smallest step of interest, in the units of the inputs (> 0).
    error_rate : alpha = beta of both tests (in (0, 0.5)).
    limit : samples after which the event ends undecided (>= 1).
    min_samples : samples before any decision (>= 1, at most ``limit``).
    n_ref : the samples the reference level rests on, when few (a young level);
        ``inf`` (the default): a settled reference, whose error is negligible.
    lam : variance of the inputs per sample allowed for (> 0; with ``n_ref``).
    n_lam : the samples ``lam`` rests on, against the trial's own inputs' variance
        (default ``n_ref``).

    Examples
    --------
    A 3-sigma step (inputs around 3, d = 1) is confirmed within a few samples:

    >>> tr = EventTrial(+1, 1.0, 0.001, 600)
    >>> tr.feed(np.array([2.9, 3.2, 2.7, 3.1, 3.0]))
    (2, 'step')
    >>> tr.m, tr.outcome
    (3, 'step')

    An event on an unchanged level is dismissed:

    >>> tr = EventTrial(-1, 1.0, 0.001, 600)
    >>> i, outcome = tr.feed(np.zeros(100)); i, outcome
    (24, 'no_step')

    Measured from a level of 20 samples, a 3-sigma step is still confirmed as soon
    (the larger step sizes weigh it):

    >>> tr = EventTrial(+1, 1.0, 0.001, 600, n_ref=20.0)
    >>> tr.feed(np.array([2.9, 3.2, 2.7, 3.1, 3.0, 2.4, 3.6, 2.8]))
    (2, 'step')
    """

    __slots__ = ("bound", "c", "d", "lam", "last", "limit", "m", "min_samples", "n_lam", "n_ref", "outcome",
                 "q", "s", "sign", "step_from")

    def __init__(self, sign: int, d: float, error_rate: float, limit: int,
                 min_samples: int = 1, n_ref: float = math.inf, lam: float = 1.0,
                 n_lam: float | None = None) -> None:
        if sign not in (-1, 1):
            raise ValueError(f"sign must be +1 or -1, got {sign!r}")
        if not (d > 0 and math.isfinite(d)):
            raise ValueError(f"d must be a positive number, got {d!r}")
        if not 0.0 < error_rate < 0.5:
            raise ValueError(f"error_rate must be in (0, 0.5), got {error_rate!r}")
        if limit < 1:
            raise ValueError(f"limit must be at least 1, got {limit!r}")
        if not n_ref > 0:
            raise ValueError(f"n_ref must be a positive number or inf, got {n_ref!r}")
        if not (lam > 0.0 and math.isfinite(lam)):
            raise ValueError(f"lam must be a positive number, got {lam!r}")
        if n_lam is None:
            n_lam = n_ref if math.isfinite(n_ref) else 0.0
        if not (n_lam >= 0.0 and math.isfinite(n_lam)):
            raise ValueError(f"n_lam must be a number of at least 0, got {n_lam!r}")
        self.sign = sign
        self.d = float(d)
        self.bound = math.log((1.0 - error_rate) / error_rate)
        self.limit = int(limit)
        self.min_samples = max(1, min(int(min_samples), self.limit))
        self.m = 0
        self.s = 0.0
        self.outcome = PENDING
        self.step_from = 0  # no "step" verdict before this count (see reopen)
        self.n_ref = float(n_ref)
        self.lam = float(lam) if math.isfinite(self.n_ref) else 1.0
        self.n_lam = float(n_lam) if math.isfinite(self.n_ref) else 0.0
        self.q = 0.0  # sum of the squared inputs (signed as s)
        self.c = 0.0  # sum of the products of neighbouring inputs
        self.last = 0.0  # the last input (signed)

    # The two log-likelihood ratios, from the sums.
    def llr_step(self) -> float:
        """Evidence for a step of ``d`` against none (decides at :attr:`bound`); on a young
        reference the largest of the step sizes' share-weighted ratios, less ``log 4``."""
        if not math.isfinite(self.n_ref):
            return self.d * self.s - 0.5 * self.m * self.d * self.d
        return float(self._young_llr(np.float64(self.m), np.float64(self.s), np.float64(self.q),
                                     np.float64(self.c)))

    def variance(self) -> float:
        """The variance per sample of the inputs the young reference's evidence allows for
        (see the module docstring); :attr:`lam` on a settled reference."""
        if not math.isfinite(self.n_ref) or self.m == 0:
            return self.lam
        return float(self._lam_at(np.float64(self.m), np.float64(self.s), np.float64(self.q),
                                  np.float64(self.c)))

    def _lam_at(self, m: Any, s: Any, q: Any, c: Any) -> Any:
        """The variance per sample allowed for after ``m`` inputs with sums ``s``, ``q`` and
        ``c``, element by element (numpy's operations; :meth:`feed` decides on the plain
        evidence and asks this at the deciding sample, from sums both of its paths add
        sample by sample, so both get the same floats): the inputs' own variance about
        their mean times ``(1 + r) / (1 - r)``, ``r`` their lag-1 autocorrelation
        (Kendall's bias ``(1 + 3 r) / m`` added) plus :data:`PHI_MARGIN` standard errors
        ``1 / sqrt(m)``, in [0, 0.95]; pooled with :attr:`lam`, which rests on
        :attr:`n_lam` samples, by degrees of freedom (``m - 1`` for the inputs' own);
        at least :data:`LAM_FLOOR`."""
        mm1 = np.maximum(m - 1.0, 1.0)
        mean = s / m
        var = np.maximum((q - s * mean) / mm1, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(var > 0.0, (c / mm1 - mean * mean) / var, 0.0)
        r = r + (1.0 + 3.0 * r) / m
        up = np.minimum(0.95, np.maximum(0.0, r + PHI_MARGIN / np.sqrt(m)))
        own = var * ((1.0 + up) / (1.0 - up))
        return np.maximum((self.n_lam * self.lam + (m - 1.0) * own) / (self.n_lam + (m - 1.0)), LAM_FLOOR)

    def _young_llr(self, m: Any, s: Any, q: Any, c: Any) -> Any:
        """The young reference's evidence (the largest of the step sizes' share-weighted
        log-likelihood ratios, less ``log 4``), element by element."""
        best = None
        for k in STEP_MULTIPLES:
            dj = k * self.d
            g = dj * s - 0.5 * m * dj * dj
            best = g if best is None else np.maximum(best, g)
        return best * (self.n_ref / (self._lam_at(m, s, q, c) * (self.n_ref + m))) - _LOG_MULTIPLES

    def llr_plain(self) -> float:
        """Evidence for a step of ``d`` against none on a reference taken as exact (the
        settled trial's :meth:`llr_step`; on a young reference it decides a :data:`LOOK`)."""
        return self.d * self.s - 0.5 * self.m * self.d * self.d

    def llr_no_step(self) -> float:
        """Evidence for no step against one of ``DISMISS_AT * d`` (decides at :attr:`bound`)."""
        c = DISMISS_AT * self.d
        return -c * self.s + 0.5 * self.m * c * c

    def feed(self, z: FloatArray) -> tuple[int, str]:
        """Take inputs in time order until a decision.

        Returns the index into ``z`` of the deciding sample (the samples after
        it are not consumed) and the outcome, or ``(-1, "")`` when every
        sample was taken and nothing is decided yet.
        """
        if self.outcome:
            raise RuntimeError("the trial is decided already")
        n = z.shape[0]
        if n == 0:
            return -1, PENDING
        if n <= 4:
            for i, v in enumerate(z.tolist()):
                u = self.sign * v
                self.m += 1
                self.s += u
                self.q += u * u
                self.c += self.last * u
                self.last = u
                out = self._verdict()
                if out:
                    self.outcome = out
                    return i, out
            return -1, PENDING
        m = self.m + np.arange(1, n + 1, dtype=np.float64)
        # Summed from the running total one sample at a time, as the small path sums:
        # both decide on the same sample however the stream is batched.
        u = z if self.sign > 0 else -z
        s = np.cumsum(np.concatenate(([self.s], u)))[1:]
        c = DISMISS_AT * self.d
        q = cq = None
        if math.isfinite(self.n_ref):
            # The same operations as llr_step's, element by element (the same floats).
            q = np.cumsum(np.concatenate(([self.q], u * u)))[1:]
            lag = np.empty(n)
            lag[0] = self.last * float(u[0])
            np.multiply(u[:-1], u[1:], out=lag[1:])
            cq = np.cumsum(np.concatenate(([self.c], lag)))[1:]
        # A verdict ("step" or "look") comes only where the plain evidence for d reaches the
        # bound (_verdict): the young evidence decides which of the two it is.
        step = (self.d * s - 0.5 * m * self.d * self.d) >= self.bound
        if self.step_from > self.m + 1:
            step &= m >= self.step_from
        none = (-c * s + 0.5 * m * c * c) >= self.bound
        hit = np.flatnonzero(((step | none) & (m >= self.min_samples)) | (m >= self.limit))
        i = n - 1 if hit.shape[0] == 0 else int(hit[0])
        self.m += i + 1
        self.s = float(s[i])
        if q is not None and cq is not None:
            self.q = float(q[i])
            self.c = float(cq[i])
            self.last = float(u[i])
        if hit.shape[0] == 0:
            return -1, PENDING
        self.outcome = self._verdict()
        return i, self.outcome

    def reopen(self, by: int | None = None) -> None:
        """Take back a "step" (or "look") verdict the engine did not accept (the fit of the event's
        samples does not show the step): the sums stand and the trial goes on.  The next
        "step" verdict comes no sooner than a tenth of the samples so far later (so the
        engine refits once every so many samples, not on each), on a count that does
        not depend on batching, or at the count ``by`` where that is sooner (a wait of the
        engine's that ends there: see :data:`RETURN_WAIT`); "no step" and the limit decide
        as before."""
        self.outcome = PENDING
        self.step_from = self.m + max(1, self.m // 10)
        if by is not None:
            self.step_from = min(self.step_from, max(int(by), self.m + 1))

    def _verdict(self) -> str:
        if self.m < self.min_samples:
            return PENDING
        if self.m >= self.step_from and self.llr_plain() >= self.bound:
            # On a young reference the step sizes' mixture must reach the bound as well: its
            # larger sizes alone would take two inputs at the clip (a burst of two or
            # three wild readings) for a step (tests/core/test_outlier_burst.py).
            if not math.isfinite(self.n_ref) or self.llr_step() >= self.bound:
                return STEP
            return LOOK
        if self.llr_no_step() >= self.bound:
            return NO_STEP
        if self.m >= self.limit:
            return NO_DECISION
        return PENDING

    def get_state(self) -> dict[str, Any]:
        return {"sign": self.sign, "d": self.d, "bound": self.bound, "limit": self.limit,
                "min_samples": self.min_samples, "m": self.m, "s": self.s, "step_from": self.step_from,
                # (JSON has no inf: 0 for a settled reference)
                "n_ref": self.n_ref if math.isfinite(self.n_ref) else 0.0, "lam": self.lam,
                "n_lam": self.n_lam, "q": self.q, "c": self.c, "last": self.last}

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> EventTrial:
        """Rebuild a trial from :meth:`get_state`; ``ValueError`` names a bad field."""
        out = cls.__new__(cls)
        sign = state["sign"]
        if sign not in (-1, 1):
            raise ValueError(f"event.trial.sign: must be +1 or -1, got {sign!r}")
        out.sign = int(sign)
        for name in ("d", "bound", "s"):
            v = _number(state, name)
            if not math.isfinite(v) or (name != "s" and v <= 0):
                raise ValueError(f"event.trial.{name}: not a usable number ({v!r})")
            setattr(out, name, v)
        for name in ("limit", "min_samples", "m"):
            setattr(out, name, _count(state, name, 1 if name != "m" else 0))
        out.outcome = PENDING
        # (snapshots before the fit's check carry no step_from: 0, as a new trial)
        out.step_from = _count(state, "step_from", 0, default=0)
        # (snapshots before the young reference's allowance carry neither: a settled one)
        n_ref = _number(state, "n_ref") if "n_ref" in state else 0.0
        if not (math.isfinite(n_ref) and n_ref >= 0):
            raise ValueError(f"event.trial.n_ref: not a usable number ({n_ref!r})")
        out.n_ref = n_ref if n_ref > 0 else math.inf
        lam = _number(state, "lam") if "lam" in state else 1.0
        if not (math.isfinite(lam) and lam > 0.0):
            raise ValueError(f"event.trial.lam: not a usable number ({lam!r})")
        out.lam = lam if math.isfinite(out.n_ref) else 1.0
        for name in ("n_lam", "q", "c", "last"):
            v = _number(state, name) if name in state else 0.0
            if not math.isfinite(v) or (name in ("n_lam", "q") and v < 0):
                raise ValueError(f"event.trial.{name}: not a usable number ({v!r})")
            setattr(out, name, v)
        return out


def _number(state: dict[str, Any], name: str) -> float:
    """Field ``name`` of a saved trial as a float; ``ValueError`` names it when it is
    missing or not a number (text, a list, true or false)."""
    if name not in state:
        raise ValueError(f"event.trial.{name}: missing")
    v = state[name]
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise ValueError(f"event.trial.{name}: not a number ({v!r})")  # noqa: TRY004 (set_state's contract: ValueError names the field)
    return float(v)


def _count(state: dict[str, Any], name: str, low: int, default: int | None = None) -> int:
    """Field ``name`` of a saved trial as a count from ``low`` to 2**53; ``ValueError``
    names it when it is missing (and has no ``default``), not a whole number (text,
    1.5, true) or out of that range."""
    if name not in state and default is not None:
        return default
    v = _number(state, name)
    if not v.is_integer():
        raise ValueError(f"event.trial.{name}: not a whole number ({state[name]!r})")
    if not low <= v <= 2**53:
        raise ValueError(f"event.trial.{name}: out of range ({state[name]!r})")
    return int(v)


class OpenEvent:
    """What the engine remembers of the event it has open.

    ``trip_len`` is the number of samples in the event's fitter at the trip
    (the tripping sample is the last of them), so a refit can tell whether
    the step it finds began before the detection or after it.  ``first_split``
    is the first sample of the fitter a fit of this event may place the step
    at: 0, or for an event opened when the samples after an earlier detection
    showed a step of their own, that detection's ``trip_len`` (the step began
    after it; a fit over the samples the false trip had raised could date it
    there).
    """

    __slots__ = (
        "detected_at", "first_split", "id", "level_after", "level_before", "n_after", "statistic", "test",
        "threshold", "trial", "trip_len",
    )

    def __init__(self, *, id: str, detected_at: float, test: str, statistic: float,
                 threshold: float, trip_len: int, level_before: float, level_after: float,
                 trial: EventTrial, n_after: int = 1, first_split: int = 0) -> None:
        self.id = id
        self.detected_at = detected_at
        self.test = test
        self.statistic = statistic
        self.threshold = threshold
        self.trip_len = trip_len
        # The level before the step as fitted at the detection (on every sample of the
        # window before it, more than a young baseline has): the trial's reference.
        self.level_before = level_before
        self.level_after = level_after  # the new level as first fitted: one centre of the spike check
        self.n_after = n_after  # the samples it was fitted on (the spike band allows for its error)
        self.trial = trial
        self.first_split = first_split

    def get_state(self) -> dict[str, Any]:
        return {"id": self.id, "detected_at": self.detected_at, "test": self.test,
                "statistic": self.statistic, "threshold": self.threshold,
                "trip_len": self.trip_len, "level_before": self.level_before,
                "level_after": self.level_after, "n_after": self.n_after,
                "first_split": self.first_split, "trial": self.trial.get_state()}

    @classmethod
    def from_state(cls, e: dict[str, Any], new_trial: Any, level: float) -> OpenEvent:
        """Rebuild from :meth:`get_state`.  Snapshots of earlier versions carry no
        trial and no level before: ``new_trial()`` makes a trial, whose count starts
        afresh, and ``level`` (the baseline's) is the reference."""
        trial = e.get("trial")
        out = cls(id=str(e["id"]), detected_at=_finite(e, "detected_at"), test=str(e["test"]),
                  statistic=_finite(e, "statistic"), threshold=float(e["threshold"]),
                  trip_len=int(e["trip_len"]),
                  level_before=_finite(e, "level_before") if "level_before" in e else level,
                  level_after=_finite(e, "level_after"),
                  trial=new_trial() if trial is None else EventTrial.from_state(trial),
                  # (snapshots before it have none: 1, the widest band)
                  n_after=int(e.get("n_after", 1)),
                  first_split=_first_split(e))
        if out.n_after < 1:
            raise ValueError(f"event.n_after: must be at least 1, got {out.n_after}")
        if out.trip_len < 1:
            raise ValueError(f"event.trip_len: must be at least 1, got {out.trip_len}")
        if not 0 <= out.first_split < out.trip_len:
            raise ValueError(f"event.first_split: must be from 0 to trip_len - 1 ({out.trip_len - 1}), "
                             f"got {out.first_split}")
        return out


def _first_split(e: dict[str, Any]) -> int:
    """A saved event's ``first_split`` (snapshots before it have none: 0, any split);
    ``ValueError`` names it when it is not a whole number."""
    v = e.get("first_split", 0)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not float(v).is_integer():
        raise ValueError(f"event.first_split: not a whole number ({v!r})")
    return int(v)


def _finite(d: dict[str, Any], key: str) -> float:
    v = float(d[key])
    if not math.isfinite(v):
        raise ValueError(f"event.{key}: not a finite number ({v!r})")
    return v


#: How many standard errors of the new level from the line between a return and a step
#: of its own leave the kind unclear (the two-sided 10% point of the normal), and the most
#: samples after the detection the engine waits for it to clear: see :class:`StepMemory`.
RETURN_Z = 1.6449
RETURN_WAIT = 60


class StepMemory:
    """The last confirmed step of a stream, kept to recognise its return.

    A later step in the opposite direction whose new level lies within half
    the first step of the level before it ends the excursion: its record is
    ``returned`` and names the excursion's event and start.  Where the new
    level lies within ``RETURN_Z`` of its own standard errors of that line
    (:meth:`return_unclear`), the engine waits for more readings, up to
    ``RETURN_WAIT`` after the detection, before it names the kind: the way
    back is often confirmed on a few readings, chosen by the detection for
    running far out, and a level of 19.00 +- 0.31 for a true 20 fell beyond
    the half by 0.2 and was recorded as a step of its own (outside trial of
    2026-12-05, ``tests/core/test_excursion_return.py``).

    Examples
    --------
    >>> m = StepMemory("a1", shift_at=100.0, level_before=10.0, delta=2.0)
    >>> m.is_return(level_after=10.3, delta=-1.7), m.is_return(level_after=11.5, delta=-0.5)
    (True, False)
    >>> m.return_unclear(level_after=8.8, delta=-3.0, level_after_se=0.3)
    True
    >>> m.return_unclear(level_after=8.8, delta=-3.0, level_after_se=0.05)
    False
    """

    __slots__ = ("delta", "id", "level_before", "shift_at")

    def __init__(self, id: str, *, shift_at: float, level_before: float, delta: float) -> None:
        self.id = id
        self.shift_at = shift_at
        self.level_before = level_before
        self.delta = delta

    def is_return(self, *, level_after: float, delta: float) -> bool:
        return (delta * self.delta < 0
                and abs(level_after - self.level_before) <= 0.5 * abs(self.delta))

    def return_unclear(self, *, level_after: float, delta: float, level_after_se: float) -> bool:
        """Whether a step of ``delta`` to ``level_after`` goes back from this one and its
        level lies within ``RETURN_Z`` standard errors ``level_after_se`` of the line
        :meth:`is_return` draws (half this step from the level before it)."""
        return (delta * self.delta < 0 and math.isfinite(level_after_se)
                and abs(abs(level_after - self.level_before) - 0.5 * abs(self.delta))
                <= RETURN_Z * level_after_se)

    def get_state(self) -> dict[str, Any]:
        return {"id": self.id, "shift_at": self.shift_at, "level_before": self.level_before,
                "delta": self.delta}

    @classmethod
    def from_state(cls, d: dict[str, Any]) -> StepMemory:
        vals = {}
        for key in ("shift_at", "level_before", "delta"):
            v = float(d[key])
            if not math.isfinite(v):
                raise ValueError(f"last_step.{key}: not a finite number ({v!r})")
            vals[key] = v
        return cls(str(d["id"]), **vals)
