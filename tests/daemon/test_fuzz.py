"""Bad input through the whole message path: paho's callback, the hand-over,
Daemon.process with real engines, counters, published records and /metrics.

The properties run the real :class:`~shiftwatch.daemon.Daemon` in this
process, connected to a private Mosquitto: a message enters as the
``paho.MQTTMessage`` paho's network thread hands to the link's callback (so
topics Mosquitto would never carry can be tried too), and everything the
daemon publishes goes through the broker to a subscriber of ``#``.  The
process tests at the end run ``shiftwatch run`` against a broker and publish
through it.

Rules checked (README, "Reliability and security: what was tried"):

- nothing raises out of the callback or out of the daemon's processing;
- every message is accounted for: each sample it holds is counted in its
  stream's ``samples_total`` or under a reason in ``messages_dropped``, and a
  message with nothing usable has at least one reason counted; for messages
  of one sample each, ``received == sum(dropped) + sum(samples)``;
- alert records go only to ``<prefix>/alerts/<stream>`` with no wildcard,
  NUL or control character and at most 200 levels, and the daemon stays
  connected (Mosquitto disconnects a client that publishes anything else);
- /metrics stays parseable whatever names come in;
- oversized payloads are set aside before any parsing;
- logs are rate-limited per reason, the stream cap holds and its bookkeeping
  stays bounded, and good streams carry on exactly.

The plant names are invented (Brackenfield Bottling).
"""

from __future__ import annotations

import json
import logging
import math
import re
import threading
import time
import urllib.request
from collections import Counter as Tally
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as paho
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch import decode as decode_module
from shiftwatch.broker import MosquittoBroker
from shiftwatch.config import parse_config
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import DetectionSettings
from shiftwatch.core.timefmt import parse_time
from shiftwatch.daemon import SPEC_CACHE_MIN, Daemon
from shiftwatch.decode import decode
from shiftwatch.levels import LEVELS_IN_FLIGHT
from shiftwatch.metrics import Metrics
from shiftwatch.mqtt import PlainClient

from .conftest import Collector
from .fuzz_strategies import HOSTILE_PIECES, MESSAGES, PROPERTY, TOPIC_TEXT, is_safe
from .test_daemon_mqtt import JSON_STREAM, metric_value, wait_metric
from .test_daemon_process import wait_until

T0 = 1_790_000_000.0
PREFIX = "fzsw"
STREAMS = """\
  - {topic: 'fz/num/#', format: number}
  - {topic: 'fz/json/#', format: json, value: v, time: ts}
  - {topic: 'fz/batch/#', format: json}
  - {topic: 'fz/senml/#', format: senml}
"""
#: Small windows so a stepped series gives its records in 120 samples.
SMALL = "detection: {warmup_samples: 20, window_samples: 60, baseline_guard: 10, confirm_min_samples: 10}\n"
#: Reasons the callback and the daemon use besides the decoders' and the engine's.
SHELL_REASONS = {"no_matching_stream", "stream_cap", "queue_full", "topic_not_utf8", "internal_error"}
DEFECTS = {"internal_error"}


@pytest.fixture(scope="module")
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[MosquittoBroker]:
    try:
        b = MosquittoBroker(workdir=tmp_path_factory.mktemp("fuzz-broker")).start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test broker: {exc}")
    yield b
    b.stop()


