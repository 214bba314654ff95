"""Benchmark of a daemon's start from its state directory (``Daemon.restore``: the snapshot
loaded, the pool's waiting samples fed, the journal replayed) and the snapshot after it, this
checkout's code against another's (``--against DIR``, a ``daemon/`` directory), with the
outputs of both held to be the same.

Usage, from the repository root::

    PYTHONPATH=daemon python tests/bench/bench_localstate.py --against /tmp/old/daemon
    PYTHONPATH=daemon python tests/bench/bench_localstate.py --against DIR --timed 8   # CPU time instead

One state directory is made first by this checkout's daemon, in process: STREAMS streams of
the entry ``bench/+/v`` fed WARM readings each in rounds (a step of 3 sigma in every fifth
stream), a snapshot, then JOURNALED more rounds journaled and no snapshot, as a crash leaves
it (the calm pool's waiting samples in the snapshot too).  Each run copies it afresh and starts
a child process on one side's code that builds a ``Daemon`` on it, calls ``restore()`` and
``snapshot()``, feeds one round more (not counted), and prints digests of what they left:
every engine's state, the snapshot (its ``saved_at`` and journal token aside), the journal
after its header (that round), the log lines.

The figure is the instructions of ``restore()`` and ``snapshot()`` alone, counted by
callgrind (valgrind) with its instrumentation switched on around them only
(``callgrind_control``), imports and the daemon's construction left out; or, with
``--timed N``, their CPU time (``time.process_time``) in N pairs.  The sides alternate which
goes first, pair by pair.  Target: this checkout's figure within 0.5% of DIR's (the median of
the pairs' ratios), and the digests the same on both sides in every run.  Exits 0 when both
hold.  Instruction counts do not move with the machine's load (PYTHONHASHSEED is fixed; what
is left is the random tokens and times of a run).
"""

from __future__ import annotations

import argparse
import gzip
import hashlib
import json
import logging
import os
import re
import shutil
import statistics
import struct
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
STREAMS = 300
WARM = 600
JOURNALED = 120
ROUND = 20  # readings of each stream a round
TARGET = 0.005
COUNTING = "SHIFTWATCH_BENCH_COUNTING"
T0 = 1_790_000_000.0


def write_config(where: Path) -> Path:
    path = where / "shiftwatch.yaml"
    path.write_text("streams:\n  - {topic: 'bench/+/v', format: json, value: v, time: ts, unit: g}\n"
                    f"metrics: {{listen: '127.0.0.1:0', max_streams: {STREAMS + 10}}}\n"
                    f"state: {{dir: '{where / 'state'}'}}\n")
    return path


def prepare(where: Path) -> None:
    """The state directory a crash leaves: a snapshot after WARM readings a stream, then
    JOURNALED readings a stream journaled on top of it."""
    import numpy as np

    from shiftwatch.config import load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics
    from shiftwatch.mqtt import Message

    path = write_config(where)
    d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics(),
               logger=logging.getLogger("bench_localstate.prepare"))
    d.restore()
    rng = np.random.default_rng(7)
    x = 100.0 + rng.standard_normal((STREAMS, WARM + JOURNALED))
    x[::5, WARM - 100:] += 3.0

    def rounds(lo: int, hi: int, step: int = ROUND) -> None:
        for a in range(lo, hi, step):
            msgs = [Message(f"bench/s{s:04d}/v",
                            json.dumps([{"v": float(x[s, i]), "ts": T0 + i} for i in range(a, min(a + step, hi))]
                                       ).encode(), T0 + a, 0, 0)
                    for s in range(STREAMS)]
            d.process(msgs)

    rounds(0, WARM - 4)
    rounds(WARM - 4, WARM, 1)  # rounds of one reading: calm streams' samples wait in the pool
    assert d.pool is not None and d.pool.total_waiting() > 0
    assert d.snapshot()
    rounds(WARM, WARM + JOURNALED)
    assert d.journal is not None
    d.journal.close()


def child(state: Path, config: Path) -> dict[str, Any]:
    """restore() and snapshot() of a daemon on ``state`` (counted alone under callgrind);
    digests of what they left."""
    import shiftwatch
    from shiftwatch.config import load_config
    from shiftwatch.daemon import Daemon
    from shiftwatch.metrics import Metrics
    from shiftwatch.mqtt import Message

    lines: list[str] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            lines.append(record.getMessage().replace(str(state), "<state>"))

    log = logging.getLogger("bench_localstate.child")
    log.propagate = False
    log.setLevel(logging.DEBUG)
    log.addHandler(Keep())
    d = Daemon(load_config(str(config)), config_path=str(config), metrics=Metrics(), logger=log)
    counting = os.environ.get(COUNTING) == "1"
    if counting:
        subprocess.run(["callgrind_control", "-i", "on", str(os.getpid())], check=True,
                       capture_output=True, timeout=600)
    c0 = time.process_time()
    d.restore()
    ok = d.snapshot()
    cpu = time.process_time() - c0
    if counting:
        subprocess.run(["callgrind_control", "-i", "off", str(os.getpid())], check=True,
                       capture_output=True, timeout=600)
    # One round more, outside the count: the bytes a round leaves in the fresh journal.
    d.process([Message(f"bench/s{s:04d}/v", json.dumps({"v": 100.5, "ts": T0 + WARM + JOURNALED}).encode(),
                       T0 + WARM + JOURNALED, 0, 0) for s in range(STREAMS)])
    assert d.journal is not None
    d.journal.close()

    def digest(b: bytes) -> str:
        return hashlib.sha256(b).hexdigest()[:16]

    with gzip.open(state / "state" / "snapshots" / "streams.json.gz", "rb") as f:
        snap = f.read().splitlines()
    head = json.loads(snap[0])
    token = head["meta"].pop("journal")
    head["meta"].pop("saved_at")
    raw = (state / "state" / "snapshots" / "journal.bin").read_bytes()
    _magic, size, _crc = struct.unpack_from("<4sII", raw)  # the header record (journal.py)
    assert token.encode() in raw[12:12 + size]
    return {"code": str(Path(shiftwatch.__file__).parent), "cpu": cpu, "ok": ok,
            "engines": digest(json.dumps({n: e.get_state() for n, e in d.engines.items()},
                                         sort_keys=True).encode()),
            "snapshot": digest(json.dumps(head, sort_keys=True).encode() + b"\n".join(snap[1:])),
            "journal": digest(raw[12 + size:]), "journal_bytes": len(raw) - 12 - size,
            "lines": digest("\n".join(lines).encode()), "n_lines": len(lines),
            "streams": len(d.engines)}


