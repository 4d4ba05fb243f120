"""deploy/prometheus and deploy/dashboard against promtool and against our own metrics.

promtool comes with Debian's ``prometheus`` package; the tests that need it skip with that
reason when it is absent.  Generated promtool inputs are written as JSON, which YAML parsers
(promtool's included) read as YAML, so no YAML library is needed here.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

from mailweir.daemon.metrics import Metrics
from mailweir.daemon.quarantine import Quarantine, QuarantineCollector
from mailweir.daemon.settings import HttpSettings, Settings

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
ALERTS = DEPLOY / "prometheus" / "alerts.yml"
SCRAPE = DEPLOY / "prometheus" / "scrape.yml"
DASHBOARD = DEPLOY / "dashboard" / "mailweir.json"
PROMTOOL = shutil.which("promtool")
needs_promtool = pytest.mark.skipif(
    PROMTOOL is None, reason="promtool not installed (Debian package: prometheus)"
)
ALERT_NAMES = {
    "MailweirDown",
    "MailweirFalsePositiveRateHigh",
    "MailweirNextHopFailing",
    "MailweirNoMail",
    "MailweirScoringFailures",
    "MailweirVerdictLogFailing",
    "MailweirReportsStale",
    "MailweirUpkeepFailing",
    "MailweirQuarantineNeedsAttention",
}
INSTANCE = {"instance": "mx1.harbourlane.example:7180", "job": "mailweir"}


def promtool(*args: str | Path) -> subprocess.CompletedProcess[str]:
    assert PROMTOOL is not None
    return subprocess.run(
        [PROMTOOL, *map(str, args)], capture_output=True, text=True, timeout=120, check=False
    )


def sample_names(metrics: Metrics) -> dict[str, set[str]]:
    """Family name -> every sample name PromQL can query for it."""
    names: dict[str, set[str]] = {}
    for family in metrics.registry.collect():
        forms = {family.name}
        if family.type == "counter":
            forms.add(family.name + "_total")
        elif family.type == "histogram":
            forms |= {family.name + s for s in ("_bucket", "_sum", "_count")}
        elif family.type == "info":
            forms = {family.name + "_info"}
        names[family.name] = forms
    return names


@pytest.fixture
def daemon_metrics(tmp_path: Path) -> Metrics:
    """Every family a running daemon serves: Metrics plus the quarantine's own collector."""
    metrics = Metrics()
    quarantine = Quarantine(Settings(state_dir=tmp_path))
    metrics.registry.register(QuarantineCollector(quarantine))
    return metrics


def deploy_text() -> str:
    return ALERTS.read_text() + SCRAPE.read_text() + DASHBOARD.read_text()


# -- coverage both ways -----------------------------------------------------------------------


def test_deploy_mentions_every_metric(daemon_metrics: Metrics) -> None:
    text = deploy_text()
    used = set(re.findall(r"\bmailweir_[a-z0-9_]+", text))
    missing = [name for name, forms in sample_names(daemon_metrics).items() if not forms & used]
    assert missing == [], f"metrics neither on the dashboard nor in an alert: {missing}"


def test_deploy_uses_only_metrics_that_exist(daemon_metrics: Metrics) -> None:
    known = set().union(*sample_names(daemon_metrics).values())
    used = set(re.findall(r"\bmailweir_[a-z0-9_]+", deploy_text()))
    assert sorted(used - known) == []


# -- scrape configuration and rules -----------------------------------------------------------


def test_scrape_target_is_the_default_http_listen() -> None:
    default = HttpSettings().listen
    assert f"- {default.host}:{default.port}" in SCRAPE.read_text()


@needs_promtool
def test_alert_rules_pass_promtool_check() -> None:
    result = promtool("check", "rules", ALERTS)
    assert result.returncode == 0, result.stdout + result.stderr
    assert f"SUCCESS: {len(ALERT_NAMES)} rules found" in result.stdout


