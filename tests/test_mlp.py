"""The mlp family: learns, stays normalized, matches scikit-learn's forward pass."""

import math

import numpy as np
import pytest
from sklearn.neural_network import MLPClassifier

from retrograde import SequenceSet
from retrograde.errors import ConfigError
from retrograde.families import make
from retrograde.families.mlp import PROBABILITY_FLOOR, forward_probs

CYCLE = [[0.1, 0.8, 0.1], [0.1, 0.1, 0.8], [0.8, 0.1, 0.1]]  # mostly 0 -> 1 -> 2 -> 0


def chain_units(n_units, length, seed):
    """Units from a 3-state Markov chain that is easy to learn from one previous token."""
    rng = np.random.default_rng(seed)
    cumulative = np.cumsum(CYCLE, axis=1)
    units = np.empty((n_units, length), dtype=np.int32)
    units[:, 0] = rng.integers(0, 3, n_units)
    for t in range(1, length):
        units[:, t] = (rng.random((n_units, 1)) > cumulative[units[:, t - 1]]).sum(axis=1)
    return SequenceSet.from_list(list(np.minimum(units, 2)), vocab_size=3)


def small_mlp(**params):
    return make("mlp", **{"window": 2, "hidden": 16, "progress": False, **params})


def test_validation_nll_falls_over_epochs_on_a_learnable_source():
    train, valid = chain_units(200, 40, seed=1), chain_units(50, 40, seed=2)
    model = small_mlp(epochs=6).fit(train, valid, seed=0)
    curve = [record["valid_bits_per_token"] for record in model.learning_curve_]
    assert [record["epoch"] for record in model.learning_curve_] == list(range(1, 7))
    assert curve[-1] < curve[0] - 0.2
    # Uniform over 3 tokens + end marker costs log2(4) = 2 bits; the chain is far cheaper.
    assert curve[-1] < 1.5


def test_the_kept_weights_are_those_of_the_best_validation_epoch():
    train, valid = chain_units(100, 30, seed=3), chain_units(30, 30, seed=4)
    model = small_mlp(epochs=5, lr=0.3, patience=2).fit(train, valid, seed=1)
    bits = -model.logprobs(valid).values.sum() / math.log(2) / len(valid.tokens)
    best = min(record["valid_bits_per_token"] for record in model.learning_curve_)
    assert bits == pytest.approx(best, rel=1e-12)


def test_scores_are_normalized_and_match_the_full_distribution():
    train = chain_units(60, 20, seed=5)
    model = small_mlp(epochs=2).fit(train, seed=0)
    contexts = [train[0][:t] for t in range(6)] + [np.array([], dtype=np.int32)]
    probs = model.next_token_probs(contexts)
    assert probs.shape == (7, 4)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-12)
    scores = model.logprobs(train.subset(np.array([0])))[0]
    observed = [*train[0][:5].tolist()]
    np.testing.assert_allclose(scores[:5], np.log(probs[np.arange(5), observed]), rtol=1e-12)


def test_tokens_never_seen_in_training_keep_at_least_the_floor_probability():
    train = SequenceSet.from_list([[0, 1, 0, 1]] * 30, vocab_size=5)
    model = small_mlp(epochs=3, lr=0.1).fit(train, seed=0)
    probs = model.next_token_probs([np.array([0])])
    assert probs.min() >= PROBABILITY_FLOOR / (1 + 5 * PROBABILITY_FLOOR)
    assert np.all(np.isfinite(model.logprobs(SequenceSet.from_list([[4, 3]], vocab_size=5)).values))


@pytest.mark.parametrize("n_classes", [2, 5])
def test_numpy_forward_pass_equals_scikit_learn_predict_proba(n_classes):
    # Reference: sklearn.neural_network.MLPClassifier.predict_proba (softmax output, or a
    # single logistic unit when there are two classes).
    rng = np.random.default_rng(0)
    x = (rng.random((200, 12)) < 0.3).astype(float)
    y = rng.integers(0, n_classes, 200)
    classifier = MLPClassifier(hidden_layer_sizes=(7, 5), random_state=0)
    classifier.partial_fit(x, y, classes=np.arange(n_classes))
    ours = forward_probs(x, classifier.coefs_, classifier.intercepts_)
    np.testing.assert_allclose(ours, classifier.predict_proba(x), rtol=1e-12, atol=1e-15)


def test_fitting_is_deterministic_for_a_seed_and_varies_across_seeds():
    train, valid = chain_units(50, 20, seed=6), chain_units(20, 20, seed=7)

    def scores(seed):
        return small_mlp(epochs=2).fit(train, valid, seed=seed).logprobs(valid).values

    np.testing.assert_array_equal(scores(3), scores(3))
    assert not np.array_equal(scores(3), scores(4))


def test_without_validation_units_all_epochs_run_and_the_training_loss_is_recorded():
    model = small_mlp(epochs=3).fit(chain_units(30, 20, seed=8), seed=0)
    assert [sorted(record) for record in model.learning_curve_] == [["epoch", "train_loss"]] * 3


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"window": 0}, r"window=0 is invalid; allowed: an integer >= 1 and <= 127"),
        ({"hidden": -3}, r"hidden=-3 is invalid"),
        ({"lr": 0}, r"lr=0 is invalid; allowed: a number > 0.0 and <= 1.0"),
        ({"progress": "yes"}, r"progress='yes' is invalid; allowed: true or false"),
    ],
)
def test_invalid_parameters_are_refused_naming_key_value_and_range(params, message):
    with pytest.raises(ConfigError, match=r"family 'mlp': parameter " + message):
        small_mlp(**params).fit(chain_units(2, 5, seed=0))


def test_one_hot_columns_stay_exact_where_window_times_vocabulary_passes_two_to_the_31():
    # 127 slots x (2**24 + 2**20 + 1) symbols = 2.26e9 feature columns: the column index of
    # a symbol in the last slot must not wrap in int32.
    model = make("mlp", window=127)
    vocab_size = (1 << 24) + (1 << 20)
    model.vocab_size_ = vocab_size
    units = SequenceSet.from_list([[vocab_size - 1, 3]], vocab_size=vocab_size)
    features, outcomes, _ = model._features(units)
    n_symbols = vocab_size + 1
    assert features.shape == (3, 127 * n_symbols)
    last_event = features[2].indices.astype(np.int64)  # predicting the end marker
    expected = {3, n_symbols + vocab_size - 1} | {
        lag * n_symbols + vocab_size for lag in range(2, 127)
    }
    assert set(last_event.tolist()) == expected
    assert outcomes.tolist() == [vocab_size - 1, 3, vocab_size]
