"""Every registered family honours the contract in families/_base.py.

Families are found through ``families.names()``, so a new family is checked without editing
this file. Each family class may declare ``example_params`` (small, fast keyword parameters
for this test); the ``command`` family gets the example trainer in ``examples/``. A family
whose construction raises ``MissingDependencyError`` (the torch families without torch) is
skipped with that reason.
"""

import math
import sys
from pathlib import Path

import numpy as np
import pytest

from retrograde import SequenceSet
from retrograde.errors import DataError, FitError, MissingDependencyError
from retrograde.families import load, make, names, registry

TOY = str(Path(__file__).resolve().parents[1] / "examples" / "toy_trainer.py")
EXTRA_PARAMS = {
    "command": {
        "command": [sys.executable, TOY, "fit", "--train", "{train}", "--valid", "{valid}"]
        + ["--test", "{test}", "--out", "{out}", "--seed", "{seed}"],
        "score_command": [sys.executable, TOY, "score", "--model", "{model}"]
        + ["--test", "{test}", "--out", "{out}"],
    }
}
#: how far a full distribution may stray from summing to 1 (issue #3)
SUM_TOLERANCE = {"ngram": 1e-9}
DEFAULT_SUM_TOLERANCE = 1e-6
VOCAB_SIZE = 5


def random_units(n_units, seed, max_length=9):
    rng = np.random.default_rng(seed)
    rows = [rng.integers(0, VOCAB_SIZE, rng.integers(0, max_length)) for _ in range(n_units)]
    rows[0] = np.array([], dtype=np.int64)  # an empty unit still scores its end marker
    return SequenceSet.from_list(rows, vocab_size=VOCAB_SIZE)


TRAIN, VALID, TEST = random_units(60, 1), random_units(12, 2), random_units(10, 3)


def build(name):
    params = {**getattr(registry.get(name), "example_params", {}), **EXTRA_PARAMS.get(name, {})}
    try:
        return make(name, **params)
    except MissingDependencyError as exc:
        pytest.skip(f"family {name!r} needs an optional dependency: {exc}")


@pytest.fixture(scope="module", params=names())
def fitted(request):
    """(name, model fitted on TRAIN with VALID, seed 0)."""
    model = build(request.param)
    assert model.fit(TRAIN, VALID, seed=0) is model
    return request.param, model


def test_full_distributions_sum_to_one_over_tokens_and_the_end_marker(fitted):
    name, model = fitted
    rng = np.random.default_rng(4)
    contexts = [rng.integers(0, VOCAB_SIZE, n) for n in (0, 1, 2, 3, 5, 8, 12)]
    probs = model.next_token_probs(contexts)
    assert probs.shape == (len(contexts), VOCAB_SIZE + 1)
    assert np.all(probs > 0)
    tolerance = SUM_TOLERANCE.get(name, DEFAULT_SUM_TOLERANCE)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, rtol=0, atol=tolerance)


def test_every_family_passes_the_normalization_probe_the_fit_stage_applies(fitted):
    # The same check refuses a cell in the pipeline (families/_probe.py): full
    # distributions at sampled test positions sum to 1 and agree with logprobs.
    from retrograde.families import check_probe, probe_positions

    name, model = fitted
    values = model.logprobs(TEST).values
    positions = probe_positions(TEST, 16, seed=0)
    check_probe(f"family {name!r}", TEST, values, positions, model.probe_logprobs(TEST, positions))


def test_logprobs_give_each_unit_one_value_per_token_plus_the_end_marker(fitted):
    _, model = fitted
    scores = model.logprobs(TEST)
    assert len(scores) == len(TEST)
    assert scores.lengths.tolist() == (TEST.lengths + 1).tolist()
    assert np.all(np.isfinite(scores.values)) and np.all(scores.values <= 0)


