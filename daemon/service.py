"""The running daemon: ``startup()``, ``wait_for_stop()``, ``shutdown()``, and ``mailweir run``.

Everything runs on one event loop.  ``startup`` validates the settings, opens (and migrates)
the store, starts the scoring executor, the judge and the verdict log, and only then binds the
SMTP port, so a bad configuration or an unreachable database fails before any socket listens.
``shutdown`` stops accepting, lets transactions in flight finish within a grace period, cancels
the rest (logging how many), flushes the verdict log and closes the store.

SIGTERM and SIGINT stop the daemon (a second one during the grace period ends it at once);
SIGHUP re-reads the configuration and applies the policy (cut-offs, actions, cold-start guard)
and the log level without touching listening sockets; other changed keys are logged as needing
a restart.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import functools
import gc
import logging
import os
import signal
import sys
import time
import weakref
from pathlib import Path
from typing import Any

from mailweir.daemon import verdict_journal
from mailweir.daemon.compiled import missing_parts
from mailweir.daemon.config import CONFIG_PATH_ENV, ConfigSource, validate
from mailweir.daemon.digest import DigestSchedule
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.feedback import FeedbackGate, FeedbackIntake
from mailweir.daemon.http_side import FeedbackHandler
from mailweir.daemon.judge import INLINE_BELOW, ON_LOOP_BELOW, Judge, make_executor
from mailweir.daemon.log_setup import configure_logging
from mailweir.daemon.memory_return import ReturnFreeMemory
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.observing import Observing
from mailweir.daemon.preload import KeepPreloaded
from mailweir.daemon.quarantine import Quarantine, QuarantineCollector
from mailweir.daemon.settings import HostPort, Settings
from mailweir.daemon.smtp_server import Connections, create_smtp_server
from mailweir.daemon.upkeep import Upkeep
from mailweir.daemon.verdict_log import VerdictLog
from mailweir.store.memory import limit_malloc_arenas, map_large_blocks

log = logging.getLogger("mailweir.service")

# What SIGHUP applies; every other key needs a restart (sockets, database, pools) and a reload
# only names it in the log.
RELOADABLE = ("policy", "log.level")


class Service:
    def __init__(self, settings: Settings, source: ConfigSource | None = None) -> None:
        self.settings = settings
        self._source = source  # re-read on SIGHUP; None: reload() needs explicit settings
        self._stop = asyncio.Event()
        self.store: Any = None
        self.judge: Judge | None = None
        self.verdict_log: VerdictLog | None = None
        self.upkeep: Upkeep | None = None
        self.preload: KeepPreloaded | None = None
        self.memory_return: ReturnFreeMemory | None = None
        self.quarantine: Quarantine | None = None
        self.digests: DigestSchedule | None = None
        self._quarantine_collector: QuarantineCollector | None = None
        self.handler: Any = None
        self.metrics: Metrics = Metrics()
        self.feedback: FeedbackHandler | None = None  # the intake, when configured
        self.observing: Observing | None = None
        self.smtp_server: Any = None
        self.connections: Connections | None = None  # the SMTP side's open connections
        self._signals: list[signal.Signals] = []
        self.reload_refusal = ""  # why the last refused reload was refused

    # -- lifecycle -----------------------------------------------------------------------

    async def startup(self) -> None:
        validate(self.settings)
        self._prepare_state_dir()
        try:
            await self._open_parts()
            self.connections = Connections.from_settings(self.settings.smtp)
            self.metrics.watch_connections(self.connections)
            self.smtp_server = await create_smtp_server(
                self.settings, self.handler, connections=self.connections
            )
            self.observing = Observing(
                self.settings,
                self.metrics,
                self.store,
                lambda: self.judge.policy if self.judge else self.settings.policy,
                lambda: bool(self.smtp_server and self.smtp_server.is_serving()),
                self.feedback,
            )
            self.observing.http.quarantine = self.quarantine
            self.observing.http.reload = self.reload_problem
            await self.observing.start()
        except BaseException:
            if self.smtp_server is not None:
                self.smtp_server.close()
                self.smtp_server = None
            self.observing = None
            await self._close_parts()
            raise
        s = self.settings
        log.info(
            "mailweir listening for SMTP on %s, relaying to %s; mode %s, position %s; model %s",
            self.smtp_address,
            s.next_hop.address,
            s.policy.mode,
            s.policy.position,
            s.database,
        )
        if missing := missing_parts():
            log.warning(
                "%s run in Python: mailweir was installed without a C compiler (and "
                "Python's headers), so each message costs more CPU (the same results); "
                "reinstall with them to build model/_*.c and store/_*.c",
                ", ".join(missing),
            )

    async def wait_for_stop(self) -> None:
        await self._stop.wait()

    def stop(self) -> None:
        self._stop.set()

    async def shutdown(self, grace: float = 30.0) -> None:
        self.remove_signal_handlers()
        if self.smtp_server is not None and self.connections is not None:
            # Idle clients hear 421 now rather than start a transaction the drain must await.
            self.connections.close_idle()
            self.smtp_server.close()  # stop accepting; transactions in flight carry on
            # No wait_closed(): from Python 3.12 on it also waits for idle clients to leave.
            cancelled = await _drain(self.handler, grace)
            if cancelled:
                log.warning(
                    "shutdown: %d transactions still running after %.0fs were cancelled",
                    cancelled,
                    grace,
                )
            self.connections.close_idle()  # those whose transaction ended during the drain
            await _closed(self.connections, CLOSE_WAIT)
            self.smtp_server = None
        if self.observing is not None:
            await self.observing.stop()
            self.observing = None
        await self._close_parts()
        log.info("mailweir stopped")

    @property
    def http_address(self) -> HostPort | None:
        """The HTTP side's address (metrics, status page, feedback), once it listens."""
        return self.observing.address if self.observing is not None else None

    @property
    def smtp_address(self) -> HostPort:
        """The address actually bound (the OS's choice when the port was 0)."""
        if self.smtp_server is None or not self.smtp_server.sockets:
            raise RuntimeError("the SMTP side is not listening")
        host, port = self.smtp_server.sockets[0].getsockname()[:2]
        return HostPort(host, port)

    # -- reload --------------------------------------------------------------------------

    def reload(self, settings: Settings | None = None) -> bool:
        """Apply new policy and log level; return False (and keep running as is) on bad input.

        Without ``settings`` the configuration source (file, environment, flags) is read again.
        """
        try:
            if settings is None:
                if self._source is None:
                    self.reload_refusal = "no configuration file to read; nothing changed"
                    log.warning("reload: %s", self.reload_refusal)
                    return False
                settings = self._source.load()
            else:
                validate(settings)
        except ConfigError as exc:
            self.reload_refusal = str(exc)
            log.error("reload refused, keeping the running configuration: %s", exc)
            self.metrics.config_reload(applied=False)
            return False
        changed = _restart_only_changes(self.settings, settings)
        if changed:
            log.warning(
                "reload: changes to %s take effect only after a restart", ", ".join(changed)
            )
        level = dataclasses.replace(self.settings.log, level=settings.log.level)
        self.settings = dataclasses.replace(self.settings, policy=settings.policy, log=level)
        logging.getLogger("mailweir").setLevel(self.settings.log.level.upper())
        if self.judge is not None:
            self.judge.reload(self.settings)
        if self.handler is not None:
            self.handler.reload(self.settings)
        policy = self.settings.policy
        log.info(
            "reloaded: suspect_threshold=%s spam_threshold=%s actions=%s/%s/%s mode=%s",
            policy.suspect_threshold,
            policy.spam_threshold,
            policy.ham_action,
            policy.suspect_action,
            policy.spam_action,
            policy.mode,
        )
        log.info(
            "reloaded site policy: %d allowed and %d blocked senders, %d allowed and %d blocked "
            "networks, %d recipient rules, exempt %s",
            len(policy.allow_senders),
            len(policy.block_senders),
            len(policy.allow_networks),
            len(policy.block_networks),
            len(policy.recipient),
            ", ".join(policy.exempt_local_parts) or "none",
        )
        self.metrics.config_reload(applied=True)
        return True

    def reload_problem(self) -> str | None:
        """:meth:`reload` for the HTTP side: None when applied, else why it was refused."""
        return None if self.reload() else self.reload_refusal

    def install_signal_handlers(self) -> None:
        loop = asyncio.get_running_loop()
        for sig, action in (
            (signal.SIGTERM, self.stop),
            (signal.SIGINT, self.stop),
            (signal.SIGHUP, self.reload),
        ):
            loop.add_signal_handler(sig, action)
            self._signals.append(sig)

    def remove_signal_handlers(self) -> None:
        loop = asyncio.get_running_loop()
        while self._signals:
            loop.remove_signal_handler(self._signals.pop())

    # -- parts ---------------------------------------------------------------------------

    def _prepare_state_dir(self) -> None:
        if self.settings.model.database:
            return  # the database lives elsewhere; the state directory is not needed yet
        path = self.settings.state_dir
        try:
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ConfigError(
                "state_dir",
                f"cannot create {str(path)!r} ({exc.strerror}); expected a writable directory "
                "(set state_dir, MAILWEIR_STATE_DIR or --state-dir)",
            ) from exc

    async def _open_parts(self) -> None:
        from mailweir.store import ModelStore

        model = self.settings.model
        self.store = await asyncio.to_thread(
            ModelStore.open,
            self.settings.database,
            cache_tokens=model.cache_tokens,
            staleness_seconds=model.staleness_seconds,
        )
        self.judge = Judge(
            self.store,
            self.settings,
            # Without tokenizer processes the judge's own threads take large mail too.
            executor_factory=(
                functools.partial(make_executor, model.scoring_workers)
                if model.tokenizer_processes
                else None
            ),
            metrics=self.metrics,
            inline_below=INLINE_BELOW,
            on_loop_below=ON_LOOP_BELOW,
        )
        self.verdict_log = VerdictLog(
            self.store,
            self.settings.log.verdict_batch_seconds,
            retention_days=self.settings.log.verdict_retention_days,
            journal_dir=self.settings.state_dir / verdict_journal.FOLDER,
        )
        await self.verdict_log.start()  # replays what a killed predecessor left in the journal
        self.metrics.watch_verdict_log(self.verdict_log)
        self.metrics.watch_store(self.store)
        self.upkeep = Upkeep(self.store, self.settings.upkeep, self.metrics.upkeep)
        await self.upkeep.start()
        if model.preload:
            self.preload = KeepPreloaded(self.store)
            self.preload.start()
        judge = self.judge
        self.memory_return = ReturnFreeMemory(lambda: sum(judge.counts.values()))
        self.memory_return.start()
        intake = FeedbackIntake(
            self.store,
            self.settings.feedback,
            self.judge.options,
            self.metrics,
            verdict_log=self.verdict_log,
        )
        self.feedback = intake
        self._open_quarantine(intake)
        self.handler = _make_handler(
            self.settings, self.judge, self.verdict_log, self.metrics, intake, self.quarantine
        )

    def _open_quarantine(self, intake: FeedbackIntake) -> None:
        """Held copies of rerouted mail, their release by feedback, metrics and the digest."""
        self.quarantine = Quarantine(self.settings)
        intake.release_wanted = self.quarantine.release_wanted
        if self._quarantine_collector is None:
            self._quarantine_collector = QuarantineCollector(self.quarantine)
            self.metrics.registry.register(self._quarantine_collector)
        self._quarantine_collector.quarantine = self.quarantine
        self.digests = DigestSchedule(self.quarantine, time.time)
        self.digests.start()

    async def _close_parts(self) -> None:
        if self.digests is not None:
            await self.digests.stop()
            self.digests = None
        if self.upkeep is not None:
            await self.upkeep.stop()  # before the store closes under a task's thread
            self.upkeep = None
        if self.preload is not None:
            await self.preload.stop()  # likewise
            self.preload = None
        if self.memory_return is not None:
            await self.memory_return.stop()
            self.memory_return = None
        if self.verdict_log is not None:
            await self.verdict_log.close()
            self.verdict_log = None
        if self.judge is not None:
            await asyncio.to_thread(self.judge.close)
            self.judge = None
        if self.store is not None:
            await asyncio.to_thread(self.store.close)
            self.store = None