@needs_promtool
def test_scrape_config_passes_promtool_check() -> None:
    result = promtool("check", "config", SCRAPE)
    assert result.returncode == 0, result.stdout + result.stderr


def test_alert_names_are_ours() -> None:
    assert set(re.findall(r"^\s*- alert: (\S+)$", ALERTS.read_text(), re.M)) == ALERT_NAMES


# -- the rules' behaviour, with promtool's unit tests -------------------------------------------


def without_annotations(text: str) -> str:
    """The rule file minus its annotation blocks, so expected alerts need labels only."""
    kept, skip_deeper_than = [], None
    for line in text.splitlines():
        indent = len(line) - len(line.lstrip())
        if skip_deeper_than is not None:
            if not line.strip() or indent > skip_deeper_than:
                continue
            skip_deeper_than = None
        if line.strip() == "annotations:":
            skip_deeper_than = indent
            continue
        kept.append(line)
    return "\n".join(kept) + "\n"


def series(name: str, values: str, **labels: str) -> dict[str, str]:
    body = ",".join(f'{k}="{v}"' for k, v in {**INSTANCE, **labels}.items())
    return {"series": f"{name}{{{body}}}", "values": values}


def fires(alert: str, at: str, **labels: str) -> dict[str, Any]:
    return {
        "eval_time": at,
        "alertname": alert,
        "exp_alerts": [{"exp_labels": {**labels, "alertname": alert}}],
    }


def quiet(alert: str, at: str) -> dict[str, Any]:
    return {"eval_time": at, "alertname": alert, "exp_alerts": []}


def run_rule_tests(tmp_path: Path, tests: list[dict[str, Any]], rules: Path | None = None) -> None:
    if rules is None:
        rules = tmp_path / "alerts.yml"
        rules.write_text(without_annotations(ALERTS.read_text()))
    spec = {"rule_files": [str(rules)], "evaluation_interval": "1m", "tests": tests}
    path = tmp_path / "rule-tests.json"
    path.write_text(json.dumps(spec, indent=1))
    result = promtool("test", "rules", path)
    assert result.returncode == 0, result.stdout + result.stderr


@needs_promtool
def test_rule_false_positive_rate_fires_only_with_volume(tmp_path: Path) -> None:
    fp, judged = "mailweir_false_positive_rate", "mailweir_judged_messages"
    alert = "MailweirFalsePositiveRateHigh"
    labels = {**INSTANCE, "window": "24h", "severity": "warning"}
    run_rule_tests(
        tmp_path,
        [
            {  # 5 % of 200 judged: fires once it has held for 30 minutes
                "interval": "1m",
                "input_series": [
                    series(fp, "0.05x90", window="24h"),
                    series(judged, "200x90", window="24h"),
                ],
                "alert_rule_test": [quiet(alert, "20m"), fires(alert, "45m", **labels)],
            },
            {  # the same share of only 20 messages: no page
                "interval": "1m",
                "input_series": [
                    series(fp, "0.05x90", window="24h"),
                    series(judged, "20x90", window="24h"),
                ],
                "alert_rule_test": [quiet(alert, "60m")],
            },
            {  # under the target, or over it only in the 7-day window
                "interval": "1m",
                "input_series": [
                    series(fp, "0.004x90", window="24h"),
                    series(fp, "0.05x90", window="7d"),
                    series(judged, "500x90", window="24h"),
                    series(judged, "500x90", window="7d"),
                ],
                "alert_rule_test": [quiet(alert, "60m")],
            },
        ],
    )


