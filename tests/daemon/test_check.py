"""`mailweir check`: configuration problems (exit 2), database health (exit 1), all well (0)."""

from __future__ import annotations

import asyncio
import json
import os
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from postgres_helpers import POSTGRES_ENV, empty_postgres_database
from smtp_helpers import NextHop, free_port

from mailweir.daemon import cli
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, VerdictRecord


def check(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, dict]:
    status = cli.main(["check", "--json", *args])
    return status, json.loads(capsys.readouterr().out)


def model(path: Path) -> Path:
    store = ModelStore.open(str(path))
    store.set_meta("tokenizer", '{"bigrams": false}')
    store.set_meta("method", "fisher")
    store.train(np.arange(1, 200, dtype=np.int64), HAM, digest=b"h" * 16, source="test")
    store.train(np.arange(150, 400, dtype=np.int64), SPAM, digest=b"s" * 16, source="test")
    store.record_verdicts([VerdictRecord("v1", 1_796_000_000.0, 1, 900, 0.2, "ham", "pass", None)])
    store.close()
    return path


def test_check_good_config_and_database(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    database = model(tmp_path / "model.sqlite3")
    config = tmp_path / "mailweir.toml"
    config.write_text(f'[model]\ndatabase = "{database}"\n\n[upkeep]\ntidy_every_hours = 0\n')
    before = database.read_bytes()
    status, report = check(capsys, "--config", str(config))
    assert status == 0, report
    db = report["database"]
    assert (db["backend"], db["integrity"], db["problems"], db["pending"]) == (
        "sqlite",
        "ok",
        [],
        [],
    )
    assert (db["tokens"], db["ham_messages"], db["spam_messages"]) == (399, 1, 1)
    assert (db["verdict_rows"], db["oldest_verdict"], db["method"]) == (
        1,
        1_796_000_000.0,
        "fisher",
    )
    assert database.read_bytes() == before  # opened read-only: not a byte changed
    assert cli.main(["check", "--db", str(database)]) == 0
    assert "integrity (quick_check): ok" in capsys.readouterr().out


def test_check_lists_every_configuration_problem(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = tmp_path / "mailweir.toml"
    config.write_text(
        '[policy]\nspam_threshold = 1.5\nmode = "loud"\n\n'
        "[upkeep]\nverdict_keep_days = 0\nprune_evry_hours = 3\n"
    )
    status, report = check(capsys, "--config", str(config))
    assert status == 2
    keys = sorted(p["key"] for p in report["config_problems"])
    assert keys == [
        "policy.mode",
        "policy.spam_threshold",
        "upkeep.prune_evry_hours",
        "upkeep.verdict_keep_days",
    ]
    assert all(str(config) in p["reason"] for p in report["config_problems"])
    assert cli.main(["check", "--config", str(config)]) == 2
    assert "  upkeep.verdict_keep_days: got 0" in capsys.readouterr().out


def test_check_unreadable_config_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "mailweir.toml"
    config.write_text("[policy\n")
    status, report = check(capsys, "--config", str(config))
    assert status == 2 and report["config_problems"][0]["key"] == "--config"


def test_check_damaged_sqlite_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    database = model(tmp_path / "model.sqlite3")
    raw = bytearray(database.read_bytes())
    page = int.from_bytes(raw[16:18], "big")  # page size, file header offset 16 (sqlite.org)
    assert len(raw) >= 4 * page
    raw[2 * page : 4 * page] = b"\xa5" * (2 * page)  # two b-tree pages overwritten
    database.write_bytes(bytes(raw))
    status, report = check(capsys, "--db", str(database))
    assert status == 1
    assert report["database"]["problems"] and report["database"]["integrity"] != "ok"


def test_check_not_a_database_and_missing_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    junk = tmp_path / "junk.sqlite3"
    junk.write_bytes(b"Harbour Lane rota, not a database\n" * 200)
    status, report = check(capsys, "--db", str(junk))
    assert status == 1 and "not a SQLite database" in report["database"]["problems"][0]
    missing = tmp_path / "absent.sqlite3"
    status, report = check(capsys, "--db", str(missing))
    assert status == 1 and "does not exist" in report["database"]["problems"][0]
    assert not missing.exists()  # a check never creates a database


def test_check_sqlite_file_of_another_program(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    other = tmp_path / "rota.sqlite3"
    with sqlite3.connect(other) as conn:
        conn.execute("CREATE TABLE shifts (day TEXT, vet TEXT)")
    status, report = check(capsys, "--db", str(other))
    assert status == 1 and "no mailweir schema" in report["database"]["problems"][0]


async def test_check_connect_greets_the_next_hop(
    tmp_path: Path, next_hop: NextHop, capsys: pytest.CaptureFixture[str]
) -> None:
    database = model(tmp_path / "model.sqlite3")
    config = tmp_path / "mailweir.toml"
    listen = f"127.0.0.1:{free_port()}"
    config.write_text(
        f'[smtp]\nlisten = "{listen}"\n[http]\nlisten = "127.0.0.1:{free_port()}"\n'
        f'[next_hop]\naddress = "{next_hop.address}"\n[model]\ndatabase = "{database}"\n'
    )
    args = ["check", "--json", "--connect", "--config", str(config)]
    status = await asyncio.to_thread(cli.main, args)
    report = json.loads(capsys.readouterr().out)
    assert status == 0, report
    hop = report["connect"][0]
    assert hop["ok"] and hop["detail"].startswith("220 mx.harbourlane.example")
    assert "no XFORWARD offered to us" in hop["detail"]
    next_hop.behaviour.offer_xforward = "NAME ADDR PROTO HELO"
    await asyncio.to_thread(cli.main, args)
    hop = json.loads(capsys.readouterr().out)["connect"][0]
    assert hop["ok"] and "offers XFORWARD" in hop["detail"], hop
    config.write_text(config.read_text().replace(str(next_hop.address), f"127.0.0.1:{free_port()}"))
    status = await asyncio.to_thread(cli.main, args)
    report = json.loads(capsys.readouterr().out)
    assert status == 1 and not report["connect"][0]["ok"]


@pytest.mark.postgres
@pytest.mark.skipif(not os.environ.get(POSTGRES_ENV), reason=f"{POSTGRES_ENV} is not set")
def test_check_postgresql(capsys: pytest.CaptureFixture[str]) -> None:
    url = empty_postgres_database()  # another test's rows would be another model's
    ModelStore.open(url).close()
    status, report = check(capsys, "--db", url)
    assert status == 0, report
    assert report["database"]["backend"] == "postgresql"
    assert report["database"]["integrity"] == ""  # quick_check is SQLite's
