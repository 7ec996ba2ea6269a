"""
HTTPS: ``listenpost collector serve`` with ``tls.cert``/``tls.key`` serves TLS only, and the agent's uplink
reaches a TLS collector when it trusts the issuing CA.

The certificates are made in the test with ``cryptography`` (already installed: bluetooth-data-tools
depends on it): a throw-away CA and a server certificate for 127.0.0.1 signed by it.
"""

from __future__ import annotations

import asyncio
import datetime
import ipaddress
import socket
import ssl
import sys
from pathlib import Path

import aiohttp
import pytest
import yaml
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import NameOID

from listenpost.agent.client.uplink import Uplink
from listenpost.agent.spool import Spool
from listenpost.collector.app import create_app
from listenpost.collector.cli import tls_context
from listenpost.collector.state import STORE
from listenpost.core.clock import VirtualClock
from listenpost.core.errors import ConfigError
from listenpost.core.records import Reading
from tests.collector.test_api import TAGS, enrolled, import_tags, settings_for


def make_certs(folder: Path) -> tuple[Path, Path, Path]:
    """(ca.pem, server cert.pem, server key.pem) in ``folder``, for 127.0.0.1 and localhost, valid for a day."""
    folder.mkdir(parents=True, exist_ok=True)
    now = datetime.datetime.now(datetime.UTC)
    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "Brackenford test CA")])
    ca = (
        x509.CertificateBuilder()
        .subject_name(ca_name)
        .issuer_name(ca_name)
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(minutes=5))
        .not_valid_after(now + datetime.timedelta(days=1))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
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
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key()), critical=False)
        .sign(ca_key, hashes.SHA256())
    )
    key = ec.generate_private_key(ec.SECP256R1())
    cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "collector.brackenford.test")]))
        .issuer_name(ca_name)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(minutes=5))
        .not_valid_after(now + datetime.timedelta(days=1))
        .add_extension(
            x509.SubjectAlternativeName(
                [x509.IPAddress(ipaddress.ip_address("127.0.0.1")), x509.DNSName("localhost")]
            ),
            critical=False,
        )
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(x509.ExtendedKeyUsage([x509.oid.ExtendedKeyUsageOID.SERVER_AUTH]), critical=False)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), critical=False
        )
        .sign(ca_key, hashes.SHA256())
    )
    ca_pem, cert_pem, key_pem = folder / "ca.pem", folder / "cert.pem", folder / "key.pem"
    ca_pem.write_bytes(ca.public_bytes(serialization.Encoding.PEM))
    cert_pem.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_pem.write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
        )
    )
    key_pem.chmod(0o600)
    return ca_pem, cert_pem, key_pem


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


async def test_serve_answers_https_with_the_configured_certificate_and_refuses_plain_http(tmp_path):
    """The real command in a child process: a client trusting the CA gets the status; plain HTTP gets nothing."""
    ca, cert, key = make_certs(tmp_path / "pki")
    port = free_port()
    config = tmp_path / "collector.yaml"
    config.write_text(
        yaml.safe_dump(
            {"listen": {"host": "127.0.0.1", "port": port}, "tls": {"cert": str(cert), "key": str(key)}}
        )
    )
    log = (tmp_path / "serve.log").open("wb")
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "listenpost",
        "collector",
        "serve",
        "--state-dir",
        str(tmp_path / "state"),
        "--config",
        str(config),
        "--log-format",
        "json",
        stdout=log,
        stderr=asyncio.subprocess.STDOUT,
    )
    trust = ssl.create_default_context(cafile=str(ca))
    try:
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=5)) as session:
            doc = None
            loop = asyncio.get_running_loop()
            end = loop.time() + 30  # the child's start-up (imports, migration) in real time, bounded
            while doc is None:
                assert proc.returncode is None, (tmp_path / "serve.log").read_text()
                try:
                    async with session.get(f"https://127.0.0.1:{port}/v1/status", ssl=trust) as r:
                        assert r.status == 200
                        doc = await r.json()
                except aiohttp.ClientConnectorError:
                    if loop.time() > end:
                        pytest.fail(
                            "collector serve did not listen within 30 s:\n"
                            + (tmp_path / "serve.log").read_text()
                        )
                    await asyncio.sleep(0.05)
            assert doc["fleet"]["boards"] == 0
            # Without the CA the certificate is not trusted ...
            with pytest.raises(aiohttp.ClientConnectorCertificateError):
                async with session.get(f"https://127.0.0.1:{port}/v1/status"):
                    pass
            # ... and plain HTTP on the TLS port never gets an answer.
            with pytest.raises(aiohttp.ClientError):
                async with session.get(f"http://127.0.0.1:{port}/v1/status") as r:
                    pytest.fail(f"plain HTTP answered {r.status}")
    finally:
        proc.terminate()
        try:
            await asyncio.wait_for(proc.wait(), 10)
        except TimeoutError:
            proc.kill()
            await proc.wait()
        log.close()
    assert proc.returncode == 0, (tmp_path / "serve.log").read_text()
    assert '"event": "collector_started"' in (tmp_path / "serve.log").read_text()


