"""In-memory replay counts: the same numbers as the store, so sweeps measure the real thing."""

from __future__ import annotations

import numpy as np
import pytest

from mailweir.daemon import scenario
from mailweir.daemon.learning import Progress
from mailweir.daemon.replay import ReplayPlan, replay, replay_hashes
from mailweir.daemon.replay_counts import MemoryCounts
from mailweir.daemon.sources import LabelledMessage
from mailweir.model.hashing import hash_tokens
from mailweir.model.tokenize import tokens
from mailweir.model.types import HAM, SPAM, Vocabulary


def _interleaved(n: int, seed: int) -> list[LabelledMessage]:
    ham, spam = scenario.generate(n, "ham", seed), scenario.generate(n, "spam", seed)
    found = []
    for i in range(n):
        found.append(LabelledMessage(f"ham/{i}", HAM, ham[i].raw))
        found.append(LabelledMessage(f"spam/{i}", SPAM, spam[i].raw))
    return found


def test_memory_counts_summary_equals_rebuilt_vocabulary() -> None:
    rng = np.random.default_rng(5)
    messages = [np.unique(rng.integers(-40, 40, size=rng.integers(1, 30))) for _ in range(60)]
    counts = MemoryCounts(messages)
    for i, message in enumerate(messages):
        counts.train(i, int(rng.integers(0, 2)))
        expected = Vocabulary.from_token_counts(counts.token_counts())
        got = counts.vocabulary()
        width = expected.count_histogram.shape[1]
        assert got.size == expected.size == counts.tokens
        assert got.token_total.tolist() == expected.token_total.tolist()
        assert np.array_equal(got.count_histogram[:, :width], expected.count_histogram)
        assert not got.count_histogram[:, width:].any()
        assert counts.lookup(i).shape == (len(message), 2)


def test_memory_counts_prune_keeps_the_summary_exact() -> None:
    # Oracle: the summary rebuilt from the remaining counts (Vocabulary.from_token_counts).
    rng = np.random.default_rng(9)
    messages = [np.unique(rng.integers(-60, 60, size=rng.integers(1, 30))) for _ in range(80)]
    counts = MemoryCounts(messages)
    for i in range(80):
        counts.train(i, int(rng.integers(0, 2)))
        if i in (30, 60):
            before = counts.tokens
            rare = int(((counts.token_counts().sum(axis=1)) <= 2).sum())
            assert counts.prune(2) == rare
            assert counts.tokens == before - rare
            assert (counts.token_counts().sum(axis=1) > 2).all()
        expected = Vocabulary.from_token_counts(counts.token_counts())
        got = counts.vocabulary()
        width = expected.count_histogram.shape[1]
        assert got.size == expected.size
        assert got.token_total.tolist() == expected.token_total.tolist()
        assert np.array_equal(got.count_histogram[:, :width], expected.count_histogram)
        assert not got.count_histogram[:, width:].any()


def test_memory_counts_refuse_training_twice() -> None:
    counts = MemoryCounts([np.array([1, 2], dtype=np.int64)])
    counts.train(0, SPAM)
    with pytest.raises(ValueError, match="already trained"):
        counts.train(0, HAM)


@pytest.mark.parametrize("thick", [None, 4.0])
def test_replay_in_memory_equals_the_store_replay(thick: float | None) -> None:
    corpus = _interleaved(40, 11)
    corpus.append(corpus[3])  # an exact copy: the store's ledger does not count it twice
    plan = ReplayPlan(methods=("fisher", "multinomial", "bernoulli"), train_margin=thick)
    stored = replay(corpus, plan, progress=Progress("replayed", enabled=False))
    memory = replay(corpus, ReplayPlan(**{**vars(plan), "in_memory": True}), progress=Progress(""))
    for a, b in zip(stored.results, memory.results, strict=True):
        assert a.method == b.method
        np.testing.assert_allclose(a.scores, b.scores, rtol=1e-12, atol=1e-15)
    assert stored.tokens == memory.tokens


def test_replay_hashes_names_changed_parameters() -> None:
    corpus = _interleaved(5, 2)
    hashes = [hash_tokens(tokens(m.raw)) for m in corpus]
    from mailweir.model.nb import make_scorer

    result = replay_hashes(
        hashes,
        [m.label for m in corpus],
        [m.name for m in corpus],
        ReplayPlan(methods=(), train_margin=None),
        [make_scorer("fisher"), make_scorer("fisher", strength=0.5)],
    )
    assert [r.method for r in result.results] == ["fisher", "fisher(strength=0.5)"]
    assert result.trained == len(corpus)
