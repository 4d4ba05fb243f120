"""The [feedback] configuration section: loading, environment overrides and validation."""

from __future__ import annotations

from pathlib import Path

import pytest

from mailweir.daemon.config import load_settings
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import FeedbackSettings


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "mailweir.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_feedback_config_defaults_trust_loopback_only() -> None:
    feedback = load_settings(env={}).feedback
    assert feedback == FeedbackSettings()
    assert feedback.trusted_networks == ("127.0.0.0/8", "::1/128")
    assert feedback.spam_address == feedback.ham_address == ""


def test_feedback_config_reads_the_toml_table(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        "[feedback]\n"
        'spam_address = "report-spam@harbourlane.example"\n'
        'ham_address = "report-wanted@harbourlane.example"\n'
        'trusted_networks = ["192.0.2.0/24", "2001:db8::/32"]\n'
        "rate_limit_per_hour = 5\n",
    )
    feedback = load_settings(path, env={}).feedback
    assert feedback.spam_address == "report-spam@harbourlane.example"
    assert feedback.trusted_networks == ("192.0.2.0/24", "2001:db8::/32")
    assert feedback.rate_limit_per_hour == 5


def test_feedback_config_environment_list_is_comma_separated() -> None:
    env = {"MAILWEIR_FEEDBACK_TRUSTED_NETWORKS": "192.0.2.0/24, 198.51.100.0/24"}
    feedback = load_settings(env=env).feedback
    assert feedback.trusted_networks == ("192.0.2.0/24", "198.51.100.0/24")


def test_feedback_config_single_string_is_one_network(tmp_path: Path) -> None:
    # The same text form the environment uses; a lone string is not an error.
    path = _write(tmp_path, '[feedback]\ntrusted_networks = "192.0.2.0/24"\n')
    assert load_settings(path, env={}).feedback.trusted_networks == ("192.0.2.0/24",)


@pytest.mark.parametrize(
    ("toml", "key"),
    [
        ('trusted_networks = ["192.0.2.300/24"]', "feedback.trusted_networks"),
        ('trusted_networks = ["192.0.2.1/24"]', "feedback.trusted_networks"),  # host bits set
        ("trusted_networks = [1, 2]", "feedback.trusted_networks"),
        ('spam_address = "report-spam"', "feedback.spam_address"),
        ("rate_limit_per_hour = -1", "feedback.rate_limit_per_hour"),
        ("max_message_bytes = 0", "feedback.max_message_bytes"),
        (
            'spam_address = "a@harbourlane.example"\nham_address = "A@harbourlane.example"',
            "feedback.ham_address",
        ),
        ("require_auth = true", "feedback.require_auth"),  # not offered: no AUTH on the SMTP side
    ],
)
def test_feedback_config_bad_value_names_the_key(tmp_path: Path, toml: str, key: str) -> None:
    path = _write(tmp_path, "[feedback]\n" + toml + "\n")
    with pytest.raises(ConfigError) as caught:
        load_settings(path, env={})
    assert caught.value.key == key
