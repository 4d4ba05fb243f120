"""Who gets a connection (daemon/admission.py) and the wait for a client's first command.

Different clients are simulated with different loopback source addresses: Linux routes the
whole of 127.0.0.0/8 to the loopback interface (from memory; the tests bind 127.0.0.2 and up
as source addresses and would fail at connect if it did not).  Addresses in unit tests are
from the documentation ranges 192.0.2.0/24 and 198.51.100.0/24 (RFC 5737) and 2001:db8::/32
(RFC 3849).
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from smtp_helpers import LOCAL, FakeJudge, FakeVerdictLog, daemon_settings

from mailweir.daemon import replies
from mailweir.daemon.admission import UNKNOWN_CLIENT, Admission, client_key
from mailweir.daemon.config import load_settings
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import Settings, SmtpSettings
from mailweir.daemon.smtp import FilterHandler
from mailweir.daemon.smtp_server import Connections, FilterSMTP, create_smtp_server

pytestmark = pytest.mark.timeout(60)


# -- the rules ---------------------------------------------------------------------------------


def test_client_key_ipv4_is_the_address() -> None:
    assert client_key("192.0.2.7") == "192.0.2.7"
    assert client_key("::ffff:192.0.2.7") == "192.0.2.7"  # IPv4-mapped (RFC 4291 2.5.5.2)


def test_client_key_ipv6_is_its_64() -> None:
    assert client_key("2001:db8:0:1::7") == client_key("2001:db8:0:1:ffff::1")
    assert client_key("2001:db8:0:1::7") == "2001:db8:0:1::/64"
    assert client_key("2001:db8:0:2::7") != client_key("2001:db8:0:1::7")
    assert client_key("fe80::1%eth0") == "fe80::/64"  # zone index dropped


def test_client_key_without_an_address_is_one_unknown_client() -> None:
    assert client_key(None) == client_key("") == client_key("not an address") == UNKNOWN_CLIENT


def test_admission_per_client_cap_answers_4_7_0() -> None:
    admission = Admission(10, per_client=2)
    assert admission.admit("192.0.2.7", 0) is None
    assert admission.admit("192.0.2.7", 1) is None
    assert admission.admit("192.0.2.7", 2) == replies.TOO_MANY_FROM_CLIENT
    assert admission.admit("192.0.2.8", 2) is None  # another client is not held back
    admission.release("192.0.2.7")
    assert admission.admit("192.0.2.7", 2) is None  # a slot given back can be taken again
    assert str(replies.TOO_MANY_FROM_CLIENT).startswith("421 4.7.0 ")
    assert admission.refused == {"4.7.0": 1}  # counted (and logged: the first, every 1,000th)


def test_admission_outsiders_cannot_take_the_reserved_slots() -> None:
    admission = Admission(
        5, per_client=5, reserved_networks=["198.51.100.0/24"], reserved_connections=2
    )
    assert [admission.admit(f"192.0.2.{i}", i) for i in range(3)] == [None] * 3
    assert admission.admit("192.0.2.99", 3) == replies.TOO_MANY_CONNECTIONS
    assert admission.admit("198.51.100.25", 3) is None  # reserved: the slots kept for it
    assert admission.admit("198.51.100.25", 4) is None
    assert admission.admit("198.51.100.25", 5) == replies.TOO_MANY_CONNECTIONS  # total cap
    assert admission.outside == 3
    admission.release("198.51.100.25")  # a reserved client's slot is not an outsider's
    assert admission.outside == 3
    assert admission.refused == {"4.3.2": 2}


def test_admission_reserved_clients_have_no_per_client_cap() -> None:
    admission = Admission(50, per_client=1, reserved_networks=["::1/128"], reserved_connections=5)
    assert [admission.admit("::1", i) for i in range(10)] == [None] * 10
    assert admission.outside == 0


def test_admission_from_settings_defaults() -> None:
    admission = Admission.from_settings(SmtpSettings())
    assert (admission.limit, admission.per_client, admission.outside_limit) == (200, 20, 180)
    assert admission.admit("127.0.0.1", 0) is None and admission.outside == 0
    assert admission.admit("::1", 0) is None and admission.outside == 0
    assert admission.admit("127.0.0.2", 0) is None and admission.outside == 1


# -- configuration -----------------------------------------------------------------------------


def _load(tmp_path: Path, smtp: str) -> Settings:
    path = tmp_path / "mailweir.toml"
    path.write_text(f'state_dir = "{tmp_path}"\n[smtp]\n{smtp}\n', encoding="utf-8")
    return load_settings(path, env={})


def test_config_admission_defaults_when_unset(tmp_path: Path) -> None:
    smtp = _load(tmp_path, "").smtp
    assert smtp.first_command_timeout == 30.0
    assert smtp.max_connections_per_client == 20
    assert smtp.reserved_connections == 20
    assert smtp.reserved_networks == ("127.0.0.1/32", "::1/128")


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("first_command_timeout = 0", "smtp.first_command_timeout"),
        ("max_connections_per_client = 0", "smtp.max_connections_per_client"),
        ("reserved_connections = -1", "smtp.reserved_connections"),
        ("max_connections = 10\nreserved_connections = 11", "smtp.reserved_connections"),
        ('reserved_networks = ["192.0.2.300/32"]', "smtp.reserved_networks"),
    ],
)
def test_config_admission_bad_values_name_the_key(tmp_path: Path, text: str, key: str) -> None:
    with pytest.raises(ConfigError) as caught:
        _load(tmp_path, text)
    assert caught.value.key == key


def test_config_reserved_networks_from_the_environment(tmp_path: Path) -> None:
    env = {"MAILWEIR_SMTP_RESERVED_NETWORKS": "192.0.2.0/24, ::1/128"}
    settings = load_settings(None, env={**env, "MAILWEIR_STATE_DIR": str(tmp_path)})
    assert settings.smtp.reserved_networks == ("192.0.2.0/24", "::1/128")


# -- on the wire -------------------------------------------------------------------------------


@asynccontextmanager
async def listening(settings: Settings) -> AsyncIterator[tuple[int, Connections]]:
    """mailweir's SMTP side with the admission rules of ``settings`` (no next hop needed)."""
    handler = FilterHandler(settings, FakeJudge(), FakeVerdictLog())
    connections = Connections.from_settings(settings.smtp)
    server = await create_smtp_server(settings, handler, connections=connections)
    try:
        yield server.sockets[0].getsockname()[1], connections
    finally:
        server.close()
        connections.close_all()
        await server.wait_closed()
        await asyncio.sleep(0)


