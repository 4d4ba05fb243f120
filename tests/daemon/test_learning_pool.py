"""Bulk training with tokenizing processes (daemon/learning.py ``tokenized_batches``).

The oracle is the same training in one process: the pool only moves tokenizing elsewhere,
so the margin decisions, the counts and the ledger must come out identical.
"""

from __future__ import annotations

import concurrent.futures
import sqlite3
from collections import Counter
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from mailweir.daemon import learning, margin
from mailweir.daemon.learning import Progress, open_model, train_from
from mailweir.model.tokenize import DEFAULT_OPTIONS, tokenize
from mailweir.model.types import HAM, SPAM

HAM_LINES = [
    "Dr. Maren Okafor needs the kennel cough vaccine order confirmed before the Tuesday clinic",
    "Tobias Lindqvist put the weekend surgery rota on the staff board, please check your shifts",
    "Priya Raman booked a dental check for the rabbit Clover at half past ten on Monday",
    "Blood test results for Biscuit are normal; reception will call the owner this afternoon",
    "The vetsupply.example delivery of gloves, sutures and syringes arrives on Friday morning",
]
SPAM_LINES = [
    "Claim your free casino bonus credits today, no deposit needed, winners every hour",
    "Your parcel is held at customs, pay the release fee now at our secure payment link",
    "Guaranteed crypto returns of forty percent a month, limited places, act immediately",
    "Your mailbox password expires today, verify your account now or lose every message",
]


def message(line: str, n: int, sender: str) -> bytes:
    tag = "case" + "".join("klmnopqrst"[int(d)] for d in f"{n:04d}")  # a word of its own
    return (
        f"From: {sender}\r\nTo: office@harbourlane.example\r\nSubject: Note {n}\r\n"
        "Content-Type: text/plain; charset=utf-8\r\n\r\n"
        f"{line}.\r\nCase {tag}, kept for the record.\r\n"
    ).encode()


def write(folder: Path, lines: list[str], count: int, sender: str) -> str:
    folder.mkdir(parents=True)
    for n in range(count):
        (folder / f"{n:04d}.eml").write_bytes(message(lines[n % len(lines)], n, sender))
    return str(folder)


def quiet() -> Progress:
    return Progress("trained", enabled=False)


def train_all(target: str, folders: list[tuple[int, str]], workers: int) -> list[Counter[str]]:
    model = open_model(target)
    try:
        return [
            train_from(model, [folder], label, source="t", progress=quiet(), workers=workers)
            for label, folder in folders
        ]
    finally:
        model.close()


def table_rows(target: str) -> dict[str, list[tuple[Any, ...]]]:
    with sqlite3.connect(target) as db:
        return {
            "tokens": db.execute("SELECT hash, ham, spam FROM weir_token ORDER BY hash").fetchall(),
            "ledger": db.execute(
                "SELECT digest, label, source FROM weir_ledger ORDER BY digest"
            ).fetchall(),
            "totals": db.execute("SELECT * FROM weir_class_total").fetchall(),
        }


@pytest.fixture
def folders(tmp_path: Path) -> list[tuple[int, str]]:
    return [
        (HAM, write(tmp_path / "ham", HAM_LINES, 23, "priya@harbourlane.example")),
        (SPAM, write(tmp_path / "spam", SPAM_LINES, 17, "offers@prizes.example")),
        (HAM, write(tmp_path / "ham2", HAM_LINES[::-1], 11, "maren@harbourlane.example")),
    ]


@pytest.mark.slow
def test_train_from_with_workers_equals_one_process(
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
    folders: list[tuple[int, str]],
) -> None:
    monkeypatch.setattr(learning, "BATCH", 5)  # several chunks in flight per call
    monkeypatch.setattr(margin, "MARGIN_WARMUP", 0)  # the margin decides from the start
    serial = train_all(str(tmp_path / "serial.sqlite3"), folders, workers=1)
    pooled = train_all(str(tmp_path / "pooled.sqlite3"), folders, workers=2)
    assert not caplog.records  # the pool did the tokenizing, it did not fall back
    assert pooled == serial
    assert sum(s["trained"] for s in serial) > 0 and sum(s["confident"] for s in serial) > 0
    assert table_rows(str(tmp_path / "pooled.sqlite3")) == table_rows(
        str(tmp_path / "serial.sqlite3")
    )


class _BreaksOnSecondMap:
    """A stand-in pool whose second ``map`` fails as a pool with a killed worker does."""

    def __init__(self, *args: object, **kwargs: object) -> None:
        self.calls = 0

    def __enter__(self) -> _BreaksOnSecondMap:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def map(self, fn: Callable[..., Any], *iterables: Any, chunksize: int = 1) -> Iterator[Any]:
        self.calls += 1
        if self.calls == 2:
            raise concurrent.futures.process.BrokenProcessPool("a worker died")
        return map(fn, *iterables)


def test_tokenized_batches_carry_on_in_this_process_when_the_pool_breaks(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(learning, "BATCH", 2)
    monkeypatch.setattr(concurrent.futures, "ProcessPoolExecutor", _BreaksOnSecondMap)
    chunks = [
        [message(line, n, "priya@harbourlane.example") for n, line in enumerate(HAM_LINES[:2])],
        [message(line, n, "offers@prizes.example") for n, line in enumerate(SPAM_LINES[:2])],
        [message(HAM_LINES[4], 9, "maren@harbourlane.example")],
    ]
    got = list(learning.tokenized_batches(iter(chunks), DEFAULT_OPTIONS, workers=2))
    assert [chunk for chunk, _ in got] == chunks  # every chunk once, in order
    for chunk, hashed in got:
        assert [h.tolist() for h in hashed] == [tokenize(raw).tolist() for raw in chunk]


def test_tokenized_batches_small_import_starts_no_pool(monkeypatch: pytest.MonkeyPatch) -> None:
    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("a pool was started for a short import")

    monkeypatch.setattr(concurrent.futures, "ProcessPoolExecutor", refuse)
    chunk = [message(HAM_LINES[0], 1, "priya@harbourlane.example")]
    got = list(learning.tokenized_batches(iter([chunk]), DEFAULT_OPTIONS, workers=4))
    assert got[0][1][0].tolist() == tokenize(chunk[0]).tolist()
