"""Where a shard's CPU goes with state in the cluster, in process, and what the JSON
libraries at hand would make of its arrays (issue 15).

Usage, from the repository root with the package installed::

    python tests/bench/bench_cluster_round.py                     # both parts
    python tests/bench/bench_cluster_round.py --part split [--quick] [--repeat N] [--against DIR]
    python tests/bench/bench_cluster_round.py --part split --instructions [--quick] [--against DIR]
    python tests/bench/bench_cluster_round.py --part decoders [--repeat N]

``--part split``: one ``Daemon`` with ``state.keep: cluster`` on a lone nats-server
(JetStream, loopback; tests/daemon/natskit.py), fed as ``bench_shards.py --payload
batch260 --streams established`` feeds a shard: 500 streams (``--quick``: 100) of the
plant Brackenfield, each first taking 5 JSON arrays of 260 samples (past the warm-up
and the young level), then 3 more, measured, in rounds of 100 messages through
``Daemon.process`` (no broker: the decoding, the engines, the journal messages to
the cluster and their acknowledgements are the shard's; the MQTT client's thread and
the /metrics threads are not here).  Reported, per sample of the measured rounds: the
main thread's CPU time (``time.thread_time``) and its parts, each timed by a wrapper
(two clock reads a call): the engines (``StreamEngine.process``), the decoding
(``Daemon._decode``), the journal messages (``JournalRound.add``: the encoding and
the hand-over to the NATS thread; ``JournalRound.wait``), the metrics snapshot of
each stream (``StreamStats.from_engine``), the round's arrays (``Daemon._add_columns``)
and the rest; and the NATS thread's CPU time (its schedstat run time).  ``--against
DIR``: each repeat runs the part in child processes, on DIR's code (another checkout's
``daemon/`` directory, first on their PYTHONPATH) and on this checkout's, which goes
first alternating, with the ratios (this / DIR) of the CPU a sample per repeat.
``--instructions``: the part once per code under callgrind (valgrind), its
instrumentation switched on around the measured rounds only (``callgrind_control``),
without the timers: instructions a message of the main thread and of the others
(the NATS thread's), which the machine's load does not move.

``--part decoders``: CPU time per array of 260 samples (the shard benchmark's
payloads, ``{"v": .., "ts": ..}`` objects), in alternating passes over 100 payloads:
the daemon's path to its two float64 columns (``decode._array_columns``, msgspec
into small structs), msgspec's parse alone, msgspec into dicts, orjson's parse into
dicts, and pyarrow's JSON reader over the same payloads as newline-delimited
objects (one read for all 100, one thread); each as a ratio to the daemon's path in
the same run.  The columns of orjson's and pyarrow's parses are compared with the
daemon's, bit for bit.

No target: it prints what it measured and exits 0 (issue 15's target is
``bench_shards.py``'s).  The figures move with the machine's load; compare within
one run.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "daemon"))

from natskit import start_lone_server

from shiftwatch import clusterstate, decode, metrics
from shiftwatch.config import load_config
from shiftwatch.core.engine import StreamEngine
from shiftwatch.daemon import Daemon
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import Message

BATCH = 260
T0 = 1764633600.0
WARM = 5
MEASURED = 3
ROUND = 100
#: Set in a child run under callgrind (--instructions): no timers, the instrumentation
#: switched on around the measured rounds.
COUNTING = "SHIFTWATCH_BENCH_COUNTING"
#: (owner, attribute, part), timed by a wrapper in --part split.
PARTS: list[tuple[Any, str, str]] = [
    (StreamEngine, "process", "engines"),
    (Daemon, "_decode", "decoding"),
    (clusterstate.JournalRound, "add", "journal: encode and hand over"),
    (clusterstate.JournalRound, "wait", "journal: wait for the cluster"),
    (metrics.StreamStats, "from_engine", "metrics snapshot a stream"),
    (Daemon, "_add_columns", "the round's arrays"),
]


def payloads(streams: int, rounds: int, after: int = 0) -> list[tuple[str, bytes]]:
    """bench_shards.py's arrays: round-robin over the streams, one sample a second."""
    tops = [f"brackenfield/line{i // 50}/tank{i % 50}/fill" for i in range(streams)]
    out = []
    for r in range(rounds):
        for i, t in enumerate(tops):
            base = after + r * BATCH
            out.append((t, json.dumps([{"v": round(500 + ((base + j + i) % 13) * 0.01, 3), "ts": T0 + base + j}
                                       for j in range(BATCH)]).encode()))
    return out


