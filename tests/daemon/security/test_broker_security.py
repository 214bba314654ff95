"""TLS to the broker with verification on, and a user name and password, against a real Mosquitto.

Every failure (a CA that did not sign the broker's certificate, a certificate for
another name, an expired certificate, a wrong password, no user name at all) must
give one clear error line that names the broker URL and the reason, then retries
spaced by a growing delay: never a tight reconnect loop.  The broker's own log
counts the attempts independently of the daemon's lines.
"""

from __future__ import annotations

import itertools
import re
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from shiftwatch.broker import MosquittoBroker, TlsListener, free_port
from shiftwatch.mqtt import PlainClient

from .conftest import (
    BROKER_SECRET,
    BROKER_USER,
    NUMBER_STREAM,
    VIEWER_SECRET,
    VIEWER_USER,
    Pki,
    RunningDaemon,
    Watcher,
    fill_series,
    metric,
    metrics_port,
    scrape,
    start_broker,
    wait_until,
    write_config,
)

# Each failing daemon is watched for this long after its first attempt.  paho doubles its
# delay from 1 s: a refused login is retried after 1, 2, 4, 8 s (attempts at 0, 1, 3, 7, 15 s);
# a failed TLS handshake after 3, 4, 8 s (paho's first 1 s wait ends in no attempt).
WINDOW = 16.5


@dataclass
class Failure:
    name: str
    url: str
    reason: str  # expected in the one error line
    broker_marker: (
        str  # the broker's log line for one failed attempt (shared by the wrong-host cases)
    )
    daemon: RunningDaemon
    config: Path
    broker_log: str = ""
    exit_code: int | None = None
    connected_metric: float | None = None


@pytest.fixture(scope="module")
def failures(
    tmp_path_factory: pytest.TempPathFactory, pki: Pki, shiftwatch_cmd: list[str]
) -> Iterator[dict[str, Failure]]:
    """Six daemons that cannot connect, started together and watched for one window."""
    d = tmp_path_factory.mktemp("failures")
    login_ports = [free_port(), free_port()]  # one plain listener for each failing login
    broker = MosquittoBroker(
        workdir=d / "broker",
        log=True,
        extra=[f"listener {port} 127.0.0.1" for port in login_ports],
        users={BROKER_USER: BROKER_SECRET, VIEWER_USER: VIEWER_SECRET},
        tls=[
            TlsListener(*pki.good),
            TlsListener(*pki.expired),
            TlsListener(*pki.wrong_host),
            TlsListener(*pki.wrong_host),
            TlsListener(*pki.good, cafile=pki.plant.cert_file),  # wants client certificates
            TlsListener(*pki.good, cafile=pki.plant.cert_file),
        ],
    )
    start_broker(broker)
    good, expired, wrong_ip, wrong_name, wants_cert, wants_cert_too = broker.tls
    right_pw = d / "right.password"
    right_pw.write_text(BROKER_SECRET + "\n")
    wrong_pw = d / "wrong.password"
    wrong_pw.write_text("not-the-" + BROKER_SECRET + "\n")
    for f in (right_pw, wrong_pw):
        f.chmod(0o600)
    login = f"  username: {BROKER_USER}\n  password_file: {right_pw}\n"
    trust_plant = login + f"  tls: {{ca_file: {pki.plant.cert_file}}}\n"
    cases = [
        # (name, url, broker section body, expected reason, the broker's line for one attempt:
        #  the TLS alert OpenSSL sent back, or a new connection on the login's own listener)
        (
            "wrong_ca",
            good.url,
            login + f"  tls: {{ca_file: {pki.other.cert_file}}}\n",
            "TLS certificate verify failed: unable to get local issuer certificate",
            "alert unknown ca",
        ),
        (
            "wrong_host_ip",
            wrong_ip.url,
            trust_plant,
            ("TLS certificate verify failed: IP address mismatch, "
             "certificate is not valid for '127.0.0.1'"),
            "alert bad certificate",
        ),
        (
            "wrong_host_name",
            f"mqtts://localhost:{wrong_name.port}",
            trust_plant,
            ("TLS certificate verify failed: Hostname mismatch, "
             "certificate is not valid for 'localhost'"),
            "alert bad certificate",
        ),
        (
            "expired",
            expired.url,
            trust_plant,
            "TLS certificate verify failed: certificate has expired",
            "alert certificate expired",
        ),
        (
            "no_client_cert",
            wants_cert.url,
            trust_plant,
            ("the connection was closed before the broker accepted it: [SSL: "
             "TLSV13_ALERT_CERTIFICATE_REQUIRED] tlsv13 alert certificate required "
             "(the broker wants a client certificate it trusts"),
            "peer did not return a certificate",
        ),
        (
            "foreign_client_cert",
            wants_cert_too.url,
            trust_plant[:-2]
            + f", cert_file: {pki.foreign_client[0]}, key_file: {pki.foreign_client[1]}}}\n",
            ("the connection was closed before the broker accepted it: "
             "[SSL: TLSV1_ALERT_UNKNOWN_CA] tlsv1 alert unknown ca "
             "(the broker wants a client certificate it trusts"),
            "SSL routines::certificate verify failed",
        ),
        (
            "wrong_password",
            f"mqtt://127.0.0.1:{login_ports[0]}",
            f"  username: {BROKER_USER}\n  password_file: {wrong_pw}\n",
            f"refused the connection: Not authorized (user '{BROKER_USER}'",
            f"on port {login_ports[0]}.",
        ),
        (
            "anonymous",
            f"mqtt://127.0.0.1:{login_ports[1]}",
            "",
            "refused the connection: Not authorized (no user name",
            f"on port {login_ports[1]}.",
        ),
    ]
    out: dict[str, Failure] = {}
    for name, url, extra, reason, marker in cases:
        cid = f"sw-{name.replace('_', '-')}"
        cfg = write_config(
            d / f"{name}.yaml",
            broker=f"  url: {url}\n  client_id: {cid}\n{extra}",
            state=d / f"state-{name}",
            streams=NUMBER_STREAM,
        )
        out[name] = Failure(name, url, reason, marker, RunningDaemon(shiftwatch_cmd, cfg), cfg)
    for f in out.values():
        if not f.daemon.wait_for(lambda lines: any(x.startswith("ERROR") for x in lines), 30):
            pytest.fail(f"{f.name}: no error line: {f.daemon.text()}")
    first = max(f.daemon.matching("ERROR")[0][0] for f in out.values())
    time.sleep(max(0.0, first + WINDOW - time.monotonic()))
    for f in out.values():
        try:
            f.connected_metric = metric(
                scrape(metrics_port(f.config)), "shiftwatch_broker_connected"
            )
        except OSError:
            f.connected_metric = None
        f.exit_code = f.daemon.stop()
    time.sleep(0.2)
    broker.stop()
    log = broker.log_path.read_text()
    for f in out.values():
        f.broker_log = log
    yield out


