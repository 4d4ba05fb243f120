"""The digest's schedule and the [quarantine] settings' validation."""

from __future__ import annotations

import datetime
import time

import pytest

from mailweir.daemon.config import load_settings
from mailweir.daemon.digest import next_run, subject_of
from mailweir.daemon.errors import ConfigError


def _local(hour: int, minute: int, day: int = 2) -> float:
    return datetime.datetime(2026, 12, day, hour, minute).astimezone().timestamp()


def test_digest_next_run_later_today_or_tomorrow() -> None:
    assert next_run("07:30", _local(6, 0)) == _local(7, 30)
    assert next_run("07:30", _local(7, 30)) == _local(7, 30, day=3)  # strictly after now
    assert next_run("07:30", _local(9, 15)) == _local(7, 30, day=3)


def test_digest_subject_decoded_and_damage_tolerated() -> None:
    # RFC 2047 section 8 style encoded word ("Kennel offer – 40 % off").
    raw = b"Subject: =?utf-8?q?Kennel_offer_=E2=80=93_40_=25_off?=\r\n\r\nbody\r\n"
    assert subject_of(raw) == "Kennel offer – 40 % off"
    assert subject_of(b"From: a@mail.example\r\n\r\n") == "(no subject)"
    assert subject_of(b"\xff\xfe\x00garbage") in ("(no subject)", "(subject unreadable)")


@pytest.mark.parametrize(
    ("quarantine", "key"),
    [
        ({"digest_time": "7.30", "digest_from": "f@harbourlane.example"}, "digest_time"),
        ({"digest_time": "24:00", "digest_from": "f@harbourlane.example"}, "digest_time"),
        ({"digest_time": "07:30"}, "digest_from"),
        (
            {"digest_time": "07:30", "digest_from": "f@harbourlane.example", "digest_to": "admin"},
            "digest_admin",
        ),
        ({"retention_days": 0}, "retention_days"),
        ({"digest_from": "not-an-address"}, "digest_from"),
    ],
)
def test_digest_settings_refused_naming_the_key(quarantine: dict[str, object], key: str) -> None:
    env = {f"MAILWEIR_QUARANTINE_{k.upper()}": str(v) for k, v in quarantine.items()}
    with pytest.raises(ConfigError) as caught:
        load_settings(None, env)
    assert caught.value.key == f"quarantine.{key}"


def test_digest_settings_accepted() -> None:
    env = {
        "MAILWEIR_QUARANTINE_DIGEST_TIME": "07:30",
        "MAILWEIR_QUARANTINE_DIGEST_FROM": "mail-filter@harbourlane.example",
        "MAILWEIR_QUARANTINE_RETENTION_DAYS": "14",
    }
    settings = load_settings(None, env)
    assert settings.quarantine.digest_time == "07:30"
    assert settings.quarantine.retention_days == 14


def test_digest_next_run_keeps_local_hour_across_summer_time(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # EU summer time began on 29 March 2026 at 01:00 UTC (Directive 2000/84/EC: last Sunday
    # of March); Oslo moves from UTC+1 to UTC+2.
    monkeypatch.setenv("TZ", "Europe/Oslo")
    time.tzset()
    try:
        saturday_9 = datetime.datetime(2026, 3, 28, 8, 0, tzinfo=datetime.UTC).timestamp()
        sunday_0730 = datetime.datetime(2026, 3, 29, 5, 30, tzinfo=datetime.UTC).timestamp()
        assert next_run("07:30", saturday_9) == sunday_0730
    finally:
        monkeypatch.undo()
        time.tzset()
