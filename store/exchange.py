"""Model export and import as JSON Lines: backup, restore, and moving between databases.

The format (``mailweir-model``, version 1) is UTF-8 text, one JSON object per line
(https://jsonlines.org), so ordinary tools (``jq``, ``grep``, ``gzip``) can read it.

Line 1, the header::

    {"format": "mailweir-model", "version": 1, "created": "2026-12-02T01:00:00Z",
     "meta": {"method": "fisher", "tokenizer": "{...}"}, "class_count": {"ham": 812, "spam": 430}}

``meta`` holds the model's settings as the strings stored with it: the scoring method and the
tokenizer settings (a JSON text), which the importer stores unchanged because token hashes only
mean something with the tokenizer that made them.  ``class_count`` is the number of trained ham
and spam messages.

Then, in any order, one line per token and one per ledger entry::

    {"h": -4417290337162045807, "ham": 3, "spam": 0, "seen": 20424}
    {"ledger": "9c1f...e0", "label": "spam", "at": 1764637200.5, "source": "feedback"}

A token line gives the token's signed 64-bit hash, the number of trained ham and spam messages
that contain it, and the day it was last seen (days since 1970-01-01 UTC).  A ledger line gives
a trained message's 16-byte content digest in hex, its class, when it was trained (Unix time)
and what trained it.  The verdict and feedback logs are not part of the model and not exported.

The last line, the trailer, counts the lines before it, so a cut-off file is refused::

    {"end": "mailweir-model", "tokens": 125004, "ledger": 1242}

Both directions stream: the export reads through a server-side cursor in one read transaction
(a consistent snapshot), the import writes in batches inside one transaction that commits only
after the trailer checked out, so a failed import leaves the target as empty as it was.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterable, Iterator
from contextlib import AbstractContextManager, contextmanager
from dataclasses import asdict, dataclass
from typing import Any, Protocol, TextIO

from sqlalchemy import Connection, Engine, Table, insert, select, update
from sqlalchemy import exc as sa_exc

from mailweir.model.types import HAM, LABELS, SPAM
from mailweir.store import schema
from mailweir.store.bulk import insert_rows
from mailweir.store.engine import READ_ONLY
from mailweir.store.errors import StoreError, store_errors

FORMAT = "mailweir-model"
VERSION = 1
BATCH = 10_000  # rows per fetch and per insert: large enough to amortise round trips
# Meta keys that describe one database rather than the model in it.
LOCAL_META = frozenset({"created"})
_INT64 = (-(2**63), 2**63 - 1)


class ExchangeError(StoreError):
    """An export could not be read or imported."""


class TargetNotEmpty(ExchangeError):
    """The import target already holds a model; importing would mix two models' counts."""


class BadExportFile(ExchangeError):
    """The file is not a complete ``mailweir-model`` export; ``line`` is 1-based (0: none)."""

    def __init__(self, line: int, reason: str) -> None:
        super().__init__(f"line {line}: {reason}" if line else reason)
        self.line = line
        self.reason = reason


class HasEngine(Protocol):
    """The part of ``ModelStore`` this module uses."""

    @property
    def engine(self) -> Engine: ...

    def transaction(self) -> AbstractContextManager[Connection]: ...


@dataclass(frozen=True)
class ExchangeSummary:
    tokens: int
    ledger: int
    ham: int
    spam: int
    meta: dict[str, str]

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


ExportSummary = ExchangeSummary
ImportSummary = ExchangeSummary


# -- export --------------------------------------------------------------------------------


@contextmanager
def _snapshot(engine: Engine) -> Iterator[Connection]:
    """A read transaction that sees one consistent state of every table and writes nothing."""
    with engine.connect() as conn:
        if conn.dialect.name == "sqlite":
            # A deferred BEGIN (engine.py): a WAL snapshot without the write lock that
            # training needs, so the daemon keeps learning while a backup runs.
            conn = conn.execution_options(**{READ_ONLY: True})
        else:
            conn = conn.execution_options(isolation_level="REPEATABLE READ")
        try:
            yield conn
        finally:
            conn.rollback()


class ModelExport:
    """The export of one store as an iterator of lines; ``summary`` is set once it is done."""

    def __init__(self, store: HasEngine) -> None:
        self.store = store
        self.summary: ExportSummary | None = None

    def __iter__(self) -> Iterator[str]:
        with store_errors(), _snapshot(self.store.engine) as conn:
            meta = _read_meta(conn)
            ham, spam = _class_totals(conn)
            header = {
                "format": FORMAT,
                "version": VERSION,
                "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "meta": meta,
                "class_count": {LABELS[HAM]: ham, LABELS[SPAM]: spam},
            }
            yield json.dumps(header, sort_keys=True) + "\n"
            streaming = conn.execution_options(stream_results=True, yield_per=BATCH)
            tokens = 0
            for line in _token_lines(streaming):
                yield line
                tokens += 1
            entries = 0
            for line in _ledger_lines(streaming):
                yield line
                entries += 1
            yield json.dumps({"end": FORMAT, "tokens": tokens, "ledger": entries}) + "\n"
        self.summary = ExchangeSummary(tokens, entries, ham, spam, meta)


