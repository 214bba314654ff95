"""Example data for the report tests: the invented Brackenfield bottling line.

The sensors, their levels, noise and planned steps are the demo's
(:data:`shiftwatch.demo.SENSORS`); the schedule here is stretched to 10
samples a second for five minutes, and filler head 3 gets a blip of six
samples that returns to its old level, which the engine should dismiss (a
longer excursion would be confirmed and then reported as returned); filler
head 1 steps up 6 samples before the end, so that event is still open when
the file ends.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.core.timefmt import format_time
from shiftwatch.demo import RATE_HZ, SENSORS

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
N = 3000  # samples per stream
STRETCH = 40  # the demo's step times (seconds) times this: sample index of the step
EXCURSION = ("brackenfield/line2/filler/head3/fill", 1200, 6, 3.0)  # stream, start, length, sigmas
LATE_STEP = ("brackenfield/line2/filler/head1/fill", N - 6, 3.0)  # stream, start, sigmas: still open at the end


@dataclass(frozen=True)
class PlantCsv:
    path: Path
    steps: dict[str, tuple[float, float]]  # stream -> (time of the first stepped sample, step)
    excursion: tuple[str, float, float]  # stream, first and last time of the excursion
    streams: list[str]
    rows: int


def write_plant_csv(path: Path, *, n: int = N, random_state: int = 2026) -> PlantCsv:
    """Write the line's samples as long CSV (time,stream,value), rows in time order."""
    rng = np.random.default_rng(random_state)
    t = T0 + np.arange(n) / RATE_HZ
    cols = {}
    steps = {}
    for s in SENSORS:
        v = s.level + s.sigma * rng.standard_normal(n)
        if s.step_at is not None:
            k = int(s.step_at * STRETCH)
            v[k:] += s.step
            steps[s.stream] = (float(t[k]), s.step)
        if s.stream == EXCURSION[0]:
            a, length, size = EXCURSION[1:]
            v[a:a + length] += size * s.sigma
        if s.stream == LATE_STEP[0]:
            v[LATE_STEP[1]:] += LATE_STEP[2] * s.sigma
        spikes = np.flatnonzero(rng.random(n) < 0.002)  # lone spikes, as in the demo
        v[spikes] += 8 * s.sigma * np.where(rng.random(spikes.shape[0]) < 0.5, 1, -1)
        cols[s.stream] = v
    with open(path, "w", encoding="utf-8") as f:
        f.write("time,stream,value\n")
        for i in range(n):
            stamp = format_time(float(t[i]))
            for name, v in cols.items():
                f.write(f"{stamp},{name},{v[i]:.3f}\n")
    a, length = EXCURSION[1], EXCURSION[2]
    return PlantCsv(path, steps, (EXCURSION[0], float(t[a]), float(t[a + length - 1])),
                    sorted(cols), n * len(cols))


@pytest.fixture
def plant_csv(tmp_path: Path) -> PlantCsv:
    """The line's CSV with the default schedule."""
    return write_plant_csv(tmp_path / "brackenfield-line2.csv")


@pytest.fixture
def write_plant() -> Callable[..., PlantCsv]:
    """:func:`write_plant_csv`, for tests that need another length."""
    return write_plant_csv
