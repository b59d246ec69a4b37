"""A throw-away plant PKI for the access tests, made with the ``cryptography`` package.

Why generated in the test and not checked in: a checked-in key is a key anyone can read, and
a checked-in certificate expires one day and turns a green suite red for no reason. Each test
session makes its own CA, broker and client certificates in a temporary folder.

What is made (X.509 profile after RFC 5280; only what mosquitto and Python's ``ssl`` check):

- ``ca``: the plant CA (``basicConstraints CA:TRUE``, ``keyCertSign``);
- ``broker``: the broker's certificate, ``subjectAltName`` IP 127.0.0.1 and DNS localhost,
  so a client that checks host names (paho does, RFC 6125) accepts it on loopback;
- clients: ``CN`` = station id (the deploy ACL matches it through
  ``use_identity_as_username``), ``extendedKeyUsage clientAuth``;
- a *rogue* CA with its own broker and client certificates (a stranger's PKI), and an
  *expired* client certificate signed by the plant CA.

Keys are EC P-256: fast to make and accepted by OpenSSL 3 at its default security level.
Key files are written mode 0600, the way deploy/BOARD.md asks for them on a board.

Demo scenario: Brackenfield Garden Machines, mower deck assembly (invented).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import ipaddress
import os
import random
import signal
from collections.abc import AsyncIterator, Callable
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from clampd.daemon.runtime import BrokerConfig, MqttSession, StationState
from clampd.protocol import Topics
from clampd.simulators._broker import BrokerUnavailableError, mosquitto_path

__all__ = [
    "DEPLOY",
    "Identity",
    "Pki",
    "deploy_broker_config",
    "make_pki",
    "run_mosquitto",
    "wait_until",
]

_ORG = "Brackenfield Garden Machines (test)"


@dataclasses.dataclass(frozen=True, slots=True)
class Identity:
    """A certificate and its key on disk (PEM)."""

    cert: Path
    key: Path


@dataclasses.dataclass(frozen=True, slots=True)
class Pki:
    """Every file the access tests use."""

    ca: Path  # plant CA certificate
    broker: Identity
    rogue_ca: Path
    rogue_broker: Identity
    folder: Path
    _ca_key: ec.EllipticCurvePrivateKey
    _ca_cert: x509.Certificate
    _rogue_key: ec.EllipticCurvePrivateKey
    _rogue_cert: x509.Certificate

    def client(self, cn: str, *, rogue: bool = False, expired: bool = False) -> Identity:
        """A client certificate with common name ``cn``, issued by the plant CA (or the rogue
        one); ``expired`` makes one whose validity ended yesterday."""
        key = ec.generate_private_key(ec.SECP256R1())
        issuer_key, issuer = (
            (self._rogue_key, self._rogue_cert) if rogue else (self._ca_key, self._ca_cert)
        )
        now = dt.datetime.now(dt.UTC)
        start, end = (
            (now - dt.timedelta(days=30), now - dt.timedelta(days=1))
            if expired
            else (now - dt.timedelta(minutes=5), now + dt.timedelta(days=2))
        )
        cert = (
            _builder(cn, issuer, key, start, end)
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
            .add_extension(
                x509.AuthorityKeyIdentifier.from_issuer_public_key(issuer_key.public_key()),
                critical=False,
            )
            .sign(issuer_key, hashes.SHA256())
        )
        tag = f"{cn}{'-rogue' if rogue else ''}{'-expired' if expired else ''}"
        return _write_identity(self.folder, tag, cert, key)


def _name(cn: str) -> x509.Name:
    return x509.Name(
        [
            x509.NameAttribute(NameOID.ORGANIZATION_NAME, _ORG),
            x509.NameAttribute(NameOID.COMMON_NAME, cn),
        ]
    )


def _builder(
    cn: str,
    issuer: x509.Certificate | None,
    key: ec.EllipticCurvePrivateKey,
    start: dt.datetime,
    end: dt.datetime,
) -> x509.CertificateBuilder:
    return (
        x509.CertificateBuilder()
        .subject_name(_name(cn))
        .issuer_name(issuer.subject if issuer is not None else _name(cn))
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
    )


def _make_ca(cn: str) -> tuple[ec.EllipticCurvePrivateKey, x509.Certificate]:
    key = ec.generate_private_key(ec.SECP256R1())
    now = dt.datetime.now(dt.UTC)
    cert = (
        _builder(cn, None, key, now - dt.timedelta(minutes=5), now + dt.timedelta(days=2))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=False,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=True,
                crl_sign=True,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .sign(key, hashes.SHA256())
    )
    return key, cert


def _server_cert(
    issuer_key: ec.EllipticCurvePrivateKey, issuer: x509.Certificate
) -> tuple[x509.Certificate, ec.EllipticCurvePrivateKey]:
    key = ec.generate_private_key(ec.SECP256R1())
    now = dt.datetime.now(dt.UTC)
    cert = (
        _builder("broker.test", issuer, key, now - dt.timedelta(minutes=5), now + dt.timedelta(2))
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(
            x509.SubjectAlternativeName(
                [x509.IPAddress(ipaddress.ip_address("127.0.0.1")), x509.DNSName("localhost")]
            ),
            critical=False,
        )
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH]), critical=False)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_public_key(issuer_key.public_key()),
            critical=False,
        )
        .sign(issuer_key, hashes.SHA256())
    )
    return cert, key


def _write_cert(path: Path, cert: x509.Certificate) -> Path:
    path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    return path


def _write_identity(
    folder: Path, tag: str, cert: x509.Certificate, key: ec.EllipticCurvePrivateKey
) -> Identity:
    cert_path = _write_cert(folder / f"{tag}.crt", cert)
    key_path = folder / f"{tag}.key"
    # Created 0600 from the start: never readable by others, not even for a moment.
    fd = os.open(key_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "wb") as f:
        f.write(
            key.private_bytes(
                serialization.Encoding.PEM,
                serialization.PrivateFormat.PKCS8,
                serialization.NoEncryption(),
            )
        )
    return Identity(cert=cert_path, key=key_path)


def make_pki(folder: Path) -> Pki:
    """Make the plant CA, the broker certificate and the rogue PKI under ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    ca_key, ca_cert = _make_ca("Brackenfield plant CA (test)")
    rogue_key, rogue_cert = _make_ca("Unknown CA (test)")
    broker_cert, broker_key = _server_cert(ca_key, ca_cert)
    rogue_broker_cert, rogue_broker_key = _server_cert(rogue_key, rogue_cert)
    return Pki(
        ca=_write_cert(folder / "plant-ca.crt", ca_cert),
        broker=_write_identity(folder, "broker", broker_cert, broker_key),
        rogue_ca=_write_cert(folder / "rogue-ca.crt", rogue_cert),
        rogue_broker=_write_identity(folder, "rogue-broker", rogue_broker_cert, rogue_broker_key),
        folder=folder,
        _ca_key=ca_key,
        _ca_cert=ca_cert,
        _rogue_key=rogue_key,
        _rogue_cert=rogue_cert,
    )