def _run_ns(tid: int) -> int:
    """A thread's CPU time so far, in nanoseconds (the kernel's schedstat)."""
    with open(f"/proc/self/task/{tid}/schedstat") as f:
        return int(f.read().split()[0])


def part_split(streams: int, repeat: int) -> list[dict[str, float]]:
    acc: Counter[str] = Counter()

    def wrap(owner: Any, name: str, key: str) -> Callable[[], None]:
        orig = owner.__dict__[name]
        fn = orig.__func__ if isinstance(orig, classmethod) else orig

        def timed(*a: Any, **k: Any) -> Any:
            c = time.thread_time_ns()
            try:
                return fn(*a, **k)
            finally:
                acc[key] += time.thread_time_ns() - c

        setattr(owner, name, classmethod(timed) if isinstance(orig, classmethod) else timed)
        return lambda: setattr(owner, name, orig)

    with tempfile.TemporaryDirectory() as tmp:
        server, port = start_lone_server(Path(tmp), "bench-round")
        undo = []
        try:
            path = Path(tmp) / "shard.yaml"
            path.write_text(
                "streams:\n  - {topic: 'brackenfield/+/+/fill', format: json, value: v, time: ts}\n"
                "broker: {client_id: bench-round}\n"
                "metrics: {listen: '127.0.0.1:0', max_streams: 100000}\n"
                f"state: {{dir: '{Path(tmp) / 'state'}', keep: cluster, snapshot_every: 1d}}\n"
                f"cluster: {{servers: ['nats://127.0.0.1:{port}'], name: benchround, replicas: 1, "
                "redelivery_wait: 0s, lease: 15s}\n"
                "shard: {number: 0, of: 1}\n")
            d = Daemon(load_config(str(path)), config_path=str(path), metrics=Metrics())
            d._join_cluster()
            nats_tid = next(t.native_id for t in threading.enumerate() if t.name == "shiftwatch-nats")
            assert nats_tid is not None

            def feed(msgs: list[tuple[str, bytes]]) -> None:
                for i in range(0, len(msgs), ROUND):
                    d.process([Message(t, p, time.time(), 0, 0) for t, p in msgs[i:i + ROUND]])
                    if d._held_round is not None:
                        raise RuntimeError("a round was held (the cluster did not take it)")

            feed(payloads(streams, WARM))
            counting = os.environ.get(COUNTING) == "1"  # under callgrind (--instructions): no timers
            undo = [] if counting else [wrap(owner, name, key) for owner, name, key in PARTS]
            after = WARM * BATCH
            rows: list[dict[str, float]] = []
            for _ in range(repeat):
                msgs = payloads(streams, MEASURED, after)
                after += MEASURED * BATCH
                acc.clear()
                if counting:  # callgrind counts the measured rounds only
                    subprocess.run(["callgrind_control", "-i", "on", str(os.getpid())], check=True,
                                   capture_output=True, timeout=600)
                main0, nats0 = time.thread_time_ns(), _run_ns(nats_tid)
                feed(msgs)
                main1, nats1 = time.thread_time_ns(), _run_ns(nats_tid)
                if counting:
                    subprocess.run(["callgrind_control", "-i", "off", str(os.getpid())], check=True,
                                   capture_output=True, timeout=600)
                n = len(msgs) * BATCH
                row = {key: acc[key] / n for _o, _n, key in PARTS}
                row["main thread"] = (main1 - main0) / n
                row["rest"] = row["main thread"] - sum(acc.values()) / n
                row["NATS thread"] = (nats1 - nats0) / n
                rows.append(row)
            if d.lease is not None:
                d.lease.release()
            if d.nats is not None:
                d.nats.close()
        finally:
            for u in undo:
                u()
            server.kill()
            server.wait(30)
    return rows


def print_split(rows: list[dict[str, float]], streams: int, what: str = "") -> None:
    print(f"\nsplit{what}: {streams} streams, {MEASURED} arrays of {BATCH} each measured, rounds of {ROUND} "
          f"messages, {len(rows)} repeat(s); nanoseconds of CPU a sample, median (range); share of the main thread")
    order = ["main thread"] + [key for _o, _n, key in PARTS] + ["rest", "NATS thread"]
    for key in order:
        xs = [r[key] for r in rows]
        share = statistics.median(r[key] / r["main thread"] for r in rows)
        print(f"  {key:32s} {statistics.median(xs):7.1f} ({min(xs):.1f}-{max(xs):.1f})  {share:6.1%}")


