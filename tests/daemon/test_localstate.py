"""The local-state side of the daemon as a part of its own (shiftwatch.localstate), without a daemon.

``LocalState`` is driven here directly on real files: a real ``StateStore`` and ``Journal`` in a
state directory under ``tmp_path``, real ``FloorDesk``, ``StatusBoard``, ``Metrics`` and engines.
What it hands the daemon is recorded: ``engine_for`` makes an engine as the daemon's does, and
``emit`` notes the records.  The transitions: a snapshot written (read back with the standard
library's gzip and json, and restored), rounds journaled and a crash (SIGKILL of a process of
its own) that the journal's replay makes up for, damaged state refused with a line that names
what and where, and a journal deleted behind its back said, counted and started afresh.  Each restore is held against ``Daemon.restore`` on a copy of the same directory:
the same engines, the same lines, the same counts.

References: the file layout is the one statestore.py describes, read here with Python's
``gzip`` and ``json`` modules alone; a restore must leave each engine as the same samples fed
without a file in between do, in the batches a restore feeds (the journal's promise, README
"State, restarts and signals"; the engines fed in the test, not stored values); the daemon's
own restore on a copy of the same directory.  The step is planted by the test at reading 700 of
a N(500, 0.5) series, 3 sigma; that a CUSUM places such a step within a few readings of where
it is is common practice (from memory: Montgomery, "Introduction to Statistical Quality
Control", section 9.1, the CUSUM's estimate of the change point as the last time its statistic
was zero).
"""

from __future__ import annotations

import gzip
import json
import logging
import shutil
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np

from shiftwatch.config import Config, StreamConfig, load_config
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.records import AlertRecord
from shiftwatch.daemon import Daemon
from shiftwatch.floor import FloorDesk
from shiftwatch.journal import JOURNAL_NAME, Journal, JournalGroup
from shiftwatch.localstate import LocalState
from shiftwatch.metrics import FloorMetrics, Metrics
from shiftwatch.statestore import SNAPSHOT_NAME, StateStore
from shiftwatch.status import StatusBoard

from .loglines import Lines

T0 = 1_790_000_000.0
TOPICS = ("brackenfield/l4/fill", "brackenfield/l5/fill")
STEP_AT = 700
#: where the process of the crash test is killed: four readings into the step, after the second
#: stream's step was detected (at 703) and before the first's was (at 706)
CRASH_AT = 704


def series(k: int) -> np.ndarray:
    """900 readings of N(500, 0.5) with a step of 1.5 (3 sigma) at STEP_AT."""
    x = 500.0 + 0.5 * np.random.default_rng(40 + k).standard_normal(900)
    x[STEP_AT:] += 1.5
    return x


def write_config(tmp_path: Path, name: str) -> Path:
    path = tmp_path / f"{name}.yaml"
    path.write_text("streams:\n  - {topic: 'brackenfield/+/fill', format: json, value: v, time: ts, "
                    "unit: g}\n"
                    f"metrics: {{listen: '127.0.0.1:0'}}\nstate: {{dir: '{tmp_path / name}'}}\n")
    return path


