"""The daemon's lifecycle: startup on port 0, clean shutdown, draining, reload, signals, `run`."""

from __future__ import annotations

import argparse
import asyncio
import concurrent.futures
import dataclasses
import gc
import logging
import multiprocessing
import os
import signal
import smtplib
import socket
import threading
import time
import weakref
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest
from aiosmtpd.smtp import SMTP, Envelope, Session

from mailweir.daemon import judge as judge_module
from mailweir.daemon import replies
from mailweir.daemon import service as service_module
from mailweir.daemon.config import ConfigSource
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.service import Service, add_run_arguments, run_command
from mailweir.daemon.settings import HostPort, PolicySettings, Settings, SmtpSettings

MESSAGE = (
    b"From: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"To: Dr. Maren Okafor <maren.okafor@harbourlane.example>\r\n"
    b"Subject: Luna's post-op review\r\n"
    b"\r\n"
    b"Luna's owner called: the post-op review can move to Friday at 10.\r\n"
)


class SinkHandler:
    """The next hop: records what it accepts; ``hold`` keeps the DATA reply back."""

    def __init__(self) -> None:
        self.received: list[bytes] = []
        self.hold: asyncio.Event | None = None
        self.data_started = asyncio.Event()

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        self.data_started.set()
        if self.hold is not None:
            await self.hold.wait()
        self.received.append(envelope.original_content or b"")
        return "250 2.0.0 queued"


@pytest.fixture
async def sink() -> AsyncIterator[tuple[SinkHandler, HostPort]]:
    handler = SinkHandler()
    loop = asyncio.get_running_loop()
    server = await loop.create_server(
        lambda: SMTP(handler, decode_data=False, hostname="sink.test"), "127.0.0.1", 0
    )
    port = server.sockets[0].getsockname()[1]
    yield handler, HostPort("127.0.0.1", port)
    if handler.hold is not None:
        handler.hold.set()
    server.close()


def make_settings(tmp_path: Path, next_hop: HostPort, **policy: Any) -> Settings:
    base = Settings(state_dir=tmp_path / "state")
    return dataclasses.replace(
        base,
        smtp=SmtpSettings(listen=HostPort("127.0.0.1", 0), hostname="filter.harbourlane.example"),
        next_hop=dataclasses.replace(base.next_hop, address=next_hop),
        policy=PolicySettings(**policy),
        http=dataclasses.replace(base.http, listen=HostPort("127.0.0.1", 0)),
    )


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def port_is_free(port: int) -> bool:
    """Nothing listens on the port (connections closing in TIME_WAIT do not count)."""
    with socket.socket() as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind(("127.0.0.1", port))
        except OSError:
            return False
        return True


def send(address: HostPort, raw: bytes = MESSAGE) -> Any:
    with smtplib.SMTP(address.host, address.port, timeout=30) as client:
        return client.sendmail(
            "priya.raman@harbourlane.example", ["maren.okafor@harbourlane.example"], raw
        )