# -- the deploy example broker, run for real on loopback ----------------------------------

DEPLOY = Path(__file__).resolve().parent.parent / "deploy" / "mosquitto"


def deploy_broker_config(
    port: int, workdir: Path, pki: Pki, *, acl: Path | None = None, broker: Identity | None = None
) -> str:
    """``deploy/mosquitto/clampd-broker.conf`` with only the site-specific lines changed.

    The listener moves to 127.0.0.1:``port``, the certificate paths to this test's PKI, the ACL
    to ``acl`` (default: the shipped ``clampd.acl``), persistence to ``workdir``, logging to
    stderr (no syslog here); ``user root`` is added when running as root (mosquitto would
    otherwise drop to a user that cannot write ``workdir``). Every other line — mutual TLS,
    ``use_identity_as_username``, queue limits — is the shipped text, so the tests prove the
    example itself. Each replaced line must occur exactly once: a reshaped example fails
    loudly here instead of silently testing something else.
    """
    broker = broker or pki.broker
    text = (DEPLOY / "clampd-broker.conf").read_text(encoding="utf-8")
    swaps = {
        "listener 8883": f"listener {port} 127.0.0.1",
        "cafile   /etc/mosquitto/certs/plant-ca.crt": f"cafile {pki.ca}",
        "certfile /etc/mosquitto/certs/broker.crt": f"certfile {broker.cert}",
        "keyfile  /etc/mosquitto/certs/broker.key": f"keyfile {broker.key}",
        "acl_file /etc/mosquitto/clampd.acl": f"acl_file {acl or DEPLOY / 'clampd.acl'}",
        "persistence_location /var/lib/mosquitto/": f"persistence_location {workdir}/",
        "log_dest syslog": "log_dest stderr",
    }
    lines = text.splitlines()
    for old, new in swaps.items():
        hits = [i for i, line in enumerate(lines) if line.strip() == old]
        if len(hits) != 1:
            raise AssertionError(f"deploy broker example: expected one line {old!r}, found {hits}")
        lines[hits[0]] = new
    if os.geteuid() == 0:
        lines.append("user root")
    return "\n".join(lines) + "\n"


