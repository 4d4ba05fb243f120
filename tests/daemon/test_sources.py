"""Message sources: every container a mail admin keeps mail in, read as raw bytes."""

from __future__ import annotations

import io
import mailbox
import tarfile
from pathlib import Path

import pytest

from mailweir.daemon.sources import SourceError, read_corpus, read_messages
from mailweir.model.types import HAM, SPAM

NOTE = (
    b"From: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"To: Tobias Lindqvist <tobias.lindqvist@harbourlane.example>\r\n"
    b"Subject: Rota for Friday\r\n\r\n"
    b"Can you cover reception on Friday?\r\nFrom the desk, Priya\r\n"
)


def _note(n: int) -> bytes:
    return NOTE.replace(b"Friday", f"day {n}".encode())


def test_read_messages_single_file(tmp_path: Path) -> None:
    path = tmp_path / "one.eml"
    path.write_bytes(NOTE)
    assert list(read_messages(str(path))) == [(str(path), NOTE)]


def test_read_messages_mbox_splits_and_keeps_bodies(tmp_path: Path) -> None:
    path = tmp_path / "sorted.mbox"
    box = mailbox.mbox(path)
    for n in range(3):
        box.add(_note(n))
    box.close()
    found = [raw for _name, raw in read_messages(str(path))]
    assert len(found) == 3
    # mbox quotes a body line starting "From " (RFC 4155); the subject survives as written.
    assert all(b"Subject: Rota for day" in raw for raw in found)


def test_read_messages_maildir(tmp_path: Path) -> None:
    box = mailbox.Maildir(tmp_path / "Maildir")
    for n in range(4):
        box.add(_note(n))
    found = list(read_messages(str(tmp_path / "Maildir")))
    assert sorted(raw for _n, raw in found) == sorted(_note(n) for n in range(4))


def test_read_messages_folder_recurses_and_skips_hidden(tmp_path: Path) -> None:
    (tmp_path / "a").mkdir()
    (tmp_path / "a" / "1.eml").write_bytes(_note(1))
    (tmp_path / "2.eml").write_bytes(_note(2))
    (tmp_path / ".hidden").write_bytes(b"not mail")
    assert len(list(read_messages(str(tmp_path)))) == 2


def test_read_messages_missing_path_names_it(tmp_path: Path) -> None:
    with pytest.raises(SourceError, match="nowhere"):
        list(read_messages(str(tmp_path / "nowhere")))


def _corpus_folder(root: Path, index: bool) -> None:
    for label in ("ham", "spam"):
        (root / label).mkdir(parents=True)
    (root / "ham" / "b.eml").write_bytes(_note(1))
    (root / "spam" / "a.eml").write_bytes(_note(2))
    (root / "ham" / "c.eml").write_bytes(_note(3))
    if index:
        (root / "index.tsv").write_text(
            "seq\tlabel\tfile\n1\tham\tham/c.eml\n2\tspam\tspam/a.eml\n3\tham\tham/b.eml\n"
        )


def test_read_corpus_follows_index_order(tmp_path: Path) -> None:
    _corpus_folder(tmp_path, index=True)
    corpus = read_corpus(str(tmp_path))
    assert [m.name for m in corpus] == ["ham/c.eml", "spam/a.eml", "ham/b.eml"]
    assert [m.label for m in corpus] == [HAM, SPAM, HAM]


def test_read_corpus_without_index_uses_name_order(tmp_path: Path) -> None:
    _corpus_folder(tmp_path, index=False)
    assert [m.name for m in read_corpus(str(tmp_path))] == ["ham/b.eml", "ham/c.eml", "spam/a.eml"]


def test_read_corpus_tarball_read_in_place(tmp_path: Path) -> None:
    _corpus_folder(tmp_path / "src" / "mini", index=True)
    archive = tmp_path / "mini.tar.gz"
    with tarfile.open(archive, "w:gz") as tar:
        tar.add(tmp_path / "src" / "mini", arcname="mini")
    corpus = read_corpus(str(archive))
    assert [m.name for m in corpus] == ["ham/c.eml", "spam/a.eml", "ham/b.eml"]
    assert corpus[1].raw == _note(2)


def test_read_corpus_broken_tarball_is_a_clear_error(tmp_path: Path) -> None:
    archive = tmp_path / "broken.tar.gz"
    archive.write_bytes(b"\x1f\x8b" + io.BytesIO(b"not really gzip").read())
    with pytest.raises(SourceError, match="cannot read"):
        read_corpus(str(archive))