def _token_lines(conn: Connection) -> Iterator[str]:
    t = schema.token
    rows = conn.execute(select(t.c.hash, t.c.ham, t.c.spam, t.c.last_seen).order_by(t.c.hash))
    for h, ham, spam, seen in rows:
        # Formatted by hand: four integers need no escaping, and json.dumps per row would
        # dominate the time of a large export.
        yield f'{{"h": {h}, "ham": {ham}, "spam": {spam}, "seen": {seen}}}\n'


def _ledger_lines(conn: Connection) -> Iterator[str]:
    led = schema.ledger
    query = select(led.c.digest, led.c.label, led.c.trained_at, led.c.source)
    for digest, label, at, source in conn.execute(query.order_by(led.c.digest)):
        row = {"ledger": bytes(digest).hex(), "label": LABELS[label], "at": at, "source": source}
        yield json.dumps(row) + "\n"


def export_model(store: HasEngine, out: TextIO) -> ExportSummary:
    """Write the model in ``store`` to ``out`` as JSON Lines; memory use does not grow."""
    export = ModelExport(store)
    out.writelines(export)
    out.flush()
    assert export.summary is not None  # set when the iteration above ran to its end
    return export.summary


def _read_meta(conn: Connection) -> dict[str, str]:
    m = schema.meta
    rows = conn.execute(select(m.c.key, m.c.value).order_by(m.c.key))
    return {key: value for key, value in rows if key not in LOCAL_META}


def _class_totals(conn: Connection) -> list[int]:
    c = schema.class_total
    totals = {int(label): int(n) for label, n in conn.execute(select(c.c.label, c.c.messages))}
    return [int(totals.get(HAM, 0)), int(totals.get(SPAM, 0))]


# -- import --------------------------------------------------------------------------------


def import_model(store: HasEngine, lines: Iterable[str]) -> ImportSummary:
    """Load an export into ``store``, which must hold no model yet; all or nothing.

    Raises
    ------
    TargetNotEmpty
        The target has tokens, ledger entries or trained messages.
    BadExportFile
        The input is not a complete, well-formed export (the target is left untouched).
    """
    numbered = enumerate(lines, start=1)
    header = _read_header(numbered)
    try:
        with store.transaction() as conn:
            _check_empty(conn)
            tokens, entries = _load_rows(conn, numbered)
            _write_header(conn, header)
    except StoreError as exc:
        if isinstance(exc.__cause__, sa_exc.IntegrityError):
            reason = f"a token hash or ledger digest appears twice ({exc.__cause__.orig})"
            raise BadExportFile(0, reason) from exc
        raise
    classes = header["class_count"]
    return ExchangeSummary(tokens, entries, classes["ham"], classes["spam"], header["meta"])


def _read_header(numbered: Iterator[tuple[int, str]]) -> dict[str, Any]:
    for number, text in numbered:
        if not text.strip():
            continue
        header = _parse(number, text)
        if header.get("format") != FORMAT:
            raise BadExportFile(number, f'not a {FORMAT} export (no "format": "{FORMAT}" header)')
        if header.get("version") != VERSION:
            raise BadExportFile(
                number, f"format version {header.get('version')!r}; this mailweir reads {VERSION}"
            )
        meta = header.get("meta")
        classes = header.get("class_count")
        if not isinstance(meta, dict) or not all(isinstance(v, str) for v in meta.values()):
            raise BadExportFile(number, '"meta" must be an object of strings')
        if not isinstance(classes, dict) or set(classes) != set(LABELS):
            raise BadExportFile(number, '"class_count" must be {"ham": n, "spam": n}')
        for label in LABELS:
            _count(number, classes, label)
        return header
    raise BadExportFile(0, "the input is empty")


def _check_empty(conn: Connection) -> None:
    has_token = conn.execute(select(schema.token.c.hash).limit(1)).first() is not None
    has_ledger = conn.execute(select(schema.ledger.c.digest).limit(1)).first() is not None
    classes = _class_totals(conn)
    if has_token or has_ledger or any(classes):
        raise TargetNotEmpty(
            f"the target database already holds a model ({classes[HAM]} ham and "
            f"{classes[SPAM]} spam messages trained); import only into an empty one"
        )


