"""Which training units a seed trains on: resample_train and the fit stage's use of it."""

from __future__ import annotations

import numpy as np
import pytest

from retrograde import SequenceSet, families, orders, sources, stats
from retrograde.config import ModelConfig
from retrograde.data import (
    MIN_DOCUMENT_GROUPS,
    resample_train,
    resolve_train_sample,
    sample_index,
)
from retrograde.errors import ConfigError
from retrograde.stages.fit import fit_cell, training_units


def units(n: int, *, doc_ids=None, vocab_size=None) -> SequenceSet:
    rng = np.random.default_rng(n)
    rows = [rng.integers(0, 5, size=rng.integers(1, 6)) for _ in range(n)]
    return SequenceSet.from_list(rows, vocab_size=vocab_size, doc_ids=doc_ids)


def test_the_same_seed_draws_the_same_units_and_other_seeds_others():
    train = units(50)
    first, again = resample_train(train, 3), resample_train(train, 3)
    assert first.tokens.tolist() == again.tokens.tolist()
    assert first.offsets.tolist() == again.offsets.tolist()
    draws = {tuple(sample_index(50, seed)) for seed in range(20)}
    assert len(draws) == 20
    assert len(first) == 25  # half of the 50 units


def test_the_sample_depends_on_the_seed_and_unit_count_not_on_tokens_so_orders_pair_up():
    # Every order of a source holds the same units reordered: seed s must pick the same ones.
    natural = units(40)
    reversed_units = orders.make("reverse").apply_set(natural)
    for seed in range(5):
        forward = resample_train(natural, seed)
        backward = resample_train(reversed_units, seed)
        assert orders.make("reverse").apply_set(forward).tokens.tolist() == (
            backward.tokens.tolist()
        )


def test_a_half_sample_draws_half_without_replacement_and_a_bootstrap_n_with():
    half = sample_index(1000, 7)  # the default scheme
    assert len(half) == 500 and len(np.unique(half)) == 500 and np.all(np.diff(half) > 0)
    index = sample_index(1000, 7, scheme="bootstrap")
    assert len(index) == 1000 and np.all(np.diff(index) >= 0)
    # About 1 - 1/e of the units are drawn at least once (the bootstrap's known share).
    assert 0.60 < len(np.unique(index)) / 1000 < 0.66
    assert len(sample_index(1000, 7, scheme="subsample", fraction=0.8)) == 800
    assert sample_index(10, 1, scheme="subsample", fraction=1.0).tolist() == list(range(10))
    assert sample_index(1, 3).tolist() == [0]  # at least one unit
    with pytest.raises(ConfigError, match="fraction=None is invalid"):
        sample_index(10, 1, scheme="subsample")


@pytest.mark.parametrize("scheme", ["half", "bootstrap"])
def test_documents_are_drawn_whole(scheme):
    doc_ids = np.repeat(np.arange(12), 3)  # 12 documents of 3 units
    index = sample_index(36, 4, scheme=scheme, doc_ids=doc_ids)
    drawn_units = np.bincount(index, minlength=36).reshape(12, 3)
    # Every unit of a document appears as often as the document was drawn.
    assert np.all(drawn_units == drawn_units[:, :1])
    assert drawn_units.sum() == (18 if scheme == "half" else 36)


def test_the_sample_keeps_the_vocabulary_even_without_the_largest_token():
    train = SequenceSet.from_list([[0, 1]] * 30 + [[9]], vocab_size=None)
    assert train.effective_vocab_size() == 10
    seed = next(s for s in range(100) if 30 not in sample_index(31, s))  # misses the [9] unit
    sample = resample_train(train, seed)
    assert 9 not in sample.tokens.tolist() and sample.vocab_size == 10
    model = families.make("ngram", order=2).fit(sample)
    test = SequenceSet.from_list([[9, 0]], vocab_size=10)
    assert np.all(np.isfinite(model.logprobs(test).values))  # scored, not refused


def test_auto_resamples_only_families_without_randomness_of_their_own():
    assert resolve_train_sample("auto", families.registry.get("ngram")) == "half"
    assert resolve_train_sample("auto", families.registry.get("mlp")) == "none"
    assert resolve_train_sample("none", families.registry.get("ngram")) == "none"
    assert resolve_train_sample("bootstrap", families.registry.get("mlp")) == "bootstrap"
    with pytest.raises(ConfigError, match="train_sample='halves' is invalid; allowed: one of"):
        resolve_train_sample("halves", families.registry.get("ngram"))


def test_fit_cell_gives_an_ngram_a_different_sample_per_seed_unless_told_not_to():
    source = sources.make("markov", vocab_size=3, order=1, length=12, chain_seed=2)
    splits = {
        "train": source.generate(60, seed=1),
        "valid": source.generate(5, seed=2),
        "test": source.generate(20, seed=3),
    }
    spec = ModelConfig(family="ngram", params={"order": 2})  # train_sample: auto
    by_seed = [fit_cell(spec, splits, seed=seed)[1] for seed in (0, 1, 0)]
    assert not np.array_equal(by_seed[0], by_seed[1])
    assert np.array_equal(by_seed[0], by_seed[2])
    fixed = ModelConfig(family="ngram", params={"order": 2}, train_sample="none")
    assert np.array_equal(fit_cell(fixed, splits, seed=0)[1], fit_cell(fixed, splits, seed=1)[1])


def test_the_budget_counts_the_units_a_seed_trained_on():
    # What budget.json's train_tokens falls back to: the sample, not the whole split.
    train = units(40)
    spec = ModelConfig(family="ngram", params={"order": 2})
    sample = training_units(spec, families.registry.get("ngram"), train, seed=4)
    assert len(sample) == 20
    assert sample.tokens.tolist() == resample_train(train, 4).tokens.tolist()
    mlp = ModelConfig(family="mlp", params={})
    assert training_units(mlp, families.registry.get("mlp"), train, seed=4) is train


def test_units_of_fewer_than_ten_documents_are_drawn_one_by_one():
    # One file cut into lines is one document: drawn whole, every seed would train on all
    # of it (the seeds of an n-gram would be identical again).
    one_document = np.zeros(40, dtype=np.int64)
    draws = {tuple(sample_index(40, seed, doc_ids=one_document)) for seed in range(5)}
    assert len(draws) == 5 and all(len(d) == 20 for d in draws)
    nine = np.repeat(np.arange(9), 4)
    assert len(sample_index(36, 0, doc_ids=nine)) == 18  # units, not 4 or 5 documents
    assert MIN_DOCUMENT_GROUPS == stats.MIN_DOCUMENTS_FOR_GROUPING  # one rule for both
