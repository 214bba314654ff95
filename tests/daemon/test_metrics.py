"""The metrics endpoint, scraped for real over loopback."""

from __future__ import annotations

import math
import socket
import ssl
import subprocess
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.config import MetricsConfig
from shiftwatch.core.engine import StreamEngine
from shiftwatch.metrics import DEFAULT_LISTEN, Metrics, MetricsServer, StreamStats, parse_listen

Samples = dict[tuple[str, tuple[tuple[str, str], ...]], float]


def scrape(server: MetricsServer, *, scheme: str = "http", context: ssl.SSLContext | None = None) -> str:
    with urllib.request.urlopen(f"{scheme}://127.0.0.1:{server.port}/metrics", timeout=30,
                                context=context) as resp:
        assert resp.status == 200
        assert resp.headers["Content-Type"].startswith("text/plain")
        body: bytes = resp.read()
        return body.decode("utf-8")


def samples(text: str) -> Samples:
    """Every sample of a scrape keyed by (name, sorted labels)."""
    out: Samples = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def families(text: str) -> dict[str, tuple[str, str]]:
    return {f.name: (f.type, f.documentation) for f in text_string_to_metric_families(text)}


@pytest.fixture
def metrics() -> Metrics:
    return Metrics()


@pytest.fixture
def served(metrics: Metrics) -> Iterator[MetricsServer]:
    server = metrics.serve("127.0.0.1:0")
    try:
        yield server
    finally:
        server.close()


def watching(**over: object) -> StreamStats:
    base = {"samples_total": 1500, "rejected_total": {"nan": 3, "duplicate_time": 1},
                "records_total": {"detected": 2, "confirmed": 1}, "level": 500.25, "sigma": 0.4,
                "statistic": 3.5, "threshold": 16.2, "last_shift_at": 1764633600.5, "state": "watching"}
    base.update(over)
    return StreamStats(**base)  # type: ignore[arg-type]


def test_stream_values_after_update(metrics: Metrics, served: MetricsServer) -> None:
    metrics.update_stream("line1/fill_g", watching())
    got = samples(scrape(served))
    lab = (("stream", "line1/fill_g"),)
    assert got[("shiftwatch_samples_total", lab)] == 1500
    assert got[("shiftwatch_samples_rejected_total", (("reason", "nan"),) + lab)] == 3
    assert got[("shiftwatch_samples_rejected_total", (("reason", "duplicate_time"),) + lab)] == 1
    assert got[("shiftwatch_alert_records_total", (("phase", "detected"),) + lab)] == 2
    assert got[("shiftwatch_alert_records_total", (("phase", "confirmed"),) + lab)] == 1
    assert got[("shiftwatch_level", lab)] == 500.25
    assert got[("shiftwatch_sigma", lab)] == 0.4
    assert got[("shiftwatch_test_statistic", lab)] == 3.5
    assert got[("shiftwatch_test_threshold", lab)] == 16.2
    assert got[("shiftwatch_last_shift_timestamp_seconds", lab)] == 1764633600.5
    assert got[("shiftwatch_stream_info", (("state", "watching"),) + lab)] == 1
    assert got[("shiftwatch_streams", ())] == 1


def test_update_replaces_and_remove_drops(metrics: Metrics, served: MetricsServer) -> None:
    metrics.update_stream("a", watching())
    metrics.update_stream("b", watching(samples_total=7))
    metrics.update_stream("a", watching(samples_total=1600, state="event_open"))
    got = samples(scrape(served))
    assert got[("shiftwatch_samples_total", (("stream", "a"),))] == 1600
    assert ("shiftwatch_stream_info", (("state", "watching"), ("stream", "a"))) not in got
    assert got[("shiftwatch_stream_info", (("state", "event_open"), ("stream", "a")))] == 1
    assert got[("shiftwatch_streams", ())] == 2

    metrics.remove_stream("a")
    metrics.remove_stream("never-seen")
    got = samples(scrape(served))
    assert not [k for k in got if ("stream", "a") in k[1]]
    assert got[("shiftwatch_samples_total", (("stream", "b"),))] == 7
    assert got[("shiftwatch_streams", ())] == 1


