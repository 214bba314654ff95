"""Adapter that runs river's drift detectors behind :class:`SequentialTest`.

River is imported lazily, inside :meth:`RiverTest.reset` (first called from
the constructor), never at module import, so the core stays importable
without paying river's import cost until an adapter is actually built.

Supported kinds and the river classes behind them:

``"page_hinkley"``
    :class:`river.drift.PageHinkley`.  :attr:`RiverTest.threshold` is its
    ``threshold`` parameter (lambda) and :attr:`RiverTest.statistic` is the
    larger of its two Page-Hinkley sums measured from their extremes
    (``sum_increase - min_increase`` and ``max_decrease - sum_decrease``,
    restricted to the monitored ``mode``), the quantity river compares with
    the threshold; 0.0 before ``min_instances`` samples.  Read from river's
    private attributes (river 0.26 is pinned in ``pyproject.toml``).
``"adwin"``
    :class:`river.drift.ADWIN`.  It has no threshold parameter, so
    :attr:`RiverTest.threshold` is nan and :attr:`RiverTest.statistic` is
    always 0.0.  The direction of a trip is the sign of the change of ADWIN's
    mean estimate across the tripping sample (ADWIN drops the old part of its
    window when it detects).

Snapshots (:meth:`RiverTest.get_state`) are pickle-free: the adapter keeps
the samples fed since the last :meth:`RiverTest.reset` (the newest
``max_replay`` of them) and :meth:`RiverTest.set_state` replays them into a
fresh detector.  The restored detector is exact while fewer than
``max_replay`` samples were fed since the reset; beyond that it is the
detector that would have been reset ``max_replay`` samples ago.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from shiftwatch.core.sequential import FloatArray, SequentialTest

#: Accepted kinds -> (river.drift class name, accepted constructor params).
KINDS: dict[str, tuple[str, tuple[str, ...]]] = {
    "page_hinkley": (
        "PageHinkley",
        ("min_instances", "delta", "threshold", "alpha", "mode"),
    ),
    "adwin": (
        "ADWIN",
        ("delta", "clock", "max_buckets", "min_window_length", "grace_period"),
    ),
}

#: Default bound on the samples kept for snapshot replay.
DEFAULT_MAX_REPLAY = 20_000


class RiverTest(SequentialTest):
    """A river drift detector seen as a :class:`SequentialTest`.

    Parameters
    ----------
    kind : {"page_hinkley", "adwin"}
        Which river detector to run.  Also the adapter's :attr:`name`.
    max_replay : int, default 20000
        Most samples kept for :meth:`get_state` / :meth:`set_state` replay
        (>= 0; 0 disables replay, so restored detectors start empty).
    **params
        Passed unchanged to the river constructor.  Names are checked
        against the river signature (see :data:`KINDS`); river checks values.

    Attributes
    ----------
    kind : str
        As given.
    params : dict
        Copy of the river constructor parameters.
    max_replay : int
        As given.

    Examples
    --------
    >>> import numpy as np
    >>> test = RiverTest("page_hinkley", threshold=20.0)
    >>> z = np.r_[np.zeros(100), np.full(100, 2.0)]
    >>> test.update(z)
    110
    >>> test.direction, test.threshold
    (1, 20.0)
    """

    def __init__(self, kind: str, max_replay: int = DEFAULT_MAX_REPLAY, **params: Any) -> None:
        if kind not in KINDS:
            raise ValueError(
                f"kind must be one of {sorted(KINDS)}, got {kind!r}"
            )
        accepted = KINDS[kind][1]
        unknown = sorted(set(params) - set(accepted))
        if unknown:
            raise ValueError(
                f"unknown parameter(s) {unknown} for kind {kind!r}; "
                f"accepted: {list(accepted)}"
            )
        if isinstance(max_replay, bool) or not isinstance(max_replay, (int, np.integer)) or max_replay < 0:
            raise ValueError(f"max_replay must be an integer >= 0, got {max_replay!r}")
        self.kind = kind
        self.params = dict(params)
        self.max_replay = int(max_replay)
        self.name = kind  # type: ignore[misc]  # per-instance name
        self._detector: Any = None
        self.reset()

    # -------------------------------------------------------------- helpers
    def _new_detector(self) -> Any:
        from river import drift  # lazy: never at module import

        cls = getattr(drift, KINDS[self.kind][0])
        try:
            return cls(**self.params)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"bad parameters for kind {self.kind!r}: {exc}") from None

    def _ph_sums(self) -> tuple[float, float]:
        det = self._detector
        if det._x_mean.n < det.min_instances:
            return 0.0, 0.0
        inc = det._sum_increase - det._min_increase
        dec = det._max_decrease - det._sum_decrease
        if det.mode == "up":
            dec = 0.0
        elif det.mode == "down":
            inc = 0.0
        return float(inc), float(dec)

    # ------------------------------------------------------------ interface
    @property
    def threshold(self) -> float:
        """The detector's ``threshold`` parameter, or nan if it has none."""
        value = getattr(self._detector, "threshold", None)
        return float(value) if value is not None else math.nan

    @property
    def statistic(self) -> float:
        """Current statistic (see the module docstring; 0.0 for ADWIN)."""
        if self.kind == "page_hinkley":
            return max(self._ph_sums())
        return 0.0

    @property
    def direction(self) -> int:
        """+1 / -1 for the last trip's direction, 0 if none since reset."""
        return self._dir

    def reset(self) -> None:
        """Re-create the river detector and forget the replay buffer."""
        self._detector = self._new_detector()
        self._history: list[float] = []
        self._dir = 0

    def update(self, z: FloatArray) -> int:
        """Feed samples one by one to river; return the first trip index or -1."""
        det = self._detector
        hist = self._history
        is_ph = self.kind == "page_hinkley"
        for i, v in enumerate(np.asarray(z, dtype=np.float64).reshape(-1).tolist()):
            before = 0.0 if is_ph else det.estimation
            det.update(v)
            hist.append(v)
            if det.drift_detected:
                if is_ph:
                    inc, dec = self._ph_sums()
                    self._dir = 1 if inc >= dec else -1
                else:
                    change = det.estimation - before
                    self._dir = 1 if change > 0 else (-1 if change < 0 else 0)
                self._trim()
                return i
        self._trim()
        return -1

    def _trim(self) -> None:
        extra = len(self._history) - self.max_replay
        if extra > 0:
            del self._history[:extra]

    def get_state(self) -> dict[str, Any]:
        """Samples since the last reset (newest ``max_replay``) and direction."""
        return {"history": list(self._history), "direction": int(self._dir)}

    def set_state(self, state: dict[str, Any]) -> None:
        """Rebuild the detector and replay the stored samples into it."""
        det = self._new_detector()
        history = [float(v) for v in state["history"]]
        for v in history:
            det.update(v)
        self._detector = det
        self._history = history
        self._dir = int(state["direction"])
