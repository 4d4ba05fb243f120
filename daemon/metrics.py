"""Prometheus metrics: one registry of our own and a small facade the daemon calls.

Every name starts with ``mailweir_``.  The registry is not prometheus_client's global default,
so each daemon (and each test) owns a fresh one.  Call sites stay one line::

    metrics.message("spam", "tag", score=0.997)
    with metrics.scoring_seconds.time(): ...
    metrics.relay_error(exc)  # or metrics.next_hop_failure("timeout")

Label sets that are known in advance (bands and actions, failure kinds, feedback kinds) are
created at zero when the registry is made, so a query such as ``increase(...[1h])`` sees a
series before its first event.

The misfiling-rate gauges and the model-size gauges are not pushed by the message path: a
:class:`ReportRefresher` sets them every ``interval`` seconds from ``store/reports.py`` in a
worker thread.  The verdict log's own counters are read at scrape time from the
:class:`~mailweir.daemon.verdict_log.VerdictLog` handed to :meth:`Metrics.watch_verdict_log`.
"""

from __future__ import annotations

import asyncio
import logging
import platform
from collections.abc import Callable, Iterator
from importlib import metadata
from typing import Any, Final, Protocol, get_args

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    Info,
    disable_created_metrics,
    generate_latest,
)
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from mailweir.daemon import replies
from mailweir.daemon.background import stop_task
from mailweir.daemon.compiled import COMPILED
from mailweir.daemon.errors import NextHopRejected, RelayError
from mailweir.daemon.preload import MemoryState, memory_state
from mailweir.daemon.upkeep import UpkeepMetrics
from mailweir.store.reports import MisfilingRates, ModelSummary

log = logging.getLogger("mailweir.metrics")

# The ``*_created`` timestamp series prometheus_client adds to each counter and histogram are
# an OpenMetrics idea that the classic text format only doubles; Prometheus does not need them.
# The switch is process-wide, which suits a daemon whose only registry is this one.
disable_created_metrics()  # type: ignore[no-untyped-call]  # untyped in the library

BANDS: Final = ("ham", "suspect", "spam")
ACTIONS: Final = ("pass", "tag", "reroute", "reject")
NEXT_HOP_FAILURE_KINDS: Final = ("refused", "timeout", "reset", "tempfail", "permfail")
FEEDBACK_KINDS: Final = ("false_positive", "false_negative", "confirmation")
REFUSAL_REASONS: Final = (
    "untrusted", "rate_limited", "no_original", "unauthorized", "invalid", "listed",
)  # fmt: skip
SENDER_LISTS: Final = ("allow", "block")
RELOAD_RESULTS: Final = ("applied", "refused")
RATE_WINDOWS: Final = {"24h": 24 * 3600.0, "7d": 7 * 24 * 3600.0}

# Spam probabilities crowd both ends of [0, 1], so the buckets are fine at the ends and coarse
# in the middle; 0.5 and 0.98 sit on the default cut-offs (settings.py).
SCORE_BUCKETS: Final = (
    0.001, 0.01, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.98, 0.99, 0.999, 1.0,
)  # fmt: skip
# Parsing and scoring take milliseconds; a 64 MB message can take seconds.
CPU_BUCKETS: Final = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 10)
# The relay waits on the next hop, whose DATA reply may take minutes (RFC 5321 4.5.3.2).
RELAY_BUCKETS: Final = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 600)


_KIND_BY_REPLY: Final = {
    replies.NEXT_HOP_DOWN: "refused",  # connection refused or unreachable, bad greeting
    replies.NEXT_HOP_TIMEOUT: "timeout",
    replies.NEXT_HOP_LOST: "reset",  # the connection dropped mid-transaction
}


def failure_kind(error: RelayError) -> str:
    """The ``kind`` label for a relay error: refused, timeout, reset, tempfail or permfail."""
    if isinstance(error, NextHopRejected):
        return "permfail"
    return _KIND_BY_REPLY.get(error.reply, "tempfail")  # the next hop's own 4xx, and the rest


class _VerdictLogLike(Protocol):
    written: int
    dropped: int
    write_failures: int

    @property
    def pending(self) -> int: ...


