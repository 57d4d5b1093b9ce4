"""The ngram family: modified Kneser–Ney checked against published formulas and NLTK."""

import math
from collections import Counter

import numpy as np
import pytest
from nltk.lm import KneserNeyInterpolated

from retrograde import SequenceSet
from retrograde.errors import ConfigError, DataError
from retrograde.families import make
from retrograde.families._ngram_counts import FALLBACK_DISCOUNT, modified_kn_discounts

BEGIN, END = "<s>", "</s>"


def markov_units(transition, n_units, length, seed):
    """Units cut from a stationary first-order Markov chain (start drawn from its stationary law)."""
    transition = np.asarray(transition)
    values, vectors = np.linalg.eig(transition.T)
    stationary = np.real(vectors[:, np.argmin(abs(values - 1))])
    stationary /= stationary.sum()
    rng = np.random.default_rng(seed)
    cumulative = np.cumsum(transition, axis=1)
    draws = rng.random((n_units, length))
    units = np.empty((n_units, length), dtype=np.int32)
    units[:, 0] = np.searchsorted(np.cumsum(stationary), draws[:, 0])
    for t in range(1, length):  # one vectorized step per position, across all units
        row = cumulative[units[:, t - 1]]
        units[:, t] = (draws[:, t, None] > row).sum(axis=1)
    units = np.minimum(units, len(transition) - 1)
    return SequenceSet.from_list(list(units), vocab_size=len(transition)), stationary


def entropy_rate_bits(transition, stationary):
    # Cover & Thomas, Elements of Information Theory, Thm 4.2.4: H = -sum_ij mu_i P_ij log P_ij.
    transition = np.asarray(transition)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(transition > 0, transition * np.log2(transition), 0.0)
    return float(-(stationary[:, None] * terms).sum())


def events(unit, order, vocab_size):
    """The n-grams (as tuples) predicted in one unit: each token, then the end marker."""
    padded = [vocab_size] * (order - 1) + list(unit) + [vocab_size]
    return [tuple(padded[t - order + 1 : t + 1]) for t in range(order - 1, len(padded))]


def test_discounts_follow_chen_goodman_eq_26_on_a_hand_made_corpus():
    units = SequenceSet.from_list(
        [[0, 2, 1], [1, 0, 1, 1, 1], [1, 1, 2, 1], [2, 2], [2, 0, 2, 1], [2, 2, 0, 0]],
        vocab_size=3,
    )
    model = make("ngram", order=2).fit(units)
    bigrams = Counter(g for u in units for g in events(u.tolist(), 2, 3))
    n1, n2, n3, n4 = (sum(c == r for c in bigrams.values()) for r in (1, 2, 3, 4))
    assert (n1, n2, n3, n4) == (7, 4, 3, 1)  # counted by hand; every formula is exercised
    # Chen & Goodman (1998), "An empirical study of smoothing techniques", eq. 26:
    y = n1 / (n1 + 2 * n2)
    expected = [1 - 2 * y * n2 / n1, 2 - 3 * y * n3 / n2, 3 - 4 * y * n4 / n3]
    assert model.tables_.discounts[2].tolist() == pytest.approx(expected, rel=1e-12)


def test_discounts_fall_back_to_a_single_discount_when_counts_of_counts_are_zero():
    # A binary alphabet: every unigram type is seen many times, so n1 = n2 = 0.
    assert modified_kn_discounts(np.array([50, 70, 90])).tolist() == [FALLBACK_DISCOUNT] * 3
    # Singletons but no doubletons: Y = 1 and D2, D3+ have no defined formula.
    assert modified_kn_discounts(np.array([1, 1, 5])).tolist() == [1.0, 1.0, 1.0]