def _load_rows(conn: Connection, numbered: Iterator[tuple[int, str]]) -> tuple[int, int]:
    """Insert token and ledger lines in batches up to the trailer; return the two counts."""
    pending: dict[Table, list[tuple[Any, ...]]] = {schema.token: [], schema.ledger: []}
    tokens = entries = 0
    for number, text in numbered:
        if not text.strip():
            continue
        row = _parse(number, text)
        if "h" in row:
            table = schema.token
            pending[table].append(_token_row(number, row))
            tokens += 1
        elif "end" in row:  # before "ledger": the trailer has a "ledger" count too
            _check_trailer(number, row, tokens, entries)
            _check_nothing_after(numbered)
            for table, rows in pending.items():
                _flush(conn, table, rows)
            return tokens, entries
        elif "ledger" in row:
            table = schema.ledger
            pending[table].append(_ledger_row(number, row))
            entries += 1
        else:
            raise BadExportFile(number, 'expected a token ("h"), ledger ("ledger") or "end" line')
        if len(pending[table]) >= BATCH:
            _flush(conn, table, pending[table])
    raise BadExportFile(
        0,
        f"the input ends without its trailer line after {tokens} tokens and {entries} ledger "
        "entries: the file is truncated",
    )


# Column order of the row tuples built by _token_row and _ledger_row.
COLUMNS = {
    schema.token: ("hash", "ham", "spam", "last_seen"),
    schema.ledger: ("digest", "label", "trained_at", "source"),
}


def _flush(conn: Connection, table: Table, rows: list[tuple[Any, ...]]) -> None:
    """Write one batch (``bulk.insert_rows``) and empty it."""
    insert_rows(conn, table, COLUMNS[table], rows)
    rows.clear()


def _check_trailer(number: int, row: dict[str, Any], tokens: int, entries: int) -> None:
    if row.get("end") != FORMAT:
        raise BadExportFile(number, f'the trailer must be {{"end": "{FORMAT}", ...}}')
    want = (_count(number, row, "tokens"), _count(number, row, "ledger"))
    if want != (tokens, entries):
        raise BadExportFile(
            number,
            f"the trailer counts {want[0]} tokens and {want[1]} ledger entries but the file "
            f"holds {tokens} and {entries}: lines are missing",
        )


def _check_nothing_after(numbered: Iterator[tuple[int, str]]) -> None:
    for number, text in numbered:
        if text.strip():
            raise BadExportFile(number, "text after the trailer line")


def _write_header(conn: Connection, header: dict[str, Any]) -> None:
    m = schema.meta
    for key, value in header["meta"].items():
        if key in LOCAL_META:
            continue
        conn.execute(m.delete().where(m.c.key == key))
        conn.execute(insert(m).values(key=key, value=value))
    c = schema.class_total
    for label in (HAM, SPAM):
        # The revision bump tells other daemons sharing the database that counts changed.
        conn.execute(
            update(c)
            .where(c.c.label == label)
            .values(messages=header["class_count"][LABELS[label]], revision=c.c.revision + 1)
        )


# -- one line at a time ------------------------------------------------------------------


def _parse(number: int, text: str) -> dict[str, Any]:
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise BadExportFile(number, f"not JSON ({exc.msg}); the file may be cut off") from exc
    if not isinstance(value, dict):
        raise BadExportFile(number, "expected a JSON object")
    return value


def _count(number: int, row: dict[str, Any], key: str) -> int:
    value = row.get(key)
    if not isinstance(value, int) or isinstance(value, bool) or value < 0:
        raise BadExportFile(number, f'"{key}" must be a whole number >= 0, got {value!r}')
    return value


def _token_row(number: int, row: dict[str, Any]) -> tuple[int, int, int, int]:
    # .get with a default keeps the values typed Any (not Any | None) for the fast path
    h, ham, spam, seen = row["h"], row.get("ham", -1), row.get("spam", -1), row.get("seen", -1)
    # Fast path for the tens of millions of well-formed lines; the checks below only run
    # to name what is wrong.
    well_typed = type(h) is type(ham) is type(spam) is type(seen) is int
    if well_typed and ham >= 0 and spam >= 0 and seen >= 0 and _INT64[0] <= h <= _INT64[1]:
        return (h, ham, spam, seen)
    if not isinstance(h, int) or isinstance(h, bool) or not _INT64[0] <= h <= _INT64[1]:
        raise BadExportFile(number, f'"h" must be a signed 64-bit integer, got {h!r}')
    return (h, _count(number, row, "ham"), _count(number, row, "spam"), _count(number, row, "seen"))


def _ledger_row(number: int, row: dict[str, Any]) -> tuple[bytes, int, float, str]:
    try:
        digest = bytes.fromhex(row["ledger"])
    except (TypeError, ValueError):
        digest = b""
    if len(digest) != 16:
        raise BadExportFile(number, f'"ledger" must be 32 hex digits, got {row["ledger"]!r}')
    label, at, source = row.get("label"), row.get("at"), row.get("source")
    if label not in LABELS:
        raise BadExportFile(number, f'"label" must be "ham" or "spam", got {label!r}')
    if not isinstance(at, int | float) or isinstance(at, bool):
        raise BadExportFile(number, f'"at" must be a Unix time, got {at!r}')
    if not isinstance(source, str) or len(source) > 64:
        raise BadExportFile(
            number, f'"source" must be a string of at most 64 characters: {source!r}'
        )
    return (digest, LABELS.index(label), float(at), source)
