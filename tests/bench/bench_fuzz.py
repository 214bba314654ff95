"""Long fuzz run of the decoders and the daemon's message path, and a flood of new topics.

Usage, from the repository root with the package installed and mosquitto available::

    python tests/bench/bench_fuzz.py            # full run, 10 to 30 minutes on 2 cores
    python tests/bench/bench_fuzz.py --quick    # smaller counts, for a smoke check

Three parts, each with the strategies of the test suite
(tests/daemon/fuzz_strategies.py), derandomized so a run is repeatable:

1. decoders: hypothesis examples straight into ``shiftwatch.decode.decode``
   (every format, random limits and paths); tally of problems by reason and
   of exceptions (target 0);
2. message path: examples through paho's callback, the hand-over and
   ``Daemon.process`` with real engines, the real Daemon connected to a
   private Mosquitto (the helpers of tests/daemon/test_fuzz.py); tally of
   drops by reason, of accounting violations (target 0: every message adds
   exactly its samples and problems to the counters) and of exceptions
   (target 0);
3. flood of new topics: the real daemon (``shiftwatch run``) and a private
   Mosquitto; 1,000,000 QoS 1 messages on distinct topics, every tenth one
   a bad payload, with one existing stream that steps published among them.
   Targets: the stream cap holds (``shiftwatch_streams`` equals
   ``metrics.max_streams``), the existing stream's sample count is exact
   and its confirmed ``shift_at`` is the step, resident memory does not grow
   with the number of topics (from the 100,000th topic to the last it grows
   by at most 5% of the idle daemon's RSS; RSS from /proc/PID/status idle,
   at the cap, at 100,000 topics, during and after), and at most one log
   line per reason per 10 s.

4. Sparkplug B decoding: sequences of hypothesis examples (births, data,
   deaths, commands on random topics; built, merged, truncated protobuf and
   raw bytes) straight into ``shiftwatch.sparkplug.SparkplugSessions``;
   tally of problems by reason, of exceptions and of messages neither taken
   in nor set aside with a reason (targets 0, 0).  ``--sparkplug-only`` runs
   this part alone.

The script prints the tallies and one table, and exits 0 only when every
target is met.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
import threading
import time
import traceback
import warnings
from collections import Counter
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(Path(__file__).resolve().parent)]

from bench_daemon import RawPublisher, _die_with_parent, rss_kb, scrape, shiftwatch_command

T0 = 1_790_000_000.0
#: RSS growth between the 100,000th and the last new topic, as a fraction of the
#: idle daemon's RSS: memory must not grow with the number of topics.  (Between
#: the cap and the 100,000th topic it grows by a few MB once: the topic cache
#: fills to its bound and rounds of 20,000 new-topic messages reach full size.)
GROWTH_TARGET = 0.05


# ======================================================================
# 1. decoders
# ======================================================================
def fuzz_decoders(n: int) -> dict[str, Any]:
    from hypothesis import given, settings
    from hypothesis import strategies as st
    from tests.daemon.fuzz_strategies import PATHS, PAYLOADS, PROPERTY

    from shiftwatch.decode import FORMATS, decode

    tally: Counter[str] = Counter()
    errors: list[str] = []
    count = {"examples": 0, "readings": 0}

    @settings(PROPERTY, max_examples=n)
    @given(payload=PAYLOADS, fmt=st.sampled_from(FORMATS), value_path=PATHS, time_path=st.none() | PATHS,
           max_depth=st.integers(1, 64), max_items=st.integers(1, 20000))
    def run(payload: bytes, fmt: str, value_path: str, time_path: str | None, max_depth: int,
            max_items: int) -> None:
        count["examples"] += 1
        try:
            out = decode(payload, fmt, value_path=value_path, time_path=time_path, now=T0,
                         max_depth=max_depth, max_items=max_items)
        except Exception:  # noqa: BLE001  any exception is what this fuzzer counts
            tally["EXCEPTION"] += 1
            if len(errors) < 3:
                errors.append(f"{fmt} {payload[:60]!r}: {traceback.format_exc(limit=3)}")
            return
        count["readings"] += len(out.readings)
        tally.update(p.reason for p in out.problems)
        if not out.readings and not out.problems:
            tally["UNACCOUNTED"] += 1

    t = time.monotonic()
    run()
    return {"examples": count["examples"], "readings": count["readings"], "tally": tally,
            "errors": errors, "seconds": time.monotonic() - t}


# ======================================================================
# 4. Sparkplug B decoding
# ======================================================================
def fuzz_sparkplug(n: int) -> dict[str, Any]:
    from hypothesis import given, settings
    from hypothesis import strategies as st
    from tests.daemon.fuzz_strategies import PROPERTY, SP_TOPICS
    from tests.daemon.test_sparkplug import SP_BODIES

    from shiftwatch.sparkplug import SparkplugSessions

    tally: Counter[str] = Counter()
    errors: list[str] = []
    count = {"examples": 0, "messages": 0, "readings": 0, "used": 0}

    @settings(PROPERTY, max_examples=n)
    @given(msgs=st.lists(st.tuples(SP_TOPICS, SP_BODIES), min_size=1, max_size=12))
    def run(msgs: list[tuple[str, bytes]]) -> None:
        count["examples"] += 1
        s = SparkplugSessions(max_sessions=4, max_metrics=4)
        for topic, body in msgs:
            count["messages"] += 1
            try:
                out = s.feed(topic, body, T0, max_bytes=200)
            except Exception:  # noqa: BLE001  any exception is what this fuzzer counts
                tally["EXCEPTION"] += 1
                if len(errors) < 3:
                    errors.append(f"{topic} {body[:60]!r}: {traceback.format_exc(limit=3)}")
                continue
            count["readings"] += len(out.readings)
            count["used"] += out.used
            tally.update(p.reason for p in out.problems)
            if not out.used and not out.problems:
                tally["UNACCOUNTED"] += 1

    t = time.monotonic()
    run()
    return {**count, "tally": tally, "errors": errors, "seconds": time.monotonic() - t}


# ======================================================================
# 2. message path (in-process Daemon, private Mosquitto)
# ======================================================================
def fuzz_path(n: int, tmp: Path) -> dict[str, Any]:
    from hypothesis import given, settings
    from tests.daemon import test_fuzz as tf
    from tests.daemon.fuzz_strategies import MESSAGES, PROPERTY

    from shiftwatch.broker import MosquittoBroker

    broker = MosquittoBroker(workdir=tmp / "path-broker").start()
    tally: Counter[str] = Counter()
    errors: list[str] = []
    count = {"examples": 0, "messages": 0, "violations": 0}
    try:
        with tf.live_daemon(broker, tmp / "path-state", max_streams=200, client_id="fz-bench") as (d, seen, _):
            @settings(PROPERTY, max_examples=n)
            @given(msgs=MESSAGES)
            def run(msgs: list[tuple[bytes, bytes]]) -> None:
                count["examples"] += 1
                count["messages"] += len(msgs)
                try:
                    before_r, before_d, before_s = tf.received(d), tf.drops(d), tf.samples(d)
                    expected = [tf.units(d, t, p) for t, p in msgs]
                    for i, (topic, payload) in enumerate(msgs):
                        tf.deliver(d, topic, payload, mid=i + 1)
                    while len(d.inbox):
                        d.round(timeout=0.0)
                    after_d = tf.drops(d)
                except Exception:  # noqa: BLE001  any exception is what this fuzzer counts
                    tally["EXCEPTION"] += 1
                    if len(errors) < 3:
                        errors.append(traceback.format_exc(limit=4))
                    return
                delta = {k: v - before_d.get(k, 0.0) for k, v in after_d.items()}
                tally.update({k: int(v) for k, v in delta.items() if v})
                got = sum(delta.values()) + tf.samples(d) - before_s
                ok = (tf.received(d) - before_r == len(msgs) and got == sum(u for u, _ in expected)
                      and all(u >= 1 for u, _ in expected))
                if not ok:
                    count["violations"] += 1
                    if len(errors) < 3:
                        errors.append(f"accounting: {msgs!r:.300} expected {expected} got {got}")

            t = time.monotonic()
            run()
            seconds = time.monotonic() - t
            try:
                tf.check_exposition(d)
                tf.check_published(d, seen)
                exposition_ok = True
            except AssertionError as exc:
                exposition_ok = False
                errors.append(f"exposition or published topics: {exc}")
            streams = len(d.engines)
    finally:
        broker.stop()
    return {**count, "tally": tally, "errors": errors, "seconds": seconds, "streams": streams,
            "exposition_ok": exposition_ok}


# ======================================================================
# 3. flood of new topics (real daemon, private Mosquitto)
# ======================================================================
class DaemonLog:
    """Reads the daemon's stderr in a thread; keeps each line with its arrival time."""

    def __init__(self, proc: subprocess.Popen[bytes]) -> None:
        self.lines: list[tuple[float, str]] = []
        self._t = threading.Thread(target=self._read, args=(proc,), daemon=True)
        self._t.start()

    def _read(self, proc: subprocess.Popen[bytes]) -> None:
        assert proc.stderr is not None
        for raw in proc.stderr:
            self.lines.append((time.monotonic(), raw.decode("utf-8", "replace").rstrip("\n")))

    def wait_for(self, text: str, timeout: float) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if any(text in line for _, line in self.lines):
                return True
            time.sleep(0.05)
        return False