@pytest.mark.parametrize("order", [2, 3])
def test_fixed_discount_probabilities_agree_with_nltk_kneser_ney_interpolated(order):
    # Conventions aligned (documented here, not in the model):
    # 1. NLTK's unigram level is the undiscounted continuation distribution; ours is
    #    discounted and interpolated with uniform. They coincide when every outcome (all
    #    tokens and the end marker) has a continuation count >= 1 and discount <= 1, which
    #    this corpus guarantees.
    # 2. NLTK's padding also counts n-grams that end inside the padding ("<s> <s>",
    #    "</s> </s>"); we feed it exactly the n-grams that end at a predicted outcome.
    rng = np.random.default_rng(3)
    vocab_size, discount = 4, 0.35
    units = [rng.integers(0, vocab_size, rng.integers(1, 7)).tolist() for _ in range(30)]
    model = make("ngram", order=order, discount=discount)
    model.fit(SequenceSet.from_list(units, vocab_size=vocab_size))

    def word(symbol, is_context):
        return (BEGIN if is_context else END) if symbol == vocab_size else str(symbol)

    sentences = []
    for unit in units:
        grams = []
        for gram in events(unit, order, vocab_size):
            for k in range(1, order + 1):  # every suffix: the lower-order n-grams
                suffix = gram[-k:]
                grams.append(tuple(word(s, i < k - 1) for i, s in enumerate(suffix)))
        sentences.append(grams)
    vocabulary = [BEGIN, END] + [str(v) for v in range(vocab_size)]
    reference = KneserNeyInterpolated(order, discount=discount)
    reference.fit(sentences, vocabulary_text=vocabulary)

    # The alignment precondition of convention 1: every outcome continues some context.
    assert len(model.tables_.type_keys[1]) == vocab_size + 1

    contexts = [np.array(u[:cut]) for u in units[:8] for cut in range(len(u) + 1)]
    # Random contexts too, some never seen in training (both back off to lower orders).
    contexts += [rng.integers(0, vocab_size, n) for n in (1, 2, 3, 4) for _ in range(5)]
    ours = model.next_token_probs(contexts)
    for row, context in enumerate(contexts):
        padded = [vocab_size] * (order - 1) + context.tolist()
        nltk_context = tuple(word(s, True) for s in padded[len(padded) - order + 1 :])
        for outcome in range(vocab_size + 1):
            expected = reference.score(word(outcome, False), nltk_context)
            assert ours[row, outcome] == pytest.approx(expected, rel=1e-12, abs=1e-15)


def test_held_out_bits_per_token_approach_the_entropy_rate_of_a_markov_chain():
    transition = [[0.7, 0.2, 0.1], [0.1, 0.6, 0.3], [0.3, 0.3, 0.4]]
    # Long units make the end-marker and first-token costs negligible (< 0.002 bits/token).
    train, stationary = markov_units(transition, 20, 10_000, seed=1)
    test, _ = markov_units(transition, 5, 10_000, seed=2)
    model = make("ngram", order=2).fit(train)
    bits = -model.logprobs(test).values.sum() / math.log(2) / len(test.tokens)
    assert bits == pytest.approx(entropy_rate_bits(transition, stationary), abs=0.01)


def test_forward_and_reversed_bigram_fits_of_a_stationary_chain_score_the_same_total():
    # Symmetry fact (common practice, no source): a stationary first-order chain has the
    # same joint law read backwards, so exact bigram models give equal totals.
    # The chain is not reversible (P != its time reversal), so the two models differ.
    transition = [[0.1, 0.8, 0.1], [0.1, 0.1, 0.8], [0.8, 0.1, 0.1]]
    train, _ = markov_units(transition, 2_000, 100, seed=4)  # 200k tokens
    test, _ = markov_units(transition, 500, 100, seed=5)

    def reverse(units):
        return SequenceSet.from_list([u[::-1] for u in units], vocab_size=units.vocab_size)

    forward_nll = -make("ngram", order=2).fit(train).logprobs(test).values.sum()
    reverse_model = make("ngram", order=2).fit(reverse(train))
    reverse_nll = -reverse_model.logprobs(reverse(test)).values.sum()
    assert abs(reverse_nll / forward_nll - 1) < 0.005


