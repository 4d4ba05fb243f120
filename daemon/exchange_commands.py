"""``mailweir export``, ``import`` and ``move``: the model as a JSON Lines file, and the move
from one database to another (SQLite to PostgreSQL when a second daemon joins).

The file format is described in :mod:`mailweir.store.exchange`.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

from sqlalchemy import func, select

from mailweir.daemon.command_args import db_argument, json_argument
from mailweir.store import ModelStore, StoreError, schema
from mailweir.store.exchange import ExchangeSummary, ModelExport, export_model, import_model

Handler = Callable[[argparse.Namespace], int]


def add_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Register ``export``, ``import`` and ``move`` on the ``mailweir`` command's subparsers."""
    export = sub.add_parser(
        "export",
        help="write the model to a JSON Lines file",
        description="Write token counts, class totals, the training ledger and the model's "
        "settings as JSON Lines (one object per line; the format is in the README). For "
        "backups and moves; the daemon may keep running meanwhile.",
    )
    export.add_argument("--out", default="-", help="file to write, or - for standard output")
    db_argument(export)
    json_argument(export)
    export.set_defaults(handler=cmd_export)

    imp = sub.add_parser(
        "import",
        help="load a model exported earlier into an empty database",
        description="Read an export and load it into a database that holds no model yet, in "
        "one transaction: a cut-off or damaged file leaves the database as it was.",
    )
    imp.add_argument("file", help="the export file, or - for standard input")
    db_argument(imp)
    json_argument(imp)
    imp.set_defaults(handler=cmd_import)

    move = sub.add_parser(
        "move",
        help="copy the model to another database and check the copy",
        description="Export the model from one database straight into another, empty one "
        "(for example from SQLite to PostgreSQL), then compare class totals, token counts "
        "and ledger sizes of both. Stop the daemons first so that no training is missed.",
    )
    move.add_argument("--from", dest="source", required=True, help="database URL or SQLite path")
    move.add_argument("--to", dest="target", required=True, help="database URL or SQLite path")
    json_argument(move)
    move.set_defaults(handler=cmd_move)


@contextmanager
def _opened(target: str, *, create: bool) -> Iterator[ModelStore]:
    store = ModelStore.open(target, create=create)
    try:
        yield store
    finally:
        store.close()


def _failing_cleanly(handler: Handler) -> Handler:
    """Report store, file and encoding errors in one line and exit with status 2."""

    @functools.wraps(handler)
    def wrapper(args: argparse.Namespace) -> int:
        try:
            return handler(args)
        except (StoreError, OSError, UnicodeDecodeError) as exc:
            print(f"mailweir {args.command}: {exc}", file=sys.stderr)
            return 2

    return wrapper


# -- commands -------------------------------------------------------------------------------


@_failing_cleanly
def cmd_export(args: argparse.Namespace) -> int:
    # With the export on standard output the summary goes to standard error.
    report_to = sys.stderr if args.out == "-" else sys.stdout
    with _opened(args.db, create=False) as store:
        if args.out == "-":
            summary = export_model(store, sys.stdout)
        else:
            summary = _export_to_file(store, Path(args.out))
    _report(args, report_to, "export", summary, f"exported to {args.out}")
    return 0


def _export_to_file(store: ModelStore, path: Path) -> ExchangeSummary:
    # Written beside the target and renamed at the end, so a failed export never leaves a
    # file that looks like a finished one under the requested name.
    partial = path.with_name(path.name + ".partial")
    try:
        with partial.open("w", encoding="utf-8") as out:
            summary = export_model(store, out)
            os.fsync(out.fileno())
        partial.replace(path)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    return summary


@_failing_cleanly
def cmd_import(args: argparse.Namespace) -> int:
    with _opened(args.db, create=True) as store:
        if args.file == "-":
            summary = import_model(store, sys.stdin)
        else:
            with open(args.file, encoding="utf-8") as lines:
                summary = import_model(store, lines)
    _report(args, sys.stdout, "import", summary, f"imported {args.file} into {args.db}")
    return 0


@_failing_cleanly
def cmd_move(args: argparse.Namespace) -> int:
    with (
        _opened(args.source, create=False) as source,
        _opened(args.target, create=True) as target,
    ):
        summary = import_model(target, ModelExport(source))
        before, after = model_figures(source), model_figures(target)
    differences = {k: (before[k], after[k]) for k in before if before[k] != after[k]}
    report: dict[str, Any] = {
        "command": "move",
        "from": args.source,
        "to": args.target,
        "moved": summary.as_dict(),
        "source": before,
        "target": after,
        "identical": not differences,
    }
    if args.json:
        print(json.dumps(report, indent=2, sort_keys=True))
    else:
        print(f"moved the model from {args.source} to {args.target}")
        for key, value in before.items():
            mark = "" if key not in differences else f"   DIFFERS: target has {after[key]}"
            print(f"  {key.replace('_', ' ')}: {value}{mark}")
        print("  the copy matches the source" if not differences else "  THE COPY DIFFERS")
    return 0 if not differences else 1


def model_figures(store: ModelStore) -> dict[str, int]:
    """Totals that must agree between a model and its copy."""
    t, led, c = schema.token, schema.ledger, schema.class_total
    with store.engine.connect() as conn:
        tokens, ham_sum, spam_sum = conn.execute(
            select(
                func.count(),
                func.coalesce(func.sum(t.c.ham), 0),
                func.coalesce(func.sum(t.c.spam), 0),
            )
        ).one()
        ledger = conn.execute(select(func.count()).select_from(led)).scalar_one()
        totals = dict(conn.execute(select(c.c.label, c.c.messages)).all())
    return {
        "ham_messages": int(totals.get(0, 0)),
        "spam_messages": int(totals.get(1, 0)),
        "tokens": int(tokens),
        "token_ham_sum": int(ham_sum),
        "token_spam_sum": int(spam_sum),
        "ledger_rows": int(ledger),
    }


# -- helpers --------------------------------------------------------------------------------


def _report(
    args: argparse.Namespace, out: TextIO, verb: str, summary: ExchangeSummary, title: str
) -> None:
    if args.json:
        print(
            json.dumps({"command": verb, **summary.as_dict()}, indent=2, sort_keys=True), file=out
        )
        return
    lines = [
        title,
        f"  tokens: {summary.tokens}",
        f"  ledger entries: {summary.ledger}",
        f"  trained messages: {summary.ham} ham, {summary.spam} spam",
    ]
    lines += [f"  {key}: {value}" for key, value in sorted(summary.meta.items())]
    print("\n".join(lines), file=out)
