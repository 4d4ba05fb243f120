"""A read-only look at a model database, for ``mailweir check``.

Nothing here writes, migrates or creates: a SQLite file is opened with ``mode=ro`` and a
PostgreSQL session is set read-only, so a check is safe beside a running daemon and on a copy
someone is worried about.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, event, func, inspect, select
from sqlalchemy.exc import SQLAlchemyError

from mailweir.store import maintenance, schema
from mailweir.store.engine import target_url
from mailweir.store.meta import CREATED, METHOD, TOKENIZER, database_bytes, get_meta, row_count
from mailweir.store.migrations import MIGRATIONS, applied_migrations


@dataclass
class DatabaseReport:
    """What a check found; ``problems`` empty means the database is fit to serve."""

    target: str  # the URL with any password hidden, or the SQLite path
    backend: str = ""
    integrity: str = ""  # SQLite quick_check: "ok" or its first complaints; "" when not run
    applied: list[str] = field(default_factory=list)
    pending: list[str] = field(default_factory=list)  # applied when the daemon next starts
    tokenizer: str | None = None
    method: str | None = None
    created: float | None = None
    tokens: int = 0
    ham_messages: int = 0
    spam_messages: int = 0
    ledger_rows: int = 0
    verdict_rows: int = 0
    feedback_rows: int = 0
    oldest_verdict: float | None = None
    newest_verdict: float | None = None
    database_bytes: int = 0
    upkeep_last_run: dict[str, float | None] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)


def shown(target: str) -> str:
    """The target as it may be printed: a URL's password replaced by ``***``."""
    if "://" not in target:
        return target
    try:
        return target_url(target).render_as_string(hide_password=True)
    except Exception:
        return "<unparsable database URL>"


def read_only_engine(target: str) -> Engine:
    """An engine that cannot write; FileNotFoundError for a SQLite file that is not there."""
    url = target_url(target)
    if url.get_backend_name() == "sqlite":
        path = Path(url.database or "")
        if not path.is_file():
            raise FileNotFoundError(f"SQLite database {path} does not exist")
        uri = path.resolve().as_uri() + "?mode=ro"
        return create_engine("sqlite://", creator=lambda: sqlite3.connect(uri, uri=True))
    engine = create_engine(url)

    @event.listens_for(engine, "connect")
    def _read_only(dbapi_connection: Any, _record: Any) -> None:
        cursor = dbapi_connection.cursor()
        cursor.execute("SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY")
        cursor.close()
        dbapi_connection.commit()

    return engine


def inspect_database(target: str) -> DatabaseReport:
    """Open ``target`` read-only and report schema, integrity, model stamp and sizes."""
    report = DatabaseReport(shown(target))
    try:
        engine = read_only_engine(target)
    except (FileNotFoundError, SQLAlchemyError, ValueError) as exc:
        report.problems.append(f"cannot open: {exc}")
        return report
    try:
        with engine.connect() as conn:
            report.backend = conn.dialect.name
            if report.backend == "sqlite" and not _integrity(conn, report):
                return report
            if _schema(conn, report):
                _contents(conn, report)
    except SQLAlchemyError as exc:
        report.problems.append(f"reading failed: {_first_line(exc)}")
    finally:
        engine.dispose()
    return report


def _integrity(conn: Connection, report: DatabaseReport) -> bool:
    """SQLite's quick_check (b-tree structure, records, NOT NULL; skips index contents)."""
    try:
        rows = [str(r[0]) for r in conn.exec_driver_sql("PRAGMA quick_check(20)")]
    except SQLAlchemyError as exc:
        report.integrity = _first_line(exc)
        report.problems.append(f"damaged, or not a SQLite database: {report.integrity}")
        return False
    report.integrity = "; ".join(rows)
    if rows != ["ok"]:
        report.problems.append(f"integrity check failed: {report.integrity}")
        return False
    return True


def _schema(conn: Connection, report: DatabaseReport) -> bool:
    if not inspect(conn).has_table(schema.schema_log.name):
        report.problems.append("no mailweir schema (weir_schema is missing): not a model database")
        return False
    report.applied = applied_migrations(conn)
    known = [name for name, _ in MIGRATIONS]
    report.pending = [name for name in known if name not in report.applied]
    unknown = [name for name in report.applied if name not in known]
    if unknown:
        report.problems.append(f"migrations unknown to this mailweir (newer?): {unknown}")
        return False
    return not report.pending or bool(report.applied)


def _contents(conn: Connection, report: DatabaseReport) -> None:
    ct = schema.class_total
    totals = dict(conn.execute(select(ct.c.label, ct.c.messages)).all())
    if set(totals) != {0, 1}:
        report.problems.append(f"class totals rows are {sorted(totals)}; expected [0, 1]")
    report.ham_messages, report.spam_messages = int(totals.get(0, 0)), int(totals.get(1, 0))
    report.tokenizer = get_meta(conn, TOKENIZER)
    report.method = get_meta(conn, METHOD)
    created = get_meta(conn, CREATED)
    report.created = float(created) if created else None
    report.tokens = row_count(conn, schema.token)
    report.ledger_rows = row_count(conn, schema.ledger)
    report.verdict_rows = row_count(conn, schema.verdict)
    report.feedback_rows = row_count(conn, schema.feedback)
    v = schema.verdict
    oldest, newest = conn.execute(
        select(func.min(v.c.received_at), func.max(v.c.received_at))
    ).one()
    report.oldest_verdict, report.newest_verdict = oldest, newest
    report.database_bytes = database_bytes(conn)
    for task in maintenance.TASKS:
        stamp = get_meta(conn, maintenance.STAMP_PREFIX + task)
        report.upkeep_last_run[task] = float(stamp) if stamp else None
    if report.tokens and not report.tokenizer:
        report.problems.append("tokens are stored but the tokenizer stamp is missing")
    if min(report.ham_messages, report.spam_messages) < 0:
        report.problems.append("a class total is negative")


def _first_line(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None)
    return str(orig if orig is not None else exc).splitlines()[0]