def _restart_only_changes(old: Settings, new: Settings) -> list[str]:
    changed = []
    for f in dataclasses.fields(Settings):
        before, after = getattr(old, f.name), getattr(new, f.name)
        if f.name in RELOADABLE or before == after:
            continue
        if dataclasses.is_dataclass(before):
            for g in dataclasses.fields(before):
                key = f"{f.name}.{g.name}"
                if key not in RELOADABLE and getattr(before, g.name) != getattr(after, g.name):
                    changed.append(key)
        else:
            changed.append(f.name)
    return changed


# -- the SMTP side (daemon/smtp.py) --------------------------------------------------------


def _make_handler(
    settings: Settings,
    judge: Judge,
    verdict_log: VerdictLog,
    metrics: Metrics,
    intake: FeedbackIntake,
    quarantine: Quarantine | None = None,
) -> Any:
    """The SMTP handler: feedback transactions answered by the gate, the rest filtered."""
    from mailweir.daemon.smtp import FilterHandler

    filtering = FilterHandler(settings, judge, verdict_log, metrics=metrics)
    filtering.holding = quarantine
    return TransactionWatch(FeedbackGate(filtering, intake))


class TransactionWatch:
    """The SMTP handler, seen through: which connections are inside a transaction.

    aiosmtpd hands every hook the protocol instance of its connection; the first RCPT of a
    transaction registers it here.  A connection is busy while its envelope holds recipients
    (aiosmtpd starts a fresh envelope after the reply to DATA and after RSET).  Every other
    attribute is the wrapped handler's own.
    """

    def __init__(self, handler: Any) -> None:
        self.handler = handler
        self._connections: weakref.WeakSet[Any] = weakref.WeakSet()

    def __getattr__(self, name: str) -> Any:
        return getattr(self.handler, name)

    def __dir__(self) -> list[str]:
        # aiosmtpd finds hooks with dir(handler); a hook it misses gets its default, and its
        # default DATA answers 250 and drops the message, so every handler name must show.
        return sorted(set(super().__dir__()) | set(dir(self.handler)))

    async def handle_RCPT(self, server: Any, session: Any, envelope: Any, *args: Any) -> Any:
        self._connections.add(server)
        return await self.handler.handle_RCPT(server, session, envelope, *args)

    def open_connections(self) -> list[Any]:
        return [c for c in self._connections if getattr(c, "transport", None) is not None]

    def busy(self) -> list[Any]:
        return [c for c in self.open_connections() if c.envelope.rcpt_tos]

    def reload(self, settings: Settings) -> None:
        # Unwrap to the FilterHandler (under the feedback gate): it reads its policy per message.
        target = self.handler
        while "handler" in vars(target):
            target = target.handler
        target.settings = settings


