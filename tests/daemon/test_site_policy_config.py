"""Loading the site policy from TOML and the environment (daemon/config.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

from mailweir.daemon.config import load_settings
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import RecipientPolicy, Settings

POLICY = """
[policy]
allow_senders = ["@.vetsupply.example", "tobias.lindqvist@harbourlane.example"]
block_networks = ["198.51.100.0/24", "2001:db8:bad::/48"]
block_action = "reroute"
quarantine_mailbox = "quarantine@harbourlane.example"

[[policy.recipient]]
match = "maren.okafor@harbourlane.example"
spam_threshold = 0.9
spam_action = "reroute"

[[policy.recipient]]
match = "@lists.harbourlane.example"
suspect_action = "pass"
"""


def load(tmp_path: Path, text: str, env: dict[str, str] | None = None) -> Settings:
    path = tmp_path / "mailweir.toml"
    path.write_text(text, encoding="utf-8")
    return load_settings(path, env=env or {})


def test_site_policy_loads_lists_and_recipient_tables(tmp_path: Path) -> None:
    policy = load(tmp_path, POLICY).policy
    assert policy.allow_senders == ("@.vetsupply.example", "tobias.lindqvist@harbourlane.example")
    assert policy.block_networks == ("198.51.100.0/24", "2001:db8:bad::/48")
    assert policy.block_action == "reroute"
    assert policy.exempt_local_parts == ("postmaster", "abuse")  # the default
    assert policy.recipient == (
        RecipientPolicy("maren.okafor@harbourlane.example", spam_threshold=0.9,
                        spam_action="reroute"),
        RecipientPolicy("@lists.harbourlane.example", suspect_action="pass"),
    )  # fmt: skip


def test_site_policy_lists_from_environment(tmp_path: Path) -> None:
    env = {"MAILWEIR_POLICY_BLOCK_SENDERS": "@mail.example, offers@shop.example"}
    policy = load(tmp_path, "", env).policy
    assert policy.block_senders == ("@mail.example", "offers@shop.example")


def test_site_policy_recipient_tables_only_from_the_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as caught:
        load(tmp_path, "", {"MAILWEIR_POLICY_RECIPIENT": "x"})
    assert caught.value.key == "policy.recipient"
    assert "[[policy.recipient]]" in caught.value.reason


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ('[policy]\nallow_senders = ["vetsupply.example"]\n', "policy.allow_senders"),
        ('[policy]\nallow_networks = ["192.0.2.0/33"]\n', "policy.allow_networks"),
        ('[policy]\nblock_action = "pass"\n', "policy.block_action"),
        ('[policy]\nblock_action = "reject"\n', "policy.block_action"),  # after-queue
        ('[policy]\nblock_action = "reroute"\n', "policy.block_action"),  # no quarantine
        ('[[policy.recipient]]\nspam_threshold = 0.9\n', "policy.recipient[0].match"),
        ('[[policy.recipient]]\nmatch = "@x.example"\nlevel = 1\n', "policy.recipient[0].level"),
        ('[[policy.recipient]]\nmatch = "@x.example"\nspam_threshold = "high"\n',
         "policy.recipient[0].spam_threshold"),
    ],
)  # fmt: skip
def test_site_policy_bad_values_name_the_key(tmp_path: Path, text: str, key: str) -> None:
    with pytest.raises(ConfigError) as caught:
        load(tmp_path, text)
    assert caught.value.key == key
