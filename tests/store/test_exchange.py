"""Model export and import (JSON Lines): round trips, damaged files, non-empty targets, and the
move from SQLite to PostgreSQL.

Oracles: the source database itself (every table row must come back unchanged) and RFC 8259 /
the JSON Lines convention (every line is one JSON object; read back with the standard ``json``
module, not with our parser).
"""

from __future__ import annotations

import argparse
import io
import json
import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from postgres_helpers import POSTGRES_ENV
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from mailweir.daemon import exchange_commands
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import tokenize
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, TrainResult
from mailweir.store.exchange import (
    FORMAT,
    BadExportFile,
    TargetNotEmpty,
    export_model,
    import_model,
)

HAM_MESSAGES = [
    (
        "From: Tobias Lindqvist <tobias@harbourlane.example>\r\n"
        "To: Priya Raman <priya@harbourlane.example>\r\n"
        "Subject: Rota for the Saturday surgery\r\n\r\n"
        "Priya, Dr. Okafor covers Saturday morning; please move the two dental checks.\r\n"
    ),
    (
        "From: orders@vetsupply.example\r\nTo: tobias@harbourlane.example\r\n"
        "Subject: Your order 4471 has shipped\r\n\r\n"
        "Two boxes of suture kits and the feline vaccine batch leave our depot today.\r\n"
    ),
    (
        "From: jo.hartley@mail.example\r\nTo: reception@harbourlane.example\r\n"
        "Subject: Biscuit's booster appointment\r\n\r\n"
        "Could we move Biscuit's booster to Thursday afternoon? Thank you, Jo\r\n"
    ),
]
SPAM_MESSAGES = [
    (
        "From: billing@invoice-desk.invalid\r\nTo: tobias@harbourlane.example\r\n"
        "Subject: OVERDUE INVOICE 99812 final notice\r\n\r\n"
        "Pay the attached invoice within 24 hours to avoid legal action. Wire transfer only.\r\n"
    ),
    (
        "From: parcel@delivery-notice.invalid\r\nTo: priya@harbourlane.example\r\n"
        "Subject: Your parcel is held, customs fee unpaid\r\n\r\n"
        "Click here to pay the 1.99 fee and release your parcel today.\r\n"
    ),
    (
        "From: winner@prize-centre.invalid\r\nTo: reception@harbourlane.example\r\n"
        "Subject: You have WON a prize\r\n\r\n"
        "Congratulations! Claim your prize now, send your bank details to claim.\r\n"
    ),
]


def _train(store: ModelStore) -> None:
    """Train through the store's API, with a correction and an untrain for a lived-in ledger."""
    items = []
    for label, messages in ((HAM, HAM_MESSAGES), (SPAM, SPAM_MESSAGES)):
        for raw in messages:
            hashes = tokenize(raw.encode())
            items.append((hashes, label, message_digest(hashes), "import"))
    store.train_many(items)
    # A ham message misfiled as spam, then corrected by feedback: the ledger moves it.
    hashes = tokenize(b"Subject: Lab results for Pepper\r\n\r\nBloods are normal.\r\n")
    digest = message_digest(hashes)
    store.train(hashes, SPAM, digest=digest, source="import")
    assert store.train(hashes, HAM, digest=digest, source="feedback") is TrainResult.MOVED
    gone = tokenize(b"Subject: test message\r\n\r\nplease ignore\r\n")
    store.train(gone, HAM, digest=message_digest(gone), source="import")
    assert store.untrain(gone, digest=message_digest(gone)) is TrainResult.UNTRAINED
    store.set_meta("method", "fisher")
    store.set_meta("tokenizer", '{"bigrams": false}')


def _tables(store: ModelStore) -> dict[str, list[tuple[object, ...]]]:
    """Full contents of every model table, except per-database bookkeeping."""
    queries = {
        "token": "SELECT hash, ham, spam, last_seen FROM weir_token ORDER BY hash",
        "ledger": "SELECT digest, label, trained_at, source FROM weir_ledger ORDER BY digest",
        "class_total": "SELECT label, messages FROM weir_class_total ORDER BY label",
        "meta": "SELECT key, value FROM weir_meta WHERE key <> 'created' ORDER BY key",
    }
    with store.engine.connect() as conn:
        return {
            name: [tuple(bytes(v) if isinstance(v, memoryview) else v for v in row) for row in rows]
            for name, sql in queries.items()
            for rows in [conn.execute(text(sql)).all()]
        }