CLOSE_WAIT = 1.0  # seconds for closed connections to flush their 421 at shutdown
ACCEPT_SETTLE = 0.05  # seconds for connections accepted as the listener closed to appear


async def _drain(watch: Any, grace: float) -> int:
    """Wait up to ``grace`` seconds for transactions in flight, then abort what is left.

    Returns how many transactions were cut off; their upstream never got a 250, so it keeps
    those messages and retries them (nothing is lost).
    """
    if not isinstance(watch, TransactionWatch):
        return 0
    deadline = time.monotonic() + grace
    while watch.busy() and time.monotonic() < deadline:
        await asyncio.sleep(0.02)
    cut = watch.busy()
    for connection in cut:
        connection.transport.abort()
    return len(cut)


async def _closed(connections: Connections, seconds: float) -> None:
    """Give closed connections ``seconds`` to send their 421 and go, then cut off the rest
    (a client that reads nothing would hold its transport open past the loop's end)."""
    # A connection the kernel handed over just before the listener closed gets its protocol
    # (and its 421) from a task that runs a few loop turns later: wait that out first.
    await asyncio.sleep(ACCEPT_SETTLE)
    deadline = time.monotonic() + seconds
    while not connections.all_gone and time.monotonic() < deadline:
        await asyncio.sleep(0.01)
    connections.abort_all()
    await asyncio.sleep(0)