def test_ten_gram_counts_on_a_huge_vocabulary_match_a_counter_of_tuples():
    # 2**20 ** 10 does not fit in 64 bits: keys are built level by level from context ids.
    rng = np.random.default_rng(7)
    vocab_size = 1 << 20
    units = [rng.integers(0, 4, 12) * (vocab_size // 4) + 1 for _ in range(50)]
    model = make("ngram", order=10).fit(SequenceSet.from_list(units, vocab_size=vocab_size))
    expected = Counter(g for u in units for g in events(u.tolist(), 10, vocab_size))
    assert sorted(model.tables_.type_counts[10].tolist()) == sorted(expected.values())
    probs = model.next_token_probs([units[0][:5], np.array([3, 3])])
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-9)


def test_tokens_never_seen_in_training_still_get_positive_probability():
    train = SequenceSet.from_list([[0, 1, 0, 1]] * 5, vocab_size=6)
    model = make("ngram", order=3).fit(train)
    scores = model.logprobs(SequenceSet.from_list([[5, 4, 0]], vocab_size=6))
    assert np.all(np.isfinite(scores.values)) and np.all(scores.values < 0)


def test_each_unit_gets_one_score_per_token_plus_the_end_marker():
    train = SequenceSet.from_list([[0, 1, 2], [], [2, 2]], vocab_size=3)
    scores = make("ngram", order=2).fit(train).logprobs(train)
    assert scores.lengths.tolist() == [4, 1, 3]


def test_token_ids_outside_the_fitted_vocabulary_are_refused():
    model = make("ngram", order=2).fit(SequenceSet.from_list([[0, 1]], vocab_size=2))
    with pytest.raises(DataError, match="outside the fitted vocabulary of 2"):
        model.logprobs(SequenceSet.from_list([[0, 3]], vocab_size=4))


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"order": 0}, r"order=0 is invalid; allowed: an integer >= 1 and <= 10"),
        ({"order": 11}, r"order=11 is invalid"),
        ({"order": 2.5}, r"order=2.5 is invalid"),
        ({"discount": 0.0}, r"discount=0.0 is invalid; allowed: a number > 0.0 and <= 1.0"),
    ],
)
def test_invalid_parameters_are_refused_naming_key_value_and_range(params, message):
    train = SequenceSet.from_list([[0, 1]], vocab_size=2)
    with pytest.raises(ConfigError, match=r"family 'ngram': parameter " + message):
        make("ngram", **params).fit(train)


def test_unknown_parameters_are_refused():
    with pytest.raises(ConfigError, match="unexpected keyword argument 'ordr'"):
        make("ngram", ordr=3)


def test_a_unigram_model_saves_and_loads_without_context_tables(tmp_path):
    train = SequenceSet.from_list([[0, 1, 1], [2]], vocab_size=3)
    model = make("ngram", order=1).fit(train)
    model.save(tmp_path / "unigram")
    from retrograde.families import load

    np.testing.assert_array_equal(
        load(tmp_path / "unigram").logprobs(train).values, model.logprobs(train).values
    )


def test_docstring_examples_run():
    import doctest

    import retrograde.families._ngram_counts
    import retrograde.families.ngram

    for module in (retrograde.families.ngram, retrograde.families._ngram_counts):
        result = doctest.testmod(module)
        assert result.attempted > 0 and result.failed == 0


def test_scoring_in_batches_of_units_gives_the_same_values_as_one_batch(monkeypatch):
    import retrograde.families.ngram as ngram_module

    rng = np.random.default_rng(11)
    units = SequenceSet.from_list(
        [rng.integers(0, 4, rng.integers(0, 9)) for _ in range(60)], vocab_size=4
    )
    model = make("ngram", order=4).fit(units)
    whole = model.logprobs(units)
    monkeypatch.setattr(ngram_module, "_SCORE_TOKENS", 7)  # many batches, some units empty
    batched = model.logprobs(units)
    np.testing.assert_array_equal(batched.offsets, whole.offsets)
    np.testing.assert_array_equal(batched.values, whole.values)