async def connect(port: int, source: str) -> tuple[asyncio.StreamReader, asyncio.StreamWriter]:
    return await asyncio.open_connection(LOCAL, port, local_addr=(source, 0))


def with_smtp(settings: Settings, **changes: object) -> Settings:
    return replace(settings, smtp=replace(settings.smtp, **changes))


async def test_smtp_silent_client_gets_421_4_4_2_after_first_command_timeout(next_hop):
    settings = with_smtp(daemon_settings(next_hop.address), first_command_timeout=0.3)
    async with listening(settings) as (port, connections):
        reader, writer = await connect(port, LOCAL)
        assert (await reader.readline()).startswith(b"220 ")
        rest = await asyncio.wait_for(reader.read(), timeout=20)  # until the daemon closes
        writer.close()
        assert rest == str(replies.NO_FIRST_COMMAND).encode() + b"\r\n"
        assert rest.startswith(b"421 4.4.2 ")
        for _ in range(100):  # the slot is given back once the close is processed
            if connections.active == 0:
                break
            await asyncio.sleep(0.01)
        assert connections.active == 0


async def test_smtp_first_command_ends_the_short_wait(next_hop):
    # The client speaks at once, then idles past first_command_timeout (but well inside
    # command_timeout): it keeps its connection.
    settings = with_smtp(
        daemon_settings(next_hop.address), first_command_timeout=0.3, command_timeout=30.0
    )
    async with listening(settings) as (port, _):
        reader, writer = await connect(port, LOCAL)
        await reader.readline()
        writer.write(b"EHLO mx.mail.example\r\n")
        while (await reader.readline())[3:4] == b"-":
            pass
        await asyncio.sleep(1.0)
        writer.write(b"NOOP\r\n")
        assert (await asyncio.wait_for(reader.readline(), 20)).startswith(b"250")
        writer.close()


async def test_smtp_first_command_timeout_default_applies(next_hop):
    # With the key unset the wait is 30 s: the timer of a fresh connection is set that far
    # ahead (read from the loop's schedule, not timed).
    settings = daemon_settings(next_hop.address)
    assert settings.smtp.first_command_timeout == SmtpSettings().first_command_timeout == 30.0
    async with listening(settings) as (port, connections):
        reader, writer = await connect(port, LOCAL)
        await reader.readline()
        (protocol,) = connections.protocols
        assert isinstance(protocol, FilterSMTP)
        timer = protocol._first_command_timer
        assert timer is not None
        ahead = timer.when() - asyncio.get_running_loop().time()
        assert 20.0 < ahead <= 30.0
        writer.close()


async def test_smtp_per_client_cap_answers_421_4_7_0_at_greeting(next_hop):
    settings = with_smtp(daemon_settings(next_hop.address), max_connections_per_client=3)
    async with listening(settings) as (port, _):
        opened = [await connect(port, "127.0.0.2") for _ in range(5)]
        greetings = [await reader.readline() for reader, _ in opened]
        other_reader, other_writer = await connect(port, "127.0.0.3")
        other = await other_reader.readline()
        for _, writer in [*opened, (other_reader, other_writer)]:
            writer.close()
    assert sum(g.startswith(b"220 ") for g in greetings) == 3
    assert greetings[3:] == [str(replies.TOO_MANY_FROM_CLIENT).encode() + b"\r\n"] * 2
    assert other.startswith(b"220 ")  # the cap is per client


async def test_smtp_reserved_address_connects_when_outsiders_filled_their_share(next_hop):
    settings = with_smtp(
        daemon_settings(next_hop.address),
        max_connections=4,
        reserved_connections=1,
        max_connections_per_client=4,
    )
    async with listening(settings) as (port, _):
        outsiders = [await connect(port, f"127.0.0.{2 + i}") for i in range(4)]
        codes = [(await reader.readline())[:3] for reader, _ in outsiders]
        reserved_reader, reserved_writer = await connect(port, LOCAL)
        reserved = await reserved_reader.readline()
        for _, writer in [*outsiders, (reserved_reader, reserved_writer)]:
            writer.close()
    assert codes == [b"220", b"220", b"220", b"421"]
    assert reserved.startswith(b"220 ")


def test_connections_keep_the_turned_away_until_they_are_gone() -> None:
    # Shutdown waits for refused connections too, and cuts off any still open at the end.
    class Late:
        def __init__(self) -> None:
            self.transport = AbortRecorder()

    class AbortRecorder:
        aborted = False

        def abort(self) -> None:
            self.aborted = True

    connections = Connections(4)
    connections.closing = True
    late: Any = Late()
    assert connections.admit(late, "192.0.2.7") == replies.SHUTTING_DOWN
    assert late in connections.turned_away and not connections.all_gone
    connections.abort_all()
    assert late.transport.aborted
    connections.turned_away.discard(late)  # as its connection_lost does
    assert connections.all_gone
