"""The metrics registry, read back through prometheus_client's own text parser."""

from __future__ import annotations

import asyncio
import math
import time
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families
from prometheus_client.samples import Sample

from mailweir.daemon import replies
from mailweir.daemon.compiled import COMPILED
from mailweir.daemon.errors import NextHopRejected, NextHopUnavailable, RelayError
from mailweir.daemon.metrics import RATE_WINDOWS, Metrics, ReportRefresher, failure_kind
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import SmtpSettings
from mailweir.daemon.smtp_server import Connections
from mailweir.store import ModelStore, reports
from mailweir.store.verdicts import FeedbackChannel, FeedbackKind, FeedbackRecord, VerdictRecord

# The families a scrape must show, as the parser names them (counters without ``_total``).
EXPECTED_FAMILIES = {
    "mailweir_messages": "counter",
    "mailweir_score": "histogram",
    "mailweir_parsing_seconds": "histogram",
    "mailweir_scoring_seconds": "histogram",
    "mailweir_relay_seconds": "histogram",
    "mailweir_next_hop_failures": "counter",
    "mailweir_scoring_failures": "counter",
    "mailweir_feedback": "counter",
    "mailweir_feedback_refused": "counter",
    "mailweir_model_tokens": "gauge",
    "mailweir_model_in_memory": "gauge",
    "mailweir_model_messages": "gauge",
    "mailweir_last_training_timestamp_seconds": "gauge",
    "mailweir_false_positive_rate": "gauge",
    "mailweir_false_negative_rate": "gauge",
    "mailweir_judged_messages": "gauge",
    "mailweir_report_refresh_failures": "counter",
    "mailweir_build_info": "gauge",
    "mailweir_verdict_log_write_failures": "counter",
    "mailweir_verdict_log_dropped": "counter",
    "mailweir_verdict_log_written": "counter",
    "mailweir_verdict_log_pending": "gauge",
    "mailweir_upkeep_last_run_timestamp_seconds": "gauge",
    "mailweir_upkeep_duration_seconds": "gauge",
    "mailweir_upkeep_removed_rows": "counter",
    "mailweir_upkeep_failures": "counter",
    "mailweir_upkeep_skipped": "counter",
    "mailweir_listed_messages": "counter",
    "mailweir_config_reloads": "counter",
    "mailweir_verdict_journal_failures": "counter",
    "mailweir_verdict_journal_replayed": "counter",
    "mailweir_smtp_connections_open": "gauge",
    "mailweir_smtp_connections_refused": "counter",
    "mailweir_smtp_first_command_timeouts": "counter",
}


def scrape(metrics: Metrics) -> dict[str, list[Sample]]:
    families = text_string_to_metric_families(metrics.render().decode("utf-8"))
    return {f.name: f.samples for f in families}


def value(metrics: Metrics, name: str, **labels: str) -> float:
    for family in text_string_to_metric_families(metrics.render().decode("utf-8")):
        for sample in family.samples:
            if sample.name == name and sample.labels == labels:
                return sample.value
    raise AssertionError(f"no sample {name} {labels}")


def test_metrics_every_family_present_with_type_and_help() -> None:
    text = Metrics().render().decode("utf-8")
    families = {f.name: f for f in text_string_to_metric_families(text)}
    assert {name: f.type for name, f in families.items()} == EXPECTED_FAMILIES
    for name, family in families.items():
        assert family.documentation.strip(), f"{name} has no HELP text"
        assert name.startswith("mailweir_")


def test_metrics_no_created_series() -> None:
    assert "_created" not in Metrics().render().decode("utf-8")


def test_metrics_known_label_sets_start_at_zero() -> None:
    m = Metrics()
    assert value(m, "mailweir_messages_total", band="spam", action="reroute") == 0
    for kind in ("refused", "timeout", "reset", "tempfail", "permfail"):
        assert value(m, "mailweir_next_hop_failures_total", kind=kind) == 0
    for kind in ("false_positive", "false_negative", "confirmation"):
        assert value(m, "mailweir_feedback_total", kind=kind) == 0
    for reason in ("untrusted", "rate_limited", "no_original"):
        assert value(m, "mailweir_feedback_refused_total", reason=reason) == 0
    for window in ("24h", "7d"):
        assert value(m, "mailweir_false_positive_rate", window=window) == 0


