"""Key/value settings in ``weir_meta`` and size figures."""

from __future__ import annotations

from sqlalchemy import Connection, Table, func, select, text
from sqlalchemy.dialects import postgresql, sqlite

from mailweir.store import schema

# Keys other parts of mailweir read back: the tokenizer's fingerprint (training and scoring
# must agree on it) and the scoring method the model was tuned for.
TOKENIZER = "tokenizer"
METHOD = "method"
CREATED = "created"


def get_meta(conn: Connection, key: str) -> str | None:
    m = schema.meta
    return conn.execute(select(m.c.value).where(m.c.key == key)).scalar()


def set_meta(conn: Connection, key: str, value: str) -> None:
    m = schema.meta
    dialect_insert = postgresql.insert if conn.dialect.name == "postgresql" else sqlite.insert
    stmt = dialect_insert(m).values(key=key, value=value)
    conn.execute(stmt.on_conflict_do_update(index_elements=[m.c.key], set_={"value": value}))


def row_count(conn: Connection, table: Table) -> int:
    return int(conn.execute(select(func.count()).select_from(table)).scalar_one())


def database_bytes(conn: Connection) -> int:
    """SQLite: pages in the main file; PostgreSQL: total size of the weir_ tables and indexes."""
    if conn.dialect.name == "sqlite":
        pages = conn.exec_driver_sql("PRAGMA page_count").scalar_one()
        size = conn.exec_driver_sql("PRAGMA page_size").scalar_one()
        return int(pages) * int(size)
    names = [t.name for t in schema.metadata.sorted_tables] + [schema.schema_log.name]
    query = text(
        "SELECT COALESCE(SUM(pg_total_relation_size(c.oid)), 0) FROM pg_class c "
        "WHERE c.relkind = 'r' AND c.relname = ANY(:names) "
        "AND c.relnamespace = to_regnamespace(current_schema())"
    )
    return int(conn.execute(query, {"names": sorted(set(names))}).scalar_one())
