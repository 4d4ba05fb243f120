"""The command line, run in-process through ``main()`` on models in tmp_path."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from mailweir.daemon import cli, learning, scenario
from mailweir.daemon.learning import ModelMismatch, open_model
from mailweir.model.tokenize import TokenizerOptions


def _write(folder: Path, messages: list[scenario.ScenarioMessage]) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for n, message in enumerate(messages):
        (folder / f"{n:04d}.eml").write_bytes(message.raw)
    return folder


@pytest.fixture
def sorted_mail(tmp_path: Path) -> tuple[Path, Path]:
    ham = _write(tmp_path / "ham", scenario.generate(60, "ham", 7))
    spam = _write(tmp_path / "spam", scenario.generate(60, "spam", 7))
    return ham, spam


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> dict[str, object]:
    assert cli.main([*argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def _train_both(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> str:
    """A model in ``tmp_path`` trained on the ham folder, then the spam one; its path."""
    db = str(tmp_path / "model.sqlite3")
    ham, spam = sorted_mail
    _run(capsys, "train", "--ham", str(ham), "--db", db)
    _run(capsys, "train", "--spam", str(spam), "--db", db)
    return db


def test_train_reports_trained_then_already_known(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = str(tmp_path / "model.sqlite3")
    ham, _spam = sorted_mail
    first = _run(capsys, "train", "--ham", str(ham), "--db", db)
    again = _run(capsys, "train", "--ham", str(ham), "--db", db)
    assert first["messages"] == again["messages"] == 60
    assert first["trained"] == first["messages"] - first.get("already_known", 0)  # type: ignore[operator]
    assert again.get("trained", 0) == 0 and again["already_known"] == 60


def test_train_the_other_way_moves_messages(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = str(tmp_path / "model.sqlite3")
    ham, _spam = sorted_mail
    first = _run(capsys, "train", "--ham", str(ham), "--db", db)
    moved = _run(capsys, "train", "--spam", str(ham), "--db", db)
    assert moved["moved"] == first["trained"]
    stats = _run(capsys, "stats", "--db", db)
    assert stats["ham_messages"] == 0 and stats["spam_messages"] == first["trained"]


def test_untrain_restores_an_empty_model(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    ham, spam = sorted_mail
    db = _train_both(tmp_path, sorted_mail, capsys)
    _run(capsys, "untrain", str(ham), str(spam), "--db", db)
    stats = _run(capsys, "stats", "--db", db)
    assert (stats["tokens"], stats["ham_messages"], stats["spam_messages"]) == (0, 0, 0)


def test_stats_names_the_kinds_of_token_the_model_counts(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    ham, _spam = sorted_mail
    words, pairs = str(tmp_path / "words.sqlite3"), str(tmp_path / "pairs.sqlite3")
    _run(capsys, "train", "--ham", str(ham), "--db", words)
    _run(capsys, "train", "--ham", str(ham), "--db", pairs, "--bigrams")
    assert _run(capsys, "stats", "--db", words)["token_kinds"] == "words and header evidence"
    assert _run(capsys, "stats", "--db", pairs)["token_kinds"] == (
        "words, header evidence and adjacent word pairs"
    )
    older = TokenizerOptions(bigrams=True, bigram_window=5)  # a bigram model made before window 2
    assert learning.token_kinds(older) == (
        "words, header evidence and word pairs up to 3 words apart (window 5)"
    )


def test_score_explains_with_token_text(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = _train_both(tmp_path, sorted_mail, capsys)
    junk = tmp_path / "junk.eml"
    junk.write_bytes(scenario.generate(1, "spam", 99)[0].raw)
    report = _run(capsys, "score", str(junk), "--db", db)
    assert report["band"] == "spam"
    evidence = report["evidence"]
    assert isinstance(evidence, list) and evidence
    assert all(not str(e["token"]).startswith("#") for e in evidence)  # text, not bare hashes
    assert any(float(e["weight"]) > 0 for e in evidence)


def test_score_plain_output_names_band_and_cutoffs(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = _train_both(tmp_path, sorted_mail, capsys)
    note = tmp_path / "note.eml"
    note.write_bytes(scenario.generate(1, "ham", 99)[0].raw)
    assert cli.main(["score", str(note), "--db", db]) == 0
    out = capsys.readouterr().out
    assert ": ham (spam probability" in out and "cut-offs: suspect" in out


def test_model_keeps_its_tokenizer_settings(tmp_path: Path) -> None:
    db = str(tmp_path / "model.sqlite3")
    open_model(db, bigrams=True).close()
    reopened = open_model(db)
    try:
        assert reopened.options.bigrams is True
    finally:
        reopened.close()
    with pytest.raises(ModelMismatch, match="bigrams"):
        open_model(db, bigrams=False)


def test_cli_reports_a_model_mismatch_as_exit_2(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = str(tmp_path / "model.sqlite3")
    ham, _ = sorted_mail
    assert cli.main(["train", "--ham", str(ham), "--db", db, "--bigrams"]) == 0
    assert cli.main(["train", "--ham", str(ham), "--db", db, "--no-bigrams"]) == 2
    assert "bigrams" in capsys.readouterr().err


def test_prune_removes_rare_stale_tokens(
    tmp_path: Path, sorted_mail: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    db = str(tmp_path / "model.sqlite3")
    ham, _ = sorted_mail
    _run(capsys, "train", "--ham", str(ham), "--db", db)
    kept = _run(capsys, "prune", "--db", db)  # everything was seen today: nothing is stale
    assert kept["removed"] == 0
    gone = _run(capsys, "prune", "--db", db, "--unseen-days", "-1", "--max-count", "1")
    assert 0 < gone["removed"] < gone["tokens_before"]  # type: ignore[operator]


def _corpus(root: Path) -> Path:
    """80 ham and 80 spam, interleaved by an index.tsv as a replay order."""
    _write(root / "ham", scenario.generate(80, "ham", 3))
    _write(root / "spam", scenario.generate(80, "spam", 3))
    rows = [f"{label}/{n:04d}.eml" for n in range(80) for label in ("ham", "spam")]
    (root / "index.tsv").write_text("file\n" + "\n".join(rows) + "\n")
    return root


def test_replay_online_separates_the_scenario(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    corpus = _corpus(tmp_path / "corpus")
    scores, roc = tmp_path / "scores.tsv", tmp_path / "roc.svg"
    report = _run(
        capsys,
        "replay",
        str(corpus),
        "--method",
        "fisher",
        "--method",
        "multinomial",
        "--warmup",
        "40",
        "--scores",
        str(scores),
        "--roc",
        str(roc),
    )
    assert report["messages"] == 160
    methods = {m["method"]: m for m in report["methods"]}  # type: ignore[union-attr]
    assert set(methods) == {"fisher", "multinomial"}
    for figures in methods.values():
        assert figures["one_minus_auc_percent"] < 5.0  # the invented junk is easy to tell
    lines = scores.read_text().splitlines()
    assert lines[0] == "file\tlabel\tscore\tverdict" and len(lines) == 161
    assert roc.read_text().startswith("<svg")


def test_replay_split_scores_only_the_held_out_part(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    corpus = _corpus(tmp_path / "corpus")
    report = _run(capsys, "replay", str(corpus), "--protocol", "split", "--train-fraction", "0.75")
    assert report["messages"] == 160
    assert report["methods"][0]["messages"] == 40  # type: ignore[index]


def _word(n: int) -> str:
    """A distinct letters-only word per message (numbers are bucketed by the tokenizer)."""
    return "".join("abcdefghij"[int(d)] for d in f"{n:04d}")


def test_replay_ignore_header_drops_a_leaking_field(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Both classes carry the same note; only the spam has an upstream server's verdict field.
    # The tokenizer marks which fields are present, so the field gives the answer away --
    # unless --ignore-header drops it before tokenizing.
    root = tmp_path / "leaky"
    for label in ("ham", "spam"):
        (root / label).mkdir(parents=True)
        leak = b"Upstream-Junk-Flag: yes\r\n" if label == "spam" else b""
        for n in range(30):
            body = f"Subject: rota\r\n\r\nreception cover {_word(n + 100 * len(leak))}\r\n"
            (root / label / f"{n}.eml").write_bytes(leak + body.encode())
    rows = [f"{label}/{n}.eml" for n in range(30) for label in ("ham", "spam")]
    (root / "index.tsv").write_text("file\n" + "\n".join(rows) + "\n")
    leaked = _run(capsys, "replay", str(root), "--warmup", "4")
    clean = _run(capsys, "replay", str(root), "--warmup", "4", "--ignore-header", "upstream-")
    assert leaked["methods"][0]["one_minus_auc_percent"] < 1.0  # type: ignore[index]
    assert clean["methods"][0]["one_minus_auc_percent"] > 30.0  # type: ignore[index]


def test_train_workers_flag_reaches_training_and_refuses_nonsense(
    tmp_path: Path,
    sorted_mail: tuple[Path, Path],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    seen: list[object] = []
    real = cli.learning.train_from

    def recording(*args: object, **kwargs: object) -> object:
        seen.append(kwargs.get("workers"))
        return real(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(cli.learning, "train_from", recording)
    db = str(tmp_path / "model.sqlite3")
    ham, spam = sorted_mail
    _run(capsys, "train", "--ham", str(ham), "--db", db, "--workers", "1")
    _run(capsys, "train", "--spam", str(spam), "--db", db)
    assert seen == [1, None]  # None: one per core (learning.default_workers)
    for bad in ("0", "-2", "many"):
        with pytest.raises(SystemExit) as exited:
            cli.main(["train", "--ham", str(ham), "--db", db, "--workers", bad])
        assert exited.value.code == 2
    assert "expected a whole number of processes >= 1" in capsys.readouterr().err
