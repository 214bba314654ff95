"""The metrics endpoint: loopback unless asked otherwise, and HTTPS (optionally with client
certificates) with the handshake in each connection's own thread, scraped for real."""

from __future__ import annotations

import http.client
import socket
import ssl
import urllib.error
from pathlib import Path

import pytest

from shiftwatch.broker import MosquittoBroker, free_port
from shiftwatch.config import ConfigError, MetricsConfig, parse_config

from .conftest import Pki, metric, scrape, wait_until, write_config

NOT_SERVED = (OSError, http.client.HTTPException)


def listening_addresses(port: int) -> set[str]:
    """Local addresses of the TCP sockets listening on ``port`` (from /proc/net/tcp and tcp6)."""
    found = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        try:
            rows = Path(table).read_text().splitlines()[1:]
        except OSError:
            continue
        for row in rows:
            local, state = row.split()[1], row.split()[3]
            addr, hexport = local.split(":")
            if state == "0A" and int(hexport, 16) == port:  # 0A: TCP_LISTEN
                found.add(addr)
    return found


def test_the_default_listen_address_is_loopback() -> None:
    assert MetricsConfig().listen == "127.0.0.1:9650"
    assert parse_config("").metrics.listen == "127.0.0.1:9650"


@pytest.mark.broker
def test_the_daemon_binds_its_metrics_to_loopback(
    broker: MosquittoBroker, tmp_path: Path, run_daemon
) -> None:
    port = free_port()
    # An empty host also means loopback, never every interface.
    cfg = write_config(
        tmp_path / "m.yaml",
        state=tmp_path / "s",
        metrics=f"  listen: ':{port}'\n",
        broker=f"  url: {broker.url}\n  client_id: sw-loopback\n",
    )
    d = run_daemon(cfg)
    assert d.wait_for(lambda lines: any("connected to broker" in x for x in lines)), d.text()
    assert f"metrics on http://127.0.0.1:{port}/metrics" in d.text()
    assert wait_until(lambda: metric(scrape(port), "shiftwatch_broker_connected") == 1.0)
    # Bound to 127.0.0.1 only (0100007F in the kernel's table), not 0.0.0.0: another loopback
    # address of this host is refused.
    assert listening_addresses(port) == {"0100007F"}
    with pytest.raises(ConnectionRefusedError):
        socket.create_connection(("127.0.0.2", port), timeout=5).close()
    assert d.stop() == 0


def https_daemon(tmp_path: Path, broker: MosquittoBroker, pki: Pki, run_daemon, *, client_ca: bool):  # type: ignore[no-untyped-def]
    port = free_port()
    tls = f"    cert_file: {pki.good[0]}\n    key_file: {pki.good[1]}\n"
    if client_ca:
        tls += f"    client_ca_file: {pki.plant.cert_file}\n"
    cfg = write_config(
        tmp_path / f"https-{client_ca}.yaml",
        state=tmp_path / f"s-{client_ca}",
        metrics=f"  listen: 127.0.0.1:{port}\n  tls:\n{tls}",
        broker=f"  url: {broker.url}\n  client_id: sw-https-{client_ca}\n",
    )
    d = run_daemon(cfg)
    assert d.wait_for(lambda lines: any("connected to broker" in x for x in lines)), d.text()
    return d, port


@pytest.mark.broker
def test_metrics_over_https_with_the_plant_ca(
    broker: MosquittoBroker, tmp_path: Path, pki: Pki, run_daemon
) -> None:
    d, port = https_daemon(tmp_path, broker, pki, run_daemon, client_ca=False)
    assert f"metrics on https://127.0.0.1:{port}/metrics" in d.text()
    trusted = ssl.create_default_context(cafile=str(pki.plant.cert_file))
    assert wait_until(
        lambda: (
            metric(scrape(port, scheme="https", context=trusted), "shiftwatch_broker_connected")
            == 1.0
        )
    )
    with pytest.raises(NOT_SERVED):  # plain HTTP gets no metrics
        scrape(port)
    stranger = ssl.create_default_context(cafile=str(pki.other.cert_file))
    with pytest.raises(urllib.error.URLError) as exc:  # and the certificate is the one we made
        scrape(port, scheme="https", context=stranger)
    assert isinstance(exc.value.reason, ssl.SSLCertVerificationError)
    assert d.stop() == 0