class Part:
    """A LocalState on the state directory of ``cfg`` with what it hands the daemon recorded."""

    def __init__(self, cfg: Config) -> None:
        self.cfg = cfg
        self.lines = Lines()
        self.log = logging.getLogger(f"test_localstate.{id(self)}")
        self.log.propagate = False
        self.log.setLevel(logging.DEBUG)
        self.log.addHandler(self.lines)
        self.metrics = Metrics()
        self.engines: dict[str, StreamEngine] = {}
        self.filters: dict[str, str] = {}
        self.records: list[AlertRecord] = []
        snaps = Path(cfg.state.dir) / "snapshots"
        self.journal = Journal(snaps, logger=self.log)
        self.floor = FloorDesk(cfg.alerts.topic_prefix, snaps, FloorMetrics(self.metrics.registry), self.log,
                               lambda topic, payload, durable: None)
        self.local = LocalState(
            engines=self.engines, filters=self.filters, store=StateStore(snaps, logger=self.log),
            journal=self.journal, config=lambda: self.cfg, floor=self.floor,
            status=StatusBoard(self.metrics.streams), pool=None, tz="UTC",
            engine_for=self.engine_for, emit=lambda rec, arrived: self.records.append(rec),
            metrics=self.metrics, log=self.log)

    def engine_for(self, name: str, spec: StreamConfig, unit: str | None) -> StreamEngine:
        """As Daemon.engine_for, without its stream limit and "new stream" line."""
        eng = self.engines.get(name)
        if eng is None:
            eng = self.engines[name] = StreamEngine(name, spec.detection, unit=unit)
            self.filters[name] = spec.topic
            self.floor.attach(name, eng)
        return eng

    def feed(self, lo: int, hi: int, step: int = 50) -> None:
        """Readings lo..hi of each topic in rounds of ``step``, each round journaled after it is fed."""
        spec = self.cfg.streams[0]
        for a in range(lo, hi, step):
            fed = []
            for k, topic in enumerate(TOPICS):
                t = T0 + np.arange(float(a), float(min(a + step, hi)))
                x, arr = series(k)[a:a + len(t)], t + 0.25
                res = self.engine_for(topic, spec, "g").process(t, x, arr)
                self.records.extend(res.records)
                fed.append(JournalGroup(topic, "g", t, x, arr, spec.topic))
            self.local.journal_round(fed, None)

    def count(self, name: str) -> float:
        return self.metrics.registry.get_sample_value(name) or 0.0


def started(tmp_path: Path, name: str) -> tuple[Config, Path, Part]:
    """A configuration with its state directory under ``tmp_path / name``, and a LocalState
    restored on it (nothing there yet: the journal starts)."""
    cfg = load_config(str(write_config(tmp_path, name)))
    part = Part(cfg)
    part.local.restore()
    return cfg, Path(cfg.state.dir) / "snapshots", part


def states(engines: dict[str, StreamEngine]) -> dict[str, str]:
    return {n: json.dumps(e.get_state(), sort_keys=True) for n, e in engines.items()}


def reference(upto: int) -> dict[str, StreamEngine]:
    """Engines fed what a restore feeds them, without a file in between: the readings up to 500
    in the rounds of 50 a snapshot at 500 holds, then those after it in one batch, as the
    journal's replay gathers them.  (Fed in other rounds, states differ in the last bits of a
    few sums: an engine's sums depend on how its samples were batched.)"""
    spec = StreamConfig("brackenfield/+/fill", format="json", value="v", time="ts", unit="g")
    out = {}
    for k, topic in enumerate(TOPICS):
        eng = out[topic] = StreamEngine(topic, spec.detection, unit="g")
        for a, b in [(a, min(a + 50, 500)) for a in range(0, min(upto, 500), 50)] + \
                ([(500, upto)] if upto > 500 else []):
            t = T0 + np.arange(float(a), float(b))
            eng.process(t, series(k)[a:b], t + 0.25)
    return out


def daemon_restore(tmp_path: Path, state_from: Path, name: str) -> tuple[Daemon, Lines]:
    """Daemon.restore on a copy of the state directory ``state_from`` (the daemon's own lines kept)."""
    path = write_config(tmp_path, name)
    shutil.copytree(state_from, tmp_path / name)
    lines = Lines()
    log = logging.getLogger(f"test_localstate.daemon.{name}")
    log.propagate = False
    log.setLevel(logging.DEBUG)
    log.addHandler(lines)
    d = Daemon(load_config(str(path)), config_path=str(path), logger=log, metrics=Metrics())
    d.restore()
    assert d.journal is not None
    d.journal.close()
    return d, lines


def same_as_daemon(tmp_path: Path, part: Part, state_from: Path, name: str) -> None:
    """A restore by LocalState and one by the daemon, on copies of one directory, agree."""
    d, lines = daemon_restore(tmp_path, state_from, name)
    assert states(d.engines) == states(part.engines)
    assert d._filters == part.filters
    where = str(Path(part.cfg.state.dir))
    assert [m.replace(str(tmp_path / name), where) for m in lines.lines] == part.lines.lines
    for counter in ("shiftwatch_stream_states_set_aside_total", "shiftwatch_journal_damaged_total"):
        assert d.metrics.registry.get_sample_value(counter) == part.count(counter), counter


