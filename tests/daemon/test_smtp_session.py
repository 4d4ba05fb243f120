"""Connection-level behaviour: STARTTLS, idle and relay timeouts, the whole service."""

from __future__ import annotations

import asyncio
import datetime
import smtplib
import ssl
from dataclasses import replace
from pathlib import Path

import pytest
from smtp_helpers import (
    LOCAL,
    daemon_settings,
    message,
    running_daemon,
    running_service,
    send,
)

from mailweir.daemon.settings import Settings

pytestmark = pytest.mark.timeout(60)

MAREN = "maren.okafor@harbourlane.example"


def with_smtp(settings: Settings, **changes: object) -> Settings:
    return replace(settings, smtp=replace(settings.smtp, **changes))


def self_signed(folder: Path) -> tuple[Path, Path]:
    """A throwaway certificate for filter.harbourlane.example (test only)."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "filter.harbourlane.example")])
    now = datetime.datetime.now(datetime.UTC)
    certificate = (
        x509.CertificateBuilder()
        .subject_name(name)
        .issuer_name(name)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(days=1))
        .not_valid_after(now + datetime.timedelta(days=1))
        .sign(key, hashes.SHA256())
    )
    cert_path, key_path = folder / "cert.pem", folder / "key.pem"
    cert_path.write_bytes(certificate.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM,
            serialization.PrivateFormat.PKCS8,
            serialization.NoEncryption(),
        )
    )
    return cert_path, key_path


def ehlo_features(port: int) -> list[bytes]:
    with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
        return client.ehlo()[1].split(b"\n")


async def test_smtp_starttls_when_certificate_configured(next_hop, tmp_path):
    pytest.importorskip("cryptography", reason="makes the test certificate")
    cert, key = self_signed(tmp_path)
    settings = with_smtp(daemon_settings(next_hop.address), tls_cert=cert, tls_key=key)

    def over_tls(port: int) -> tuple[list[bytes], dict[str, tuple[int, bytes]]]:
        context = ssl.create_default_context()
        context.check_hostname = False
        context.verify_mode = ssl.CERT_NONE  # our own throwaway certificate
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            client.starttls(context=context)
            features = client.ehlo()[1].split(b"\n")
            return features, client.sendmail("orders@vetsupply.example", [MAREN], message())

    async with running_daemon(settings) as daemon:
        assert b"STARTTLS" in await asyncio.to_thread(ehlo_features, daemon.port)
        features, refused = await asyncio.to_thread(over_tls, daemon.port)
    assert b"STARTTLS" not in features
    assert not any(line.startswith(b"AUTH") for line in features)
    assert refused == {}
    assert next_hop.deliveries[0].content == message()


async def test_smtp_no_starttls_without_certificate(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        assert b"STARTTLS" not in await asyncio.to_thread(ehlo_features, daemon.port)


async def test_smtp_idle_connection_closed_after_command_timeout(next_hop):
    settings = with_smtp(daemon_settings(next_hop.address), command_timeout=0.3)
    async with running_daemon(settings) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        assert (await reader.readline()).startswith(b"220 ")
        assert await asyncio.wait_for(reader.read(), timeout=10) == b""
        writer.close()


async def test_smtp_slow_upload_not_cut_while_bytes_arrive(next_hop):
    # The command timeout is an idle timeout: a big message arriving slowly is not cut off.
    settings = with_smtp(daemon_settings(next_hop.address), command_timeout=1.0)
    async with running_daemon(settings) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        writer.write(b"EHLO mx.mail.example\r\nMAIL FROM:<orders@vetsupply.example>\r\n")
        writer.write(f"RCPT TO:<{MAREN}>\r\nDATA\r\n".encode())
        while not (await reader.readline()).startswith(b"354"):
            pass
        for _ in range(8):  # 8 x 0.3 s, well past the 1 s timeout in total
            writer.write(b"Subject: slow\r\n")
            await asyncio.sleep(0.3)
        writer.write(b"\r\nbody\r\n.\r\n")
        assert (await reader.readline()).startswith(b"250 ")
        writer.close()
    assert len(next_hop.deliveries) == 1


async def test_smtp_idle_timeout_counts_from_last_command(next_hop):
    # The idle timer notes activity and re-checks when it fires: commands keep the connection
    # past several timeout periods, and silence after them still closes it.
    settings = with_smtp(daemon_settings(next_hop.address), command_timeout=0.5)
    async with running_daemon(settings) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        assert (await reader.readline()).startswith(b"220 ")
        for _ in range(8):  # 8 x 0.2 s, past three timeout periods in total
            writer.write(b"NOOP\r\n")
            assert (await reader.readline()).startswith(b"250 ")
            await asyncio.sleep(0.2)
        assert await asyncio.wait_for(reader.read(), timeout=10) == b""
        writer.close()


async def test_smtp_slow_next_hop_within_its_timeout_keeps_upstream(next_hop):
    # Relaying may take longer than the upstream command timeout (RFC 5321 section 4.5.3.2.6
    # gives the end of DATA 10 minutes); the upstream connection must stay open meanwhile.
    next_hop.behaviour.delay_at_data = 0.8
    settings = with_smtp(daemon_settings(next_hop.address), command_timeout=0.3)
    async with running_daemon(settings) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data is not None and sent.data[0] == 250
    assert len(next_hop.deliveries) == 1


async def test_service_relays_and_marks_cold_start_unjudged(next_hop, tmp_path):
    pytest.importorskip("mailweir.daemon.service", reason="daemon/service.py not built yet")
    settings = replace(daemon_settings(next_hop.address), state_dir=tmp_path / "state")
    settings = replace(
        settings, http=replace(settings.http, listen=replace(settings.http.listen, port=0))
    )
    async with running_service(settings) as address:
        sent = await send(address.port, message())
    assert sent.data is not None and sent.data[0] == 250
    (delivery,) = next_hop.deliveries
    assert delivery.content.startswith(b"Mailweir-Verdict: unjudged\r\nMailweir-Id: ")
    assert delivery.content.endswith(message())
