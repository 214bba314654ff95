"""The SIGKILL scenario shared by tests/daemon/test_faults_daemon.py and tests/bench/bench_faults_daemon.py.

A private Mosquitto (persistence on, ``max_queued_messages`` raised), a
publisher thread sending sensor readings with scheduled steps at QoS 1, a
subscriber keeping every alert record, and the real daemon (``shiftwatch
run``) in a subprocess, killed with SIGKILL at seeded random moments and
restarted from its state directory each time.  After each kill the snapshot
is loaded with the real :class:`StateStore` (from a copy, as the next start
would see it) and the journal with the real :class:`Journal`.

The tally counts, per stream, samples the engines lost (published, never
processed) and reprocessed (seen twice: the publisher's times are unique and
increasing, so each second sighting is rejected as ``duplicate_time`` or
``out_of_order``), the records delivered more than once, and the injected
shifts without an alert.
"""

from __future__ import annotations

import ctypes
import json
import random
import resource
import shutil
import signal
import subprocess
import threading
import time
import urllib.request
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import MosquittoBroker, free_port, wait_until
from shiftwatch.journal import Journal
from shiftwatch.mqtt import PlainClient
from shiftwatch.statestore import SNAPSHOT_NAME, StateStore

T0 = 1_790_000_000.0
NOISE = 0.2
STEP = 0.6  # 3 sigma


def scrape(port: int) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        text = r.read().decode()
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = float(s.value)
    return out


def metric(m: dict[tuple[str, tuple[tuple[str, str], ...]], float], name: str, **labels: str) -> float:
    return sum(v for (n, lab), v in m.items() if n == name and all(dict(lab).get(k) == x for k, x in labels.items()))




class Piped:
    """``shiftwatch run`` with its log read through a pipe (a file would be subject to
    the file-size limit of the full-disk fault)."""

    def __init__(self, command: list[str], config: Path, port: int,
                 preexec_fn: Callable[[], None] | None = None) -> None:
        self.port = port
        self.lines: list[str] = []
        self.proc = subprocess.Popen(command + ["run", "--config", str(config)], stdout=subprocess.PIPE,
                                     stderr=subprocess.STDOUT, text=True,
                                     preexec_fn=preexec_fn)  # noqa: PLW1509 - a syscall or two, no locks
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        if not wait_until(lambda: "connected to broker" in self.text() or self.proc.poll() is not None):
            raise RuntimeError(f"daemon did not connect: {self.text()}")
        if self.proc.poll() is not None:
            raise RuntimeError(f"daemon exited: {self.text()}")

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.append(line)

    def text(self) -> str:
        return "".join(self.lines)

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            code = self.proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            code = self.proc.wait()
        self._reader.join(timeout=10)
        return code


_LIBC = ctypes.CDLL(None, use_errno=True)  # loaded here: the child after fork only calls it


def without_dac_override() -> None:
    """preexec_fn: drop the capabilities that let root write where modes forbid it."""
    for cap in (1, 2, 3):  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH, CAP_FOWNER
        if _LIBC.prctl(24, cap, 0, 0, 0) != 0:  # PR_CAPBSET_DROP
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP)")


def fsize_limit(limit: int) -> Callable[[], None]:
    """preexec_fn: files may not grow past ``limit`` bytes (a full disk, as the process sees it)."""

    def apply() -> None:
        # CPython ignores SIGXFSZ, so a write past the limit fails with EFBIG.
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return apply