def test_unknown_values_are_omitted_not_nan(metrics: Metrics, served: MetricsServer) -> None:
    metrics.update_stream("warm", StreamStats(
        samples_total=12, rejected_total={}, records_total={}, level=None, sigma=None,
        statistic=0.0, threshold=math.nan, last_shift_at=None, state="warming_up"))
    text = scrape(served)
    got = samples(text)
    assert not [v for v in got.values() if math.isnan(v)]
    lab = (("stream", "warm"),)
    assert got[("shiftwatch_samples_total", lab)] == 12
    for name in ("shiftwatch_level", "shiftwatch_sigma", "shiftwatch_test_statistic",
                 "shiftwatch_test_threshold", "shiftwatch_last_shift_timestamp_seconds"):
        assert (name, lab) not in got
    assert got[("shiftwatch_stream_info", (("state", "warming_up"),) + lab)] == 1


def test_from_engine_exports_the_engine_totals(metrics: Metrics, served: MetricsServer) -> None:
    # A 1-sigma step after 600 in-control samples, as in the engine's own example,
    # plus a few samples the screen rejects.
    rng = np.random.default_rng(11)
    t = 1764633600.0 + np.arange(1000.0)
    x = 500.0 + 0.4 * rng.standard_normal(1000)
    x[600:] += 0.4
    x[[100, 200]] = np.nan
    eng = StreamEngine("filler3/weight")
    eng.process(t, x)
    metrics.update_stream(eng.stream, StreamStats.from_engine(eng))
    got = samples(scrape(served))
    lab = (("stream", "filler3/weight"),)
    assert got[("shiftwatch_samples_total", lab)] == eng.samples_total == 1000
    for reason, n in eng.rejected_total.items():
        assert got[("shiftwatch_samples_rejected_total", (("reason", reason),) + lab)] == n
    assert sum(eng.rejected_total.values()) == 2
    assert got[("shiftwatch_alert_records_total", (("phase", "confirmed"),) + lab)] == 1
    assert got[("shiftwatch_level", lab)] == eng.level
    assert got[("shiftwatch_sigma", lab)] == eng.sigma
    assert got[("shiftwatch_test_threshold", lab)] == eng.threshold
    assert got[("shiftwatch_last_shift_timestamp_seconds", lab)] == eng.last_shift_at
    assert got[("shiftwatch_stream_info", (("state", eng.state),) + lab)] == 1
    # The snapshot is a copy: the engine moving on does not change it until the next update.
    eng.process(t[-1] + 1 + np.arange(5.0), np.full(5, 500.8))
    assert samples(scrape(served))[("shiftwatch_samples_total", lab)] == 1000


def test_awkward_label_values_round_trip(metrics: Metrics, served: MetricsServer) -> None:
    names = ['say "hi"', "back\\slash", "two\nlines", "tail\\", "ünïcode/温度", 'mix\\"\n\\n']
    for i, name in enumerate(names):
        metrics.update_stream(name, watching(samples_total=i + 1,
                                             rejected_total={'re"as\\on\n': i + 10}))
    got = samples(scrape(served))
    for i, name in enumerate(names):
        assert got[("shiftwatch_samples_total", (("stream", name),))] == i + 1
        assert got[("shiftwatch_samples_rejected_total",
                    (("reason", 're"as\\on\n'), ("stream", name)))] == i + 10
    assert got[("shiftwatch_streams", ())] == len(names)