def test_a_snapshot_is_written_to_disk_and_restored(tmp_path: Path) -> None:
    cfg, snaps, a = started(tmp_path, "a")
    a.feed(0, 500)
    assert a.local.snapshot()
    assert a.count("shiftwatch_snapshots_total") == 1
    a.journal.close()

    # The file as statestore.py describes it, read with the standard library alone.
    with gzip.open(snaps / SNAPSHOT_NAME, "rt", encoding="utf-8") as f:
        lines = [json.loads(line) for line in f]
    head, end = lines[0], lines[-1]
    assert head["format"] == "shiftwatch-state" and head["streams"] == len(TOPICS) == end["end"]
    assert sorted(n for n, _ in lines[1:-1]) == sorted(TOPICS)
    assert head["meta"]["filters"] == {t: "brackenfield/+/fill" for t in TOPICS}
    # The journal now belongs to this snapshot: its header repeats the snapshot's token.
    assert Journal(snaps).open(head["meta"]["journal"]) == []

    b = Part(cfg)
    b.local.restore()
    b.journal.close()
    assert states(b.engines) == states(a.engines) == states(reference(500))
    assert b.lines.said("restored 2 stream(s) from the snapshot of") == 1
    assert b.records == []
    same_as_daemon(tmp_path, b, Path(cfg.state.dir), "a-daemon")


def test_the_journal_is_replayed_after_a_crash(tmp_path: Path) -> None:
    path = write_config(tmp_path, "b")
    # A process of its own takes a snapshot at reading 500, journals seven rounds of at most
    # 30 more (the first four readings of the step among them), and is killed: the snapshot
    # holds 500 readings a stream, the journal the 204 after them.
    code = (
        "import os, signal, sys, types\n"
        "pkg = types.ModuleType('localrun')\n"
        f"pkg.__path__ = [{str(Path(__file__).parent)!r}]\n"
        "sys.modules['localrun'] = pkg\n"
        "from localrun.test_localstate import Part\n"
        "from shiftwatch.config import load_config\n"
        f"p = Part(load_config({str(path)!r}))\n"
        "p.local.restore()\n"
        "p.feed(0, 500)\n"
        "assert p.local.snapshot()\n"
        "p.feed(500, CRASH_AT, 30)\n"
        "os.kill(os.getpid(), signal.SIGKILL)\n").replace("CRASH_AT", str(CRASH_AT))
    res = subprocess.run([sys.executable, "-c", code], check=False)
    assert res.returncode == -signal.SIGKILL
    cfg = load_config(str(path))
    state = Path(cfg.state.dir)
    shutil.copytree(state, tmp_path / "b-as-killed")

    b = Part(cfg)
    b.local.restore()
    assert b.lines.said("replayed 408 sample(s) in 7 round(s) from the journal") == 1
    # The record the replay makes again (the second stream's step detected) is not published
    # again (it was, before the crash): it is noted for acknowledgement only.
    assert b.records == []
    assert [e.phase for e in b.floor.view(TOPICS[1]).events] == ["detected"]
    assert not b.floor.view(TOPICS[0]).events
    ref = reference(CRASH_AT)
    assert states(b.engines) == states(ref)
    same_as_daemon(tmp_path, b, tmp_path / "b-as-killed", "b-daemon")

    # Carried on, the restored engines and the reference ones give the same records, and
    # the planted step is confirmed on each stream within a few readings of where it is.
    b.feed(CRASH_AT, 900)
    b.journal.close()
    ref_records = []
    for k, eng in enumerate(ref.values()):
        for a in range(CRASH_AT, 900, 50):
            t = T0 + np.arange(float(a), float(min(a + 50, 900)))
            ref_records += eng.process(t, series(k)[a:a + len(t)], t + 0.25).records
    assert sorted(json.dumps(r.to_dict()) for r in b.records) == \
        sorted(json.dumps(r.to_dict()) for r in ref_records)
    confirmed = {r.stream: r for r in b.records if r.phase == "confirmed"}
    assert sorted(confirmed) == sorted(TOPICS)
    assert all(abs(r.shift_at - (T0 + STEP_AT)) <= 5 for r in confirmed.values()), \
        [r.shift_at - T0 for r in confirmed.values()]