class _VerdictLogCollector(Collector):
    """Reads the verdict log's own counters at scrape time (zeros until one is attached)."""

    def __init__(self) -> None:
        self.source: _VerdictLogLike | None = None

    def collect(self) -> Iterator[Metric]:
        src = self.source
        yield CounterMetricFamily(
            "mailweir_verdict_log_write_failures",
            "Batch writes of the verdict log that failed (the batch is kept and retried).",
            value=src.write_failures if src else 0,
        )
        yield CounterMetricFamily(
            "mailweir_verdict_log_dropped",
            "Verdict records dropped because the backlog was full or the log closed unwritten.",
            value=src.dropped if src else 0,
        )
        yield CounterMetricFamily(
            "mailweir_verdict_log_written",
            "Verdict records written to the store.",
            value=src.written if src else 0,
        )
        yield GaugeMetricFamily(
            "mailweir_verdict_log_pending",
            "Verdict records queued and not yet written.",
            value=src.pending if src else 0,
        )
        yield CounterMetricFamily(
            "mailweir_verdict_journal_failures",
            "Verdict records that could not be appended to the verdict journal (a kill before "
            "their batch is written would lose their rows; the mail is not affected).",
            value=getattr(src, "journal_failures", 0) if src else 0,
        )
        yield CounterMetricFamily(
            "mailweir_verdict_journal_replayed",
            "Verdict rows written at start from the journal a killed predecessor left.",
            value=getattr(src, "replayed", 0) if src else 0,
        )


# Enhanced code of a refusal at the greeting (daemon/admission.py) -> its reason label.
GREETING_REFUSALS = {"4.3.2": "capacity", "4.7.0": "per_client"}


class _ConnectionsCollector(Collector):
    """The SMTP side's connection figures (daemon/admission.py), read at scrape time."""

    def __init__(self) -> None:
        self.source: Any = None  # daemon/smtp.py's Connections

    def collect(self) -> Iterator[Metric]:
        connections = self.source
        admission = connections.admission if connections is not None else None
        yield GaugeMetricFamily(
            "mailweir_smtp_connections_open",
            "Upstream SMTP connections open now.",
            value=connections.active if connections is not None else 0,
        )
        refused = CounterMetricFamily(
            "mailweir_smtp_connections_refused",
            "Connections answered 421 at the greeting: over smtp.max_connections or the share "
            "of clients outside smtp.reserved_networks (capacity), or over "
            "smtp.max_connections_per_client (per_client).",
            labels=["reason"],
        )
        for code, reason in GREETING_REFUSALS.items():
            refused.add_metric([reason], admission.refused[code] if admission else 0)
        yield refused
        yield CounterMetricFamily(
            "mailweir_smtp_first_command_timeouts",
            "Connections closed (421 4.4.2) for sending no command within "
            "smtp.first_command_timeout.",
            value=admission.first_command_timeouts if admission else 0,
        )


class _ModelMemoryCollector(Collector):
    """What memory holds of the model (store/counts.py ``preload``), read at scrape time."""

    def __init__(self) -> None:
        self.source: Any = None  # the ModelStore

    def collect(self) -> Iterator[Metric]:
        state = memory_state(self.source)
        held = GaugeMetricFamily(
            "mailweir_model_in_memory",
            "1 for what memory holds of the model now: every token's counts (counts; a token "
            "memory lacks is never read), a filter of which tokens it holds (presence; a model "
            "larger than model.cache_tokens, only tokens it may hold are read), or neither "
            "(none: tokens memory lacks are read, e.g. a minute after another process trained).",
            labels=["state"],
        )
        for name in get_args(MemoryState):
            held.add_metric([name], float(state == name))
        yield held


def _version() -> str:
    try:
        return metadata.version("mailweir")
    except metadata.PackageNotFoundError:
        return "unknown"