def instructions(code: str, streams: int, quick: bool, out: Path) -> tuple[int, int, str]:
    """One split run in a child process under callgrind on ``code``'s package, the
    instrumentation switched on around the measured rounds only: the instructions of the
    main thread and of all the others (the NATS thread's, mostly), and the package's path."""
    env = dict(os.environ)
    env["PYTHONPATH"] = code + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env[COUNTING] = "1"
    env["PYTHONHASHSEED"] = "0"
    out.mkdir(parents=True, exist_ok=True)
    cmd = ["valgrind", "--tool=callgrind", "--instr-atstart=no", "--separate-threads=yes",
           f"--callgrind-out-file={out / 'cg.%p'}", sys.executable, __file__, "--part", "split", "--repeat", "1",
           "--child"] + (["--quick"] if quick else [])
    got = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True, timeout=3600)
    where = json.loads(got.stdout.strip().splitlines()[-1])["code"]
    main = others = 0
    for f in sorted(out.glob("cg.*-*")):
        m = re.search(r"^totals: (\d+)", f.read_text(errors="replace"), re.MULTILINE)
        n = int(m.group(1)) if m else 0
        if f.name.endswith("-01"):
            main += n
        else:
            others += n
    return main, others, where


def split_instructions(against: str | None, streams: int, quick: bool) -> None:
    """--instructions: callgrind counts of the measured rounds, this checkout's code and
    (with --against) DIR's, each once (the counts do not move with the machine's load)."""
    messages = streams * MEASURED
    sides = [("this", str(ROOT / "daemon"))] + ([("against", against)] if against else [])
    counts = {}
    with tempfile.TemporaryDirectory() as tmp:
        for side, code in sides:
            counts[side] = instructions(code, streams, quick, Path(tmp) / side)
    print(f"\ninstructions (callgrind, the {messages:,} measured messages of {streams} streams only; a message "
          f"is {BATCH} samples):")
    for side, (main, others, where) in counts.items():
        print(f"  {side} ({where}): main thread {main / messages:,.0f} a message, the other threads "
              f"{others / messages:,.0f}")
    if against:
        t, a = counts["this"], counts["against"]
        print(f"  this / against: main thread {t[0] / a[0]:.4f}, the other threads {t[1] / a[1]:.4f}, "
              f"all {(t[0] + t[1]) / (a[0] + a[1]):.4f}")


def split_against(against: str, streams: int, repeat: int, quick: bool) -> None:
    """Each repeat runs the split part in a child process on ``against``'s code (a
    ``daemon/`` directory, first on its PYTHONPATH) and on this checkout's, which goes
    first alternating; the ratios of this checkout's CPU a sample to the other's."""
    sides = {"against": against, "this": str(ROOT / "daemon")}
    rows: dict[str, list[dict[str, float]]] = {"against": [], "this": []}
    code: dict[str, str] = {}
    for r in range(repeat):
        for side in (("against", "this") if r % 2 == 0 else ("this", "against")):
            env = dict(os.environ)
            env["PYTHONPATH"] = sides[side] + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
            cmd = [sys.executable, __file__, "--part", "split", "--repeat", "1", "--child"] + (["--quick"] if quick else [])
            out = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True, timeout=1800)
            got = json.loads(out.stdout.strip().splitlines()[-1])
            rows[side] += got["rows"]
            code[side] = got["code"]
    for side in ("against", "this"):
        print_split(rows[side], streams, f" ({side}: the package at {code[side]})")
    for key in ("main thread", "NATS thread"):
        ratios = [t[key] / a[key] for t, a in zip(rows["this"], rows["against"])]
        print(f"  this / against, {key} CPU a sample, per repeat: " + ", ".join(f"{x:.3f}" for x in ratios)
              + f" (median {statistics.median(ratios):.3f})")
    both = [(t["main thread"] + t["NATS thread"]) / (a["main thread"] + a["NATS thread"])
            for t, a in zip(rows["this"], rows["against"])]
    print("  this / against, main and NATS threads together, per repeat: " + ", ".join(f"{x:.3f}" for x in both)
          + f" (median {statistics.median(both):.3f})")


