"""Arguments and report printing shared by every ``mailweir`` command that reads a model."""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

from mailweir.daemon.settings import Settings

DB_ENV = "MAILWEIR_DB"
DEFAULT_DB = Settings().database  # the daemon's own default: <state_dir>/model.sqlite3


def db_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--db",
        default=os.environ.get(DB_ENV, DEFAULT_DB),
        help=f"database URL or SQLite path (default: ${DB_ENV} or {DEFAULT_DB})",
    )


def config_arguments(parser: argparse.ArgumentParser) -> None:
    """``--config`` (the daemon's TOML file) and ``--db`` overriding its database, for the
    commands that act as the daemon would (``check``, ``upkeep``)."""
    config_file_argument(parser)
    parser.add_argument("--db", metavar="URL_OR_PATH", help="database (default: the config's)")


def config_file_argument(parser: argparse.ArgumentParser) -> None:
    """``--config``: the daemon's TOML file, by default the one ``$MAILWEIR_CONFIG`` names."""
    from mailweir.daemon.config import CONFIG_PATH_ENV  # late: keeps this module light

    parser.add_argument(
        "--config",
        type=Path,
        default=os.environ.get(CONFIG_PATH_ENV) or None,
        help=f"TOML configuration file (default: ${CONFIG_PATH_ENV}; none: built-in defaults)",
    )


def json_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--json", action="store_true", help="print the report as JSON")


def print_report(args: argparse.Namespace, report: dict[str, object], lines: list[str]) -> None:
    """The report as JSON with ``--json``, else as the lines for people."""
    if args.json:
        print(json.dumps(report, indent=2, sort_keys=True, default=str))
    else:
        print("\n".join(lines))