def test_damaged_state_is_refused_naming_the_file_and_the_rest_is_kept(tmp_path: Path) -> None:
    cfg, snaps, a = started(tmp_path, "c")
    a.feed(0, 300)
    assert a.local.snapshot()
    a.journal.close()

    # One stream's state damaged (its window is no list of numbers): that stream only is set
    # aside, counted, with its name; the other is restored.
    streams, meta = StateStore(snaps).load()
    bad: dict[str, Any] = {n: dict(s) for n, s in streams.items()}
    bad[TOPICS[0]]["times"] = "not a window"
    StateStore(snaps).save(bad, meta)
    shutil.copytree(Path(cfg.state.dir), tmp_path / "one-stream")
    b = Part(cfg)
    b.local.restore()
    b.journal.close()
    assert list(b.engines) == [TOPICS[1]]
    assert b.count("shiftwatch_stream_states_set_aside_total") == 1
    assert b.lines.said(f"saved state of stream {TOPICS[0]} set aside (") == 1
    same_as_daemon(tmp_path, b, tmp_path / "one-stream", "c-daemon-1")

    # The snapshot file itself damaged (its gzip stream cut short): refused with a line that
    # names the file and where it was moved; nothing is restored and nothing raises.
    data = (snaps / SNAPSHOT_NAME).read_bytes()
    (snaps / SNAPSHOT_NAME).write_bytes(data[: len(data) // 2])
    shutil.copytree(Path(cfg.state.dir), tmp_path / "cut")
    c = Part(cfg)
    c.local.restore()
    c.journal.close()
    assert c.engines == {}
    said = [m for m in c.lines.lines if str(snaps / SNAPSHOT_NAME) in m]
    assert len(said) == 1 and "is unreadable" in said[0] and f"moved to {SNAPSHOT_NAME}.corrupt-1" in said[0]
    assert (snaps / f"{SNAPSHOT_NAME}.corrupt-1").read_bytes() == data[: len(data) // 2]
    same_as_daemon(tmp_path, c, tmp_path / "cut", "c-daemon-2")

    # A snapshot that cannot be read at all (a directory in its place): one line naming the
    # state directory and why; the daemon starts with streams warming up.
    (snaps / SNAPSHOT_NAME).mkdir()
    e = Part(cfg)
    e.local.restore()
    e.journal.close()
    assert e.engines == {}
    assert e.lines.said(f"state snapshot in {snaps} cannot be read (") == 1


def test_a_journal_deleted_behind_its_back_is_said_counted_and_started_afresh(tmp_path: Path) -> None:
    cfg, snaps, a = started(tmp_path, "d")
    a.feed(0, 200)
    a.local.check_journal()  # nothing wrong: nothing said, nothing taken
    assert a.lines.lines == [] and a.count("shiftwatch_snapshots_total") == 0
    (snaps / JOURNAL_NAME).unlink()
    a.local.check_journal()
    said = [m for m in a.lines.lines if str(snaps / JOURNAL_NAME) in m]
    assert len(said) == 1 and "was deleted" in said[0] and "taking a snapshot" in said[0]
    assert a.count("shiftwatch_journal_damaged_total") == 1
    assert a.count("shiftwatch_snapshots_total") == 1
    # The snapshot holds what the lost journal did, and a fresh journal belongs to it.
    a.feed(200, 250)
    a.journal.close()
    b = Part(cfg)
    b.local.restore()
    b.journal.close()
    assert b.lines.said("replayed 100 sample(s) in 1 round(s) from the journal") == 1
    assert states(b.engines) == states(a.engines)