@dataclass
class Plan:
    """What to publish: ``streams`` streams of ``samples`` readings, a step every ``gap`` samples."""

    streams: int = 3
    samples: int = 1200
    gap: int = 400
    rate: float = 150.0  # readings per second per stream
    seed: int = 1

    def names(self) -> list[str]:
        return [f"brackenfield/line2/filler/head{i + 1}/fill" for i in range(self.streams)]

    def series(self, i: int) -> np.ndarray:
        rng = np.random.default_rng(self.seed * 1000 + i)
        x = 500.0 + NOISE * rng.standard_normal(self.samples)
        for k, at in enumerate(self.shift_indices()):
            x[at:] += STEP if k % 2 == 0 else -STEP
        return x

    def shift_indices(self) -> list[int]:
        return list(range(self.gap, self.samples - self.gap // 2, self.gap))


@dataclass
class Tally:
    kills: int = 0
    published: int = 0
    processed: int = 0
    lost: int = 0
    reprocessed: int = 0
    records: int = 0
    duplicates: int = 0
    shifts: int = 0
    shifts_missed: int = 0
    shifts_with_two_ids: int = 0
    records_off_any_shift: int = 0
    snapshots_checked: int = 0
    snapshots_restored: int = 0
    snapshots_corrupt: int = 0
    temp_files_seen: int = 0
    journal_rounds_seen: int = 0
    seconds: float = 0.0
    per_stream: dict[str, dict[str, float]] = field(default_factory=dict)


class KillRun:
    """One scenario run in ``workdir``; call :meth:`run`, then :meth:`close`."""

    def __init__(self, workdir: Path, command: list[str], *, plan: Plan | None = None,
                 kills: int = 3, journal: bool = True, snapshot_every: str = "1s",
                 kill_seed: int = 7, lifetime: tuple[float, float] = (0.3, 2.5)) -> None:
        self.workdir = Path(workdir)
        self.command = command
        self.plan = plan or Plan()
        self.kills = kills
        self.journal = journal
        self.snapshot_every = snapshot_every
        self.rng = random.Random(kill_seed)
        self._killed_all = threading.Event()  # set when the kills are over
        self.lifetime = lifetime
        self.state = self.workdir / "state"
        self.port = free_port()
        self.cfg = self.workdir / "shiftwatch.yaml"
        self.log_path = self.workdir / "daemon.log"
        self.broker: MosquittoBroker | None = None
        self.proc: subprocess.Popen[bytes] | None = None
        self.clients: list[PlainClient] = []
        self.records: list[dict[str, Any]] = []
        self._lock = threading.Lock()
        self.tally = Tally()

    # ------------------------------------------------------------ pieces
    def _write_config(self) -> None:
        assert self.broker is not None
        self.cfg.write_text(
            f"broker:\n  url: {self.broker.url}\n  client_id: sw-killed\n  keepalive: 5\n"
            "streams:\n  - topic: brackenfield/line2/filler/+/fill\n    format: json\n"
            "    value: v\n    time: ts\n    unit: g\n"
            "alerts:\n  topic_prefix: sw\n"
            f"metrics:\n  listen: 127.0.0.1:{self.port}\n"
            f"state:\n  dir: {self.state}\n  snapshot_every: {self.snapshot_every}\n"
            f"  journal: {'true' if self.journal else 'false'}\n")

    def _on_record(self, topic: str, payload: bytes) -> None:
        try:
            body = json.loads(payload)
        except ValueError:
            return
        with self._lock:
            self.records.append(body)

    def _start_daemon(self, timeout: float = 30.0) -> None:
        offset = self.log_path.stat().st_size if self.log_path.exists() else 0
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(self.command + ["run", "--config", str(self.cfg)],
                                         stdout=log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"daemon exited with {self.proc.returncode}: {self.log()[-3000:]}")
            if "connected to broker" in self.log()[offset:]:
                return
            time.sleep(0.02)
        raise RuntimeError(f"daemon did not connect within {timeout} s: {self.log()[-3000:]}")

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def _check_state(self) -> None:
        """Load the snapshot and the journal the next start will see, from a copy."""
        snap_dir = self.state / "snapshots"
        if not snap_dir.exists():
            return
        copy = self.workdir / f"check-{self.tally.kills}"
        shutil.copytree(snap_dir, copy)
        names = sorted(p.name for p in copy.iterdir())
        self.tally.temp_files_seen += sum(1 for n in names if n.endswith(".tmp"))
        streams, meta = StateStore(copy).load()
        after = sorted(p.name for p in copy.iterdir())
        self.tally.snapshots_checked += 1
        self.tally.snapshots_restored += bool(streams)
        if any(".corrupt-" in n or ".unknown-" in n for n in after) or \
                (SNAPSHOT_NAME in names and not meta):
            self.tally.snapshots_corrupt += 1
        if any(n.endswith(".tmp") and n.startswith(f".{SNAPSHOT_NAME}") for n in after):
            self.tally.snapshots_corrupt += 1  # a leftover temp file would have stayed
        if self.journal:
            token = meta.get("journal")
            rounds = Journal(copy).open(token if isinstance(token, str) else "none")
            self.tally.journal_rounds_seen += len(rounds)
        shutil.rmtree(copy)

    def _publish_all(self, pub: PlainClient, done: threading.Event) -> None:
        p = self.plan
        names = p.names()
        series = [p.series(i) for i in range(p.streams)]
        start = time.monotonic()
        hold_at = p.samples * 9 // 10
        for j in range(p.samples):
            if j == hold_at and self.kills:
                # The last tenth waits for the last kill: on a loaded machine each restart
                # takes longer, and the readings could all be out before the kills were.
                self._killed_all.wait(180)
                start = time.monotonic() - j / p.rate
            for i, name in enumerate(names):
                pub.publish(name, json.dumps({"v": round(float(series[i][j]), 4), "ts": T0 + j}), qos=1)
            lag = start + (j + 1) / p.rate - time.monotonic()
            if lag > 0:
                time.sleep(lag)
        done.set()

    def _kill_all(self, done: threading.Event) -> None:
        """Each run of the daemon lives a random time (from its connection to the broker)
        before it is killed: some die before their first snapshot, some just after one,
        some in the middle of a round."""
        while self.tally.kills < self.kills and not done.is_set():
            time.sleep(self.rng.uniform(*self.lifetime))
            if done.is_set():
                break
            assert self.proc is not None
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()
            self.tally.kills += 1
            self._check_state()
            self._start_daemon()

    # ------------------------------------------------------------ the run
    def run(self) -> Tally:
        t_start = time.monotonic()
        self.broker = MosquittoBroker(workdir=self.workdir / "broker").start()
        self._write_config()
        viewer = PlainClient(self.broker.url, "sw-kill-viewer", subscribe=["sw/alerts/#"],
                             on_message=self._on_record).start()
        self.clients.append(viewer)
        self._start_daemon()
        time.sleep(0.3)  # let the daemon's SUBSCRIBE settle before the first reading
        pub = PlainClient(self.broker.url, "sw-kill-publisher").start()
        self.clients.append(pub)
        done = threading.Event()
        thread = threading.Thread(target=self._publish_all, args=(pub, done), daemon=True)
        thread.start()
        try:
            self._kill_all(done)
        finally:
            self._killed_all.set()
        thread.join()
        # Wait (bounded) until every stream has seen every reading once.
        names = self.plan.names()
        n = self.plan.samples
        deadline = time.monotonic() + 120
        last, still = -1.0, time.monotonic()
        while time.monotonic() < deadline:
            m = scrape(self.port)
            if all(self._processed(m, s) >= n for s in names):
                break
            seen = self._processed(m) + self._again(m)
            if seen != last:
                last, still = seen, time.monotonic()
            elif time.monotonic() - still > 3.0:  # nothing more is coming: the rest was lost
                break
            time.sleep(0.2)
        time.sleep(1.0)  # records completed by the last readings
        m = scrape(self.port)
        self._stop_daemon()
        self._tally(m)
        self.tally.seconds = time.monotonic() - t_start
        return self.tally

    @staticmethod
    def _processed(m: dict[Any, float], stream: str | None = None) -> float:
        """Readings the engines took as new (``shiftwatch_samples_total`` counts each once)."""
        return metric(m, "shiftwatch_samples_total", **({} if stream is None else {"stream": stream}))

    @staticmethod
    def _again(m: dict[Any, float], stream: str | None = None) -> float:
        """Readings seen a second time: set aside as not newer than the stream's newest."""
        lab = {} if stream is None else {"stream": stream}
        return sum(metric(m, "shiftwatch_samples_rejected_total", reason=r, **lab)
                   for r in ("duplicate_time", "out_of_order"))

    def _stop_daemon(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()

    def _tally(self, m: dict[Any, float]) -> None:
        t = self.tally
        p = self.plan
        for s in p.names():
            processed = self._processed(m, s)
            again = self._again(m, s)
            t.per_stream[s] = {"processed": processed, "reprocessed": again}
            t.published += p.samples
            t.processed += int(processed)
            t.lost += max(0, p.samples - int(processed))
            t.reprocessed += int(again)
        with self._lock:
            recs = list(self.records)
        t.records = len(recs)
        seen = Counter((r.get("id"), r.get("phase")) for r in recs)
        t.duplicates = sum(c - 1 for c in seen.values())
        for s in p.names():
            for at in p.shift_indices():
                ts = T0 + at
                hits = [r for r in recs if r.get("stream") == s and r.get("phase") in ("detected", "confirmed")
                        and _iso(r["shift_at_low"]) - 2 <= ts <= _iso(r["shift_at_high"]) + 2]
                t.shifts += 1
                if not hits:
                    t.shifts_missed += 1
                elif len({r["id"] for r in hits}) > 1:
                    t.shifts_with_two_ids += 1
        shifts = {(s, T0 + at) for s in p.names() for at in p.shift_indices()}
        t.records_off_any_shift = sum(
            1 for r in recs if r.get("phase") in ("detected", "confirmed") and not any(
                s == r.get("stream") and _iso(r["shift_at_low"]) - 2 <= ts <= _iso(r["shift_at_high"]) + 2
                for s, ts in shifts))

    def close(self) -> None:
        for c in self.clients:
            try:
                c.stop()
            except Exception:  # noqa: BLE001, S110  clean-up must go on
                pass
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        if self.broker is not None:
            self.broker.stop()


def _iso(text: str) -> float:
    from shiftwatch.core.timefmt import parse_time

    return float(parse_time(text))