@pytest.mark.broker
def test_metrics_can_require_client_certificates(
    broker: MosquittoBroker, tmp_path: Path, pki: Pki, run_daemon
) -> None:
    d, port = https_daemon(tmp_path, broker, pki, run_daemon, client_ca=True)
    assert "(client certificates required)" in d.text()
    scraper_cert, scraper_key = pki.plant.issue(
        pki.directory, "scraper", dns=("prometheus",), ips=(), client=True
    )
    trusted = ssl.create_default_context(cafile=str(pki.plant.cert_file))
    with pytest.raises(NOT_SERVED):  # no client certificate: refused
        scrape(port, scheme="https", context=trusted)
    trusted.load_cert_chain(str(scraper_cert), str(scraper_key))
    assert wait_until(
        lambda: (
            metric(scrape(port, scheme="https", context=trusted), "shiftwatch_broker_connected")
            == 1.0
        )
    )
    rogue_cert, rogue_key = pki.other.issue(
        pki.directory, "rogue-scraper", dns=("prometheus",), ips=(), client=True
    )
    rogue = ssl.create_default_context(cafile=str(pki.plant.cert_file))
    rogue.load_cert_chain(str(rogue_cert), str(rogue_key))
    with pytest.raises(NOT_SERVED):  # a certificate the plant CA did not sign: refused
        scrape(port, scheme="https", context=rogue)
    assert d.stop() == 0


@pytest.mark.broker
def test_a_silent_connection_does_not_hold_up_https_scrapes(
    broker: MosquittoBroker, tmp_path: Path, pki: Pki, run_daemon
) -> None:
    d, port = https_daemon(tmp_path, broker, pki, run_daemon, client_ca=False)
    trusted = ssl.create_default_context(cafile=str(pki.plant.cert_file))
    assert wait_until(lambda: metric(scrape(port, scheme="https", context=trusted),
                                     "shiftwatch_broker_connected") == 1.0)
    # A client that connects and never starts its TLS handshake.  prometheus_client's own TLS
    # ran the handshake in accept(), on the one accepting thread, without a timeout, so this
    # held up every scrape for as long as it stayed open.
    silent = socket.create_connection(("127.0.0.1", port), timeout=30)
    try:
        for _ in range(3):  # scrape(): urllib with a 10 s timeout of its own, so a bounded wait
            text = scrape(port, scheme="https", context=trusted)
            assert metric(text, "shiftwatch_broker_connected") == 1.0
    finally:
        silent.close()
    assert d.stop() == 0


@pytest.mark.parametrize(
    "text, expected",
    [
        (
            "metrics:\n  tls:\n    cert_file: /etc/shiftwatch/metrics.crt\n",
            "plant.yaml:3: metrics.tls.key_file: is required",
        ),
        (
            "metrics:\n  tls: {cert_file: a.crt, key_file: a.key, ca_file: ca.pem}\n",
            "plant.yaml:2: metrics.tls.ca_file: unknown key; did you mean",
        ),
        (
            "metrics:\n  tls: {cert_file: 5, key_file: a.key}\n",
            "plant.yaml:2: metrics.tls.cert_file: must be text, got 5",
        ),
        (
            "metrics:\n  tls: yes\n",
            "plant.yaml:2: metrics.tls: must be a mapping of keys to values",
        ),
    ],
)
def test_metrics_tls_settings_are_validated(text: str, expected: str) -> None:
    with pytest.raises(ConfigError) as exc:
        parse_config(text, file="plant.yaml")
    assert str(exc.value).startswith(expected)


