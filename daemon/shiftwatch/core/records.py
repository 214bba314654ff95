"""What an engine hands back: alert records (their JSON form and id), rejections, the
result of a batch, and the counters of records and rejected samples.

Every record carries :data:`ADVISORY`: shiftwatch advises, it is not a safety
function or an interlock.
"""

from __future__ import annotations

import hashlib
import math
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from shiftwatch.core import sensorcheck as _sensorcheck
from shiftwatch.core.timefmt import format_time

#: The phases of an event's records: one ``detected``, then one of the others.
PHASES = ("detected", "confirmed", "returned", "dismissed", "undecided", "planned")
#: A step inside a planned window gets one record of this phase instead (see core/plans.py).
PLANNED = "planned"

#: Printed with every alert: shiftwatch advises, it does not protect.
ADVISORY = (
    "Advisory only: shiftwatch is not a safety function, a safety instrumented system or an "
    "interlock, and must not start or stop equipment without the site's own safety review. "
    "Site procedures, local codes and licensed practice come first."
)

#: Field order of the alert record (the JSON contract shared with the daemon).
RECORD_FIELDS = (
    "id", "phase", "stream", "detected_at", "shift_at", "shift_at_low", "shift_at_high",
    "level_before", "level_after", "delta", "delta_sigma", "sigma", "n_before", "n_after",
    "test", "statistic", "threshold",
)


@dataclass(frozen=True)
class AlertRecord:
    """One record of an event.  ``phase`` is one of :data:`PHASES`.

    Times are epoch seconds here and RFC 3339 in :meth:`to_dict`.  ``as_of``
    is the time of the sample that completed the record.
    """

    id: str
    phase: str
    stream: str
    detected_at: float
    shift_at: float
    shift_at_low: float
    shift_at_high: float
    level_before: float
    level_after: float
    delta: float
    delta_sigma: float
    sigma: float
    n_before: int
    n_after: int
    test: str
    statistic: float
    threshold: float
    as_of: float
    interval_level: float
    level_before_se: float
    level_after_se: float
    f_stat: float
    p_value: float
    direction: str
    unit: str | None = None
    #: for a ``returned`` record: the event whose step the level went back from, and its start
    excursion_id: str | None = None
    excursion_start: float | None = None
    #: for a ``planned`` record: the planned window the step fell in
    plan_id: str | None = None
    #: the time of the last reading before ``shift_at_low`` when the readings paused there
    #: for more than GAP_FACTOR of their usual intervals: the step came at some moment after it
    gap_from: float | None = None
    #: the one value the record's last ``repeated_of`` readings (nearly) all repeat, and how
    #: many of them hold it: a stuck sensor is possible (core/sensorcheck.py)
    repeated_value: float | None = None
    repeated_count: int | None = None
    repeated_of: int | None = None
    #: the noise's spread over the event's samples against before them, and the sigma it
    #: means, when it grew (core/sensorcheck.py)
    spread_ratio: float | None = None
    sigma_after: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """The JSON form: contract fields first, then the extras."""
        d: dict[str, Any] = {
            "id": self.id,
            "phase": self.phase,
            "stream": self.stream,
            "detected_at": format_time(self.detected_at),
            "shift_at": format_time(self.shift_at),
            "shift_at_low": format_time(self.shift_at_low),
            "shift_at_high": format_time(self.shift_at_high),
            "level_before": _round_level(self.level_before, self.level_before_se),
            "level_after": _round_level(self.level_after, self.level_after_se),
            "delta": _round(self.delta),
            "delta_sigma": _fixed(self.delta_sigma, 3),
            "sigma": _round(self.sigma),
            "n_before": self.n_before,
            "n_after": self.n_after,
            "test": self.test,
            "statistic": _fixed(self.statistic, 3),
            "threshold": _fixed(self.threshold, 3),
            "as_of": format_time(self.as_of),
            "direction": self.direction,
            "interval_level": self.interval_level,
            "level_before_se": _round(self.level_before_se),
            "level_after_se": _round(self.level_after_se),
            "f_stat": _fixed(self.f_stat, 3),
            "p_value": float(f"{self.p_value:.3g}") if math.isfinite(self.p_value) else None,
            "advisory": ADVISORY,
        }
        if self.unit is not None:
            d["unit"] = self.unit
        if self.excursion_id is not None:
            d["excursion_id"] = self.excursion_id
        if self.excursion_start is not None:
            d["excursion_start"] = format_time(self.excursion_start)
        if self.plan_id is not None:
            d["plan_id"] = self.plan_id
        if self.gap_from is not None:
            d["gap_from"] = format_time(self.gap_from)
        d.update(_sensorcheck.record_fields(self))
        return d