class ListHandler(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


@contextmanager
def live_daemon(broker: MosquittoBroker, state: Path, *, max_streams: int, client_id: str,
                extra: str = "") -> Iterator[tuple[Daemon, Collector, ListHandler]]:
    """A started Daemon (metrics on a free port, link connected) and a subscriber of '#'."""
    cfg = parse_config(
        f"broker: {{url: '{broker.url}', client_id: {client_id}, keepalive: 5}}\n"
        f"streams:\n{STREAMS}{SMALL}alerts: {{topic_prefix: {PREFIX}}}\n"
        f"metrics: {{listen: '127.0.0.1:0', max_streams: {max_streams}}}\n"
        f"state: {{dir: '{state}'}}\n" + extra)
    log = logging.getLogger(f"shiftwatch.test.{client_id}")
    log.propagate = False
    handler = ListHandler()
    log.addHandler(handler)
    seen = Collector(broker.url, "#", f"{client_id}-viewer")
    seen.client.start()
    daemon = Daemon(cfg, metrics=Metrics(), logger=log)
    daemon.start()
    try:
        assert wait_until(lambda: daemon.link is not None and daemon.link.connected)
        yield daemon, seen, handler
    finally:
        daemon.request_stop()
        daemon.shutdown()
        seen.client.stop()
        log.removeHandler(handler)


def deliver(daemon: Daemon, topic: bytes, payload: bytes, *, mid: int = 0, qos: int = 0) -> None:
    """What paho's network thread does with an incoming PUBLISH: call the link's on_message."""
    msg = paho.MQTTMessage(mid=mid, topic=topic)
    msg.payload = payload
    msg.qos = qos
    assert daemon.link is not None
    daemon.link.client.on_message(daemon.link.client, None, msg)  # type: ignore[misc]


def drops(daemon: Daemon) -> dict[str, float]:
    out: dict[str, float] = {}
    for fam in daemon.metrics.messages_dropped.collect():
        for s in fam.samples:
            if s.name.endswith("_total"):
                out[s.labels["reason"]] = s.value
    return out


def received(daemon: Daemon) -> float:
    return float(daemon.metrics.messages_received._value.get())


def samples(daemon: Daemon) -> int:
    """Samples the engines took in: those counted in samples_total, plus those whose
    time was not newer than their stream's newest, which are counted only among the
    rejections (so that a sample the broker delivers again never counts twice), plus
    those of calm streams waiting in the pool for their engines (journaled already)."""
    waiting = 0 if daemon.pool is None else daemon.pool.total_waiting()
    return waiting + sum(e.samples_total + e.rejected_total["duplicate_time"] + e.rejected_total["out_of_order"]
                         for e in daemon.engines.values())


def units(daemon: Daemon, topic: bytes, payload: bytes) -> tuple[int, bool]:
    """What one message must add to drops + samples, and whether it holds one sample at most.

    A message that cannot be handed over, or matches no stream entry, costs one
    drop; otherwise each reading and each problem (but the no_time note, which
    goes with a kept reading) is one unit.
    """
    try:
        text = topic.decode("utf-8")
    except UnicodeDecodeError:
        return 1, True
    spec = daemon.spec_for(text)
    if spec is None:
        return 1, True
    dec = decode(payload, spec.format, value_path=spec.value, time_path=spec.time,
                 max_bytes=daemon.cfg.broker.max_payload_bytes, now=T0)
    n = len(dec.readings) + sum(p.reason != "no_time" for p in dec.problems)
    body = payload[3:] if payload.startswith(b"\xef\xbb\xbf") else payload  # the decoder drops a BOM
    single = spec.format == "number" or (spec.format == "json" and not body.lstrip(b" \t\r\n").startswith(b"["))
    return n, single


def scrape(daemon: Daemon) -> str:
    assert daemon.server is not None
    with urllib.request.urlopen(f"http://127.0.0.1:{daemon.server.port}/metrics", timeout=10) as r:
        return r.read().decode("utf-8")


def check_exposition(daemon: Daemon) -> None:
    """/metrics over HTTP parses, and its stream labels are exactly the daemon's streams."""
    labels: set[str] = set()
    for fam in text_string_to_metric_families(scrape(daemon)):
        for s in fam.samples:
            if s.name == "shiftwatch_samples_total":
                labels.add(s.labels["stream"])
            if s.name == "shiftwatch_messages_dropped_total":
                assert s.labels["reason"] in set(decode_module.REASONS) | SHELL_REASONS
    assert labels == set(daemon.engines)


def alert_items(seen: Collector) -> list[tuple[str, Any]]:
    with seen._cv:
        return [(t, b) for t, b in seen.items if t.startswith(f"{PREFIX}/alerts/")]


def check_published(daemon: Daemon, seen: Collector) -> None:
    """Everything the daemon published arrived, under its prefix, on a safe topic."""
    assert seen.wait_for(lambda items: len(alert_items(seen)) >= daemon.records_published, timeout=20)
    with seen._cv:
        topics = [t for t, _ in seen.items]
    for t in topics:
        assert t == f"{PREFIX}/status" or t.startswith((f"{PREFIX}/alerts/", f"{PREFIX}/levels/")), t
        assert is_safe(t) and "\x00" not in t and t.count("/") < 200, t
    for t, body in alert_items(seen):
        assert isinstance(body, dict) and t == f"{PREFIX}/alerts/{body['stream']}"
        assert body["stream"] in daemon.engines
    assert len(alert_items(seen)) == daemon.records_published


# ---------------------------------------------------------------------------
# Properties over the whole path.

#: One message for each reason the property must meet at least once.
EVERY_REASON = [
    (b"fz/json/a", b"\xff"), (b"fz/json/a", b"{"), (b"fz/json/a", b"[" * 65_000),
    (b"fz/json/a", b"1" * 65_537), (b"fz/json/a", b'{"v": NaN}'), (b"fz/json/a", b'{"v": 1e999}'),
    (b"fz/json/a", b'{"v": "12.5"}'), (b"fz/batch/a", b"[" + b"1," * 10_000 + b"1]"),
    (b"fz/senml/a", b'[{"n": "a b", "v": 1}]'), (b"fz/senml/a", b'[{"bn": "a"}]'),
    (b"other/a", b"1"), (b"fz/num/\xff", b"1"),
] + [(f"fz/num/cap{k}".encode(), b"1") for k in range(30)]


def test_property_every_message_is_accounted_for(mosquitto: MosquittoBroker, tmp_path: Path) -> None:
    with live_daemon(mosquitto, tmp_path / "state", max_streams=25, client_id="fz-prop") as (d, seen, _):
        tally: Tally[str] = Tally()

        @settings(PROPERTY, max_examples=1200)
        @given(msgs=MESSAGES)
        @example(msgs=EVERY_REASON)  # so each reason below is met, whatever hypothesis draws
        def prop(msgs: list[tuple[bytes, bytes]]) -> None:
            before_r, before_d, before_s = received(d), drops(d), samples(d)
            expected = [units(d, t, p) for t, p in msgs]
            for i, (topic, payload) in enumerate(msgs):
                deliver(d, topic, payload, mid=i + 1)
            while len(d.inbox):
                d.round(timeout=0.0)
            after_d = drops(d)
            delta = {k: v - before_d.get(k, 0.0) for k, v in after_d.items() if v != before_d.get(k, 0.0)}
            tally.update({k: int(v) for k, v in delta.items()})
            assert not DEFECTS & set(delta), delta
            assert received(d) - before_r == len(msgs)
            got = sum(delta.values()) + samples(d) - before_s
            assert got == sum(n for n, _ in expected)
            assert all(n >= 1 for n, _ in expected)  # nothing goes unaccounted
            if all(single for _, single in expected):
                assert all(n == 1 for n, _ in expected)
                assert got == len(msgs)  # received == sum(dropped) + accepted

        prop()
        assert len(d.engines) == 25
        check_exposition(d)
        check_published(d, seen)
        assert d.link is not None and d.link.connected
        # The examples reached the reasons the task names, and the cap.
        for reason in ("not_utf8", "not_json", "too_deep", "too_large", "nan", "infinite", "value_is_text",
                       "too_many_items", "senml_invalid", "empty", "no_matching_stream", "topic_not_utf8",
                       "stream_cap"):
            assert tally[reason] > 0, (reason, tally)


def hostile_name() -> st.SearchStrategy[tuple[str, str]]:
    """(topic suffix, SenML name) pairs built from the pieces that would inject."""
    senml_ok = st.text("abz09-:._/", min_size=1, max_size=30).filter(lambda s: s[0].isalnum())
    senml_name = senml_ok | st.sampled_from(["a/../../x", "a/" * 120 + "z", "z" * 400, "a/+/b", "a#",
                                             "a\x00b", 'a"b', "a\\b", "a\nb"])
    return st.tuples(TOPIC_TEXT | HOSTILE_PIECES, senml_name)


def stepped_pack(name: str, seed: int, start: float) -> bytes:
    x = 10.0 + np.random.default_rng(seed).standard_normal(120)
    x[60:] += 8.0
    recs: list[dict[str, Any]] = [{"bn": name, "bt": start, "bu": "g", "v": float(x[0])}]
    recs += [{"t": float(i), "v": float(v)} for i, v in enumerate(x[1:], start=1)]
    return json.dumps(recs).encode()


def test_property_hostile_names_never_reach_a_bad_topic(mosquitto: MosquittoBroker, tmp_path: Path) -> None:
    # Each example opens a stream under a hostile name and steps it, so the
    # daemon publishes alert records and levels under that name.
    with live_daemon(mosquitto, tmp_path / "state", max_streams=100_000,
                     client_id="fz-names") as (d, seen, _):
        examples = iter(range(10**6))

        @settings(PROPERTY, max_examples=100)
        @given(pair=hostile_name(), seed=st.integers(0, 2**31))
        def prop(pair: tuple[str, str], seed: int) -> None:
            suffix, name = pair
            start = T0 + 1000.0 * next(examples)  # later each time, should a name come back
            deliver(d, ("fz/senml/" + suffix).encode("utf-8"), stepped_pack(name, seed, start))
            while len(d.inbox):
                d.round(timeout=0.0)
            assert not DEFECTS & set(drops(d))
            check_published(d, seen)
            assert d.link is not None and d.link.connected
            check_exposition(d)

        prop()
        assert d.records_published >= 60
        # Labels that need escaping went through the exposition and back.
        text = scrape(d)
        assert '\\"' in text and "\\\\" in text


def test_callback_sets_aside_a_topic_that_is_not_utf8(mosquitto: MosquittoBroker, tmp_path: Path) -> None:
    # paho hands over whatever topic bytes the broker sent; MQTT says UTF-8.
    with live_daemon(mosquitto, tmp_path / "state", max_streams=10, client_id="fz-topic") as (d, _, _):
        assert d.link is not None
        acked: list[tuple[int, int]] = []
        real_ack = d.link.client.ack
        d.link.client.ack = lambda mid, qos: acked.append((mid, qos)) or real_ack(mid, qos)  # type: ignore
        deliver(d, b"fz/num/\xff\xfe", b"1.0", mid=77, qos=1)
        assert drops(d) == {"topic_not_utf8": 1.0} and received(d) == 1
        assert acked == [(77, 1)]  # acknowledged, or it would hold one of the broker's in-flight slots
        assert len(d.inbox) == 0 and d.link.connected


def test_oversized_payloads_are_set_aside_before_parsing(mosquitto: MosquittoBroker, tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    parsed: list[int] = []
    real = decode_module._JSON

    class CountingDecoder:
        def decode(self, text: str) -> Any:
            parsed.append(len(text))
            return real.decode(text)

    monkeypatch.setattr(decode_module, "_JSON", CountingDecoder())
    fast = decode_module._fast_loads

    def counting_fast(data: bytes | str) -> Any:  # orjson's parse, tried first
        parsed.append(len(data))
        return fast(data)

    monkeypatch.setattr(decode_module, "_fast_loads", counting_fast)
    with live_daemon(mosquitto, tmp_path / "state", max_streams=10, client_id="fz-size",
                     extra="") as (d, _, handler):
        limit = d.cfg.broker.max_payload_bytes
        assert limit == 65536  # the default
        pub = PlainClient(mosquitto.url, "fz-size-pub").start()
        try:
            # 8 MB of a JSON array would take a good part of a second to parse.
            slow = b"[" + b"1.5," * 2_000_000 + b"1.5]"
            for payload in (slow, b"[" * (limit + 1), b"\xff" * (limit + 1), b"1" * (limit + 1)):
                pub.publish_wait("fz/batch/a", payload)
            pub.publish_wait("fz/batch/a", b'{"value": 1.5}')  # a normal one is parsed
            assert wait_until(lambda: len(d.inbox) == 5)
        finally:
            pub.stop()
        while len(d.inbox):  # a round ends once its payloads reach 2 MB
            d.round(timeout=0.0)
    assert drops(d) == {"too_large": 4.0}
    assert parsed == [len('{"value": 1.5}')]  # the parser never saw the big ones
    assert any("(too_large)" in line and f"the limit is {limit}" in line for line in handler.lines)


def test_flood_of_new_topics_keeps_the_cap_and_serves_the_old_stream(mosquitto: MosquittoBroker,
                                                                     tmp_path: Path) -> None:
    # 10,000 messages on distinct topics through the broker, with max_streams
    # 100, while one stream that was there first steps.
    n_flood, cap, n_good, step = 10_000, 100, 300, 150
    x = 500.0 + 0.5 * np.random.default_rng(11).standard_normal(n_good)
    x[step:] += 3.0
    good = [json.dumps({"v": float(v), "ts": T0 + i}).encode() for i, v in enumerate(x)]
    with live_daemon(mosquitto, tmp_path / "state", max_streams=cap, client_id="fz-flood") as (d, seen, handler):
        pub = PlainClient(mosquitto.url, "fz-flood-pub").start()

        def publish() -> None:
            for i in range(30):
                pub.publish("fz/json/filler/head1", good[i])
            g = 30
            for k in range(n_flood):
                pub.publish(f"fz/num/flood/{k}", b"1.0")
                if k % 40 == 0 and g < n_good:
                    pub.publish("fz/json/filler/head1", good[g])
                    g += 1
            for i in range(g, n_good):
                pub.publish("fz/json/filler/head1", good[i])

        th = threading.Thread(target=publish)
        th.start()
        total = n_flood + n_good
        deadline = time.monotonic() + 120
        while received(d) < total and time.monotonic() < deadline:
            d.round(timeout=0.05)
        th.join()
        pub.stop()
        assert received(d) == total
        assert len(d.engines) == cap
        assert drops(d) == {"stream_cap": n_flood - (cap - 1)}
        assert d.engines["fz/json/filler/head1"].samples_total == n_good
        # The cap's bookkeeping stays bounded: no per-topic memory of capped streams.
        assert len(d._spec_cache) <= SPEC_CACHE_MIN + cap
        assert len(d.rlog._last) <= 10 and len(d.rlog._held) <= 10
        assert sum("stream limit of 100 reached" in line for line in handler.lines) <= 2
        # The old stream's alerts are those of an engine fed only its own samples.
        assert seen.wait_for(lambda items: len(alert_items(seen)) >= 2)
        expected = [r.to_dict() for r in StreamEngine("fz/json/filler/head1", d.cfg.streams[1].detection)
                    .process(T0 + np.arange(float(n_good)), x).records]
        got = [b for _, b in alert_items(seen)]
        for rec in got + expected:
            rec.pop("summary", None), rec.pop("unit", None)
        assert got == expected and [r["phase"] for r in got] == ["detected", "confirmed"]
        assert parse_time(got[1]["shift_at"]) == T0 + step


def test_level_updates_waiting_for_acknowledgement_stay_bounded(mosquitto: MosquittoBroker,
                                                                tmp_path: Path) -> None:
    # 200 streams finish their warm-up while the broker answers nothing (SIGSTOP,
    # shorter than the keepalive): paho gets LEVELS_IN_FLIGHT level updates, the
    # other streams wait their turn, and once the broker answers again every
    # stream's retained level is the one its engine holds.
    n = 200
    rng = np.random.default_rng(12)
    with live_daemon(mosquitto, tmp_path / "state", max_streams=n, client_id="fz-levels") as (d, seen, _):
        assert d.link is not None
        mosquitto.freeze()
        try:
            # 50 samples a stream: a first warm-up of 20 whose samples hint at a shift is
            # stretched by 25 (engine.WARM_STRETCH) before its level is set; 50 pass that.
            for k in range(n):
                batch = [{"v": float(v), "ts": T0 + i} for i, v in enumerate(50.0 + rng.standard_normal(50))]
                deliver(d, f"fz/json/line/{k}".encode(), json.dumps(batch).encode())
            while len(d.inbox):
                d.round(timeout=0.05)
            assert all(e.level is not None for e in d.engines.values()) and len(d.engines) == n
            assert len(d.levels.in_flight) == LEVELS_IN_FLIGHT
            assert len(d.levels.due) == n - LEVELS_IN_FLIGHT
            held = [m for m in d.link.client._out_messages.values() if m.topic.startswith(f"{PREFIX}/levels/")]
            assert len(held) == LEVELS_IN_FLIGHT  # what paho holds
        finally:
            mosquitto.thaw()
        prefix = f"{PREFIX}/levels/fz/json/line/"  # earlier tests left retained levels of their own

        def latest() -> dict[str, Any]:
            with seen._cv:
                return {t[len(prefix):]: b for t, b in seen.items if t.startswith(prefix)}

        deadline = time.monotonic() + 30
        while (d.levels.due or len(latest()) < n) and time.monotonic() < deadline:
            d.round(timeout=0.05)
        got = latest()
        assert set(got) == {name[len("fz/json/line/"):] for name in d.engines}
        for name, body in got.items():
            eng = d.engines["fz/json/line/" + name]
            # Level and sigma to 6 significant digits, as the payload rounds them for people.
            assert (body["state"], body["level"], body["sigma"]) == \
                (eng.state, float(f"{eng.level:.6g}"), float(f"{eng.sigma:.6g}"))
        assert not d.levels.due and d.link.connected


# ---------------------------------------------------------------------------
# The real daemon as a process, bad input published through the broker.

JSON_GOOD = JSON_STREAM + """\
  - topic: brackenfield/line2/oven/+
    format: senml
  - topic: brackenfield/line2/capper/+
    format: number
"""

#: One sample's worth each (a single JSON object, one number, a one-record
#: pack), each with the reason it must be counted under.
BAD = [
    ("brackenfield/line2/filler/head9/fill", b"not json", "not_json"),
    ("brackenfield/line2/filler/head9/fill", b"\xff\xfe", "not_utf8"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": "12.5", "ts": 1790000000}', "value_is_text"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": NaN, "ts": 1790000000}', "nan"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": Infinity, "ts": 1790000000}', "infinite"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": ' + str(10**400).encode() + b"}", "infinite"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": 1, "ts": ' + b"9" * 5000 + b"}", "bad_time"),
    ("brackenfield/line2/filler/head9/fill", b"[" * 65_000, "too_deep"),
    ("brackenfield/line2/filler/head9/fill", b"1" * 65537, "too_large"),
    ("brackenfield/line2/filler/head9/fill", b'{"ts": 5}', "no_value"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": true}', "not_a_number"),
    ("brackenfield/line2/filler/head9/fill", b'{"weight_g": 1, "ts": "yesterday"}', "bad_time"),
    ("brackenfield/line2/filler/head9/fill", b"", "empty"),
    ("brackenfield/line2/oven/zone1", b'[{"bn": "oven/", "bt": "now", "v": 1}]', "senml_invalid"),
    ("brackenfield/line2/oven/zone1", b'[{"n": "a/+/#", "v": 1}]', "senml_invalid"),
    ("brackenfield/line2/oven/zone1", b'[{"n": "t\\"\\\\\\n", "v": 1}]', "senml_invalid"),
    ("brackenfield/line2/oven/zone1", b'[{"bn": "a"}]', "empty"),
    ("brackenfield/line2/oven/zone1", b'{"n": "a", "v": 1}', "senml_invalid"),
    ("brackenfield/line2/capper/torque", b"1,5", "not_a_number"),
    ("brackenfield/line2/capper/torque", b"-nan", "nan"),
]
#: Accepted samples on streams whose names need care in a topic or a label
#: (Mosquitto carries these topics; it refuses wildcards and control characters).
ODD_NAMES = [
    ("brackenfield/line2/capper/to\"rq\\ue", b"2.5"),
    ("brackenfield/line2/capper/..", b"2.5"),
    ("brackenfield/line2/capper/\u2028 \u202e$x", b"2.5"),
    ("brackenfield/line2/capper/" + "x" * 400, b"2.5"),
    ("brackenfield/line2/oven/zone1", b'[{"bn": "a/../../", "n": "x", "v": 1}]'),
]


def log_lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.strip()]


def reason_of(line: str) -> str | None:
    m = re.search(r"set aside \(([a-z_0-9]+)\)", line)
    if m:
        return m.group(1)
    if "stream limit of" in line:
        return "stream_cap"
    if "no time at" in line:
        return "no_time"
    return None


CAP = 50


def test_real_daemon_under_bad_input_keeps_the_good_stream_exact(daemon_factory, collector, publisher) -> None:
    d = daemon_factory(JSON_GOOD)
    d.config.write_text(d.config.read_text().replace("metrics:\n", f"metrics:\n  max_streams: {CAP}\n"))
    d.start()
    started = time.monotonic()
    alerts = collector("sw/alerts/#")
    n, step, per = 800, 500, 10
    x = 500.0 + 0.6 * np.random.default_rng(6).standard_normal(n)
    x[step:] += 1.2
    topic = "brackenfield/line2/filler/head1/fill"
    want: Tally[str] = Tally()
    for i, v in enumerate(x):
        publisher.publish(topic, json.dumps({"weight_g": float(v), "ts": int((T0 + i) * 1000)}))
        for j in range(per):
            bad_topic, payload, reason = BAD[(i * per + j) % len(BAD)]
            publisher.publish(bad_topic, payload)
            want[reason] += 1
        if i == 0:  # these open streams before the new topics below fill the cap
            for odd_topic, payload in ODD_NAMES:
                publisher.publish(odd_topic, payload)
        for k in range(i * per, (i + 1) * per):  # new topics, most of them past the stream cap
            publisher.publish(f"brackenfield/line2/capper/c{k}", b"2.5")
    odd = len(ODD_NAMES)
    capped = n * per - (CAP - 1 - odd)
    want["stream_cap"] = capped
    total = n * (2 * per + 1) + odd
    text = wait_metric(d, "shiftwatch_messages_received_total", total, timeout=120)
    assert alerts.wait_for(lambda items: any(b.get("phase") == "confirmed" for _, b in items))
    wait_metric(d, "shiftwatch_samples_total", n, stream=topic)
    # The capped topics are the last ones published; a round may still hold a
    # few of them after the good stream's last sample has been counted.
    text = wait_metric(d, "shiftwatch_messages_dropped_total", capped, reason="stream_cap")
    families = list(text_string_to_metric_families(text))  # parseable, with hostile names in
    dropped = Tally({s.labels["reason"]: s.value for fam in families for s in fam.samples
                     if s.name == "shiftwatch_messages_dropped_total"})
    accepted = sum(s.value for fam in families for s in fam.samples if s.name == "shiftwatch_samples_total")
    assert sum(dropped.values()) + accepted == total  # received == dropped + accepted
    assert dropped == want  # each under its own reason
    assert accepted == n + odd + (CAP - 1 - odd)
    assert metric_value(text, "shiftwatch_samples_total", stream=topic) == n
    assert metric_value(text, "shiftwatch_streams") == CAP
    # The good stream says what an engine fed only its own samples says.
    eng = StreamEngine(topic, DetectionSettings(), unit="g")
    expected = [r.to_dict() for r in eng.process(T0 + np.arange(float(n)), x).records]
    got = alerts.records()
    for rec in got:
        rec.pop("summary")
    assert got == expected
    assert abs(parse_time(alerts.records("confirmed")[0]["shift_at"]) - (T0 + step)) <= 3
    assert d.stop() == 0
    lived = time.monotonic() - started
    # Logs: at most one line per reason per 10 s (plus the one that opens a window, and
    # the summary of what was held back when the daemon stopped).
    lines = log_lines(d.log_text())
    per_reason = Tally(r for r in map(reason_of, lines) if r is not None)
    allowed = math.floor(lived / 10) + 2
    assert per_reason and max(per_reason.values()) <= allowed, (per_reason, lived)
    assert len(lines) <= 30 + CAP + len(per_reason) * allowed, len(lines)  # CAP "new stream" lines
