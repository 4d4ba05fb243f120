"""deploy/: the systemd unit, the Postfix snippets and their mailweir.toml fragments.

Oracles: ``postconf -d`` (Postfix's own list of its parameter names, when Postfix is installed)
and our configuration loader, which refuses unknown keys.
"""

from __future__ import annotations

import configparser
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from mailweir.daemon.config import load_settings

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
POSITIONS = ("after-queue", "before-queue")


def _unit() -> configparser.ConfigParser:
    # systemd allows repeated keys (SystemCallFilter); strict=False keeps the last one.
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # type: ignore[assignment,method-assign]
    unit.read(DEPLOY / "mailweir.service", encoding="utf-8")
    return unit


def test_deploy_unit_is_hardened() -> None:
    service = _unit()["Service"]
    expected = {
        "User": "mailweir",
        "StateDirectory": "mailweir",
        "ProtectSystem": "strict",
        "ProtectHome": "yes",
        "PrivateTmp": "yes",
        "NoNewPrivileges": "yes",
        "Restart": "on-failure",
        "RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX",
        "CapabilityBoundingSet": "",
    }
    assert {key: service.get(key) for key in expected} == expected


def test_deploy_unit_reload_sends_sighup() -> None:
    service = _unit()["Service"]
    assert re.fullmatch(r"/bin/kill -(HUP|SIGHUP) \$MAINPID", service["ExecReload"])
    assert " run --config /etc/mailweir/mailweir.toml" in service["ExecStart"]


def _postfix_parameters(position: str) -> set[str]:
    names: set[str] = set()
    for line in (DEPLOY / "postfix" / position / "master.cf").read_text().splitlines():
        match = re.match(r"\s+-o\s+([a-z0-9_]+)=", line)
        if match:
            names.add(match.group(1))
    main_cf = DEPLOY / "postfix" / position / "main.cf"
    if main_cf.exists():
        for line in main_cf.read_text().splitlines():
            match = re.match(r"([a-z0-9_]+)\s*=", line)
            if match:
                names.add(match.group(1))
    return names


@pytest.mark.parametrize("position", POSITIONS)
def test_deploy_postfix_snippets_use_only_postfix_parameters(position: str) -> None:
    postconf = shutil.which("postconf") or (
        "/usr/sbin/postconf" if Path("/usr/sbin/postconf").exists() else None
    )
    if postconf is None:
        pytest.skip("postconf not found: Postfix is not installed (apt-get install postfix)")
    defaults = subprocess.run(
        [postconf, "-d"], capture_output=True, text=True, check=True, timeout=60
    ).stdout
    known = {line.split(" =", 1)[0] for line in defaults.splitlines()}
    used = _postfix_parameters(position)
    assert used, "no parameters found in the snippets"
    assert used <= known, f"not Postfix parameters: {sorted(used - known)}"


@pytest.mark.parametrize("position", POSITIONS)
def test_deploy_postfix_ports_match_mailweir_fragment(position: str) -> None:
    folder = DEPLOY / "postfix" / position
    settings = load_settings(folder / "mailweir.toml", env={})
    assert settings.policy.position == position
    postfix_text = "\n".join(p.read_text() for p in sorted(folder.glob("*.cf")))
    # Postfix sends to mailweir's listen address and listens on mailweir's next hop.
    listen, next_hop = settings.smtp.listen, settings.next_hop.address
    assert f"{listen.host}]:{listen.port}" in postfix_text or str(listen) in postfix_text
    assert re.search(rf"^{re.escape(str(next_hop))}\s+inet\s", postfix_text, re.MULTILINE)