def test_an_unusable_metrics_certificate_stops_the_start_with_a_clear_error(
    tmp_path: Path, pki: Pki, run_daemon
) -> None:
    port = free_port()
    cfg = write_config(
        tmp_path / "badcert.yaml",
        state=tmp_path / "s",
        broker="  url: mqtt://127.0.0.1:1\n",
        metrics=(
            f"  listen: 127.0.0.1:{port}\n  tls:\n    cert_file: {tmp_path / 'missing.crt'}\n"
            f"    key_file: {pki.good[1]}\n"
        ),
    )
    d = run_daemon(cfg)
    assert d.proc.wait(timeout=30) == 2
    d.stop()
    assert (
        f"metrics endpoint 127.0.0.1:{port}: metrics.tls: Cannot load server certificate file"
        in d.text()
    )
    assert "Traceback" not in d.text()


def test_a_metrics_endpoint_open_to_the_network_without_tls_draws_a_warning(
    tmp_path: Path, pki: Pki, cli
) -> None:
    open_cfg = write_config(
        tmp_path / "open.yaml",
        state=tmp_path / "s",
        broker="  url: mqtt://127.0.0.1:1883\n",
        metrics="  listen: 0.0.0.0:9650\n",
    )
    res = cli("check", "--config", str(open_cfg), "--no-network")
    assert res.returncode == 0
    assert (
        "metrics.listen 0.0.0.0:9650 is reachable from other hosts and metrics.tls is not set"
        in res.stderr
    )
    tls_cfg = write_config(
        tmp_path / "tls.yaml",
        state=tmp_path / "s",
        broker="  url: mqtt://127.0.0.1:1883\n",
        metrics=f"  listen: 0.0.0.0:9650\n  tls: {{cert_file: {pki.good[0]}, "
        f"key_file: {pki.good[1]}}}\n",
    )
    res = cli("check", "--config", str(tls_cfg), "--no-network")
    assert res.returncode == 0 and "warning" not in res.stderr, res.stderr


@pytest.mark.broker
def test_the_status_page_has_the_metrics_tls_and_client_certificates(
    broker: MosquittoBroker, tmp_path: Path, pki: Pki, run_daemon, shiftwatch_cmd
) -> None:
    import json
    import subprocess
    import urllib.request

    d, port = https_daemon(tmp_path, broker, pki, run_daemon, client_ca=True)
    assert f"status page on https://127.0.0.1:{port}/status (client certificates required)" in d.text()
    viewer_cert, viewer_key = pki.plant.issue(
        pki.directory, "status-viewer", dns=("supervisor-line2",), ips=(), client=True
    )
    trusted = ssl.create_default_context(cafile=str(pki.plant.cert_file))
    url = f"https://127.0.0.1:{port}/status.json"
    with pytest.raises(NOT_SERVED):  # no client certificate: the page is refused as the metrics are
        urllib.request.urlopen(url, timeout=10, context=trusted)
    with pytest.raises(NOT_SERVED):  # plain HTTP: nothing
        urllib.request.urlopen(url.replace("https:", "http:"), timeout=10)
    trusted.load_cert_chain(str(viewer_cert), str(viewer_key))
    with urllib.request.urlopen(url, timeout=10, context=trusted) as r:
        doc = json.loads(r.read())
    assert doc["advisory"].startswith("Advisory only") and doc["streams"] == []
    # `shiftwatch status` over the same HTTPS, with the client certificate.
    cfg = str(d.config)
    base = [*shiftwatch_cmd, "status", "--config", cfg, "--ca-file", str(pki.plant.cert_file)]
    res = subprocess.run([*base, "--cert-file", str(viewer_cert), "--key-file", str(viewer_key)],
                         capture_output=True, text=True, timeout=60, check=False)
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith("Advisory only") and "0 stream(s)" in res.stdout
    res = subprocess.run(base, capture_output=True, text=True, timeout=60, check=False)
    assert res.returncode == 2 and f"cannot read the status: {url}: " in res.stderr
    assert d.stop() == 0