def _same_vocabulary(a: ModelStore, b: ModelStore) -> bool:
    va, vb = a.vocabulary(), b.vocabulary()
    return (
        va.size == vb.size
        and va.token_total.tolist() == vb.token_total.tolist()
        and va.count_histogram.tolist() == vb.count_histogram.tolist()
    )


def _exported(store: ModelStore) -> str:
    out = io.StringIO()
    export_model(store, out)
    return out.getvalue()


@pytest.fixture
def trained(tmp_path: Path) -> Iterator[ModelStore]:
    store = ModelStore.open(str(tmp_path / "source.sqlite3"))
    _train(store)
    yield store
    store.close()


@pytest.fixture
def fresh(tmp_path: Path) -> Iterator[ModelStore]:
    store = ModelStore.open(str(tmp_path / "target.sqlite3"))
    yield store
    store.close()


def test_exchange_round_trip_keeps_every_table_row(trained: ModelStore, fresh: ModelStore) -> None:
    text_ = _exported(trained)
    summary = import_model(fresh, io.StringIO(text_))
    assert _tables(fresh) == _tables(trained)
    assert (summary.ham, summary.spam) == (4, 3)
    assert summary.tokens == len(_tables(trained)["token"])
    # A store opened afterwards sees the model through its own API too.
    reopened = ModelStore.open(str(fresh.engine.url.database))
    try:
        assert list(reopened.class_count()) == [4, 3]
        assert _same_vocabulary(reopened, trained)
    finally:
        reopened.close()


def test_exchange_export_is_json_lines_as_documented(trained: ModelStore) -> None:
    lines = _exported(trained).splitlines()
    objects = [json.loads(line) for line in lines]  # the standard parser, line by line
    header, body, trailer = objects[0], objects[1:-1], objects[-1]
    assert header["format"] == FORMAT and header["version"] == 1
    assert header["class_count"] == {"ham": 4, "spam": 3}
    assert header["meta"] == {"method": "fisher", "tokenizer": '{"bigrams": false}'}
    tokens = [o for o in body if "h" in o]
    ledger = [o for o in body if "ledger" in o]
    assert len(tokens) + len(ledger) == len(body)
    assert trailer == {"end": FORMAT, "tokens": len(tokens), "ledger": len(ledger)}
    assert set(tokens[0]) == {"h", "ham", "spam", "seen"}
    assert all(-(2**63) <= o["h"] < 2**63 for o in tokens)
    assert set(ledger[0]) == {"ledger", "label", "at", "source"}
    assert {o["label"] for o in ledger} == {"ham", "spam"}
    assert {o["source"] for o in ledger} == {"import", "feedback"}
    assert all(len(bytes.fromhex(o["ledger"])) == 16 for o in ledger)


def test_exchange_export_of_empty_model_round_trips(fresh: ModelStore, tmp_path: Path) -> None:
    lines = _exported(fresh).splitlines()
    assert len(lines) == 2
    other = ModelStore.open(str(tmp_path / "other.sqlite3"))
    try:
        summary = import_model(other, lines)
        assert (summary.tokens, summary.ledger, summary.ham, summary.spam) == (0, 0, 0, 0)
    finally:
        other.close()


@pytest.mark.parametrize("cut", ["trailer", "half_line", "body_line"])
def test_exchange_truncated_file_is_refused(
    trained: ModelStore, fresh: ModelStore, cut: str
) -> None:
    lines = _exported(trained).splitlines(keepends=True)
    if cut == "trailer":
        damaged = lines[:-1]  # cut at a line boundary: only the trailer shows it
    elif cut == "half_line":
        damaged = [*lines[:-3], lines[-3][:12]]
    else:
        damaged = lines[:5] + lines[6:]  # a line lost in the middle
    before = _tables(fresh)
    with pytest.raises(BadExportFile, match=r"truncated|cut off|missing"):
        import_model(fresh, damaged)
    assert _tables(fresh) == before  # all or nothing: the target is still empty


def test_exchange_non_empty_target_is_refused(trained: ModelStore, tmp_path: Path) -> None:
    export = _exported(trained)
    target = ModelStore.open(str(tmp_path / "busy.sqlite3"))
    try:
        hashes = tokenize(HAM_MESSAGES[0].encode())
        target.train(hashes, HAM, digest=message_digest(hashes), source="import")
        before = _tables(target)
        with pytest.raises(TargetNotEmpty, match="already holds a model"):
            import_model(target, io.StringIO(export))
        assert _tables(target) == before
    finally:
        target.close()


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ('{"format": "something-else", "version": 1}', "not a mailweir-model export"),
        ('{"format": "mailweir-model", "version": 2}', "format version 2"),
        ("[1, 2, 3]", "expected a JSON object"),
    ],
)
def test_exchange_wrong_header_is_refused(fresh: ModelStore, line: str, message: str) -> None:
    with pytest.raises(BadExportFile, match=message):
        import_model(fresh, [line])


