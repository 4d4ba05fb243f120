"""Where messages for training and replays come from: mbox, Maildir, .eml folders, tarballs, stdin.

Every reader yields ``(name, raw bytes)`` and never decodes the message: the tokenizer reads bytes.
A source that cannot be read raises ``SourceError`` naming the path and the reason.
"""

from __future__ import annotations

import csv
import io
import mailbox
import sys
import tarfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from mailweir.model.types import HAM, SPAM

MESSAGE_SUFFIXES = (".eml", ".msg", ".txt", "")


class SourceError(Exception):
    """A message source that cannot be read at all (a single bad message is skipped, not this)."""


@dataclass(frozen=True)
class LabelledMessage:
    name: str
    label: int
    raw: bytes


def read_messages(target: str) -> Iterator[tuple[str, bytes]]:
    """Yield every message at ``target``: ``-`` (stdin), a file, an mbox, a Maildir or a folder."""
    if target == "-":
        yield "<stdin>", sys.stdin.buffer.read()
        return
    path = Path(target)
    if not path.exists():
        raise SourceError(f"{target}: no such file or folder")
    if path.is_dir():
        yield from _read_folder(path)
    elif _looks_like_mbox(path):
        yield from _read_mbox(path)
    else:
        yield str(path), path.read_bytes()


def _looks_like_mbox(path: Path) -> bool:
    with path.open("rb") as fh:
        return fh.read(5) == b"From "


def _is_maildir(path: Path) -> bool:
    return all((path / sub).is_dir() for sub in ("cur", "new"))


def _read_mbox(path: Path) -> Iterator[tuple[str, bytes]]:
    box = mailbox.mbox(path, factory=None, create=False)
    try:
        for number, key in enumerate(box.keys(), 1):
            yield f"{path}#{number}", box.get_bytes(key)
    finally:
        box.close()


def _read_maildir(path: Path) -> Iterator[tuple[str, bytes]]:
    box = mailbox.Maildir(path, factory=None, create=False)
    for key in sorted(box.keys()):
        yield f"{path}/{key}", box.get_bytes(key)


def _read_folder(path: Path) -> Iterator[tuple[str, bytes]]:
    if _is_maildir(path):
        yield from _read_maildir(path)
        return
    for child in sorted(path.iterdir()):
        if child.name.startswith("."):
            continue
        if child.is_dir():
            yield from _read_folder(child)
        elif _looks_like_mbox(child):
            yield from _read_mbox(child)
        else:
            yield str(child), child.read_bytes()


# -- labelled corpora for replays ------------------------------------------------------------

_LABEL_FOLDERS = {"ham": HAM, "spam": SPAM}


def read_corpus(target: str) -> list[LabelledMessage]:
    """A labelled corpus in replay order: a folder or a .tar.gz holding ham/ and spam/.

    The order is that of ``index.tsv`` (column ``file``) when the corpus has one, else file-name
    order with ham and spam merged by name.  A tarball is read as it is, without unpacking.
    """
    path = Path(target)
    if not path.exists():
        raise SourceError(f"{target}: no such corpus")
    files, index = _corpus_tar(path) if path.is_file() else _corpus_folder(path)
    if not files:
        raise SourceError(f"{target}: no messages under ham/ or spam/")
    order = _index_order(index, files) if index is not None else sorted(files)
    return [LabelledMessage(name, files[name][0], files[name][1]) for name in order]


def _label_of(relative: str) -> int | None:
    parts = relative.split("/")
    return _LABEL_FOLDERS.get(parts[-2]) if len(parts) >= 2 else None


def _corpus_folder(path: Path) -> tuple[dict[str, tuple[int, bytes]], str | None]:
    files: dict[str, tuple[int, bytes]] = {}
    for folder, label in _LABEL_FOLDERS.items():
        base = path / folder
        if base.is_dir():
            for child in sorted(base.iterdir()):
                if child.is_file() and not child.name.startswith("."):
                    files[f"{folder}/{child.name}"] = (label, child.read_bytes())
    index = path / "index.tsv"
    return files, index.read_text("utf-8") if index.is_file() else None


def _corpus_tar(path: Path) -> tuple[dict[str, tuple[int, bytes]], str | None]:
    files: dict[str, tuple[int, bytes]] = {}
    index: str | None = None
    try:
        with tarfile.open(path, "r:*") as tar:
            for member in tar:
                if not member.isfile():
                    continue
                relative = member.name.split("/", 1)[-1] if "/" in member.name else member.name
                handle = tar.extractfile(member)
                if handle is None:
                    continue
                data = handle.read()
                if relative == "index.tsv":
                    index = data.decode("utf-8")
                elif (label := _label_of(relative)) is not None:
                    files["/".join(relative.split("/")[-2:])] = (label, data)
    except (tarfile.TarError, OSError, EOFError) as exc:
        raise SourceError(f"{path}: cannot read the archive: {exc}") from exc
    return files, index


def _index_order(index: str, files: dict[str, tuple[int, bytes]]) -> list[str]:
    rows = csv.DictReader(io.StringIO(index), delimiter="\t")
    if rows.fieldnames is None or "file" not in rows.fieldnames:
        raise SourceError("index.tsv has no 'file' column")
    order = [row["file"] for row in rows if row.get("file") in files]
    listed = set(order)
    return order + sorted(name for name in files if name not in listed)