def _round(x: float) -> float | None:
    """Round to 6 significant digits for display without losing meaningful precision;
    None (JSON null) for a number that is not finite, which JSON cannot carry (RFC 8259,
    section 6: "Infinity and NaN are not permitted")."""
    if not math.isfinite(x):
        return None
    if x == 0:
        return float(x)
    return float(f"{x:.6g}")


def _round_level(x: float, se: float) -> float | None:
    """A fitted level as :func:`_round` gives it, or, where 6 significant digits would
    round it by more than a tenth of its standard error ``se`` (a reading far from
    zero with little noise: 773.152 K with sigma 0.001 K, 101325.37 Pa with sigma
    0.2 Pa), to two significant digits of ``se``.  Before, such levels were rounded by
    up to 10 of their standard errors (773.155 for 773.15542, se 5e-05), and
    ``level_after - level_before`` was no longer the record's ``delta``.

    >>> _round_level(500.0312, 0.017), _round_level(773.1554162, 5.09e-05), _round_level(101325.372, 0.0105)
    (500.031, 773.155416, 101325.372)
    """
    r = _round(x)
    if r is None or x == 0 or not (se > 0.0 and math.isfinite(se)):
        return r
    if 10.0 ** (math.floor(math.log10(abs(x))) - 5) > se / 10.0:
        return round(x, 1 - math.floor(math.log10(se)))
    return r


def _fixed(x: float, digits: int) -> float | None:
    """``x`` to ``digits`` decimals; None (JSON null) when it is not finite (see _round)."""
    return round(x, digits) if math.isfinite(x) else None


def event_id(stream: str, detected_at: float) -> str:
    """A stable id for one event: the same stream and detection time give the same id.

    Examples
    --------
    >>> event_id("line2/filler7/weight", 1764633600.0)
    '79be137c3ac03026'
    """
    h = hashlib.blake2b(f"{stream}|{detected_at:.6f}".encode(), digest_size=8)
    return h.hexdigest()


class Rejection(NamedTuple):
    """A rejected sample: its position in the batch (-1 for a sample of an
    earlier batch, such as one held for the spike check), reason code and time."""

    position: int
    reason: str
    time: float


@dataclass
class BatchResult:
    """What one call to :meth:`StreamEngine.process` produced."""

    records: list[AlertRecord] = field(default_factory=list)
    accepted: int = 0
    rejected: list[Rejection] = field(default_factory=list)
    #: runs of one repeated reading flagged (``until`` None) or ended among the batch's
    #: readings (core/repeats.py; a ``RepeatSpan`` each): no record, a flag of the stream
    repeats: Sequence[Any] = ()


class _NoCounts(Counter[str]):
    """An empty counter that refuses to count (shared by engines that have counted nothing)."""

    def _refuse(self, *args: Any, **kwargs: Any) -> Any:
        raise TypeError("this shared empty counter is read-only")

    __setitem__ = subtract = setdefault = __ior__ = __iadd__ = __isub__ = _refuse

    def update(self, iterable: Any = None, /, **kwds: Any) -> None:
        if iterable or kwds:  # Counter() itself calls update() with nothing
            self._refuse()


_NO_COUNTS: Counter[str] = _NoCounts()


def _tally(counts: Counter[str], keys: Iterable[str]) -> Counter[str]:
    """``counts`` with ``keys`` counted in (a counter of its own in place of the shared empty one)."""
    if isinstance(counts, _NoCounts):
        counts = Counter()
    counts.update(keys)
    return counts