def test_logprobs_are_the_observed_entries_of_the_full_distributions(fitted):
    # A unit is scored from its own earlier tokens only: entry t is p(x_t | x_<t).
    _, model = fitted
    unit = TEST[3] if len(TEST[3]) else TEST[4]
    scores = model.logprobs(SequenceSet.from_list([unit], vocab_size=VOCAB_SIZE))[0]
    probs = model.next_token_probs([unit[:t] for t in range(len(unit) + 1)])
    observed = [*unit.tolist(), VOCAB_SIZE]
    expected = np.log(probs[np.arange(len(observed)), observed])
    np.testing.assert_allclose(scores, expected, rtol=1e-6, atol=1e-9)


def test_a_unit_scores_the_same_alone_as_in_a_batch(fitted):
    name, model = fitted
    batch = model.logprobs(TEST)
    tolerance = SUM_TOLERANCE.get(name, DEFAULT_SUM_TOLERANCE)  # float32 families batch-pad
    for index in (1, 5, 9):
        alone = model.logprobs(TEST.subset(np.array([index])))[0]
        np.testing.assert_allclose(alone, batch[index], rtol=tolerance, atol=1e-12)


def test_fitting_twice_with_the_same_seed_gives_identical_scores(fitted):
    name, model = fitted
    again = build(name).fit(TRAIN, VALID, seed=0)
    np.testing.assert_array_equal(again.logprobs(TEST).values, model.logprobs(TEST).values)


def test_fit_logprobs_gives_the_scores_and_model_of_fit_then_logprobs(fitted):
    name, model = fitted
    fresh = build(name)
    rows = fresh.fit_logprobs(TRAIN, VALID, TEST, seed=0)
    np.testing.assert_array_equal(rows.offsets, model.logprobs(TEST).offsets)
    np.testing.assert_allclose(rows.values, model.logprobs(TEST).values, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fresh.logprobs(VALID).values, model.logprobs(VALID).values)


def test_save_then_load_gives_the_same_scores_params_and_curve(fitted, tmp_path):
    name, model = fitted
    model.save(tmp_path / "model")
    loaded = load(tmp_path / "model")
    assert type(loaded) is type(model) and loaded.get_params() == model.get_params()
    assert loaded.vocab_size == VOCAB_SIZE
    assert loaded.learning_curve_ == model.learning_curve_
    np.testing.assert_array_equal(loaded.logprobs(TEST).values, model.logprobs(TEST).values)
    # No pickle anywhere: every saved array loads with allow_pickle=False.
    for path in (tmp_path / "model").rglob("*.np[yz]"):
        arrays = np.load(path, allow_pickle=False)
        if path.suffix == ".npz":
            with arrays:
                [arrays[key] for key in arrays.files]


def test_the_learning_curve_records_validation_bits_per_epoch(fitted):
    _, model = fitted
    assert model.learning_curve_, "a fit with validation units reports at least one point"
    for number, record in enumerate(model.learning_curve_, start=1):
        assert record["epoch"] == number
        assert math.isfinite(record["valid_bits_per_token"]) and record["valid_bits_per_token"] > 0


def test_params_rebuild_an_equivalent_unfitted_model(fitted):
    name, model = fitted
    twin = make(name, **model.get_params())
    assert twin.get_params() == model.get_params()
    with pytest.raises(FitError, match="call fit"):
        twin.logprobs(TEST)


def test_token_ids_outside_the_fitted_vocabulary_are_refused(fitted):
    _, model = fitted
    with pytest.raises(DataError, match="outside the fitted vocabulary"):
        model.logprobs(SequenceSet.from_list([[0, VOCAB_SIZE + 2]], vocab_size=VOCAB_SIZE + 3))


@pytest.mark.parametrize(
    ("module", "text"),
    [
        ("families", "unknown family 'ngrma' (did you mean 'ngram'?); known families: "),
        ("orders", "unknown order 'revers' (did you mean 'reverse'?); known orders: "),
        ("sources", "unknown source 'markof' (did you mean 'markov'?); known sources: "),
    ],
)
def test_an_unknown_name_lists_the_known_ones_in_plain_english(module, text):
    import importlib

    from retrograde.errors import ConfigError

    registry = importlib.import_module(f"retrograde.{module}")
    with pytest.raises(ConfigError) as info:
        registry.make(text.split("'")[1])
    assert text in str(info.value)
