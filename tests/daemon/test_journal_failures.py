"""D5: rounds processed while no journal can be written are counted.

An outside tester replaced ``state/snapshots`` (a directory) by a plain file under a running
daemon: the journal went with the directory, every snapshot failed, and the rounds after it
were taken in (and acknowledged) without a journal while
``shiftwatch_journal_failures_total`` stayed 0; after a SIGKILL those samples were gone.  The
README ("A full disk or a read-only state.dir") promises that such a round is counted, and
that detection carries on: the metric is read here over HTTP from the real daemon in a
subprocess, against a real Mosquitto.  The metric's name and ``_total`` suffix follow the
Prometheus naming conventions for counters (common practice).
"""

from __future__ import annotations

import json
import shutil
import signal
import time
from pathlib import Path

import numpy as np

from shiftwatch.broker import wait_until

from .faultkit import metric_matching as metric

STREAM = "  - topic: r/+\n    format: json\n    value: v\n    time: ts\n"


def test_rounds_taken_in_while_the_snapshot_directory_is_a_file_are_counted_as_unjournaled(
        daemon_factory, publisher, tmp_path: Path) -> None:
    d = daemon_factory(STREAM).start()
    assert d.proc is not None
    t0 = time.time() - 600
    x = 20.0 + 0.1 * np.random.default_rng(5).standard_normal(200)
    for i in range(100):
        publisher.publish("r/a", json.dumps({"v": round(float(x[i]), 4), "ts": t0 + i}))
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == 100)
    assert metric(d.scrape(), "shiftwatch_journal_failures_total") == 0
    snapshots = tmp_path / "state" / "snapshots"
    shutil.move(snapshots, tmp_path / "snapshots.moved")
    snapshots.write_text("not a directory\n")
    assert wait_until(lambda: "no fresh journal until a snapshot succeeds" in d.log_text(), timeout=20), \
        d.log_text()
    failed_before = metric(d.scrape(), "shiftwatch_snapshot_failures_total")
    assert failed_before is not None and failed_before >= 1
    # Four bursts of 10 samples, each taken in before the next: at least four rounds.
    for burst in range(4):
        for i in range(100 + 10 * burst, 110 + 10 * burst):
            publisher.publish("r/a", json.dumps({"v": round(float(x[i]), 4), "ts": t0 + i}))
        want = 110 + 10 * burst
        assert wait_until(lambda want=want: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == want)
    text = d.scrape()
    # Before the fix: 0 here, while these rounds went unjournaled.
    unjournaled = metric(text, "shiftwatch_journal_failures_total")
    assert unjournaled is not None and unjournaled >= 4, text
    assert metric(text, "shiftwatch_samples_total", stream="r/a") == 140  # detection carried on
    # The file moved away: the next snapshot succeeds, a journal starts and the count stops.
    snapshots.unlink()
    shutil.move(tmp_path / "snapshots.moved", snapshots)
    snaps = metric(d.scrape(), "shiftwatch_snapshots_total") or 0
    assert wait_until(lambda: (metric(d.scrape(), "shiftwatch_snapshots_total") or 0) > snaps, timeout=20)
    counted = metric(d.scrape(), "shiftwatch_journal_failures_total")
    for i in range(140, 150):
        publisher.publish("r/a", json.dumps({"v": round(float(x[i]), 4), "ts": t0 + i}))
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == 150)
    assert metric(d.scrape(), "shiftwatch_journal_failures_total") == counted
    # ... and a crash now loses nothing: the snapshot and the journal hold all 150.
    d.proc.send_signal(signal.SIGKILL)
    d.proc.wait()
    d.start()
    assert wait_until(lambda: metric(d.scrape(), "shiftwatch_samples_total", stream="r/a") == 150), d.log_text()
    assert d.stop() == 0
    assert "Traceback" not in d.log_text()