@needs_promtool
def test_rule_next_hop_failing_ignores_permanent_refusals(tmp_path: Path) -> None:
    name, alert = "mailweir_next_hop_failures_total", "MailweirNextHopFailing"
    run_rule_tests(
        tmp_path,
        [
            {
                "interval": "1m",
                "input_series": [
                    series(name, "0+2x40", kind="timeout"),
                    series(name, "0x40", kind="refused"),
                ],
                "alert_rule_test": [
                    quiet(alert, "5m"),
                    fires(alert, "25m", severity="critical", instance=INSTANCE["instance"]),
                ],
            },
            {
                "interval": "1m",
                "input_series": [series(name, "0+1x40", kind="permfail")],
                "alert_rule_test": [quiet(alert, "30m")],
            },
        ],
    )


@needs_promtool
def test_rule_no_mail_for_three_hours(tmp_path: Path) -> None:
    name, alert = "mailweir_messages_total", "MailweirNoMail"
    run_rule_tests(
        tmp_path,
        [
            {
                "interval": "5m",
                "input_series": [
                    series(name, "0+10x12 120x60", band="ham", action="pass"),
                    series(name, "0+2x12 24x60", band="spam", action="tag"),
                ],
                "alert_rule_test": [
                    # An hour of traffic, then none: the 3-hour window is empty from 4h on,
                    # and the alert fires after 15 more minutes.
                    quiet(alert, "2h"),
                    quiet(alert, "4h10m"),
                    fires(alert, "4h30m", severity="warning", instance=INSTANCE["instance"]),
                ],
            },
            {
                "interval": "5m",
                "input_series": [series(name, "0+1x72", band="ham", action="pass")],
                "alert_rule_test": [quiet(alert, "5h")],
            },
        ],
    )


@needs_promtool
def test_rule_scoring_failures_fire_at_once(tmp_path: Path) -> None:
    name, alert = "mailweir_scoring_failures_total", "MailweirScoringFailures"
    labels = {"severity": "warning", "instance": INSTANCE["instance"]}
    run_rule_tests(
        tmp_path,
        [
            {
                "interval": "1m",
                "input_series": [series(name, "0x10 1x50")],
                "alert_rule_test": [
                    quiet(alert, "9m"),
                    fires(alert, "12m", **labels),
                    quiet(alert, "40m"),  # the failure has left the 15-minute window
                ],
            }
        ],
    )


@needs_promtool
def test_rule_down_verdict_log_and_stale_reports(tmp_path: Path) -> None:
    host = INSTANCE["instance"]
    run_rule_tests(
        tmp_path,
        [
            {
                "interval": "1m",
                "input_series": [
                    series("up", "1x5 0x20"),
                    series("mailweir_verdict_log_write_failures_total", "0x5 0+1x40"),
                    series("mailweir_verdict_log_dropped_total", "0x60"),
                    series("mailweir_report_refresh_failures_total", "0x5 0+1x40"),
                ],
                "alert_rule_test": [
                    quiet("MailweirDown", "6m"),
                    fires("MailweirDown", "15m", **INSTANCE, severity="critical"),
                    quiet("MailweirVerdictLogFailing", "10m"),
                    fires("MailweirVerdictLogFailing", "30m", severity="warning", instance=host),
                    fires("MailweirReportsStale", "15m", severity="info", instance=host),
                ],
            }
        ],
    )


@needs_promtool
def test_rule_upkeep_failing_needs_the_retry_to_fail_too(tmp_path: Path) -> None:
    name, alert = "mailweir_upkeep_failures_total", "MailweirUpkeepFailing"
    labels = {"severity": "warning", "instance": INSTANCE["instance"], "task": "tidy"}
    run_rule_tests(
        tmp_path,
        [
            {  # one failure, then the retry an hour later works: no alert
                "interval": "10m",
                "input_series": [series(name, "0x6 1x30", task="tidy")],
                "alert_rule_test": [quiet(alert, "2h")],
            },
            {  # failed, and failed again on the retry: fires until the window has passed
                "interval": "10m",
                "input_series": [series(name, "0x6 1x6 2x30", task="tidy")],
                "alert_rule_test": [quiet(alert, "1h30m"), fires(alert, "2h30m", **labels)],
            },
        ],
    )