def part_decoders(repeat: int) -> None:
    import msgspec
    import orjson
    import pyarrow as pa
    import pyarrow.json as pj

    ps = [p for _t, p in payloads(100, 1, WARM * BATCH)]
    vp, tp = ("v",), ("ts",)
    strict = decode._column_decoders("v", "ts")
    assert strict is not None
    as_dicts = msgspec.json.Decoder(list[dict[str, float]])
    arrow_opts = (pj.ReadOptions(use_threads=False, block_size=1 << 24),
                  pj.ParseOptions(explicit_schema=pa.schema([("v", pa.float64()), ("ts", pa.float64())]),
                                  unexpected_field_behavior="error"))

    def daemon_path() -> Any:
        return [decode._array_columns(p, vp, tp, 10000, 32) for p in ps]

    def msgspec_parse() -> Any:
        return [strict[0].decode(p) for p in ps]

    def msgspec_dicts() -> Any:
        return [as_dicts.decode(p) for p in ps]

    def orjson_dicts() -> Any:
        return [orjson.loads(p) for p in ps]

    def orjson_columns() -> Any:
        # The parse and the two columns as the daemon takes them from its structs (a list
        # each, packed into a new float64 array); no check of what the objects hold.
        out = []
        for p in ps:
            doc = orjson.loads(p)
            n = len(doc)
            out.append((decode._column([x["ts"] for x in doc], n), decode._column([x["v"] for x in doc], n)))
        return out

    def arrow_ndjson() -> Any:
        nd = b"\n".join(p[1:-1].replace(b"}, {", b"}\n{") for p in ps)
        t = pj.read_json(io.BytesIO(nd), read_options=arrow_opts[0], parse_options=arrow_opts[1])
        return t.column("ts").to_numpy(), t.column("v").to_numpy()

    ways: list[tuple[str, Callable[[], Any]]] = [
        ("the daemon's path (msgspec structs, columns)", daemon_path),
        ("msgspec's parse alone (structs)", msgspec_parse),
        ("msgspec into dicts", msgspec_dicts),
        ("orjson into dicts", orjson_dicts),
        ("orjson into dicts, then the two columns", orjson_columns),
        ("pyarrow JSON reader, one read of 100", arrow_ndjson),
    ]
    # The same numbers, bit for bit (the daemon's columns as the reference).
    ref = daemon_path()
    ref_t = np.concatenate([c[0] for c in ref])
    ref_v = np.concatenate([c[1] for c in ref])
    oc = orjson_columns()
    same = {
        "orjson": (np.concatenate([c[0] for c in oc]).tobytes() == ref_t.tobytes()
                   and np.concatenate([c[1] for c in oc]).tobytes() == ref_v.tobytes()),
        "pyarrow": all(a.tobytes() == b.tobytes() for a, b in zip(arrow_ndjson(), (ref_t, ref_v))),
    }
    per: dict[str, list[float]] = {label: [] for label, _f in ways}
    for _ in range(repeat):
        for label, f in ways:
            best = float("inf")
            for _k in range(5):
                c = time.thread_time_ns()
                f()
                best = min(best, time.thread_time_ns() - c)
            per[label].append(best / len(ps) / 1000)
    print(f"\ndecoders: CPU microseconds an array of {BATCH} samples ({len(ps)} arrays a pass, best of 5, "
          f"{repeat} alternating rounds; median (range)); ratio to the daemon's path, per round's median")
    base = per[ways[0][0]]
    for label, _f in ways:
        xs = per[label]
        ratio = statistics.median(x / b for x, b in zip(xs, base))
        print(f"  {label:46s} {statistics.median(xs):6.1f} ({min(xs):.1f}-{max(xs):.1f})  {ratio:5.2f}")
    print(f"  the same columns, bit for bit: orjson {same['orjson']}, pyarrow {same['pyarrow']}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--part", choices=("split", "decoders"), action="append")
    ap.add_argument("--quick", action="store_true", help="100 streams in --part split")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--against", metavar="DIR",
                    help="--part split also on DIR's code (another checkout's daemon/), in alternating child processes")
    ap.add_argument("--instructions", action="store_true",
                    help="--part split counted by callgrind instead of timed (with --against: both codes)")
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args()
    parts = a.part or ["split", "decoders"]
    streams = 100 if a.quick else 500
    if a.child:  # one side of --against: the rows as JSON on the last line
        import shiftwatch

        print(json.dumps({"code": str(Path(shiftwatch.__file__).parent), "rows": part_split(streams, max(a.repeat, 1))}))
        return 0
    print(f"load average at the start: {os.getloadavg()[0]:.1f}", flush=True)
    if "split" in parts:
        if a.instructions:
            split_instructions(a.against, streams, a.quick)
        elif a.against:
            split_against(a.against, streams, max(a.repeat, 1), a.quick)
        else:
            print_split(part_split(streams, max(a.repeat, 1)), streams)
    if "decoders" in parts:
        part_decoders(max(a.repeat, 1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
