"""deploy/mailweir.toml.example must list every configuration key, and nothing else.

The oracle is ``daemon/settings.py`` itself: its dataclasses are the configuration keys, so a
key added there without being documented in the example (or a stale key left in the example)
fails here.
"""

from __future__ import annotations

import dataclasses
import tomllib
from pathlib import Path

from mailweir.daemon.config import SECTIONS, load_settings
from mailweir.daemon.settings import Settings

EXAMPLE = Path(__file__).resolve().parents[2] / "deploy" / "mailweir.toml.example"


def _settings_keys() -> set[str]:
    keys = set()
    for f in dataclasses.fields(Settings):
        if f.name in SECTIONS:
            keys |= {f"{f.name}.{g.name}" for g in dataclasses.fields(SECTIONS[f.name])}
        else:
            keys.add(f.name)
    return keys


def _example_keys() -> set[str]:
    document = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
    keys = set()
    for name, value in document.items():
        if isinstance(value, dict):
            keys |= {f"{name}.{key}" for key in value}
        else:
            keys.add(name)
    return keys


def test_example_config_lists_every_settings_key() -> None:
    missing = _settings_keys() - _example_keys()
    assert not missing, f"keys in settings.py but not in {EXAMPLE.name}: {sorted(missing)}"


def test_example_config_has_no_unknown_key() -> None:
    unknown = _example_keys() - _settings_keys()
    assert not unknown, f"keys in {EXAMPLE.name} that settings.py does not know: {sorted(unknown)}"


def test_example_config_values_are_the_defaults() -> None:
    # The example promises "every key, set to its default": loading it must give Settings().
    assert load_settings(EXAMPLE, env={}) == Settings()


def test_example_config_documents_every_key_with_a_comment() -> None:
    # A key may share the comment of a group of keys directly above it (ham/suspect/spam_action).
    lines = EXAMPLE.read_text(encoding="utf-8").splitlines()
    for number, line in enumerate(lines):
        if "=" not in line or line.startswith("#"):
            continue
        above = number - 1
        while above >= 0 and "=" in lines[above] and not lines[above].startswith("#"):
            above -= 1
        assert above >= 0 and lines[above].startswith("#"), f"no comment for line {number + 1}"
