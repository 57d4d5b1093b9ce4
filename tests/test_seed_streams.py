"""Each order's own random stream, and which models' seeds are paired across orders.

A cell's seed chooses training units (the same in every order: paired) and seeds the
family's own randomness; for a family that declares ``own_stream_per_order`` the fit stage
draws that from ``order_seed(seed, order)``, so fits of two orders share no random numbers
and the table treats their seeds as unpaired (Welch's form, docs/statistics.md).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from scipy import stats as scipy_stats

from retrograde import families, sources, stats
from retrograde.config import ModelConfig, seeds_paired
from retrograde.data import order_seed
from retrograde.stages.fit import fit_cell


def _splits(n_train: int = 60) -> dict:
    source = sources.make("markov", vocab_size=3, order=1, length=12, chain_seed=2)
    return {
        "train": source.generate(n_train, seed=1),
        "valid": source.generate(8, seed=2),
        "test": source.generate(20, seed=3),
    }


def test_order_seed_is_sha256_of_its_inputs_and_fits_every_random_library():
    # The definition, recomputed with hashlib (Python's standard library): the first four
    # bytes of SHA-256, big-endian, halved to stay below 2**31.
    digest = hashlib.sha256(b"retrograde/order-seed/forward/0").digest()
    assert order_seed(0, "forward") == int.from_bytes(digest[:4], "big") >> 1 == 999305532
    seen = {order_seed(seed, order) for seed in range(50) for order in ("forward", "reverse")}
    assert len(seen) == 100  # no two (seed, order) pairs share a stream here
    assert all(0 <= value < 2**31 for value in seen)
    np.random.default_rng(max(seen))  # numpy takes it; so do torch and scikit-learn (< 2**32)


def test_the_fit_stage_gives_an_mlp_a_stream_per_order_and_the_same_training_units():
    splits = _splits()
    spec = ModelConfig(family="mlp", params={"window": 2, "hidden": 4, "epochs": 2})
    forward = fit_cell(spec, splits, seed=0, order="forward")[1]
    reverse_named = fit_cell(spec, splits, seed=0, order="reverse")[1]
    assert not np.array_equal(forward, reverse_named)  # same data, other random numbers
    direct = families.make("mlp", **spec.params).fit(
        splits["train"], splits["valid"], seed=order_seed(0, "forward")
    )
    assert np.array_equal(forward, direct.logprobs(splits["test"]).values)
    # Without an order (a caller outside the stage) the family gets the cell's seed.
    plain = fit_cell(spec, splits, seed=0)[1]
    fitted = families.make("mlp", **spec.params).fit(splits["train"], splits["valid"], seed=0)
    assert np.array_equal(plain, fitted.logprobs(splits["test"]).values)


def test_a_family_without_own_streams_ignores_the_order_name():
    # The ngram's randomness is its seed's half-sample, the same units in every order.
    splits = _splits()
    spec = ModelConfig(family="ngram", params={"order": 2})
    one = fit_cell(spec, splits, seed=1, order="forward")[1]
    other = fit_cell(spec, splits, seed=1, order="another")[1]
    assert np.array_equal(one, other)
    assert not families.registry.get("command").own_stream_per_order  # the trainer's {seed}


@pytest.mark.parametrize(
    ("spec", "paired"),
    [
        (ModelConfig(family="mlp"), False),  # own streams, no shared training sample
        (ModelConfig(family="mlp", train_fraction=0.5), True),  # a seed's subsample
        (ModelConfig(family="mlp", train_sample="half"), True),  # a seed's half-sample
        (ModelConfig(family="ngram"), True),  # auto: a half-sample per seed
        (ModelConfig(family="ngram", train_sample="none"), True),  # fitted once: no matter
        (ModelConfig(family="command", params={"command": "true"}), True),  # cell seed kept
    ],
)
def test_seeds_are_paired_unless_two_orders_share_nothing(spec, paired):
    assert seeds_paired(spec) is paired


def test_unpaired_seeds_of_independent_fits_give_welchs_interval():
    # Reference: scipy.stats.ttest_ind(equal_var=False) (Welch's t-test), whose
    # confidence interval is the unpaired interval's when only the seeds vary: each order's
    # per-seed losses are then two independent samples of 3.
    rng = np.random.default_rng(5)
    forward_effect, reverse_effect = rng.normal(0, 0.02, 3), rng.normal(0.05, 0.04, 3)
    reference = np.full((3, 20), 30.0)
    losses = {
        "forward": reference * (1 + forward_effect[:, None]),
        "reverse": reference * (1 + reverse_effect[:, None]),
    }
    leaf = stats.summarize_model(
        losses, reference_order="forward", n_tokens=np.ones(20), paired_seeds=False
    )["reverse"]
    # The gap is a ratio of means; linearized at the estimate, its per-seed terms are the
    # reverse totals over the mean forward total and R times the forward ones.
    forward_totals, reverse_totals = (losses[o].sum(axis=1) for o in ("forward", "reverse"))
    ratio = reverse_totals.mean() / forward_totals.mean()
    welch = scipy_stats.ttest_ind(
        100 * reverse_totals / forward_totals.mean(),
        100 * ratio * forward_totals / forward_totals.mean(),
        equal_var=False,
    )
    low, high = welch.confidence_interval(0.95)
    assert leaf["gap_pct"] == pytest.approx(100 * (ratio - 1))
    assert welch.statistic == pytest.approx(0.0, abs=1e-9)  # both means are 100 R
    assert leaf["gap_pct_low"] == pytest.approx(100 * (ratio - 1) + low, rel=1e-5)
    assert leaf["gap_pct_high"] == pytest.approx(100 * (ratio - 1) + high, rel=1e-5)