class Metrics:
    """The daemon's metrics on a registry of their own."""

    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry if registry is not None else CollectorRegistry()
        r = self.registry
        self.messages = Counter(
            "mailweir_messages",
            "Messages judged, by band (ham, suspect, spam, unjudged, failed) and action taken.",
            ["band", "action"],
            registry=r,
        )
        self.listed_count = Counter(
            "mailweir_listed_messages",
            "Messages a site sender list decided without scoring, by list (allow, block) and "
            "action taken; not part of mailweir_messages.",
            ["list", "action"],
            registry=r,
        )
        self.reloads = Counter(
            "mailweir_config_reloads",
            "Configuration reloads (SIGHUP), by result: applied, or refused (the old kept).",
            ["result"],
            registry=r,
        )
        self.score = Histogram(
            "mailweir_score",
            "Spam probability of scored messages.",
            buckets=SCORE_BUCKETS,
            registry=r,
        )
        self.parsing_seconds = Histogram(
            "mailweir_parsing_seconds",
            "Time spent parsing and tokenizing one message.",
            buckets=CPU_BUCKETS,
            registry=r,
        )
        self.scoring_seconds = Histogram(
            "mailweir_scoring_seconds",
            "Time spent looking up counts and scoring one message.",
            buckets=CPU_BUCKETS,
            registry=r,
        )
        self.relay_seconds = Histogram(
            "mailweir_relay_seconds",
            "Time spent handing one message to the next hop, successful or not.",
            buckets=RELAY_BUCKETS,
            registry=r,
        )
        self.next_hop_failures = Counter(
            "mailweir_next_hop_failures",
            "Relay attempts that failed, by kind (refused, timeout, reset, tempfail, permfail).",
            ["kind"],
            registry=r,
        )
        self.scoring_failures = Counter(
            "mailweir_scoring_failures",
            "Messages whose scoring raised; they were passed on untagged or deferred.",
            registry=r,
        )
        self.feedback_count = Counter(
            "mailweir_feedback",
            "Corrections accepted, by kind (false_positive, false_negative, confirmation).",
            ["kind"],
            registry=r,
        )
        self.feedback_refused_count = Counter(
            "mailweir_feedback_refused",
            "Feedback refused without touching the model, by reason.",
            ["reason"],
            registry=r,
        )
        self.model_tokens = Gauge(
            "mailweir_model_tokens",
            "Distinct tokens with a non-zero count in the model.",
            registry=r,
        )
        self.model_messages = Gauge(
            "mailweir_model_messages",
            "Trained messages per class (the model's class totals).",
            ["class"],
            registry=r,
        )
        self.last_training = Gauge(
            "mailweir_last_training_timestamp_seconds",
            "Unix time of the most recent training or correction (0: never).",
            registry=r,
        )
        self.false_positive_rate = Gauge(
            "mailweir_false_positive_rate",
            "Messages judged spam or suspect and sent back as wanted mail, over messages "
            "judged in the window.",
            ["window"],
            registry=r,
        )
        self.false_negative_rate = Gauge(
            "mailweir_false_negative_rate",
            "Messages judged ham and sent back as spam, over messages judged in the window.",
            ["window"],
            registry=r,
        )
        self.judged_in_window = Gauge(
            "mailweir_judged_messages",
            "Messages judged (ham, suspect or spam) in the window; the rates' denominator.",
            ["window"],
            registry=r,
        )
        self.report_failures = Counter(
            "mailweir_report_refresh_failures",
            "Periodic refreshes of the rate and model gauges that failed.",
            registry=r,
        )
        self.build_info = Info(
            "mailweir_build",
            "Version of mailweir and Python, and which of its optional C modules are built.",
            registry=r,
        )
        self.build_info.info(
            {
                "version": _version(),
                "python": platform.python_version(),
                "compiled": ",".join(name for name, built in COMPILED.items() if built),
            }
        )
        self.upkeep = UpkeepMetrics(r)  # mailweir_upkeep_*, set by daemon/upkeep.py
        self._verdict_log = _VerdictLogCollector()
        r.register(self._verdict_log)
        self._connections = _ConnectionsCollector()
        r.register(self._connections)
        self._model_memory = _ModelMemoryCollector()
        r.register(self._model_memory)
        self._zero_known_series()

    def _zero_known_series(self) -> None:
        for band in BANDS:
            for action in ACTIONS:
                self.messages.labels(band, action)
        for kind in NEXT_HOP_FAILURE_KINDS:
            self.next_hop_failures.labels(kind)
        for name in SENDER_LISTS:
            for action in ACTIONS:
                self.listed_count.labels(name, action)
        for result in RELOAD_RESULTS:
            self.reloads.labels(result)
        for kind in FEEDBACK_KINDS:
            self.feedback_count.labels(kind)
        for reason in REFUSAL_REASONS:
            self.feedback_refused_count.labels(reason)
        for label in ("ham", "spam"):
            self.model_messages.labels(label)
        for window in RATE_WINDOWS:
            self.false_positive_rate.labels(window)
            self.false_negative_rate.labels(window)
            self.judged_in_window.labels(window)

    # -- one-line calls for the message path ---------------------------------------------

    def message(self, band: str, action: str, score: float | None = None) -> None:
        """Count one message; observe its score when it was scored."""
        self.messages.labels(band, action).inc()
        if score is not None:
            self.score.observe(score)

    def listed(self, sender_list: str, action: str) -> None:
        """Count one message a sender list decided (``allow`` or ``block``)."""
        self.listed_count.labels(sender_list, action).inc()

    def config_reload(self, applied: bool) -> None:
        self.reloads.labels("applied" if applied else "refused").inc()

    def next_hop_failure(self, kind: str) -> None:
        self.next_hop_failures.labels(kind).inc()

    def relay_error(self, error: RelayError) -> None:
        """Count a relay error under its kind (see :func:`failure_kind`)."""
        self.next_hop_failures.labels(failure_kind(error)).inc()

    def scoring_failure(self) -> None:
        self.scoring_failures.inc()

    def feedback(self, kind: str) -> None:
        self.feedback_count.labels(kind).inc()

    def feedback_refused(self, reason: str) -> None:
        self.feedback_refused_count.labels(reason).inc()

    def watch_verdict_log(self, verdict_log: Any) -> None:
        """Export this verdict log's written / dropped / failed / pending figures."""
        self._verdict_log.source = verdict_log

    def watch_connections(self, connections: Any) -> None:
        """Export the SMTP side's open connections and refusals (daemon/smtp.py's
        ``Connections``)."""
        self._connections.source = connections

    def watch_store(self, store: Any) -> None:
        """Export what memory holds of the model (``ModelStore.complete``,
        ``presence_known``)."""
        self._model_memory.source = store

    # -- periodic refresh from the store -------------------------------------------------

    def set_model(self, summary: ModelSummary) -> None:
        self.model_tokens.set(summary.tokens)
        self.model_messages.labels("ham").set(summary.ham_messages)
        self.model_messages.labels("spam").set(summary.spam_messages)
        self.last_training.set(summary.last_trained_at or 0.0)

    def set_rates(self, window: str, rates: MisfilingRates) -> None:
        self.false_positive_rate.labels(window).set(rates.false_positive_rate)
        self.false_negative_rate.labels(window).set(rates.false_negative_rate)
        self.judged_in_window.labels(window).set(rates.judged)

    def render(self) -> bytes:
        """The registry in the Prometheus text exposition format (version 0.0.4)."""
        return generate_latest(self.registry)