CASES = [
    "no_client_cert",
    "foreign_client_cert",
    "wrong_ca",
    "wrong_host_ip",
    "wrong_host_name",
    "expired",
    "wrong_password",
    "anonymous",
]


@pytest.mark.broker
@pytest.mark.parametrize("case", CASES)
def test_a_failed_connection_gives_one_clear_error(failures: dict[str, Failure], case: str) -> None:
    f = failures[case]
    errors = [line for _, line in f.daemon.matching("ERROR")]
    assert len(errors) == 1, f.daemon.text()
    assert errors[0].startswith(f"ERROR broker {f.url}: "), errors[0]
    assert f.reason in errors[0], errors[0]
    assert errors[0].endswith("retrying with backoff")
    assert "Traceback" not in f.daemon.text()


@pytest.mark.broker
@pytest.mark.parametrize("case", CASES)
def attempt_times(f: Failure) -> list[float]:
    return [
        t
        for t, line in f.daemon.lines
        if line.startswith("ERROR broker") or "failed the same way" in line
    ]


@pytest.mark.broker
@pytest.mark.parametrize("case", CASES)
def test_a_failed_connection_is_retried_with_a_growing_delay(
    failures: dict[str, Failure], case: str
) -> None:
    f = failures[case]
    attempts = attempt_times(f)
    numbers = [
        int(m.group(1))
        for _, line in f.daemon.lines
        if (m := re.search(r"attempt (\d+) failed the same way", line))
    ]
    assert numbers == list(range(2, len(attempts) + 1)), f.daemon.text()
    # A tight loop would show hundreds of attempts; a fixed delay, gaps that do not grow.
    assert 4 <= len(attempts) <= 6, f.daemon.text()
    gaps = [b - a for a, b in itertools.pairwise(attempts)]
    assert min(gaps) >= 0.7, gaps
    assert all(later >= earlier - 0.3 for earlier, later in itertools.pairwise(gaps)), gaps
    assert gaps[-1] >= 2 * gaps[0], gaps
    # The broker saw the same attempts (one more at most for each daemon: one cut short by
    # the stop).  The two wrong-host daemons draw the same alert, so they are counted together.
    sharing = [g for g in failures.values() if g.broker_marker == f.broker_marker]
    made = sum(len(attempt_times(g)) for g in sharing)
    seen = f.broker_log.count(f.broker_marker)
    assert made <= seen <= made + len(sharing), (seen, made)


