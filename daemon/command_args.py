"""Arguments and report printing shared by every ``mailweir`` command that reads a model."""

from __future__ import annotations

import argparse
import json
import os

from mailweir.daemon.settings import Settings

DB_ENV = "MAILWEIR_DB"
DEFAULT_DB = Settings().database  # the daemon's own default: <state_dir>/model.sqlite3


def db_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--db",
        default=os.environ.get(DB_ENV, DEFAULT_DB),
        help=f"database URL or SQLite path (default: ${DB_ENV} or {DEFAULT_DB})",
    )


def json_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--json", action="store_true", help="print the report as JSON")


def print_report(args: argparse.Namespace, report: dict[str, object], lines: list[str]) -> None:
    """The report as JSON with ``--json``, else as the lines for people."""
    if args.json:
        print(json.dumps(report, indent=2, sort_keys=True, default=str))
    else:
        print("\n".join(lines))
