"""A stream's arrays from one message reach its engine with the message's arrival time as
one float (``daemon.ONE_ARRIVAL``) instead of the array of that time the journal keeps.

Guard of a speed change (screening then looks at the batch's first and last lag only,
``core/screen.py`` ``ARRIVAL_ENDS``): a daemon fed the same rounds must give the same
alert records, the same rejections and counters, the same engine states and the same
journal bytes with the switch on and off.  The rounds mix JSON arrays stamped within
the arrival limits with arrays whose newest samples are stamped too far ahead of their
arrival or whose oldest are too far behind it (``time_ahead``, ``time_behind``), two
arrays of one stream in one round (arrivals that differ: the array path), and arrays
without time stamps (the arrival is each sample's time).  The screening itself is held
to its reference in tests/core/test_screen_one_arrival.py.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from shiftwatch import daemon as daemon_mod
from shiftwatch.daemon import Daemon
from shiftwatch.mqtt import Message

from .switchrun import RunOutput, local_daemon, run_rounds

T0 = 1_790_000_000.0
ENTRY = ("{topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts, "
         "detection: {max_time_ahead: 30s, max_time_behind: 1h}}")


@contextmanager
def one_arrival(on: bool) -> Iterator[None]:
    saved = daemon_mod.ONE_ARRIVAL
    daemon_mod.ONE_ARRIVAL = on
    try:
        yield
    finally:
        daemon_mod.ONE_ARRIVAL = saved


def _array(x: np.ndarray, t0: float) -> bytes:
    return json.dumps([{"v": round(float(v), 4), "ts": t0 + j} for j, v in enumerate(x)]).encode()


def _rounds() -> list[list[Message]]:
    """6 Brackenfield fillers, 24 rounds of JSON arrays of 260 samples, one a second: two
    step by 2 sigma at round 10; now and then an array arrives 200 s early (its newest
    samples past the 30 s ahead), or about an hour late (its oldest half past the 1 h behind), or a
    stream sends two arrays in one round; filler 5 sends its values without times."""
    rng = np.random.default_rng(171)
    out = []
    for k in range(24):
        msgs = []
        for i in range(6):
            t0 = T0 + k * 260
            x = 50.0 + rng.standard_normal(260)
            if i in (1, 3) and k >= 10:
                x += 2.0
            arrived = t0 + 260 + 0.05
            u = rng.random()
            if u < 0.1:
                arrived -= 200.0
            elif u < 0.2:
                arrived += 3600.0 - 130.0
            topic = f"brackenfield/line1/filler{i}/fill"
            if i == 5:
                msgs.append(Message(topic, json.dumps([{"v": round(float(v), 4)} for v in x]).encode(), arrived, 0, 0))
            elif u > 0.85:  # two arrays of one stream in the round, each half of the samples
                msgs.append(Message(topic, _array(x[:130], t0), arrived - 1.0, 0, 0))
                msgs.append(Message(topic, _array(x[130:], t0 + 130), arrived, 0, 0))
            else:
                msgs.append(Message(topic, _array(x, t0), arrived, 0, 0))
        out.append(msgs)
    return out


def _run(tmp_path: Path, name: str, on: bool) -> tuple[RunOutput, dict[str, object]]:
    d: Daemon = local_daemon(tmp_path, name, ENTRY)
    feed = d._feed
    floats = []

    def counted(*a: object, **k: object) -> None:
        floats.append(k.get("arrived") is not None)
        feed(*a, **k)  # type: ignore[arg-type]

    d._feed = counted  # type: ignore[method-assign]
    got = run_rounds(d, _rounds(), one_arrival, on)
    counts = {n: (e.samples_total, dict(e.rejected_total), dict(e.records_total)) for n, e in d.engines.items()}
    # With the switch on, the one-message batches went with one float, the others did not.
    if on:
        assert sum(floats) > 100 and len(floats) - sum(floats) > 5
    else:
        assert not any(floats)
    return got, counts


def test_daemon_gives_the_same_records_rejections_states_and_journal_with_one_arrival(tmp_path: Path) -> None:
    new, new_counts = _run(tmp_path, "one", True)
    old, old_counts = _run(tmp_path, "array", False)
    assert len(new[0]) > 0  # the steps were detected: records to compare
    rejected = [r for _s, r, _c in new_counts.values()]  # type: ignore[misc]
    assert any("time_ahead" in r for r in rejected) and any("time_behind" in r for r in rejected)
    assert new[0] == old[0]
    assert new[1] == old[1]
    assert new_counts == old_counts
    assert len(new[2]) > 5 * 24 * 260 * 24 and new[2] == old[2]


def test_the_switch_is_on() -> None:
    assert daemon_mod.ONE_ARRIVAL is True