def test_process_instruments(metrics: Metrics, served: MetricsServer) -> None:
    metrics.broker_connected.set(1)
    metrics.messages_received.inc(5)
    metrics.messages_dropped.labels(reason="bad_payload").inc(2)
    metrics.alert_delay.observe(0.004)
    metrics.alert_delay.observe(3.0)
    metrics.queue_depth.set(17)
    metrics.outbox_depth.set(4)
    metrics.snapshot_failures.inc()
    metrics.snapshots.inc(3)
    text = scrape(served)
    got = samples(text)
    assert got[("shiftwatch_broker_connected", ())] == 1
    assert got[("shiftwatch_messages_received_total", ())] == 5
    assert got[("shiftwatch_messages_dropped_total", (("reason", "bad_payload"),))] == 2
    assert got[("shiftwatch_alert_delay_seconds_count", ())] == 2
    assert got[("shiftwatch_alert_delay_seconds_sum", ())] == pytest.approx(3.004)
    assert got[("shiftwatch_alert_delay_seconds_bucket", (("le", "0.001"),))] == 0
    assert got[("shiftwatch_alert_delay_seconds_bucket", (("le", "0.005"),))] == 1
    assert got[("shiftwatch_alert_delay_seconds_bucket", (("le", "2.5"),))] == 1
    assert got[("shiftwatch_alert_delay_seconds_bucket", (("le", "5.0"),))] == 2
    assert got[("shiftwatch_alert_delay_seconds_bucket", (("le", "10.0"),))] == 2
    assert got[("shiftwatch_ingest_queue_depth", ())] == 17
    assert got[("shiftwatch_outbox_depth", ())] == 4
    assert got[("shiftwatch_snapshot_failures_total", ())] == 1
    assert got[("shiftwatch_snapshots_total", ())] == 3


def test_names_types_and_help(metrics: Metrics, served: MetricsServer) -> None:
    metrics.update_stream("s", watching())
    fams = families(scrape(served))
    expected = {
        "shiftwatch_samples": "counter", "shiftwatch_samples_rejected": "counter",
        "shiftwatch_alert_records": "counter", "shiftwatch_level": "gauge",
        "shiftwatch_sigma": "gauge", "shiftwatch_test_statistic": "gauge",
        "shiftwatch_test_threshold": "gauge", "shiftwatch_last_shift_timestamp_seconds": "gauge",
        "shiftwatch_stream_info": "gauge", "shiftwatch_streams": "gauge",
        "shiftwatch_stream_display_info": "gauge", "shiftwatch_broker_connected": "gauge", "shiftwatch_messages_received": "counter",
        "shiftwatch_messages_processed": "counter",
        "shiftwatch_messages_dropped": "counter", "shiftwatch_alert_delay_seconds": "histogram",
        "shiftwatch_ingest_queue_depth": "gauge", "shiftwatch_outbox_depth": "gauge", "shiftwatch_samples_waiting": "gauge",
        "shiftwatch_snapshot_failures": "counter", "shiftwatch_snapshots": "counter",
        "shiftwatch_outbox_failures": "counter", "shiftwatch_journal_failures": "counter",
        "shiftwatch_journal_damaged": "counter", "shiftwatch_stream_states_set_aside": "counter",
        "shiftwatch_client_id_conflicts": "counter", "shiftwatch_samples_handed_over": "counter",
        "shiftwatch_stream_handovers": "counter", "shiftwatch_samples_parked": "counter",
        "shiftwatch_shard_of_disputed": "gauge", "shiftwatch_stream_repeating": "gauge",
    }
    for name, kind in expected.items():
        assert fams[name][0] == kind, name
        assert fams[name][1].endswith("."), name
    # Nothing but our own metrics: no process or platform collectors on a private registry.
    # (prometheus_client adds a *_created gauge beside each of its own counters and histograms.)
    assert {n for n in fams if not n.endswith("_created")} == set(expected)


def test_the_display_info_names_each_streams_label_and_unit_once(metrics: Metrics,
                                                                 served: MetricsServer) -> None:
    # An info-style series (Prometheus naming practice, "_info" with value 1 and the facts as
    # labels), one per stream; an empty label is how the exposition leaves one out.
    metrics.label_for = {"plant/a": "fill weight head a"}.get
    metrics.update_stream("plant/a", watching(unit="g"))
    metrics.update_stream("plant/b", watching())
    got = {(s.labels["stream"], s.labels.get("label", ""), s.labels.get("unit", "")): s.value
           for f in text_string_to_metric_families(scrape(served)) for s in f.samples
           if s.name == "shiftwatch_stream_display_info"}
    assert got == {("plant/a", "fill weight head a", "g"): 1.0, ("plant/b", "", ""): 1.0}