def run_side(code: str, prepared: Path, work: Path, callgrind: bool) -> tuple[dict[str, Any], int | None]:
    """A fresh copy of the prepared directory, a child on ``code``; its report and, under
    callgrind, the instructions counted."""
    if work.exists():
        shutil.rmtree(work)
    shutil.copytree(prepared, work)
    config = write_config(work)  # the copy's own state.dir
    env = dict(os.environ)
    env["PYTHONPATH"] = code + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env["PYTHONHASHSEED"] = "0"
    cmd = [sys.executable, __file__, "--child", str(work), str(config)]
    out = work / "cg.out"
    if callgrind:
        env[COUNTING] = "1"
        cmd = ["valgrind", "--tool=callgrind", "--instr-atstart=no", f"--callgrind-out-file={out}"] + cmd
    got = subprocess.run(cmd, check=False, env=env, capture_output=True, text=True, timeout=3600)
    if got.returncode != 0:
        raise SystemExit(f"child on {code} failed ({got.returncode}): {got.stderr[-3000:]}")
    report = json.loads(got.stdout.strip().splitlines()[-1])
    n = None
    if callgrind:
        m = re.search(r"^totals: (\d+)", out.read_text(errors="replace"), re.MULTILINE)
        n = int(m.group(1)) if m else None
    return report, n


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--against", metavar="DIR", help="the other code: a checkout's daemon/ directory")
    ap.add_argument("--pairs", type=int, default=3, help="pairs of runs under callgrind (3)")
    ap.add_argument("--timed", type=int, metavar="N", help="N pairs timed (CPU) instead of callgrind")
    ap.add_argument("--child", nargs=2, metavar=("STATE", "CONFIG"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        print(json.dumps(child(Path(a.child[0]), Path(a.child[1]))))
        return 0
    if not a.against or not (Path(a.against) / "shiftwatch").is_dir():
        ap.error("--against DIR: a checkout's daemon/ directory (with shiftwatch/ in it)")
    callgrind = a.timed is None
    pairs = a.pairs if callgrind else a.timed
    sides = {"this": str(ROOT / "daemon"), "against": str(Path(a.against).resolve())}
    with tempfile.TemporaryDirectory(prefix="bench_localstate.") as tmp:
        prepared = Path(tmp) / "prepared"
        prepared.mkdir()
        prepare(prepared)
        figures: dict[str, list[float]] = {"this": [], "against": []}
        reports: list[dict[str, Any]] = []
        for p in range(pairs):
            for side in (("against", "this") if p % 2 == 0 else ("this", "against")):
                report, n = run_side(sides[side], prepared, Path(tmp) / side, callgrind)
                reports.append(report)
                figures[side].append(float(n) if callgrind and n is not None else report["cpu"])
                print(f"pair {p + 1} {side:8s} {report['code']}: "
                      + (f"{n:,} instructions" if callgrind else f"{report['cpu'] * 1000:.1f} ms CPU")
                      + f"; {report['streams']} streams, {report['n_lines']} log lines, {report['journal_bytes']:,} "
                      "bytes of journal after its header", flush=True)
    keys = ("ok", "engines", "snapshot", "journal", "lines", "streams")
    same = all({k: r[k] for k in keys} == {k: reports[0][k] for k in keys} for r in reports)
    ratios = [t / o for t, o in zip(figures["this"], figures["against"])]
    unit = "instructions" if callgrind else "s CPU"
    print(f"\nrestore() + snapshot() of {STREAMS} streams ({WARM} readings in the snapshot, {JOURNALED} "
          f"journaled), {pairs} pairs, {unit}:")
    for side, xs in figures.items():
        print(f"  {side:8s} median {statistics.median(xs):,.6g} (range {min(xs):,.6g} to {max(xs):,.6g})")
    print(f"  this / against per pair: {', '.join(f'{r:.5f}' for r in ratios)} "
          f"(median {statistics.median(ratios):.5f}; target within {TARGET:.1%} of 1)")
    print(f"  outputs the same on both sides in every run (engines, snapshot, journal, log lines): {same}")
    return 0 if same and abs(statistics.median(ratios) - 1) <= TARGET else 1


if __name__ == "__main__":
    sys.exit(main())
