"""Fixtures for the security tests: a private certificate authority, TLS and password brokers,
and the real daemon with its stderr read line by line.

Certificates are made here with the ``cryptography`` package (its X.509 tutorial,
https://cryptography.io/en/latest/x509/tutorial/, shows the builder calls), with the
extensions RFC 5280 asks of a CA and of a TLS server: basicConstraints (4.2.1.9),
keyUsage (4.2.1.3), extKeyUsage serverAuth (4.2.1.12), subjectAltName (4.2.1.6), and
the key identifiers (4.2.1.1, 4.2.1.2) that OpenSSL uses to build the chain.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import json
import os
import ssl
import subprocess
import threading
import time
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID
from prometheus_client.parser import text_string_to_metric_families

from shiftwatch.broker import (
    MosquittoBroker,
    TlsListener,
    free_port,
    wait_until,  # noqa: F401  re-exported for the tests
)
from shiftwatch.mqtt import PlainClient

NOW = dt.datetime.now(dt.UTC)


def _write_key(key: ec.EllipticCurvePrivateKey, path: Path) -> Path:
    path.write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM,
            serialization.PrivateFormat.PKCS8,
            serialization.NoEncryption(),
        )
    )
    os.chmod(path, 0o600)
    return path


def key_usage(*, ca: bool) -> x509.KeyUsage:
    """RFC 5280 4.2.1.3: a CA signs certificates and CRLs; a TLS leaf with an EC key signs only."""
    return x509.KeyUsage(
        digital_signature=not ca,
        content_commitment=False,
        key_encipherment=False,
        data_encipherment=False,
        key_agreement=False,
        key_cert_sign=ca,
        crl_sign=ca,
        encipher_only=False,
        decipher_only=False,
    )


@dataclass
class Authority:
    """A CA of our own: its key, its self-signed certificate and where the PEM is."""

    name: str
    key: ec.EllipticCurvePrivateKey
    cert: x509.Certificate
    cert_file: Path

    @classmethod
    def create(cls, directory: Path, name: str) -> Authority:
        key = ec.generate_private_key(ec.SECP256R1())
        subject = x509.Name(
            [
                x509.NameAttribute(NameOID.ORGANIZATION_NAME, "Brackenfield Bottling (test)"),
                x509.NameAttribute(NameOID.COMMON_NAME, name),
            ]
        )
        ski = x509.SubjectKeyIdentifier.from_public_key(key.public_key())
        cert = (
            x509.CertificateBuilder()
            .subject_name(subject)
            .issuer_name(subject)
            .public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(NOW - dt.timedelta(days=1))
            .not_valid_after(NOW + dt.timedelta(days=30))
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .add_extension(
                key_usage(ca=True),
                critical=True,
            )
            .add_extension(ski, critical=False)
            .sign(key, hashes.SHA256())
        )
        path = directory / f"{name}.pem"
        path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
        return cls(name, key, cert, path)

    def issue(
        self,
        directory: Path,
        stem: str,
        *,
        dns: tuple[str, ...] = ("localhost",),
        ips: tuple[str, ...] = ("127.0.0.1",),
        days_valid: tuple[float, float] = (-1, 30),
        client: bool = False,
    ) -> tuple[Path, Path]:
        """A leaf certificate signed by this CA; returns (cert_file, key_file)."""
        key = ec.generate_private_key(ec.SECP256R1())
        cn = dns[0] if dns else ips[0]
        alt: list[x509.GeneralName] = [x509.DNSName(d) for d in dns]
        alt += [x509.IPAddress(ipaddress.ip_address(i)) for i in ips]
        usage = ExtendedKeyUsageOID.CLIENT_AUTH if client else ExtendedKeyUsageOID.SERVER_AUTH
        builder = (
            x509.CertificateBuilder()
            .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)]))
            .issuer_name(self.cert.subject)
            .public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(NOW + dt.timedelta(days=days_valid[0]))
            .not_valid_after(NOW + dt.timedelta(days=days_valid[1]))
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .add_extension(
                key_usage(ca=False),
                critical=True,
            )
            .add_extension(x509.ExtendedKeyUsage([usage]), critical=False)
            .add_extension(
                x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False
            )
            .add_extension(
                x509.AuthorityKeyIdentifier.from_issuer_public_key(self.key.public_key()),
                critical=False,
            )
        )
        if alt:
            builder = builder.add_extension(x509.SubjectAlternativeName(alt), critical=False)
        cert = builder.sign(self.key, hashes.SHA256())
        cert_file = directory / f"{stem}.crt"
        cert_file.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
        return cert_file, _write_key(key, directory / f"{stem}.key")


@dataclass
class Pki:
    """The test's certificates: a plant CA with good, expired and wrongly named broker
    certificates, and a second CA that signed none of them."""

    plant: Authority
    other: Authority
    good: tuple[Path, Path]
    expired: tuple[Path, Path]
    wrong_host: tuple[Path, Path]
    client: tuple[Path, Path]
    foreign_client: tuple[Path, Path]
    directory: Path


@pytest.fixture(scope="session")
def pki(tmp_path_factory: pytest.TempPathFactory) -> Pki:
    d = tmp_path_factory.mktemp("pki")
    plant = Authority.create(d, "brackenfield-plant-ca")
    other = Authority.create(d, "some-other-ca")
    return Pki(
        plant=plant,
        other=other,
        good=plant.issue(d, "broker-good"),
        # Expired yesterday (RFC 5280 4.1.2.5: valid only between notBefore and notAfter).
        expired=plant.issue(d, "broker-expired", days_valid=(-10, -1)),
        # A name that is not the address the daemon dials (RFC 6125 / RFC 2818 identity check).
        wrong_host=plant.issue(
            d, "broker-wrong-host", dns=("broker.brackenfield.example",), ips=()
        ),
        # Client certificates for brokers that want one: from the plant CA, and from the other.
        client=plant.issue(d, "client-line2", dns=("shiftwatch-line2",), ips=(), client=True),
        foreign_client=other.issue(
            d, "client-foreign", dns=("shiftwatch-line2",), ips=(), client=True
        ),
        directory=d,
    )


def start_broker(b: MosquittoBroker) -> MosquittoBroker:
    """Start the broker; a broker that cannot start fails the test (it never skips)."""
    try:
        return b.start()
    except RuntimeError as exc:
        pytest.fail(f"cannot start the test broker: {exc}")


@pytest.fixture
def tls_broker(tmp_path: Path, pki: Pki) -> Iterator[MosquittoBroker]:
    """A Mosquitto with a plain listener (for the test's own clients) and three TLS
    listeners: the good certificate, the expired one and the wrongly named one."""
    b = MosquittoBroker(
        workdir=tmp_path / "tls-broker",
        log=True,
        tls=[TlsListener(*pki.good), TlsListener(*pki.expired), TlsListener(*pki.wrong_host)],
    )
    yield start_broker(b)
    b.stop()


BROKER_USER = "shiftwatch-line2"
BROKER_SECRET = "Qz7-kettle-Harbour-91"  # looked for in every log and output below
VIEWER_USER, VIEWER_SECRET = "viewer", "viewer-pass-5521"


@pytest.fixture
def auth_broker(tmp_path: Path) -> Iterator[MosquittoBroker]:
    """A Mosquitto with a password file and ``allow_anonymous false``."""
    b = MosquittoBroker(
        workdir=tmp_path / "auth-broker",
        log=True,
        users={BROKER_USER: BROKER_SECRET, VIEWER_USER: VIEWER_SECRET},
    )
    yield start_broker(b)
    b.stop()


class RunningDaemon:
    """``shiftwatch run`` in a subprocess; a thread stamps each stderr line as it arrives,
    so tests can count connection attempts and the gaps between them."""

    def __init__(
        self,
        command: list[str],
        config: Path,
        env: dict[str, str] | None = None,
        args: tuple[str, ...] = (),
    ) -> None:
        self.config = config
        self.lines: list[tuple[float, str]] = []
        self._cv = threading.Condition()
        self.proc = subprocess.Popen(
            [*command, "run", "--config", str(config), *args],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            env=env,
        )
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            with self._cv:
                self.lines.append((time.monotonic(), line.rstrip("\n")))
                self._cv.notify_all()

    def text(self) -> str:
        with self._cv:
            return "\n".join(line for _, line in self.lines)

    def wait_for(self, pred: Callable[[list[str]], bool], timeout: float = 30.0) -> bool:
        deadline = time.monotonic() + timeout
        with self._cv:
            while not pred([line for _, line in self.lines]):
                left = deadline - time.monotonic()
                if left <= 0 or self.proc.poll() is not None and not self._reader.is_alive():
                    return pred([line for _, line in self.lines])
                self._cv.wait(min(left, 0.5))
            return True

    def matching(self, needle: str) -> list[tuple[float, str]]:
        with self._cv:
            return [(t, line) for t, line in self.lines if needle in line]

    def stop(self, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            self.proc.terminate()
        code = self.proc.wait(timeout=timeout)
        self._reader.join(timeout=5)
        return code


@pytest.fixture
def run_daemon(shiftwatch_cmd: list[str]) -> Iterator[Callable[..., RunningDaemon]]:
    started: list[RunningDaemon] = []

    def start(
        config: Path, env: dict[str, str] | None = None, args: tuple[str, ...] = ()
    ) -> RunningDaemon:
        d = RunningDaemon(shiftwatch_cmd, config, env, args)
        started.append(d)
        return d

    yield start
    for d in started:
        if d.proc.poll() is None:
            d.proc.kill()
            d.proc.wait()


NUMBER_STREAM = "  - topic: brackenfield/line2/capper/+/torque\n    format: number\n    unit: N m\n"
JSON_STREAM = (
    "  - topic: brackenfield/line2/filler/+/fill\n    format: json\n    value: weight_g\n"
    "    time: ts\n    unit: g\n"
)


def write_config(
    path: Path,
    *,
    broker: str,
    state: Path,
    metrics: str | None = None,
    streams: str = JSON_STREAM,
    mode: int = 0o600,
) -> Path:
    """A daemon configuration: ``broker`` and ``metrics`` are the YAML bodies of those sections."""
    metrics = metrics if metrics is not None else f"  listen: 127.0.0.1:{free_port()}\n"
    path.write_text(
        f"broker:\n{broker}streams:\n{streams}alerts:\n  topic_prefix: sw\n"
        f"metrics:\n{metrics}state:\n  dir: {state}\n  snapshot_every: 1s\n"
    )
    os.chmod(path, mode)
    return path


def metrics_port(config: Path) -> int:
    """The port of ``metrics.listen`` in a configuration written by :func:`write_config`."""
    for line in config.read_text().splitlines():
        if line.strip().startswith("listen:"):
            return int(line.rsplit(":", 1)[1])
    raise AssertionError(f"no metrics.listen in {config}")


def fill_series(seed: int = 5, n: int = 700, step: int = 450, delta: float = 1.2) -> list[bytes]:
    """JSON fill-weight payloads at 1 Hz with one upward step (the invented bottling line)."""
    x = 500.0 + 0.6 * np.random.default_rng(seed).standard_normal(n)
    x[step:] += delta
    t0 = 1_790_000_000.0
    return [
        json.dumps({"weight_g": round(float(v), 4), "ts": int((t0 + i) * 1000)}).encode()
        for i, v in enumerate(x)
    ]




def scrape(port: int, *, scheme: str = "http", context: ssl.SSLContext | None = None) -> str:
    with urllib.request.urlopen(
        f"{scheme}://127.0.0.1:{port}/metrics", timeout=10, context=context
    ) as r:
        body: bytes = r.read()
        return body.decode()


def metric(text: str, name: str, **labels: str) -> float | None:
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items()):
                return float(s.value)
    return None


class Watcher:
    """A subscriber of the test's own that keeps (topic, payload) pairs."""

    def __init__(self, url: str, filt: str, client_id: str, **login: str) -> None:
        self.items: list[tuple[str, bytes]] = []
        self._lock = threading.Lock()
        self.client = PlainClient(url, client_id, subscribe=[filt], on_message=self._on, **login)

    def _on(self, topic: str, payload: bytes) -> None:
        with self._lock:
            self.items.append((topic, payload))

    def records(self) -> list[dict[str, object]]:
        with self._lock:
            out = []
            for _, p in self.items:
                try:
                    body = json.loads(p)
                except ValueError:
                    continue
                if isinstance(body, dict):
                    out.append(body)
            return out