def test_registries_are_independent() -> None:
    a, b = Metrics(), Metrics()
    a.update_stream("only-a", watching())
    a.messages_received.inc()
    assert b.registry.get_sample_value("shiftwatch_messages_received_total") == 0
    assert b.registry.get_sample_value("shiftwatch_samples_total", {"stream": "only-a"}) is None
    assert a.registry.get_sample_value("shiftwatch_samples_total", {"stream": "only-a"}) == 1500
    reg = CollectorRegistry()
    c = Metrics(reg)
    assert c.registry is reg
    with pytest.raises(ValueError):  # the same names cannot be registered twice
        Metrics(reg)


def test_listen_defaults_to_loopback(metrics: Metrics) -> None:
    assert parse_listen(DEFAULT_LISTEN)[0] == "127.0.0.1"
    assert DEFAULT_LISTEN == MetricsConfig().listen
    server = metrics.serve(":0")  # an empty host is loopback too, never every interface
    try:
        assert server.host == "127.0.0.1"
        assert server.port > 0
        assert "shiftwatch_streams 0.0" in scrape(server)
    finally:
        server.close()


def test_bad_listen_and_half_tls_are_refused(metrics: Metrics) -> None:
    for bad in ("127.0.0.1", "127.0.0.1:http", "127.0.0.1:70000", ""):
        with pytest.raises(ValueError):
            metrics.serve(bad)
    with pytest.raises(ValueError):
        metrics.serve("127.0.0.1:0", certfile="/nonexistent.pem")


def test_close_frees_the_port(metrics: Metrics) -> None:
    server = metrics.serve("127.0.0.1:0")
    port = server.port
    scrape(server)
    server.close()
    with pytest.raises(OSError):
        urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=30)
    again = metrics.serve(f"127.0.0.1:{port}")
    with again:
        assert again.port == port
        scrape(again)


@pytest.fixture
def self_signed(tmp_path: Path) -> tuple[Path, Path]:
    """A self-signed certificate for 127.0.0.1 and its key, made by the openssl CLI."""
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
                    "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1",
                    "-keyout", str(key), "-out", str(cert)], check=True, capture_output=True)
    return cert, key


def test_https_with_certificate(metrics: Metrics, self_signed: tuple[Path, Path]) -> None:
    cert, key = self_signed
    metrics.update_stream("tls", watching())
    with metrics.serve("127.0.0.1:0", certfile=str(cert), keyfile=str(key)) as server:
        ctx = ssl.create_default_context(cafile=str(cert))
        got = samples(scrape(server, scheme="https", context=ctx))
        assert got[("shiftwatch_samples_total", (("stream", "tls"),))] == 1500
        with pytest.raises(OSError):  # plain HTTP is not answered
            urllib.request.urlopen(f"http://127.0.0.1:{server.port}/metrics", timeout=30).read()


@pytest.mark.parametrize("tls", [False, True], ids=["http", "https"])
def test_a_silent_connection_is_dropped_after_the_timeout_and_holds_up_no_scrape(
    metrics: Metrics, self_signed: tuple[Path, Path], tls: bool,
    capsys: pytest.CaptureFixture[str],
) -> None:
    cert, key = self_signed
    files = {"certfile": str(cert), "keyfile": str(key)} if tls else {}
    context = ssl.create_default_context(cafile=str(cert)) if tls else None
    with metrics.serve("127.0.0.1:0", connection_timeout=0.5, **files) as server:
        # Connects and sends nothing: neither a TLS handshake nor a request line.
        with socket.create_connection(("127.0.0.1", server.port), timeout=30) as silent:
            scrape(server, scheme="https" if tls else "http", context=context)
            # The server hangs up on it (recv sees the end of the stream, b"") instead of
            # waiting for ever; the 30 s socket timeout bounds the wait.
            assert silent.recv(1) == b""
        scrape(server, scheme="https" if tls else "http", context=context)
    # The server thread handled the timeout before it closed the socket: nothing printed.
    assert "Traceback" not in capsys.readouterr().err
