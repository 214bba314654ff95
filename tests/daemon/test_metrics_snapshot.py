"""``StreamStats.from_engine`` through the slots' own setters (``metrics.DIRECT_SNAPSHOT``,
since 2026-12-05) against the dataclass's ``__init__`` (the reference, the switch off).

Guard of a speed change: the per-stream snapshot the main thread swaps in after every
round must be the same object either way (equal, of the same type, frozen, without a
``__dict__``, the counters copies and not the engine's own), for engines warming up and
watching, after a step (records), with rejections, with a unit, and no test designed yet
(a NaN threshold).  The snapshot's figures are also held to the engine's own
attributes one by one.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator

import numpy as np
import pytest

from shiftwatch import metrics as metrics_mod
from shiftwatch.core.engine import StreamEngine
from shiftwatch.metrics import StreamStats

T0 = 1_790_000_000.0


def _reference(engine: StreamEngine) -> StreamStats:
    saved = metrics_mod.DIRECT_SNAPSHOT
    metrics_mod.DIRECT_SNAPSHOT = False
    try:
        return StreamStats.from_engine(engine)
    finally:
        metrics_mod.DIRECT_SNAPSHOT = saved


def _histories() -> Iterator[StreamEngine]:
    """Engines of Brackenfield fill weights fed in batches, yielded after each batch: a clean
    stream, one with a 4-sigma step, one with NaNs, repeats and spikes, one with a unit, one
    whose sensor freezes (its snapshot then carries the engine's ``repeating`` flag)."""
    rng = np.random.default_rng(7)
    for kind in range(5):
        eng = StreamEngine(f"brackenfield/filler{kind}/fill_g", unit="g" if kind == 3 else None)
        t = 0
        for _k in range(40):
            n = int(rng.choice([1, 7, 60, 260]))
            times = T0 + t + np.arange(float(n))
            x = 500.0 + 0.4 * rng.standard_normal(n)
            if kind == 1 and t > 1500:
                x += 1.6
            if kind == 2:
                x[rng.random(n) < 0.05] = np.nan
                if n > 3:
                    times[2] = times[1]
                x[rng.random(n) < 0.01] += 9.0
            if kind == 4 and t > 1500:
                x[:] = 500.2
            t += n
            eng.process(times, x, times + 0.5)
            yield eng


def test_the_direct_snapshot_is_the_reference_snapshot() -> None:
    assert metrics_mod.DIRECT_SNAPSHOT is True  # the daemon's default
    states = set()
    with_records = with_rejections = with_repeating = 0
    for eng in _histories():
        new, old = StreamStats.from_engine(eng), _reference(eng)
        assert type(new) is StreamStats and new == old
        for f in dataclasses.fields(StreamStats):
            a, b = getattr(new, f.name), getattr(old, f.name)
            both_nan = isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b)
            assert type(a) is type(b) and (a == b or both_nan), f.name
        assert not hasattr(new, "__dict__")
        with pytest.raises(dataclasses.FrozenInstanceError):
            new.level = 1.0  # type: ignore[misc]
        # The figures, one by one, from the engine itself.
        assert new.samples_total == eng.samples_total and new.state == eng.state and new.unit == eng.unit
        assert new.level == eng.level and new.sigma == eng.sigma and new.last_shift_at == eng.last_shift_at
        assert new.statistic == float(eng.statistic)
        assert new.threshold == float(eng.threshold) or (np.isnan(new.threshold) and np.isnan(eng.threshold))
        assert dict(new.rejected_total) == dict(eng.rejected_total)
        assert dict(new.records_total) == dict(eng.records_total)
        assert new.repeating == eng.repeating
        with_repeating += eng.repeating is not None
        if eng.rejected_total:
            with_rejections += 1
            assert new.rejected_total is not eng.rejected_total  # a copy, not the engine's counter
        if eng.records_total:
            with_records += 1
            assert new.records_total is not eng.records_total
        states.add(eng.state)
    assert {"warming_up", "watching"} <= states and with_records > 0 and with_rejections > 0
    assert with_repeating > 0


def test_a_subclass_still_goes_through_its_init() -> None:
    # from_engine is a classmethod: a subclass (none in the package) gets its own __init__.
    calls = []

    @dataclasses.dataclass(frozen=True, slots=True)
    class Noted(StreamStats):
        def __post_init__(self) -> None:
            calls.append(self.samples_total)

    eng = next(_histories())
    got = Noted.from_engine(eng)
    assert type(got) is Noted and calls == [eng.samples_total]