def test_metrics_message_counts_and_observes_score() -> None:
    m = Metrics()
    m.message("spam", "tag", score=0.995)
    m.message("spam", "tag", score=0.9995)
    m.message("unjudged", "pass")  # no score: counted, not observed
    assert value(m, "mailweir_messages_total", band="spam", action="tag") == 2
    assert value(m, "mailweir_messages_total", band="unjudged", action="pass") == 1
    assert value(m, "mailweir_score_count") == 2
    assert value(m, "mailweir_score_bucket", le="0.99") == 0
    assert value(m, "mailweir_score_bucket", le="0.999") == 1
    assert value(m, "mailweir_score_bucket", le="1.0") == 2
    assert value(m, "mailweir_score_sum") == pytest.approx(0.995 + 0.9995)


def test_metrics_failures_feedback_and_timings() -> None:
    m = Metrics()
    m.next_hop_failure("timeout")
    m.scoring_failure()
    m.feedback("false_positive")
    m.feedback_refused("untrusted")
    m.feedback_refused("untrusted")
    m.relay_seconds.observe(0.2)
    with m.scoring_seconds.time():
        pass
    assert value(m, "mailweir_next_hop_failures_total", kind="timeout") == 1
    assert value(m, "mailweir_scoring_failures_total") == 1
    assert value(m, "mailweir_feedback_total", kind="false_positive") == 1
    assert value(m, "mailweir_feedback_refused_total", reason="untrusted") == 2
    assert value(m, "mailweir_relay_seconds_bucket", le="0.25") == 1
    assert value(m, "mailweir_relay_seconds_bucket", le="0.1") == 0
    assert value(m, "mailweir_scoring_seconds_count") == 1


@pytest.mark.parametrize(
    ("error", "kind"),
    [
        (NextHopUnavailable("connection refused", replies.NEXT_HOP_DOWN), "refused"),
        (NextHopUnavailable("timed out", replies.NEXT_HOP_TIMEOUT), "timeout"),
        (NextHopUnavailable("reset by peer", replies.NEXT_HOP_LOST), "reset"),
        (NextHopUnavailable("450 mailbox busy", Reply(450, "4.2.1", "busy")), "tempfail"),
        (NextHopRejected(550, "5.1.1", "no such user"), "permfail"),
    ],
)
def test_metrics_relay_error_kinds(error: RelayError, kind: str) -> None:
    m = Metrics()
    assert failure_kind(error) == kind
    m.relay_error(error)
    assert value(m, "mailweir_next_hop_failures_total", kind=kind) == 1


def test_metrics_fresh_registries_are_independent() -> None:
    first, second = Metrics(), Metrics()
    first.scoring_failure()
    assert value(first, "mailweir_scoring_failures_total") == 1
    assert value(second, "mailweir_scoring_failures_total") == 0


def test_metrics_build_info_names_version() -> None:
    labels = scrape(Metrics())["mailweir_build_info"][0].labels
    assert set(labels) == {"version", "python", "compiled"} and labels["version"]
    built = [name for name, there in COMPILED.items() if there]
    assert labels["compiled"].split(",") == built or (labels["compiled"], built) == ("", [])


class FakeVerdictLog:
    def __init__(self) -> None:
        self.written, self.dropped, self.write_failures = 40, 2, 3
        self.pending = 7


def test_metrics_verdict_log_read_at_scrape_time() -> None:
    m = Metrics()
    assert value(m, "mailweir_verdict_log_write_failures_total") == 0
    source = FakeVerdictLog()
    m.watch_verdict_log(source)
    source.write_failures = 4
    assert value(m, "mailweir_verdict_log_write_failures_total") == 4
    assert value(m, "mailweir_verdict_log_dropped_total") == 2
    assert value(m, "mailweir_verdict_log_written_total") == 40
    assert value(m, "mailweir_verdict_log_pending") == 7


def test_metrics_connections_read_at_scrape_time() -> None:
    m = Metrics()
    assert value(m, "mailweir_smtp_connections_open") == 0
    connections = Connections.from_settings(
        SmtpSettings(max_connections=3, max_connections_per_client=1, reserved_connections=0)
    )
    m.watch_connections(connections)
    first, second, third = object(), object(), object()
    assert connections.admit(first, "198.51.100.7") is None  # type: ignore[arg-type]
    assert connections.admit(second, "198.51.100.7") is not None  # type: ignore[arg-type]
    assert connections.admit(third, "198.51.100.8") is None  # type: ignore[arg-type]
    connections.admission.first_command_timeouts += 1
    assert value(m, "mailweir_smtp_connections_open") == 2
    assert value(m, "mailweir_smtp_connections_refused_total", reason="per_client") == 1
    assert value(m, "mailweir_smtp_connections_refused_total", reason="capacity") == 0
    assert value(m, "mailweir_smtp_first_command_timeouts_total") == 1