def test_tls_context_errors_name_the_files(tmp_path):
    """A key that does not belong to the certificate stops the start with a message naming both files."""
    _, cert, _ = make_certs(tmp_path / "a")
    _, _, other_key = make_certs(tmp_path / "b")
    settings = settings_for(tmp_path, tls={"cert": str(cert), "key": str(other_key)})
    with pytest.raises(ConfigError) as e:
        tls_context(settings)
    assert str(cert) in str(e.value) and str(other_key) in str(e.value) and "tls" in str(e.value)
    assert tls_context(settings_for(tmp_path)) is None


async def test_agent_uplink_reaches_a_tls_collector(
    aiohttp_server, aiohttp_client, tmp_path, clock: VirtualClock
):
    """The agent's uplink, with a session trusting the CA, stores its spool over HTTPS."""
    ca, cert, key = make_certs(tmp_path / "pki")
    settings = settings_for(tmp_path, tls={"cert": str(cert), "key": str(key)})
    server = await aiohttp_server(
        create_app(settings, clock=clock, run_monitor=False), ssl=tls_context(settings)
    )
    trust = ssl.create_default_context(cafile=str(ca))
    client = await aiohttp_client(server, connector=aiohttp.TCPConnector(ssl=trust))
    assert str(client.make_url("")).startswith("https://127.0.0.1:")
    await import_tags(client, tmp_path)
    auth = await enrolled(client, tmp_path, "g1-a", "G1 Light and Colour")
    spool = await Spool.open(tmp_path / "spool.sqlite", clock=clock, max_bytes=4 << 20, flush_seconds=5.0)
    try:
        for _ in range(3):
            for i in range(40):
                spool.add(Reading(TAGS[i % len(TAGS)], clock.monotonic_ns() + i * 5_000_000, -61.0 - i % 20))
            await spool.seal(boot=clock.boot_id, offset_db=0.0)
            await clock.advance(1.0)
        uplink = Uplink(
            base_url=str(client.make_url("")),
            token=auth["Authorization"].removeprefix("Bearer "),
            board="g1-a",
            clock=clock,
            spool=spool,
            session=client.session,
            timeout_s=5.0,
        )
        await asyncio.wait_for(uplink.run(until_empty=True), 10)
    finally:
        await spool.close()
    assert (uplink.counters.stored, uplink.counters.retries) == (3, 0)
    assert (await server.app[STORE].board_counts())[0].readings_total == 120


async def test_agent_enrolls_and_fetches_config_over_tls_with_its_ca_file(
    aiohttp_server, aiohttp_client, tmp_path, clock: VirtualClock
):
    """`agent enroll --ca-file` trusts a private CA, records it in agent.yaml, and every later call uses it."""
    from listenpost.agent.client.enroll import EnrollStatus, enroll
    from listenpost.agent.client.net import client_session
    from listenpost.agent.config import load_agent_config
    from tests.collector.test_api import add_board

    ca, cert, key = make_certs(tmp_path / "pki")
    settings = settings_for(tmp_path, tls={"cert": str(cert), "key": str(key)})
    server = await aiohttp_server(
        create_app(settings, clock=clock, run_monitor=False), ssl=tls_context(settings)
    )
    admin = await aiohttp_client(
        server, connector=aiohttp.TCPConnector(ssl=ssl.create_default_context(cafile=str(ca)))
    )
    url = str(admin.make_url("")).rstrip("/")
    code = await add_board(admin, tmp_path, "g1-a", "G1 Light & Optics", "ground")

    untrusting = await enroll(url, code, tmp_path / "no-ca", clock=clock, attempts=1)
    assert untrusting.status is EnrollStatus.UNREACHABLE
    assert "certificate" in untrusting.message.lower()

    done = await enroll(url, code, tmp_path / "board", clock=clock, attempts=1, ca_file=ca)
    assert done.status is EnrollStatus.ENROLLED, done.message
    cfg = load_agent_config(done.config_path)
    assert cfg.collector.ca_file == str(ca.resolve())
    token = (tmp_path / "board" / cfg.collector.credential_file).read_text().strip()
    async with client_session(cfg.collector.ca_file) as session:
        async with session.get(
            url + "/v1/config",
            headers={"Authorization": f"Bearer {token}"},
            timeout=aiohttp.ClientTimeout(total=5),
        ) as r:
            assert r.status == 200
            assert (await r.json())["board"] == "g1-a"


def test_a_bad_ca_file_is_a_config_error_naming_the_key(tmp_path):
    """A CA file that is not PEM is refused with the config key and the path."""
    from listenpost.agent.client.net import client_session

    bad = tmp_path / "ca.pem"
    bad.write_text("not a certificate")
    with pytest.raises(ConfigError, match="collector.ca_file: cannot load CA certificates"):
        client_session(bad)