def reason_of(line: str) -> str | None:
    m = re.search(r"set aside \(([a-z_0-9]+)\)", line)
    if m:
        return m.group(1)
    return "stream_cap" if "stream limit of" in line else None


def flood(n_topics: int, tmp: Path) -> dict[str, Any]:
    import numpy as np

    from shiftwatch.broker import MosquittoBroker, free_port
    from shiftwatch.core.timefmt import parse_time

    broker = MosquittoBroker(workdir=tmp / "flood-broker").start()
    port = free_port()
    cfg = tmp / "flood.yaml"
    cfg.write_text(
        f"broker: {{url: '{broker.url}', client_id: fz-flood, keepalive: 30}}\n"
        "streams:\n"
        "  - {topic: 'brackenfield/line2/filler/+/fill', format: json, value: weight_g, time: ts, unit: g}\n"
        "  - {topic: 'brackenfield/flood/+', format: number}\n"
        "alerts: {topic_prefix: sw}\n"
        f"metrics: {{listen: '127.0.0.1:{port}'}}\n"  # max_streams: the default, 10,000
        f"state: {{dir: '{tmp / 'flood-state'}', snapshot_every: 1h}}\n")
    proc = subprocess.Popen(shiftwatch_command() + ["run", "--config", str(cfg)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE,
                            preexec_fn=_die_with_parent)  # noqa: PLW1509  a prctl call only, no locks
    log = DaemonLog(proc)
    sampler_stop = threading.Event()
    rss_trace: list[tuple[float, int]] = []
    alerts: list[dict[str, Any]] = []
    try:
        if not log.wait_for("connected to broker", 30):
            raise RuntimeError("daemon did not connect: " + "\n".join(line for _, line in log.lines[-20:]))
        from shiftwatch.mqtt import PlainClient

        viewer = PlainClient(broker.url, "fz-flood-viewer", subscribe=["sw/alerts/#"],
                             on_message=lambda t, p: alerts.append(json.loads(p))).start()
        time.sleep(2.0)
        idle_kb, _ = rss_kb(proc.pid)

        def sample() -> None:
            while not sampler_stop.wait(0.5):
                try:
                    rss_trace.append((time.monotonic(), rss_kb(proc.pid)[0]))
                except OSError:
                    return

        threading.Thread(target=sample, daemon=True).start()
        n_good, step = 1300, 1000
        x = 500.0 + 0.6 * np.random.default_rng(6).standard_normal(n_good)
        x[step:] += 1.2
        good_topic = b"brackenfield/line2/filler/head1/fill"
        good = [b'{"weight_g": %r, "ts": %d}' % (float(v), int((T0 + i) * 1000)) for i, v in enumerate(x)]
        pub = RawPublisher(broker.port, "fz-flood-pub", 2000, time.monotonic() + 3600)
        pub.send([pub.packet(good_topic, g) for g in good[:300]])  # the stream exists before the flood
        g = 300
        every = max(1, n_topics // (n_good - 300))
        t_start = time.monotonic()
        block: list[bytes] = []
        checkpoints = {20_000: "at_cap", max(40_000, n_topics // 10): "at_mid"}  # 20,000: past the cap
        marks: dict[str, int] = {}
        for k in range(n_topics):
            block.append(pub.packet(b"brackenfield/flood/t%07d" % k, b"x" if k % 10 == 9 else b"2.5"))
            if k % every == 0 and g < n_good:
                block.append(pub.packet(good_topic, good[g]))
                g += 1
            if len(block) >= 200:
                pub.send(block)
                block = []
            if k in checkpoints:  # wait until all sent so far is processed, then read the RSS
                pub.send(block)
                block = []
                while (scrape(port, ("shiftwatch_messages_received_total",))
                       .get("shiftwatch_messages_received_total", 0) < pub.sent):
                    time.sleep(0.2)
                time.sleep(1.0)
                marks[checkpoints[k]] = rss_kb(proc.pid)[0]
                marks[checkpoints[k] + "_k"] = k
        pub.send(block + [pub.packet(good_topic, v) for v in good[g:]])
        pub.finish()
        published = time.monotonic() - t_start
        total = 300 + n_topics + (n_good - 300)
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline:
            m = scrape(port, ("shiftwatch_messages_received_total", "shiftwatch_samples_total"))
            if m.get("shiftwatch_messages_received_total", 0) >= total:
                break
            time.sleep(0.5)
        time.sleep(1.0)
        drained = time.monotonic() - t_start
        after_kb, hwm_kb = rss_kb(proc.pid)
        m = scrape(port, ("shiftwatch_messages_received_total", "shiftwatch_samples_total",
                          "shiftwatch_messages_dropped_total", "shiftwatch_streams"))
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and not any(a.get("phase") == "confirmed" for a in alerts):
            time.sleep(0.1)
        viewer.stop()
    finally:
        sampler_stop.set()
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                proc.kill()
        broker.stop()
    good_key = f'shiftwatch_samples_total{{stream="{good_topic.decode()}"}}'
    drops = {k.split('"')[1]: v for k, v in m.items() if k.startswith("shiftwatch_messages_dropped_total{")}
    confirmed = [a for a in alerts if a.get("phase") == "confirmed"]
    shift_ok = bool(confirmed) and abs(parse_time(confirmed[0]["shift_at"]) - (T0 + step)) <= 3
    during = [kb for _, kb in rss_trace]
    windows: Counter[tuple[str, int]] = Counter()
    t0 = log.lines[0][0] if log.lines else 0.0
    for t, line in log.lines:
        r = reason_of(line)
        if r is not None:
            windows[(r, int((t - t0) // 10))] += 1
    return {
        "topics": n_topics, "published_s": published, "drained_s": drained,
        "received": m.get("shiftwatch_messages_received_total", 0.0), "total": total,
        "streams": m.get("shiftwatch_streams", 0.0), "drops": drops,
        "good_samples": m.get(good_key, 0.0), "n_good": n_good, "shift_ok": shift_ok,
        "idle_mb": idle_kb / 1024, "at_cap_mb": marks.get("at_cap", 0) / 1024,
        "at_mid_mb": marks.get("at_mid", 0) / 1024, "mid_k": marks.get("at_mid_k", 0),
        "peak_during_mb": max(during, default=0) / 1024, "after_mb": after_kb / 1024, "hwm_mb": hwm_kb / 1024,
        "log_lines": len(log.lines), "max_per_reason_per_10s": max(windows.values(), default=0),
        "reasons_logged": sorted({r for r, _ in windows}), "exit": proc.returncode,
    }


# ======================================================================
def tally_text(tally: Counter[str]) -> str:
    return ", ".join(f"{k} {v:,}" for k, v in sorted(tally.items(), key=lambda kv: -kv[1]))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="smaller counts, for a smoke check")
    ap.add_argument("--decoder-examples", type=int)
    ap.add_argument("--path-examples", type=int)
    ap.add_argument("--topics", type=int)
    ap.add_argument("--sparkplug-examples", type=int)
    ap.add_argument("--sparkplug-only", action="store_true", help="run part 4 (Sparkplug B) alone")
    a = ap.parse_args()
    n_sp = a.sparkplug_examples or (2_000 if a.quick else 20_000)
    n_dec = a.decoder_examples or (5_000 if a.quick else 50_000)
    n_path = a.path_examples or (1_000 if a.quick else 10_000)
    n_topics = a.topics or (100_000 if a.quick else 1_000_000)
    warnings.simplefilter("ignore")  # overflow warnings from numpy on values near the float limit
    rows: list[tuple[str, str, str, bool]] = []
    with tempfile.TemporaryDirectory(prefix="shiftwatch-bench-fuzz-") as tmpname:
        tmp = Path(tmpname)

        sp = fuzz_sparkplug(n_sp)
        print(f"sparkplug: {sp['examples']:,} sequences, {sp['messages']:,} messages in {sp['seconds']:.0f} s, "
              f"{sp['used']:,} taken in, {sp['readings']:,} readings; problems by reason: {tally_text(sp['tally'])}")
        for e in sp["errors"]:
            print("  " + e)
        rows.append(("sparkplug: exceptions, messages unaccounted", (f"{sp['tally']['EXCEPTION']}, "
                     f"{sp['tally']['UNACCOUNTED']} of {sp['messages']:,}"), "0, 0",
                     sp["tally"]["EXCEPTION"] + sp["tally"]["UNACCOUNTED"] == 0))
        if a.sparkplug_only:
            return _table(rows)

        dec = fuzz_decoders(n_dec)
        print(f"decoders: {dec['examples']:,} examples in {dec['seconds']:.0f} s, "
              f"{dec['readings']:,} readings; problems by reason: {tally_text(dec['tally'])}")
        for e in dec["errors"]:
            print("  " + e)
        bad = dec["tally"]["EXCEPTION"] + dec["tally"]["UNACCOUNTED"]
        rows.append(("decoders: exceptions, payloads unaccounted", (f"{dec['tally']['EXCEPTION']}, "
                     f"{dec['tally']['UNACCOUNTED']} of {dec['examples']:,}"), "0, 0", bad == 0))

        path = fuzz_path(n_path, tmp)
        print(f"message path: {path['examples']:,} examples, {path['messages']:,} messages in "
              f"{path['seconds']:.0f} s, {path['streams']} streams; drops by reason: {tally_text(path['tally'])}")
        for e in path["errors"]:
            print("  " + e)
        rows.append(("message path: exceptions, accounting violations",
                     f"{path['tally']['EXCEPTION']}, {path['violations']} of {path['examples']:,}", "0, 0",
                     path["tally"]["EXCEPTION"] == 0 and path["violations"] == 0))
        rows.append(("message path: internal_error drops", str(path["tally"]["internal_error"]), "0",
                     path["tally"]["internal_error"] == 0))
        rows.append(("message path: /metrics parses, alert topics safe", str(path["exposition_ok"]), "True",
                     path["exposition_ok"]))

        fl = flood(n_topics, tmp)
        print(f"flood: {fl['topics']:,} new topics published in {fl['published_s']:.0f} s, all processed after "
              f"{fl['drained_s']:.0f} s; received {fl['received']:,.0f} of {fl['total']:,}; drops by reason: "
              + ", ".join(f"{k} {v:,.0f}" for k, v in sorted(fl["drops"].items())))
        print(f"flood: RSS idle {fl['idle_mb']:.1f} MB, at the cap (20,000 topics) {fl['at_cap_mb']:.1f} MB, "
              f"at {fl['mid_k']:,} topics {fl['at_mid_mb']:.1f} MB, peak during "
              f"{fl['peak_during_mb']:.1f} MB, after {fl['after_mb']:.1f} MB (high-water {fl['hwm_mb']:.1f} MB); "
              f"{fl['log_lines']} log lines, reasons logged {fl['reasons_logged']}")
        rows.append(("flood: streams tracked (cap 10,000)", f"{fl['streams']:,.0f}", "10,000",
                     fl["streams"] == 10_000))
        rows.append(("flood: messages received", f"{fl['received']:,.0f}", f"{fl['total']:,}",
                     fl["received"] == fl["total"]))
        rows.append(("flood: existing stream's samples, shift_at", f"{fl['good_samples']:,.0f}, {fl['shift_ok']}",
                     f"{fl['n_good']:,}, True", fl["good_samples"] == fl["n_good"] and fl["shift_ok"]))
        growth = (fl["after_mb"] - fl["at_mid_mb"]) / fl["idle_mb"] if fl["idle_mb"] else 1.0
        rows.append((f"flood: RSS growth from {fl['mid_k']:,} to {fl['topics']:,} topics / idle RSS",
                     f"({fl['after_mb']:.1f} - {fl['at_mid_mb']:.1f}) / {fl['idle_mb']:.1f} = {growth:.2f}",
                     f"<= {GROWTH_TARGET:.2f}", growth <= GROWTH_TARGET))
        rows.append(("flood: log lines per reason per 10 s", str(fl["max_per_reason_per_10s"]), "<= 1",
                     fl["max_per_reason_per_10s"] <= 1))
        rows.append(("flood: daemon exit status on SIGTERM", str(fl["exit"]), "0", fl["exit"] == 0))

    return _table(rows)


def _table(rows: list[tuple[str, str, str, bool]]) -> int:
    width = max(len(r[0]) for r in rows)
    print()
    print(f"{'target'.ljust(width)}  measured | target | result")
    for name, got, target, ok in rows:
        print(f"{name.ljust(width)}  {got} | {target} | {'ok' if ok else 'MISSED'}")
    return 0 if all(r[3] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