@needs_promtool
def test_rule_quarantine_needs_attention_past_retention_or_failed_copies(tmp_path: Path) -> None:
    past, failed = "mailweir_quarantine_past_retention", "mailweir_quarantine_hold_failures_total"
    alert = "MailweirQuarantineNeedsAttention"
    labels = {"severity": "info", "instance": INSTANCE["instance"]}
    run_rule_tests(
        tmp_path,
        [
            {  # held mail within retention and every copy written: quiet
                "interval": "1m",
                "input_series": [series(past, "0x240"), series(failed, "0x240")],
                "alert_rule_test": [quiet(alert, "4h")],
            },
            {  # two messages pass retention at 1h; the alert waits ten minutes, then fires
                "interval": "1m",
                "input_series": [series(past, "0x60 2x120"), series(failed, "0x180")],
                "alert_rule_test": [quiet(alert, "1h5m"), fires(alert, "1h30m", **labels)],
            },
            {  # copies not written (451 upstream) from 1h10m on
                "interval": "1m",
                "input_series": [series(past, "0x180"), series(failed, "0x69 1 2 3 4 5 6x110")],
                "alert_rule_test": [quiet(alert, "1h15m"), fires(alert, "2h", **labels)],
            },
        ],
    )


@needs_promtool
def test_rule_annotations_render(tmp_path: Path) -> None:
    """The full rule file, annotations included: the templates must render as intended."""
    alert = "MailweirFalsePositiveRateHigh"
    run_rule_tests(
        tmp_path,
        [
            {
                "interval": "1m",
                "input_series": [
                    series("mailweir_false_positive_rate", "0.025x60", window="24h"),
                    series("mailweir_judged_messages", "400x60", window="24h"),
                ],
                "alert_rule_test": [
                    {
                        "eval_time": "40m",
                        "alertname": alert,
                        "exp_alerts": [
                            {
                                "exp_labels": {**INSTANCE, "window": "24h", "severity": "warning"},
                                "exp_annotations": {
                                    "summary": "mailweir is filing wanted mail as spam on "
                                    + INSTANCE["instance"],
                                    "description": "2.5% of the messages judged in the last 24 "
                                    "hours were sent back as wanted mail (target: at most 1 %).  "
                                    "Check the status page for the score distribution and "
                                    "consider raising policy.spam_threshold / suspect_threshold.",
                                },
                            }
                        ],
                    }
                ],
            }
        ],
        rules=ALERTS,
    )


# -- the dashboard ----------------------------------------------------------------------------


def dashboard() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(DASHBOARD.read_text())
    return data


def test_dashboard_structure() -> None:
    board = dashboard()
    assert board["uid"] == "mailweir-overview" and board["title"] == "mailweir"
    panels = board["panels"]
    assert len({p["id"] for p in panels}) == len(panels)
    for panel in panels:
        pos = panel["gridPos"]
        assert pos["x"] >= 0 and pos["x"] + pos["w"] <= 24, panel["title"]
        if panel["type"] != "row":
            assert panel["targets"], panel["title"]
            assert panel["datasource"]["uid"] == "${datasource}"
            assert panel["description"], panel["title"]


@needs_promtool
def test_dashboard_queries_are_valid_promql(tmp_path: Path) -> None:
    """Each query becomes a recording rule, and promtool parses them all."""
    rules = []
    for panel in dashboard()["panels"]:
        for target in panel.get("targets", []):
            expr = target["expr"].replace("$__rate_interval", "5m").replace("$instance", ".*")
            assert "$" not in expr, expr
            rules.append({"record": f"mailweir:dashboard_{len(rules)}", "expr": expr})
    path = tmp_path / "dashboard-rules.json"
    path.write_text(json.dumps({"groups": [{"name": "dashboard", "rules": rules}]}))
    result = promtool("check", "rules", path)
    assert result.returncode == 0, result.stdout + result.stderr