@pytest.mark.broker
@pytest.mark.parametrize("case", CASES)
def test_the_daemon_keeps_running_and_reports_disconnected(
    failures: dict[str, Failure], case: str
) -> None:
    f = failures[case]
    assert f.connected_metric == 0.0  # metrics still served, broker_connected 0
    assert f.exit_code == 0  # it was still running and stopped cleanly on SIGTERM


@pytest.mark.broker
@pytest.mark.parametrize("case", CASES)
def test_no_password_in_the_output_of_a_failed_connection(
    failures: dict[str, Failure], case: str
) -> None:
    text = failures[case].daemon.text()
    assert (
        BROKER_SECRET not in text
    )  # neither the right password nor the wrong one (it contains it)


@pytest.mark.broker
def test_verified_tls_connection_carries_samples_and_alerts(
    tls_broker: MosquittoBroker, pki: Pki, tmp_path: Path, run_daemon
) -> None:
    url = tls_broker.tls[0].url
    cfg = write_config(
        tmp_path / "tls.yaml",
        state=tmp_path / "state",
        broker=(
            f"  url: {url}\n  client_id: sw-tls-good\n  keepalive: 5\n"
            f"  tls: {{ca_file: {pki.plant.cert_file}}}\n"
        ),
    )
    d = run_daemon(cfg)
    assert d.wait_for(lambda lines: any(f"connected to broker {url}" in x for x in lines)), d.text()
    # The test's own clients use the broker's plain listener; the daemon only its TLS one.
    alerts = Watcher(tls_broker.url, "sw/#", "tls-viewer")
    alerts.client.start()
    pub = PlainClient(tls_broker.url, "tls-publisher").start()
    try:
        for payload in fill_series():
            pub.publish("brackenfield/line2/filler/head4/fill", payload)
        assert wait_until(
            lambda: any(r.get("phase") == "detected" for r in alerts.records()), 60
        ), d.text()
        rec = next(r for r in alerts.records() if r.get("phase") == "detected")
        assert rec["stream"] == "brackenfield/line2/filler/head4/fill" and rec["direction"] == "up"
        assert b"online" in [p for t, p in alerts.items if t == "sw/status"] or any(
            t == "sw/status" for t, _ in alerts.items
        )
        assert metric(scrape(metrics_port(cfg)), "shiftwatch_broker_connected") == 1.0
    finally:
        pub.stop()
        alerts.client.stop()
    assert "ERROR" not in d.text()
    assert d.stop() == 0
    # The broker saw a TLS client: its connection came in on the TLS port.
    assert f"on port {tls_broker.tls[0].port}." in tls_broker.log_path.read_text()


@pytest.mark.broker
def test_a_client_certificate_is_presented_when_the_broker_wants_one(
    tmp_path: Path, pki: Pki, run_daemon
) -> None:
    broker = MosquittoBroker(
        workdir=tmp_path / "mtls-broker", tls=[TlsListener(*pki.good, cafile=pki.plant.cert_file)]
    )
    start_broker(broker)
    try:
        url = broker.tls[0].url
        cert, key = pki.client
        cfg = write_config(
            tmp_path / "mtls.yaml",
            state=tmp_path / "state",
            broker=f"  url: {url}\n  client_id: sw-mtls\n"
            f"  tls: {{ca_file: {pki.plant.cert_file}, cert_file: {cert}, key_file: {key}}}\n",
        )
        d = run_daemon(cfg)
        assert d.wait_for(lambda lines: any(f"connected to broker {url}" in x for x in lines)), (
            d.text()
        )
        assert wait_until(
            lambda: metric(scrape(metrics_port(cfg)), "shiftwatch_broker_connected") == 1.0
        )
        assert d.stop() == 0
        assert "ERROR" not in d.text() and "WARNING" not in d.text(), d.text()
    finally:
        broker.stop()