async def test_service_startup_binds_port_zero_and_shuts_down_clean(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    handler, next_hop = sink
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    address = service.smtp_address
    assert address.port != 0
    assert (tmp_path / "state" / "model.sqlite3").exists()
    assert await asyncio.to_thread(send, address) == {}
    assert handler.received and handler.received[0].endswith(MESSAGE.split(b"\r\n\r\n")[1])
    await service.shutdown(grace=5)
    assert port_is_free(address.port)
    assert service.store is None and service.judge is None


@pytest.mark.parametrize("compiled", [True, False])
async def test_service_startup_warns_when_c_modules_run_in_python(
    tmp_path: Path,
    sink: tuple[SinkHandler, HostPort],
    caplog: pytest.LogCaptureFixture,
    monkeypatch: pytest.MonkeyPatch,
    compiled: bool,
) -> None:
    # An install without a C compiler still works, slower; the admin is told at start.
    if not compiled:
        monkeypatch.setattr(service_module, "missing_parts", lambda: ["chunk_scan"])
    service = Service(make_settings(tmp_path, sink[1]))
    with caplog.at_level(logging.WARNING, logger="mailweir"):
        await service.startup()
    await service.shutdown(grace=5)
    warned = "chunk_scan run in Python" in caplog.text
    assert warned == (not compiled or "chunk_scan" in service_module.missing_parts())


async def test_service_model_gauges_count_tokens_without_reading_the_token_table(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    """The model-size gauge is refreshed every minute; a full count of the token table each
    time would read the whole file (seconds, and its pages resident, with tens of millions of
    rows), so it comes from the store's vocabulary summary after the first refresh."""
    import numpy as np
    from sqlalchemy import event

    from mailweir.store import ModelStore

    settings = make_settings(tmp_path, sink[1])
    seed = ModelStore.open(str(settings.database))
    seed.train(np.arange(1, 8, dtype=np.int64), 0, digest=b"h" * 16, source="test")
    seed.train(np.arange(5, 12, dtype=np.int64), 1, digest=b"s" * 16, source="test")
    seed.close()
    service = Service(settings)
    await service.startup()
    try:
        assert service.observing is not None and service.store is not None
        # The preload reads the whole table beside the gauges (a thread started at startup);
        # only the gauges' own statements count here, so it must have finished first.
        for _ in range(1000):
            if service.store.complete:
                break
            await asyncio.sleep(0.01)
        assert service.store.complete
        refresher = service.observing.refresher
        assert await refresher.refresh()
        statements: list[str] = []
        event.listen(
            service.store.engine, "before_cursor_execute", lambda *a: statements.append(a[2])
        )
        assert await refresher.refresh()
        assert statements and not [s for s in statements if "weir_token" in s]
        assert service.metrics.model_tokens._value.get() == 11
    finally:
        await service.shutdown(grace=5)


async def test_service_shutdown_lets_transaction_in_flight_finish(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    handler, next_hop = sink
    handler.hold = asyncio.Event()
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    sending = asyncio.create_task(asyncio.to_thread(send, service.smtp_address))
    await handler.data_started.wait()  # the message is now between us and the next hop
    stopping = asyncio.create_task(service.shutdown(grace=30))
    for _ in range(5):
        await asyncio.sleep(0)
    assert not stopping.done()  # shutdown waits for the transaction
    handler.hold.set()
    assert await sending == {}  # the upstream got its 250
    await stopping
    assert len(handler.received) == 1


async def test_service_shutdown_cuts_off_after_grace_without_a_250(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort], caplog: pytest.LogCaptureFixture
) -> None:
    handler, next_hop = sink
    handler.hold = asyncio.Event()  # the next hop never answers DATA
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    sending = asyncio.create_task(asyncio.to_thread(send, service.smtp_address))
    await handler.data_started.wait()
    await service.shutdown(grace=0.1)
    with pytest.raises(smtplib.SMTPException):
        await sending  # no 250: the upstream keeps the message and retries
    assert "1 transactions still running" in caplog.text


def read_reply(sock: socket.socket) -> bytes:
    """One whole SMTP reply, multiline ones included (RFC 5321 section 4.2.1)."""
    received = b""
    while not any(line[3:4] == b" " for line in received.split(b"\r\n")):
        chunk = sock.recv(4096)
        if not chunk:
            break
        received += chunk
    return received


def read_until_closed(sock: socket.socket) -> bytes:
    """Everything the server sends until it closes (bounded by the socket's timeout)."""
    received = b""
    while chunk := sock.recv(4096):
        received += chunk
    return received


async def test_service_shutdown_closes_idle_connections_with_a_421(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    # A client between transactions (greeted, EHLO sent, no RCPT) is told the service is
    # closing (RFC 5321 section 3.8: 421 may answer any time the server must shut down) and
    # its connection is closed, not left open until the process exits.
    _, next_hop = sink
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    address = service.smtp_address
    idle = await asyncio.to_thread(socket.create_connection, (address.host, address.port), 10)
    greeted = await asyncio.to_thread(socket.create_connection, (address.host, address.port), 10)
    try:
        assert (await asyncio.to_thread(read_reply, idle)).startswith(b"220 ")
        await asyncio.to_thread(idle.sendall, b"EHLO client.harbourlane.example\r\n")
        assert (await asyncio.to_thread(read_reply, idle)).startswith(b"250-")
        await service.shutdown(grace=5)
        assert service.connections is not None and service.connections.active == 0
        after_ehlo = await asyncio.to_thread(read_until_closed, idle)
        after_greeting = await asyncio.to_thread(read_until_closed, greeted)
    finally:
        idle.close()
        greeted.close()
    assert after_ehlo.startswith(b"421 4.3.2 ")
    assert after_greeting.startswith(b"220 ") and b"\r\n421 4.3.2 " in after_greeting


async def test_service_answers_421_to_a_connection_accepted_as_it_stops(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    # The kernel may hand over a connection as the listener closes; it gets its 421 at once
    # and is closed, rather than a greeting from a server that is going away, and shutdown
    # waits until it is gone.  The late connection is handed to the server's own protocol
    # factory (asyncio.Server's, as its accept would) after shutdown has begun.
    _, next_hop = sink
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    connections = service.connections
    assert connections is not None
    factory = service.smtp_server._protocol_factory
    ours, theirs = socket.socketpair()
    theirs.settimeout(10)
    try:
        connections.close_idle()  # what shutdown does first
        loop = asyncio.get_running_loop()
        await loop.connect_accepted_socket(factory, ours)
        assert not connections.protocols  # refused, not counted in
        await service.shutdown(grace=5)
        assert connections.all_gone
        assert (await asyncio.to_thread(read_until_closed, theirs)).startswith(b"421 4.3.2 ")
    finally:
        theirs.close()
    late: Any = object()
    assert connections.admit(late, "192.0.2.7") == replies.SHUTTING_DOWN


async def test_service_bad_config_fails_before_binding(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    _, next_hop = sink
    port = free_port()
    settings = make_settings(tmp_path, next_hop, suspect_threshold=0.9, spam_threshold=0.5)
    settings = dataclasses.replace(settings, smtp=SmtpSettings(listen=HostPort("127.0.0.1", port)))
    service = Service(settings)
    with pytest.raises(ConfigError) as caught:
        await service.startup()
    assert caught.value.key == "policy.suspect_threshold"
    assert port_is_free(port)
    assert not (tmp_path / "state").exists()  # not even the database was created


async def test_service_unwritable_state_dir_is_a_config_error(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    _, next_hop = sink
    (tmp_path / "blocker").write_text("a file where a directory should be")
    settings = make_settings(tmp_path, next_hop)
    settings = dataclasses.replace(settings, state_dir=tmp_path / "blocker" / "state")
    with pytest.raises(ConfigError) as caught:
        await Service(settings).startup()
    assert caught.value.key == "state_dir"


async def test_service_reload_changes_cutoffs(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort], caplog: pytest.LogCaptureFixture
) -> None:
    _, next_hop = sink
    settings = make_settings(tmp_path, next_hop)
    service = Service(settings)
    await service.startup()
    try:
        address = service.smtp_address
        newer = dataclasses.replace(
            settings,
            policy=PolicySettings(suspect_threshold=0.3, spam_threshold=0.8, spam_action="tag"),
            smtp=SmtpSettings(listen=HostPort("127.0.0.1", 1)),  # needs a restart: not applied
        )
        assert service.reload(newer)
        assert service.judge is not None
        assert service.judge.policy.spam_threshold == 0.8
        assert service.handler.settings.policy.suspect_threshold == 0.3
        assert service.smtp_address == address  # still listening where it was
        assert "changes to smtp.listen, smtp.hostname take effect only after" in caplog.text
        bad = dataclasses.replace(settings, policy=PolicySettings(spam_threshold=7.0))
        assert not service.reload(bad)
        assert service.judge.policy.spam_threshold == 0.8
    finally:
        await service.shutdown(grace=5)


def write_config(path: Path, next_hop: HostPort, spam_threshold: float) -> None:
    path.write_text(
        f'[smtp]\nlisten = "127.0.0.1:0"\n[next_hop]\naddress = "{next_hop}"\n'
        f"[policy]\nspam_threshold = {spam_threshold}\n",
        encoding="utf-8",
    )


async def test_service_sighup_rereads_file(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    _, next_hop = sink
    path = tmp_path / "mailweir.toml"
    write_config(path, next_hop, 0.95)
    source = ConfigSource(path, {"MAILWEIR_STATE_DIR": str(tmp_path / "state")}, {})
    service = Service(source.load(), source)
    await service.startup()
    service.install_signal_handlers()
    try:
        assert service.judge is not None and service.judge.policy.spam_threshold == 0.95
        write_config(path, next_hop, 0.9)
        os.kill(os.getpid(), signal.SIGHUP)
        for _ in range(500):
            if service.judge.policy.spam_threshold == 0.9:
                break
            await asyncio.sleep(0.01)
        assert service.judge.policy.spam_threshold == 0.9
        assert await asyncio.to_thread(send, service.smtp_address) == {}
    finally:
        await service.shutdown(grace=5)
    assert signal.getsignal(signal.SIGHUP) in (signal.SIG_DFL, signal.default_int_handler)


async def test_service_sigterm_stops(tmp_path: Path, sink: tuple[SinkHandler, HostPort]) -> None:
    _, next_hop = sink
    service = Service(make_settings(tmp_path, next_hop))
    await service.startup()
    service.install_signal_handlers()
    os.kill(os.getpid(), signal.SIGTERM)
    await asyncio.wait_for(service.wait_for_stop(), 30)
    await service.shutdown(grace=5)


def run_args(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    add_run_arguments(parser)
    return parser.parse_args(list(argv))


def test_run_command_bad_flag_exits_2_naming_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("MAILWEIR_STATE_DIR", str(tmp_path))
    assert run_command(run_args("--listen", "127.0.0.1:99999")) == 2
    err = capsys.readouterr().err
    assert "smtp.listen" in err and "99999" in err and "--listen" in err
    assert not any(tmp_path.iterdir())


def test_run_command_bad_env_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("MAILWEIR_STATE_DIR", str(tmp_path))
    monkeypatch.setenv("MAILWEIR_POLICY_SPAM_ACTION", "reroute")
    assert run_command(run_args()) == 2
    assert "policy.spam_action" in capsys.readouterr().err


def test_run_command_flags_beat_file_and_env(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "mailweir.toml"
    path.write_text('[smtp]\nlisten = "127.0.0.1:1001"\n', encoding="utf-8")
    monkeypatch.setenv("MAILWEIR_SMTP_LISTEN", "127.0.0.1:1002")
    args = run_args("--config", str(path), "--listen", "127.0.0.1:1003", "--db", "x.sqlite3")
    settings = service_module.source_from_args(args).load()
    assert settings.smtp.listen.port == 1003
    assert settings.database == "x.sqlite3"


def test_run_command_serves_until_sigterm(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sink_port: int
) -> None:
    port = free_port()
    monkeypatch.setenv("MAILWEIR_STATE_DIR", str(tmp_path))
    logger = logging.getLogger("mailweir")
    monkeypatch.setattr(logger, "handlers", [])  # run_command installs its own; undone after

    def stop_when_listening() -> None:
        for _ in range(3000):
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                time.sleep(0.01)
        os.kill(os.getpid(), signal.SIGTERM)

    # Freezing is checked on its own below; here, that serving does it once (not the test
    # process's objects, which pytest goes on making garbage of).
    frozen: list[bool] = []
    monkeypatch.setattr(service_module, "freeze_startup_objects", lambda: frozen.append(True))
    stopper = threading.Thread(target=stop_when_listening)
    stopper.start()
    try:
        args = run_args("--listen", f"127.0.0.1:{port}", "--next-hop", f"127.0.0.1:{sink_port}")
        assert run_command(args) == 0
    finally:
        stopper.join()
        logger.setLevel(logging.NOTSET)
    assert frozen == [True]
    assert (tmp_path / "model.sqlite3").exists()
    assert port_is_free(port)


class _Node:
    ref: object = None


def test_freeze_startup_objects_collects_garbage_then_keeps_the_rest_out_of_collections() -> None:
    garbage = _Node()
    garbage.ref = garbage  # a cycle nothing else holds: only the collector frees it
    gone = weakref.ref(garbage)
    del garbage
    kept = _Node()
    kept.ref = kept
    try:
        count = service_module.freeze_startup_objects()
        assert gone() is None  # collected first, not frozen for good
        # Frozen objects can still be freed (another test's leftover thread dropping its
        # last reference), so the count may have fallen since, by a few.
        assert 0.99 * count <= gc.get_freeze_count() <= count and count > 0
        assert not any(o is kept for o in gc.get_objects())  # no generation walks it now
    finally:
        gc.unfreeze()
    assert any(o is kept for o in gc.get_objects())


@pytest.fixture
def sink_port() -> int:
    return free_port()  # nothing listens there; the test sends no mail


async def test_service_reload_reaches_messages_on_open_connections(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort]
) -> None:
    handler, next_hop = sink
    settings = make_settings(tmp_path, next_hop, mode="observe")
    service = Service(settings)
    await service.startup()
    address = service.smtp_address

    def two_messages_one_connection() -> None:
        with smtplib.SMTP(address.host, address.port, timeout=30) as client:
            client.sendmail(
                "tobias.lindqvist@harbourlane.example", ["priya.raman@harbourlane.example"], MESSAGE
            )
            reloaded.wait(30)
            client.sendmail(
                "tobias.lindqvist@harbourlane.example", ["priya.raman@harbourlane.example"], MESSAGE
            )

    reloaded = threading.Event()
    try:
        sending = asyncio.create_task(asyncio.to_thread(two_messages_one_connection))
        for _ in range(3000):
            if handler.received:
                break
            await asyncio.sleep(0.01)
        assert service.reload(dataclasses.replace(settings, policy=PolicySettings(mode="enforce")))
        reloaded.set()
        await sending
    finally:
        await service.shutdown(grace=5)
    first, second = handler.received
    assert b"Mailweir-" not in first  # observe mode: untouched
    assert b"Mailweir-" in second  # enforce mode: marked (not yet judged: untrained model)


@pytest.mark.parametrize(
    "processes", [False, pytest.param(True, marks=pytest.mark.slow)], ids=["threads", "processes"]
)
async def test_service_tokenizes_large_mail_where_model_tokenizer_processes_says(
    tmp_path: Path, sink: tuple[SinkHandler, HostPort], processes: bool
) -> None:
    """A message over INLINE_BELOW: by default tokenized in a thread of the daemon, so no
    worker process (nor multiprocessing's helpers) is ever started; with
    model.tokenizer_processes in the process pool."""
    handler, next_hop = sink
    settings = make_settings(tmp_path, next_hop)
    assert settings.model.tokenizer_processes is False  # the default
    settings = dataclasses.replace(
        settings, model=dataclasses.replace(settings.model, tokenizer_processes=processes)
    )
    large = MESSAGE + b"The rota for the Saturday surgery is pinned in the staff room.\r\n" * 2000
    assert len(large) >= judge_module.INLINE_BELOW
    service = Service(settings)
    await service.startup()
    try:
        assert await asyncio.to_thread(send, service.smtp_address, large) == {}
        assert service.judge is not None
        pool = service.judge.executor  # the judge's own threads serve when it has none
        assert (
            isinstance(pool, concurrent.futures.ProcessPoolExecutor) if processes else pool is None
        )

        assert service.judge.counts["failed"] == 0 and sum(service.judge.counts.values()) == 1
        assert (multiprocessing.active_children() != []) is processes
    finally:
        await service.shutdown(grace=5)
    assert len(handler.received) == 1