def test_exchange_duplicate_token_is_refused(trained: ModelStore, fresh: ModelStore) -> None:
    lines = _exported(trained).splitlines(keepends=True)
    lines.insert(2, lines[1])
    count = json.loads(lines[-1])
    count["tokens"] += 1
    lines[-1] = json.dumps(count)
    with pytest.raises(BadExportFile, match="appears twice"):
        import_model(fresh, lines)
    assert _tables(fresh)["token"] == []


def test_exchange_bad_token_line_names_its_line(trained: ModelStore, fresh: ModelStore) -> None:
    lines = _exported(trained).splitlines()
    lines[3] = json.dumps({"h": 2**63, "ham": 1, "spam": 0, "seen": 1})
    with pytest.raises(BadExportFile, match=r"line 4: .*signed 64-bit"):
        import_model(fresh, lines)


# -- the commands ---------------------------------------------------------------------------


def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="mailweir")
    exchange_commands.add_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return int(args.handler(args))


def test_exchange_commands_export_then_import(
    trained: ModelStore, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    source = str(trained.engine.url.database)
    out = tmp_path / "model.jsonl"
    assert _run(["export", "--db", source, "--out", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["command"], report["ham"], report["spam"]) == ("export", 4, 3)
    target = tmp_path / "restored.sqlite3"
    assert _run(["import", str(out), "--db", str(target)]) == 0
    assert "trained messages: 4 ham, 3 spam" in capsys.readouterr().out
    restored = ModelStore.open(str(target))
    try:
        assert _tables(restored) == _tables(trained)
    finally:
        restored.close()
    assert _run(["import", str(out), "--db", str(target)]) == 2
    assert "already holds a model" in capsys.readouterr().err


def test_exchange_commands_move_between_sqlite_files(
    trained: ModelStore, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    source = str(trained.engine.url.database)
    target = str(tmp_path / "moved.sqlite3")
    assert _run(["move", "--from", source, "--to", target, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["identical"] is True
    assert report["source"] == report["target"]
    assert report["source"]["ham_messages"] == 4


def test_exchange_commands_missing_source_fails_cleanly(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = str(tmp_path / "nothing.sqlite3")
    assert _run(["export", "--db", missing, "--out", str(tmp_path / "x.jsonl")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "x.jsonl").exists()


# -- SQLite to PostgreSQL -------------------------------------------------------------------


@pytest.fixture
def private_postgres_url() -> Iterator[str]:
    """A database of our own on the test server, so concurrent tests never share tables."""
    base = os.environ.get(POSTGRES_ENV)
    if not base:
        pytest.skip(f"{POSTGRES_ENV} is not set")
    name = f"mailweir_exchange_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        yield make_url(base).set(database=name).render_as_string(hide_password=False)
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE "{name}" WITH (FORCE)'))
    finally:
        admin.dispose()


@pytest.mark.postgres
def test_exchange_move_sqlite_to_postgres(
    trained: ModelStore, private_postgres_url: str, capsys: pytest.CaptureFixture[str]
) -> None:
    source = str(trained.engine.url.database)
    assert _run(["move", "--from", source, "--to", private_postgres_url]) == 0
    assert "the copy matches the source" in capsys.readouterr().out
    moved = ModelStore.open(private_postgres_url)
    try:
        assert _tables(moved) == _tables(trained)
        assert list(moved.class_count()) == [4, 3]
        # And back again: PostgreSQL -> SQLite through a file gives the same rows.
        back = io.StringIO(_exported(moved))
    finally:
        moved.close()
    assert json.loads(back.getvalue().splitlines()[-1])["end"] == FORMAT


def test_exchange_commands_pipe_through_standard_streams(
    trained: ModelStore,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # `mailweir export | mailweir import -`: the data on stdout, the summary on stderr.
    assert _run(["export", "--db", str(trained.engine.url.database)]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out.splitlines()[0])["format"] == FORMAT
    assert "tokens:" in captured.err
    monkeypatch.setattr("sys.stdin", io.StringIO(captured.out))
    target = tmp_path / "piped.sqlite3"
    assert _run(["import", "-", "--db", str(target), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["spam"] == 3
    piped = ModelStore.open(str(target))
    try:
        assert _tables(piped) == _tables(trained)
    finally:
        piped.close()