# -- the `mailweir run` command ------------------------------------------------------------


def add_run_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config",
        type=Path,
        default=os.environ.get(CONFIG_PATH_ENV) or None,
        help=f"TOML configuration file (default: ${CONFIG_PATH_ENV}; none: built-in defaults)",
    )
    parser.add_argument("--listen", metavar="HOST:PORT", help="SMTP address to listen on")
    parser.add_argument("--next-hop", metavar="HOST:PORT", help="SMTP server to relay to")
    parser.add_argument("--db", metavar="URL_OR_PATH", help="model database URL or SQLite path")
    parser.add_argument("--http", metavar="HOST:PORT", help="HTTP address (feedback, metrics)")
    parser.add_argument("--state-dir", metavar="PATH", help="directory for the daemon's state")


FLAG_KEYS = {
    "listen": "smtp.listen",
    "next_hop": "next_hop.address",
    "db": "model.database",
    "http": "http.listen",
    "state_dir": "state_dir",
}


def source_from_args(args: argparse.Namespace) -> ConfigSource:
    flags = {key: getattr(args, attr) for attr, key in FLAG_KEYS.items()}
    names = {key: "--" + attr.replace("_", "-") for attr, key in FLAG_KEYS.items()}
    given = {key: text for key, text in flags.items() if text is not None}
    return ConfigSource(args.config, dict(os.environ), given, names)


