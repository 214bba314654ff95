"""The one small interface every sequential test implements.

A sequential test watches a stream of *standardised residuals*: values that
the stream engine has already centred on the baseline level, divided by the
baseline sigma, prewhitened when the feed is autocorrelated, and clipped so a
lone spike cannot dominate.  In control they are close to N(0, 1).

The engine feeds residuals in batches.  A test consumes them in order and
stops at the first sample where it trips, so the engine can act on the trip
(fit the step, open an event) and then reset the test.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]


class SequentialTest(ABC):
    """Base class of the sequential tests (CUSUM, GLR, river adapters).

    Subclasses store their constructor arguments as public attributes under
    the same names, keep changing state private and set it up in
    :meth:`reset`.
    """

    #: Short name used in alert records (``test`` field) and configuration.
    name: ClassVar[str] = ""

    # Subclasses may declare __slots__ (the default test does: one per stream).
    __slots__ = ()

    @property
    @abstractmethod
    def threshold(self) -> float:
        """The value of :attr:`statistic` at which the test trips."""

    @property
    @abstractmethod
    def statistic(self) -> float:
        """The current value of the test statistic.

        After a trip it holds the value at the tripping sample until
        :meth:`reset` is called.
        """

    @property
    @abstractmethod
    def direction(self) -> int:
        """+1 if the last trip was upward, -1 if downward, 0 if unknown or none."""

    @abstractmethod
    def update(self, z: FloatArray) -> int:
        """Feed standardised residuals in time order.

        Returns the index into ``z`` of the first sample at which the test
        trips, or -1 if it does not trip.  Samples after a trip index are not
        consumed; the caller resets the test and feeds them again if it wants.
        Never raises on numeric input (the engine has already screened NaN
        and inf out).
        """

    def update_one(self, z: float) -> bool:
        """Feed one standardised residual; True when the test trips on it.

        The same as :meth:`update` on a one-element array.  The engine calls
        it for the one or two samples a live stream brings per round; a test
        whose recursion is cheaper in plain floats overrides it.
        """
        return self.update(np.array([z])) == 0

    @abstractmethod
    def reset(self) -> None:
        """Forget all accumulated evidence (keeps the design parameters)."""

    @abstractmethod
    def get_state(self) -> dict[str, Any]:
        """Return the changing state as a JSON-serialisable dict (for snapshots)."""

    @abstractmethod
    def set_state(self, state: dict[str, Any]) -> None:
        """Restore state produced by :meth:`get_state` on an identically built test."""