async def test_report_refresher_sets_gauges_from_a_real_store(tmp_path: Path) -> None:
    store = ModelStore.open(str(tmp_path / "model.sqlite3"))
    engine = store.engine
    now = time.time()
    bands = ["spam", "spam", "suspect", "ham", "ham", "ham", "ham", "ham"]
    store.record_verdicts(
        [
            VerdictRecord(f"t{i}", now - 60 * (i + 1), 1, 100, 0.5, band, "tag", None)
            for i, band in enumerate(bands)
        ]
    )
    for kind, tid in [(FeedbackKind.FALSE_POSITIVE, "t0"), (FeedbackKind.FALSE_NEGATIVE, "t5")]:
        store.record_feedback(FeedbackRecord(kind, FeedbackChannel.HTTP, now - 1, tid))
    m = Metrics()
    refresher = ReportRefresher(
        m,
        rates=lambda window: reports.misfiling_rates(engine, window),
        model=lambda: reports.model_summary(engine),
    )
    assert await refresher.refresh()
    store.close()
    for window in RATE_WINDOWS:
        assert value(m, "mailweir_false_positive_rate", window=window) == pytest.approx(1 / 8)
        assert value(m, "mailweir_false_negative_rate", window=window) == pytest.approx(1 / 8)
        assert value(m, "mailweir_judged_messages", window=window) == 8
    assert value(m, "mailweir_model_messages", **{"class": "spam"}) == 0


async def test_report_refresher_failure_is_counted_and_keeps_values() -> None:
    m = Metrics()
    m.false_positive_rate.labels("24h").set(0.25)

    def broken(window: float) -> reports.MisfilingRates:
        raise RuntimeError("database is locked")

    refresher = ReportRefresher(m, rates=broken, model=lambda: reports.ModelSummary(0, 0, 0, None))
    assert not await refresher.refresh()
    assert value(m, "mailweir_report_refresh_failures_total") == 1
    assert value(m, "mailweir_false_positive_rate", window="24h") == 0.25


async def test_report_refresher_empty_window_exports_nan() -> None:
    m = Metrics()
    refresher = ReportRefresher(
        m,
        rates=lambda window: reports.MisfilingRates(0.0, window, 0, 0, 0),
        model=lambda: reports.ModelSummary(10, 3, 4, 1_700_000_000.0),
    )
    assert await refresher.refresh()
    assert math.isnan(value(m, "mailweir_false_positive_rate", window="7d"))
    assert value(m, "mailweir_model_tokens") == 10
    assert value(m, "mailweir_last_training_timestamp_seconds") == 1_700_000_000.0


async def test_report_refresher_start_stop() -> None:
    m = Metrics()
    calls: list[float] = []

    def rates(window: float) -> reports.MisfilingRates:
        calls.append(window)
        return reports.MisfilingRates(0.0, window, 1, 0, 0)

    refresher = ReportRefresher(
        m, rates=rates, model=lambda: reports.ModelSummary(0, 0, 0, None), interval=3600
    )
    await refresher.start()
    for _ in range(200):  # bounded wait for the first round
        if len(calls) == len(RATE_WINDOWS):
            break
        await asyncio.sleep(0.01)
    await refresher.stop()
    assert sorted(calls) == sorted(RATE_WINDOWS.values())


class FakeStore:
    def __init__(self) -> None:
        self.complete = False
        self.presence_known = False


def test_metrics_model_memory_read_at_scrape_time() -> None:
    m = Metrics()
    states = ("counts", "presence", "none")

    def held() -> list[float]:
        return [value(m, "mailweir_model_in_memory", state=state) for state in states]

    assert held() == [0, 0, 1]  # no store yet
    store = FakeStore()
    m.watch_store(store)
    assert held() == [0, 0, 1]
    store.presence_known = True  # a model larger than the cache: its presence filter
    assert held() == [0, 1, 0]
    store.complete = True  # preloaded whole (presence_known stays true)
    assert held() == [1, 0, 0]
