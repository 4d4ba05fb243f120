"""Tables of the store.  Every name starts with ``weir_``.

Rows are kept small because the token table dominates the file: on SQLite the token hash is
the rowid itself (INTEGER PRIMARY KEY), so a token costs one b-tree cell and no index.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    SmallInteger,
    String,
    Table,
    Text,
)

metadata = MetaData()

# BIGINT on PostgreSQL; plain INTEGER on SQLite so the column becomes the rowid alias.
HashType = BigInteger().with_variant(Integer(), "sqlite")

token = Table(
    "weir_token",
    metadata,
    Column("hash", HashType, primary_key=True, autoincrement=False),
    Column("ham", Integer, nullable=False),
    Column("spam", Integer, nullable=False),
    Column("last_seen", Integer, nullable=False),  # day number: unix time // 86400
)

class_total = Table(
    "weir_class_total",
    metadata,
    Column("label", SmallInteger, primary_key=True, autoincrement=False),
    Column("messages", BigInteger, nullable=False),
    # Bumped by every write transaction; lets a process see that another one has written.
    Column("revision", BigInteger, nullable=False),
)

ledger = Table(
    "weir_ledger",
    metadata,
    Column("digest", LargeBinary(16), primary_key=True),
    Column("label", SmallInteger, nullable=False),
    Column("trained_at", Float, nullable=False),  # unix time
    Column("source", String(64), nullable=False),
    # The model gauges read the newest entry every minute: through this index, not a scan of
    # every entry (migration 0004).
    Index("weir_ledger_trained_at", "trained_at"),
    sqlite_with_rowid=False,
)

meta = Table(
    "weir_meta",
    metadata,
    Column("key", String(100), primary_key=True),
    Column("value", Text, nullable=False),
    sqlite_with_rowid=False,
)

schema_log = Table(
    "weir_schema",
    metadata,
    Column("name", String(100), primary_key=True),
    Column("applied_at", Float, nullable=False),
)

verdict = Table(
    "weir_verdict",
    metadata,
    Column("tracking_id", String(64), primary_key=True),
    Column("received_at", Float, nullable=False),
    Column("recipients", Integer, nullable=False),
    Column("size", BigInteger, nullable=False),
    Column("score", Float, nullable=True),
    Column("band", String(16), nullable=False),
    Column("action", String(16), nullable=False),
    Column("token_hashes", LargeBinary, nullable=True),  # little-endian int64 array
    # "allow" or "block" when a sender list decided (band "listed"); NULL when scored.
    # Added by migration 0002_verdict_sender_list.
    Column("sender_list", String(8), nullable=True),
    # Covers the rate gauges' counts of a window (migration 0003_verdict_window_index).
    Index("weir_verdict_window", "received_at", "band", "tracking_id"),
)

feedback = Table(
    "weir_feedback",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("tracking_id", String(64), nullable=True),
    Column("digest", LargeBinary(16), nullable=True),
    Column("kind", String(16), nullable=False),
    Column("received_at", Float, nullable=False),
    Column("channel", String(8), nullable=False),
    Index("weir_feedback_received_at", "received_at"),
)
