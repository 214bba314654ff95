"""History files for the replay tests, and replays computed without shiftwatch's readers.

The streams belong to the Brackenfield bottling plant, line 2 (an invented
site): filler heads, a capper's torque and a tunnel oven, one sample a second,
each with a step of its own, lone spikes, and a fixed random state.

The references read the files with outside readers (the stdlib ``csv``
module and ``datetime.fromisoformat``, pandas, pyarrow) and feed each stream
to its engine in one batch; the engine is batch-independent, so a correct
streamed replay gives exactly their records.
"""

from __future__ import annotations

import csv
import json
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from shiftwatch.core.engine import AlertRecord, StreamEngine
from shiftwatch.core.timefmt import format_time
from shiftwatch.decode import EPOCH_MS_ABOVE

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC).timestamp()
#: stream -> (level, sigma, step in sigmas, sample index of the step)
STREAMS = {
    "brackenfield/line2/filler/head1/fill": (500.0, 0.8, 1.5, 1400),
    "brackenfield/line2/filler/head2/fill": (500.0, 0.7, -1.2, 2600),
    "brackenfield/line2/capper/torque": (2.4, 0.05, 2.0, 900),
    "brackenfield/line2/oven/zone3_temp": (182.0, 0.4, 1.0, 3300),
}


def readings(n: int, streams: Iterable[str] = tuple(STREAMS), *, random_state: int = 12,
             t0: float = T0) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """n samples a second per stream: (times, values rounded to 4 decimals)."""
    rng = np.random.default_rng(random_state)
    t = t0 + np.arange(n, dtype=np.float64)
    out = {}
    for i, name in enumerate(streams):
        level, sigma, step, at = STREAMS.get(name, (100.0 + i, 1.0, 1.5, n // 2))
        v = level + sigma * rng.standard_normal(n)
        v[min(at, n):] += step * sigma
        spikes = np.flatnonzero(rng.random(n) < 0.001)
        v[spikes] += 9 * sigma
        out[name] = (t.copy(), np.round(v, 4))
    return out


def time_text(t: float, form: str) -> str:
    if form == "rfc3339":
        return format_time(t)
    if form == "epoch_s":
        return f"{t:.3f}"
    if form == "epoch_ms":
        return str(int(round(t * 1000)))  # noqa: RUF046  t may be a NumPy scalar
    raise ValueError(form)


def write_long(path: Path, data: dict[str, tuple[np.ndarray, np.ndarray]], *, form: str = "rfc3339",
               stamps: list[str] | None = None) -> Path:
    """Long CSV, rows in time order, the streams of one time in the order of ``data``."""
    names = list(data)
    t = data[names[0]][0]
    with open(path, "w", encoding="utf-8", newline="") as f:
        f.write("time,stream,value\n")
        for i in range(t.shape[0]):
            stamp = stamps[i] if stamps is not None else time_text(float(t[i]), form)
            f.write("".join(f"{stamp},{name},{data[name][1][i]}\n" for name in names))
    return path


def write_wide(path: Path, data: dict[str, tuple[np.ndarray, np.ndarray]], *, missing: float = 0.0,
               random_state: int = 3) -> Path:
    """Wide CSV: time, then a column per stream; a share ``missing`` of the cells left empty."""
    rng = np.random.default_rng(random_state)
    names = list(data)
    t = data[names[0]][0]
    gone = rng.random((t.shape[0], len(names))) < missing
    with open(path, "w", encoding="utf-8", newline="") as f:
        f.write("time," + ",".join(names) + "\n")
        for i in range(t.shape[0]):
            cells = ["" if gone[i, j] else str(data[n][1][i]) for j, n in enumerate(names)]
            f.write(format_time(float(t[i])) + "," + ",".join(cells) + "\n")
    return path


def stdlib_time(text: str) -> float:
    """A time as the stdlib reads it: datetime.fromisoformat for text with a date, float for
    epoch numbers, milliseconds above the daemon's bound (shiftwatch.decode)."""
    s = text.strip()
    if "T" in s or ":" in s:
        dt = datetime.fromisoformat(s)
        assert dt.tzinfo is not None
        return dt.timestamp()
    v = float(s)
    return v / 1000.0 if v > EPOCH_MS_ABOVE else v


def stdlib_long(path: Path) -> tuple[dict[str, tuple[list[float], list[float]]], list[int]]:
    """A long CSV read with the stdlib csv module: per stream (times, values) in file order, and
    the line numbers of the rows it could not read (bad time or value, too few fields)."""
    series: dict[str, tuple[list[float], list[float]]] = {}
    bad = []
    with open(path, newline="", encoding="utf-8") as f:
        reader = csv.reader(f)
        next(reader)
        for row in reader:
            if not row:
                continue
            try:
                t, name, v = stdlib_time(row[0]), row[1].strip(), float(row[2])
            except (ValueError, IndexError):
                bad.append(reader.line_num)
                continue
            ts, vs = series.setdefault(name, ([], []))
            ts.append(t)
            vs.append(v)
    return series, bad


def one_batch_records(series: dict[str, tuple[Iterable[float], Iterable[float]]]) -> list[str]:
    """Each stream through its own engine in one batch, records as JSON lines in replay's order."""
    records: list[AlertRecord] = []
    for name in sorted(series):
        t, v = series[name]
        records += StreamEngine(name).process(np.asarray(list(t), dtype=np.float64),
                                              np.asarray(list(v), dtype=np.float64)).records
    records.sort(key=lambda r: (r.as_of, r.stream))
    return [json.dumps(r.to_dict()) for r in records]


def json_lines(records: Iterable[AlertRecord]) -> list[str]:
    return [json.dumps(r.to_dict()) for r in records]


def printed_records(stdout: str) -> list[str]:
    """The records ``replay`` printed, less the summary it adds to each (as the daemon
    publishes it), in the form of :func:`json_lines`."""
    out = []
    for line in stdout.splitlines():
        d = json.loads(line)
        assert d.pop("summary")
        out.append(json.dumps(d))
    return out
