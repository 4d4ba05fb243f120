"""bench/bench_relay.py reads the daemon's judge step times from its /metrics page by series
name; a rename in daemon/metrics.py would otherwise leave the bench printing nan."""

from __future__ import annotations

import sys
from pathlib import Path
from types import ModuleType

from prometheus_client import generate_latest

from mailweir.daemon.metrics import Metrics

BENCH = Path(__file__).resolve().parents[2] / "bench"


def _bench_relay() -> ModuleType:
    sys.path.insert(0, str(BENCH))
    try:
        import bench_relay
    finally:
        sys.path.remove(str(BENCH))
    return bench_relay


def test_the_bench_reads_the_judge_step_times_the_daemon_exposes() -> None:
    metrics = Metrics()
    for parse, score in ((0.0004, 0.0002), (0.0006, 0.0001), (0.0005, 0.0003)):
        metrics.parsing_seconds.observe(parse)
        metrics.scoring_seconds.observe(score)
    page = generate_latest(metrics.registry).decode()

    parse_sum, score_sum, scored = _bench_relay().step_values(page)

    assert abs(parse_sum - 0.0015) < 1e-12
    assert abs(score_sum - 0.0006) < 1e-12
    assert scored == 3


def test_a_page_without_the_series_reads_as_zeros() -> None:
    assert _bench_relay().step_values("# nothing here\nother_metric 5.0\n") == (0.0, 0.0, 0.0)
