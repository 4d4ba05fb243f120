"""The public surface stays documented: commands, configuration keys, header fields."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from mailweir.daemon import cli
from mailweir.daemon.settings import Settings

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _subcommands() -> dict[str, object]:
    parser = cli.build_parser()
    action = next(a for a in parser._actions if a.dest == "command")
    return dict(action.choices)  # type: ignore[arg-type]


@pytest.mark.parametrize("name", sorted(_subcommands()))
def test_every_command_has_help_and_is_in_the_readme(name: str) -> None:
    sub = _subcommands()[name]
    assert sub.description or sub.format_help()  # type: ignore[attr-defined]
    assert f"mailweir {name}" in README or f"`{name}`" in README


def _keys() -> list[str]:
    keys = []
    for f in dataclasses.fields(Settings):
        default = Settings()
        value = getattr(default, f.name)
        if dataclasses.is_dataclass(value):
            keys += [f"{f.name}.{g.name}" for g in dataclasses.fields(value)]
        else:
            keys.append(f.name)
    return keys


@pytest.mark.parametrize("key", _keys())
def test_every_configuration_key_is_in_the_readme(key: str) -> None:
    assert f"`{key}`" in README