class ReportRefresher:
    """Sets the rate and model gauges from the store every ``interval`` seconds.

    ``rates(window_seconds)`` and ``model()`` are blocking store reads; they run in a worker
    thread so the event loop never waits on SQL.  A failed refresh is logged and counted and
    leaves the gauges at their last values.
    """

    def __init__(
        self,
        metrics: Metrics,
        rates: Callable[[float], MisfilingRates],
        model: Callable[[], ModelSummary],
        interval: float = 60.0,
    ) -> None:
        self._metrics = metrics
        self._rates = rates
        self._model = model
        self._interval = interval
        self._task: asyncio.Task[None] | None = None

    async def refresh(self) -> bool:
        """One refresh now; True when every gauge was set."""
        try:
            results = await asyncio.to_thread(self._read)
        except Exception:
            self._metrics.report_failures.inc()
            log.exception("refreshing the rate and model gauges failed")
            return False
        summary, rates = results
        self._metrics.set_model(summary)
        for window, value in rates.items():
            self._metrics.set_rates(window, value)
        return True

    def _read(self) -> tuple[ModelSummary, dict[str, MisfilingRates]]:
        rates = {window: self._rates(seconds) for window, seconds in RATE_WINDOWS.items()}
        return self._model(), rates

    async def start(self) -> None:
        if self._task is None:
            self._task = asyncio.create_task(self._run(), name="mailweir-report-refresh")

    async def stop(self) -> None:
        await stop_task(self._task)
        self._task = None

    async def _run(self) -> None:
        while True:
            await self.refresh()
            await asyncio.sleep(self._interval)