@contextlib.asynccontextmanager
async def run_mosquitto(config: str, workdir: Path, port: int) -> AsyncIterator[Path]:
    """Run mosquitto with exactly ``config``; yield its log file; SIGTERM it on the way out.

    Ready when the port accepts TCP (a bare TCP probe: the listener speaks TLS, the probe
    does not, and mosquitto logs and drops it). Bounded: 10 s to open the port.
    """
    exe = mosquitto_path()
    if exe is None:
        raise BrokerUnavailableError("mosquitto is not installed")
    conf = workdir / "mosquitto.conf"
    conf.write_text(config, encoding="utf-8")
    log = workdir / "mosquitto.log"
    with log.open("ab") as sink:
        proc = await asyncio.create_subprocess_exec(
            exe, "-c", str(conf), stdout=asyncio.subprocess.DEVNULL, stderr=sink
        )
    try:
        async with asyncio.timeout(10):
            while True:
                if proc.returncode is not None:
                    raise BrokerUnavailableError(
                        f"mosquitto exited at start: {log.read_text(errors='replace')[-800:]}"
                    )
                try:
                    _, writer = await asyncio.open_connection("127.0.0.1", port)
                except OSError:
                    await asyncio.sleep(0.01)
                    continue
                writer.close()
                with contextlib.suppress(OSError):
                    await writer.wait_closed()
                break
        yield log
    finally:
        if proc.returncode is None:
            proc.send_signal(signal.SIGTERM)
            await proc.wait()


async def wait_until(check: Callable[[], bool], what: str, timeout_s: float = 20.0) -> None:
    """Wait, bounded, until ``check()`` holds (for state that has no event to await, such as
    a counter or a log line). The bound is a safety net; callers assert on what they see."""
    try:
        async with asyncio.timeout(timeout_s):
            # 20 ms polls: far below any wait here, light on a 2-core machine.
            while not check():  # noqa: ASYNC110
                await asyncio.sleep(0.02)
    except TimeoutError:
        raise AssertionError(f"gave up waiting for {what} after {timeout_s} s") from None


def station_session(
    port: int, pki: Pki, topics: Topics, state: StationState, station_id: str, *, seed: int
) -> MqttSession:
    """The station's own MQTT session on the deploy broker: mutual TLS with the station's
    client certificate (its CN is the identity the ACL matches), as a board runs it."""
    ident = pki.client(station_id)
    return MqttSession(
        BrokerConfig(
            url=f"mqtts://127.0.0.1:{port}",
            tls_ca=pki.ca,
            tls_cert=ident.cert,
            tls_key=ident.key,
        ),
        topics,
        station_id=station_id,
        client_id=f"clampd-{station_id}",
        status_provider=state.status,
        rng=random.Random(seed),
    )