def run_command(args: argparse.Namespace) -> int:
    """``mailweir run``: 0 after a clean stop, 2 for a bad configuration, 1 if start failed."""
    source = source_from_args(args)
    try:
        settings = source.load()
    except ConfigError as exc:
        print(f"mailweir: configuration error: {exc}", file=sys.stderr)
        return 2
    configure_logging(settings.log)
    limit_malloc_arenas()  # before asyncio.run starts any thread
    map_large_blocks()
    return asyncio.run(_serve(settings, source))


def freeze_startup_objects() -> int:
    """Move what exists once the daemon serves (modules, settings, the parts' objects) out of
    the cyclic garbage collector's reach; return how many objects that is.

    A full collection walks every tracked object, so with the whole program in the heap each
    one held the event loop for 25-32 ms (measured under the relay bench's load), enough to
    push a round's p99 up by 20-30 ms; after it, 2-2.4 ms.  Objects made after this are
    collected as before.  Garbage is collected first, so none of it is kept for good; what
    of the startup's objects a reload later drops (the old settings) stays, a few kilobytes."""
    gc.collect()
    gc.freeze()
    return gc.get_freeze_count()


async def _serve(settings: Settings, source: ConfigSource) -> int:
    service = Service(settings, source)
    # Handlers first: a SIGTERM that arrives while the HTTP side is still starting (the SMTP
    # port already listens) must stop us cleanly, not kill the process mid-start.
    service.install_signal_handlers()
    try:
        await service.startup()
    except ConfigError as exc:
        service.remove_signal_handlers()
        print(f"mailweir: configuration error: {exc}", file=sys.stderr)
        return 2
    except Exception as exc:
        service.remove_signal_handlers()
        log.exception("mailweir could not start: %s", exc)
        return 1
    freeze_startup_objects()
    await service.wait_for_stop()
    await service.shutdown()
    return 0
