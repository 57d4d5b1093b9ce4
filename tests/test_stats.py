"""Paired gaps, intervals, sign-flip p-values, Holm, position profiles and span losses."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as scipy_stats
from statsmodels.stats.multitest import multipletests

from retrograde import Ragged, SequenceSet
from retrograde.errors import ConfigError, DataError
from retrograde.stats import (
    adjust_holm,
    bootstrap_pvalue,
    bootstrap_totals,
    grouping_warning,
    holm,
    position_profile,
    seed_warning,
    segment_breakdown,
    sign_flip_pvalue,
    span_breakdown,
    summarize_model,
)

LN2 = math.log(2.0)
ORDERS = ("forward", "reverse", "block_reverse")
# Leaves are rounded to 6 significant digits, so comparisons allow a relative 1e-5.
approx = functools.partial(pytest.approx, rel=1e-5)


def simulate(rng, *, n_units, n_seeds, shift, seed_sd=0.01, unit_sd=2.0):
    """A noise model of two fitted orders: true unit NLL times a per-seed training effect
    plus per-unit scoring noise; ``shift`` is the true relative gap of ``reverse``."""
    truth = rng.gamma(4.0, 10.0, size=n_units)  # nats per unit
    losses = {}
    for order, factor in (("forward", 1.0), ("reverse", 1.0 + shift)):
        training = rng.normal(0.0, seed_sd, size=(n_seeds, 1))
        noise = rng.normal(0.0, unit_sd, size=(n_seeds, n_units))
        losses[order] = truth * factor * (1.0 + training) + noise
    return losses


# ----------------------------------------------------------------- point estimates


def test_point_gap_and_bits_follow_the_seed_averaged_totals():
    forward = np.array([[10.0, 20.0, 30.0], [12.0, 18.0, 30.0]])
    reverse = np.array([[11.0, 22.0, 33.0], [13.0, 20.0, 30.0]])
    leaves = summarize_model(
        {"forward": forward, "reverse": reverse},
        reference_order="forward",
        n_tokens=np.array([4, 5, 6]),
        n_bytes=np.array([8, 10, 12]),
        n_boot=100,
    )
    total_forward, total_reverse = 60.0, 64.5  # sum over units of the mean over seeds
    assert leaves["reverse"]["gap_pct"] == approx(100 * (total_reverse / total_forward - 1))
    assert leaves["forward"]["bits_per_token"] == approx(total_forward / LN2 / 15)
    assert leaves["reverse"]["bits_per_byte"] == approx(total_reverse / LN2 / 30)
    per_seed_gap = [100 * (66 / 60 - 1), 100 * (63 / 60 - 1)]
    assert leaves["reverse"]["seed_spread_pct"] == approx(np.std(per_seed_gap, ddof=1))
    assert leaves["forward"] | {"bits_per_token": 0} == {
        "bits_per_token": 0,
        "bits_per_byte": leaves["forward"]["bits_per_byte"],
        "gap_pct": 0.0,
        "gap_pct_low": 0.0,
        "gap_pct_high": 0.0,
        "p_value": 1.0,
        "p_value_sign_flip": 1.0,
        "seeds": 2,
        "seed_spread_pct": 0.0,
        "units": 3,
        "tokens": 15,
        "groups": 3,
    }


def test_floor_and_excess_are_reported_for_calibration_sources():
    forward = np.full((1, 4), 8.0 * LN2)  # 8 bits per unit of 2 tokens: 4 bits per token
    floors = np.full(4, 6.0 * LN2)  # exact: 3 bits per token
    leaves = summarize_model(
        {"forward": forward}, reference_order="forward", n_tokens=np.full(4, 2), floors=floors
    )
    assert leaves["forward"]["floor_bits_per_token"] == approx(3.0)
    assert leaves["forward"]["excess_bits_per_token"] == approx(1.0)


def test_leaves_keep_the_callers_order_of_orders():
    losses = {"reverse": np.ones((1, 5)) * 2, "forward": np.ones((1, 5)), "stride": np.ones((1, 5))}
    leaves = summarize_model(losses, reference_order="forward", n_tokens=np.ones(5), n_boot=10)
    assert list(leaves) == ["reverse", "forward", "stride"]


# ------------------------------------------------------- outside references


def test_single_level_interval_agrees_with_scipy_percentile_bootstrap():
    # Reference: scipy.stats.bootstrap(method="percentile", paired=True) on the same ratio.
    rng = np.random.default_rng(7)
    forward = rng.gamma(3.0, 5.0, size=300)
    reverse = forward * 1.04 + rng.normal(0.0, 3.0, size=300)

    def gap(x, y, axis=-1):
        return 100 * (np.sum(y, axis=axis) / np.sum(x, axis=axis) - 1)

    reference = scipy_stats.bootstrap(
        (forward, reverse),
        gap,
        paired=True,
        method="percentile",
        n_resamples=4000,
        random_state=np.random.default_rng(1),
    ).confidence_interval
    leaf = summarize_model(
        {"forward": forward[None], "reverse": reverse[None]},
        reference_order="forward",
        n_tokens=np.ones(300),
        n_boot=4000,
        seed=3,
    )["reverse"]
    width = reference.high - reference.low
    # Monte Carlo error of a 2.5% quantile from 4000 resamples is a few % of the width.
    assert leaf["gap_pct_low"] == approx(reference.low, abs=0.1 * width)
    assert leaf["gap_pct_high"] == approx(reference.high, abs=0.1 * width)


def test_sign_flip_p_value_equals_scipy_paired_permutation_test():
    # Reference: scipy.stats.permutation_test(permutation_type="samples"), exact for 12 pairs.
    rng = np.random.default_rng(3)
    forward = rng.normal(20.0, 2.0, size=12)
    reverse = forward + rng.normal(0.6, 1.5, size=12)
    reference = scipy_stats.permutation_test(
        (reverse, forward),
        lambda x, y, axis=-1: np.sum(x - y, axis=axis),
        permutation_type="samples",
        alternative="two-sided",
        n_resamples=np.inf,
    )
    leaf = summarize_model(
        {"forward": forward[None], "reverse": reverse[None]},
        reference_order="forward",
        n_tokens=np.ones(12),
        n_boot=50,
    )["reverse"]
    assert leaf["p_value"] == approx(reference.pvalue, rel=1e-5)


def test_monte_carlo_sign_flip_p_value_is_close_to_scipy_and_never_zero():
    rng = np.random.default_rng(4)
    differences = rng.normal(0.15, 1.0, size=(60, 1))
    reference = scipy_stats.permutation_test(
        (differences[:, 0],),
        lambda d, axis=-1: np.sum(d, axis=axis),
        permutation_type="samples",
        n_resamples=20000,
        random_state=np.random.default_rng(0),
    )
    p_value, exact = sign_flip_pvalue(differences, n_flips=20000, rng=np.random.default_rng(9))
    assert not exact
    assert p_value[0] == approx(reference.pvalue, abs=0.02)  # MC error ~ 0.003
    huge, _ = sign_flip_pvalue(np.full((40, 1), 5.0), n_flips=100, rng=np.random.default_rng(0))
    assert huge[0] == approx(1 / 101)  # add-one correction (common practice, no source)


def test_holm_matches_statsmodels_multipletests():
    p_values = np.array([0.01, 0.04, 0.03, 0.005, 0.5, 0.02])
    _, expected, _, _ = multipletests(p_values, method="holm")
    np.testing.assert_allclose(holm(p_values), expected)


def test_adjust_holm_tests_every_non_reference_cell_of_the_table_as_one_family():
    def leaf(p):
        return {"p_value": p, "gap_pct": 1.0}

    table = {
        "demo": {
            "ngram": {"forward": leaf(1.0), "reverse": leaf(0.01)},
            "mlp": {"forward": leaf(1.0), "reverse": leaf(0.04)},
        },
        "markov": {"ngram": {"forward": leaf(1.0), "reverse": leaf(0.03)}},
    }
    adjust_holm(table, reference_order="forward")
    _, expected, _, _ = multipletests([0.01, 0.04, 0.03], method="holm")  # statsmodels
    got = [
        table["demo"]["ngram"]["reverse"],
        table["demo"]["mlp"]["reverse"],
        table["markov"]["ngram"]["reverse"],
    ]
    assert [g["p_value_holm"] for g in got] == approx(list(expected))
    assert [g["significant"] for g in got] == [True, False, False]
    assert "p_value_holm" not in table["demo"]["ngram"]["forward"]


def test_adjust_holm_without_the_reference_order_is_a_data_error():
    with pytest.raises(DataError, match="reference order 'forward' is missing"):
        adjust_holm({"demo": {"ngram": {"reverse": {"p_value": 0.1}}}})


# ------------------------------------------------------------- calibration


def coverage(*, shift, n_seeds, repetitions=200, seed_sd=0.01):
    rng = np.random.default_rng(2024)
    covered = 0
    for repetition in range(repetitions):
        leaf = summarize_model(
            simulate(rng, n_units=200, n_seeds=n_seeds, shift=shift, seed_sd=seed_sd),
            reference_order="forward",
            n_tokens=np.full(200, 10),
            n_boot=400,
            n_flips=10,
            seed=repetition,
        )["reverse"]
        covered += leaf["gap_pct_low"] <= 0.0 <= leaf["gap_pct_high"]
    return covered / repetitions


@pytest.mark.slow  # 200 repetitions; the longer version is benchmarks/bench_coverage.py
def test_interval_covers_zero_at_about_its_level_on_a_symmetric_source():
    # 95% interval: coverage within 90-99% over 200 repetitions (binomial sd ~ 1.5%).
    assert 0.90 <= coverage(shift=0.0, n_seeds=5) <= 0.99


def test_significance_is_not_inflated_by_training_randomness_on_a_symmetric_source():
    # With a 1% per-seed training effect the unit-level sign flips alone rejected a true null
    # in about half of the repetitions; p_value must hold its level like the interval does.
    rng = np.random.default_rng(11)
    rejected = flips_rejected = 0
    for repetition in range(100):
        leaf = summarize_model(
            simulate(rng, n_units=200, n_seeds=5, shift=0.0),
            reference_order="forward",
            n_tokens=np.ones(200),
            n_boot=400,
            n_flips=200,
            seed=repetition,
        )["reverse"]
        rejected += leaf["p_value"] < 0.05
        flips_rejected += leaf["p_value_sign_flip"] < 0.05
        assert leaf["p_value"] >= leaf["p_value_sign_flip"]
    assert rejected <= 10  # level 5%: binomial(100, 0.05) exceeds 10 with probability ~1%
    assert flips_rejected >= 25  # the problem this guards against is real


def test_bootstrap_p_value_is_twice_the_smaller_tail_with_add_one():
    replicated = np.array([[-0.5], [0.5], [1.0], [1.5], [2.0], [2.5], [3.0], [3.5], [4.0]])
    # 1 of 9 replicates <= 0: 2 * (1 + 1) / (9 + 1) = 0.4 (common practice, no source).
    assert bootstrap_pvalue(replicated).tolist() == [0.4]


def test_interval_excludes_zero_most_of_the_time_on_a_shifted_source():
    assert coverage(shift=0.03, n_seeds=5, repetitions=50) <= 0.2


# ------------------------------------------------------ resampling behaviour


def test_same_seed_gives_identical_leaves_and_only_random_draws_depend_on_it():
    losses = simulate(np.random.default_rng(0), n_units=100, n_seeds=3, shift=0.01)

    def run(seed, **options):
        return summarize_model(
            losses, reference_order="forward", n_tokens=np.ones(100), seed=seed, **options
        )["reverse"]

    assert run(5) == run(5)
    # The t interval is a formula: the seed moves only the Monte Carlo sign-flip p-value.
    assert run(5)["gap_pct_low"] == run(6)["gap_pct_low"]
    assert run(5)["p_value_sign_flip"] != run(6)["p_value_sign_flip"]
    bootstrapped = run(5, interval="bootstrap")
    assert bootstrapped == run(5, interval="bootstrap")
    assert bootstrapped["gap_pct_low"] != run(6, interval="bootstrap")["gap_pct_low"]


def test_an_orders_interval_does_not_depend_on_which_other_orders_are_present():
    losses = simulate(np.random.default_rng(1), n_units=80, n_seeds=3, shift=0.02)
    alone = summarize_model(losses, reference_order="forward", n_tokens=np.ones(80))
    more = summarize_model(
        {**losses, "stride": losses["reverse"] * 1.5},
        reference_order="forward",
        n_tokens=np.ones(80),
    )
    assert alone["reverse"] == more["reverse"]


def test_grouping_units_by_document_widens_the_interval_when_documents_share_difficulty():
    rng = np.random.default_rng(2)
    doc_ids = np.repeat(np.arange(20), 10)  # 20 documents of 10 units
    doc_effect = np.repeat(rng.normal(0.0, 8.0, size=20), 10)  # a hard document is hard twice
    forward = rng.gamma(4.0, 10.0, size=200) + 40.0
    reverse = forward + doc_effect + rng.normal(0.0, 1.0, size=200)
    losses = {"forward": forward[None], "reverse": reverse[None]}
    by_unit = summarize_model(losses, reference_order="forward", n_tokens=np.ones(200))
    by_doc = summarize_model(
        losses, reference_order="forward", n_tokens=np.ones(200), doc_ids=doc_ids
    )

    def width(leaf):
        return leaf["gap_pct_high"] - leaf["gap_pct_low"]

    assert width(by_doc["reverse"]) > 2 * width(by_unit["reverse"])


def test_fewer_than_ten_documents_fall_back_to_units_and_say_so():
    rng = np.random.default_rng(3)
    losses = simulate(rng, n_units=60, n_seeds=1, shift=0.02)
    one_document = summarize_model(
        losses, reference_order="forward", n_tokens=np.ones(60), doc_ids=np.zeros(60)
    )["reverse"]
    by_unit = summarize_model(losses, reference_order="forward", n_tokens=np.ones(60))["reverse"]
    # Resampling a single document would give a zero-width interval; units are used instead.
    assert one_document["gap_pct_low"] < one_document["gap_pct_high"]
    assert one_document["groups"] == 60 and one_document["documents"] == 1
    assert {k: v for k, v in one_document.items() if k != "documents"} == by_unit
    assert "only 1 test document," in grouping_warning("demo", 1)
    assert grouping_warning("demo", 10) is None


def test_seed_resampling_starts_at_three_seeds():
    per_group = np.array([[[1.0, 2.0, 3.0], [2.0, 3.0, 4.0]]])  # (1 variant, 2 seeds, 3 units)
    totals = bootstrap_totals(
        per_group, n_boot=50, rng=np.random.default_rng(0), seed_weight_scale=None
    )
    # Seeds keep weight 1: each replicate is the seed-average of a unit resample.
    assert np.all(np.isclose(totals * 2 % 1, 0) | np.isclose(totals * 2 % 1, 1))
    assert seed_warning(2) is not None and "ignores training randomness" in seed_warning(2)
    assert seed_warning(1).startswith("with 1 seed ")
    assert seed_warning(3) is None


# ----------------------------------------------------------------- errors


def test_orders_scored_on_different_units_are_refused():
    with pytest.raises(DataError, match="order 'reverse': losses have shape"):
        summarize_model(
            {"forward": np.ones((2, 5)), "reverse": np.ones((2, 4))},
            reference_order="forward",
            n_tokens=np.ones(5),
        )


def test_infinite_losses_are_refused_with_a_hint():
    with pytest.raises(DataError, match="zero probability"):
        summarize_model(
            {"forward": np.ones((1, 3)), "reverse": np.array([[1.0, np.inf, 1.0]])},
            reference_order="forward",
            n_tokens=np.ones(3),
        )


def test_a_reference_with_zero_total_loss_is_refused():
    with pytest.raises(DataError, match="total test loss of some seed is not positive"):
        summarize_model(
            {"forward": np.zeros((1, 3)), "reverse": np.ones((1, 3))},
            reference_order="forward",
            n_tokens=np.ones(3),
        )


def test_a_bad_level_names_the_parameter_and_what_is_allowed():
    with pytest.raises(ConfigError) as caught:
        summarize_model(
            {"forward": np.ones((1, 3))}, reference_order="forward", n_tokens=np.ones(3), level=95
        )
    assert str(caught.value) == (
        "stats 'summarize_model': parameter level=95 is invalid; allowed: a number > 0.0 and < 1.0"
    )


# ------------------------------------------------ position profile and spans


def test_position_profile_gives_exact_positions_for_fixed_length_units_in_bits():
    forward = Ragged.from_list([[1.0, 2.0, 3.0, 0.5], [3.0, 2.0, 1.0, 0.5]])  # 3 tokens + end
    reverse = Ragged.from_list([[2.0, 2.0, 2.0, 1.5], [4.0, 2.0, 2.0, 0.5]])
    profile = position_profile({"forward": forward, "reverse": reverse}, reference_order="forward")
    assert profile["position"] == "absolute" and profile["x"] == [0.0, 1.0, 2.0]
    assert profile["tokens"] == [2, 2, 2]
    assert profile["bits"]["forward"] == approx([2 / LN2, 2 / LN2, 2 / LN2])
    assert profile["diff_bits"]["reverse"] == approx([1 / LN2, 0.0, 0.0])
    assert profile["diff_bits"]["forward"] == [0.0, 0.0, 0.0]
    assert profile["end_bits"]["reverse"] == approx(1.0 / LN2)


def test_position_profile_buckets_positions_relative_to_unit_length():
    long = Ragged.from_list([np.r_[np.zeros(50), np.ones(50), 0.0], np.r_[np.zeros(10), 0.0]])
    profile = position_profile({"forward": long}, reference_order="forward", n_buckets=2)
    assert profile["position"] == "relative" and profile["x"] == [0.25, 0.75]
    assert profile["tokens"] == [55, 55]
    assert profile["bits"]["forward"] == approx([0.0, 50 / 55 / LN2])


def test_span_breakdown_reports_bits_and_perplexity_per_span():
    # Two units of 4 tokens; span x = positions 0-1, y = positions 2-3.
    forward = Ragged.from_list([[LN2, LN2, 2 * LN2, 4 * LN2, 0.0]] * 2)
    reverse = Ragged.from_list([[2 * LN2, 2 * LN2, LN2, LN2, 0.0]] * 2)
    spans = span_breakdown({"forward": forward, "reverse": reverse}, {"x": (0, 2), "y": (2, 4)})
    assert spans["forward"]["x"] == {
        "bits_per_token": 1.0,
        "perplexity": 2.0,
        "bits_per_unit": 2.0,
        "tokens": 4,
    }
    assert spans["forward"]["y"]["bits_per_token"] == approx(3.0)
    assert spans["forward"]["y"]["perplexity"] == approx(8.0)
    assert spans["reverse"]["x"]["bits_per_token"] == approx(2.0)


def test_profiles_of_orders_with_different_units_are_refused():
    with pytest.raises(DataError, match="do not match"):
        position_profile(
            {"forward": Ragged.from_list([[1.0, 1.0]]), "reverse": Ragged.from_list([[1.0]])},
            reference_order="forward",
        )


def test_segment_breakdown_splits_units_where_str_split_would():
    # Reference: Python's str.split on the same text; a separator closes its own segment.
    texts = ["ab.cd.e", "xyz", ".q"]
    units = SequenceSet.from_list([[ord(c) for c in t] for t in texts], vocab_size=128)
    rng = np.random.default_rng(0)
    losses = Ragged.from_list([rng.gamma(2.0, 1.0, size=len(t) + 1) for t in texts])
    out = segment_breakdown({"forward": losses}, units, separator=ord("."), max_segments=3)
    expected_bits = {0: 0.0, 1: 0.0, 2: 0.0}
    expected_tokens = {0: 0, 1: 0, 2: 0}
    for text, row in zip(texts, losses, strict=True):
        position = 0
        for k, piece in enumerate(text.split(".")):
            width = len(piece) + (1 if position + len(piece) < len(text) else 0)  # + its "."
            expected_bits[min(k, 2)] += row[position : position + width].sum() / LN2
            expected_tokens[min(k, 2)] += width
            position += width
    got = out["forward"]
    assert [got[name]["tokens"] for name in ("segment_0", "segment_1", "segment_2+")] == [
        expected_tokens[0],
        expected_tokens[1],
        expected_tokens[2],
    ]
    assert got["segment_1"]["bits_per_token"] == approx(expected_bits[1] / expected_tokens[1])
    assert got["segment_0"]["bits_per_unit"] == approx(expected_bits[0] / 3)


@settings(max_examples=25, deadline=None)
@given(
    n_units=st.integers(1, 30),
    n_seeds=st.integers(1, 4),
    scale=st.floats(0.01, 100.0),
    seed=st.integers(0, 2**16),
)
def test_gaps_ignore_unit_order_and_the_unit_of_loss(n_units, n_seeds, scale, seed):
    # Invariances of a ratio of paired totals (common practice, no source): shuffling the
    # units the same way in every order, or measuring loss in other units, changes nothing.
    rng = np.random.default_rng(seed)
    losses = {o: rng.gamma(3.0, 4.0, size=(n_seeds, n_units)) for o in ORDERS}
    shuffle = rng.permutation(n_units)
    n_tokens = rng.integers(1, 9, size=n_units)
    base = summarize_model(losses, reference_order="forward", n_tokens=n_tokens, n_boot=20)
    moved = summarize_model(
        {o: v[:, shuffle] * scale for o, v in losses.items()},
        reference_order="forward",
        n_tokens=n_tokens[shuffle],
        n_boot=20,
    )
    for order in ORDERS:
        assert moved[order]["gap_pct"] == approx(base[order]["gap_pct"], abs=1e-9)
        assert moved[order]["bits_per_token"] == approx(base[order]["bits_per_token"] * scale)
        assert 0.0 < moved[order]["p_value"] <= 1.0


def test_below_floor_accepts_the_true_model_and_chance_dips_but_not_a_leak():
    from retrograde.stats import below_floor

    rng = np.random.default_rng(0)
    floors = rng.gamma(20.0, 1.0, 500)  # nats per unit
    assert below_floor(floors.copy(), floors) is None  # the true distribution itself
    # A model a hair worse than the truth on average, whose test-set mean dips below the
    # floor by chance (about one standard error): consistent with the floor, accepted.
    near = floors + rng.normal(0.001, 0.05, 500)
    near -= near.mean() - floors.mean() + 0.05 / np.sqrt(500)
    assert below_floor(near, floors) is None
    # 5% under the floor on every unit: no model can do that.
    assert below_floor(floors * 0.95, floors) == pytest.approx(-0.05 * floors.mean())


# ------------------------------------------- the t interval against outside references


def test_mean_squares_match_statsmodels_two_way_anova():
    # Reference: statsmodels anova_lm of the additive model z ~ seed + unit (one value a cell).
    import pandas as pd
    from statsmodels.formula.api import ols
    from statsmodels.stats.anova import anova_lm

    from retrograde.stats import mean_squares

    rng = np.random.default_rng(8)
    z = rng.normal(size=(4, 30)) + rng.normal(size=(4, 1)) + rng.normal(size=(1, 30))
    frame = pd.DataFrame(
        {"z": z.ravel(), "seed": np.repeat(np.arange(4), 30), "unit": np.tile(np.arange(30), 4)}
    )
    anova = anova_lm(ols("z ~ C(seed) + C(unit)", frame).fit())
    expected = anova["sum_sq"] / anova["df"]
    got = mean_squares(z)
    assert got == pytest.approx((expected["C(seed)"], expected["C(unit)"], expected["Residual"]))


def test_satterthwaite_df_is_welchs_for_two_sample_variances():
    # Reference: scipy's Welch t-test (equal_var=False) reports the Satterthwaite df.
    from retrograde.stats import satterthwaite_df

    rng = np.random.default_rng(9)
    a, b = rng.normal(0.0, 1.0, size=5), rng.normal(0.0, 3.0, size=8)
    welch = scipy_stats.ttest_ind(a, b, equal_var=False)
    terms = [(a.var(ddof=1) / 5, 4), (b.var(ddof=1) / 8, 7)]
    assert satterthwaite_df(terms) == pytest.approx(welch.df)


def test_one_seed_interval_is_the_textbook_ratio_estimator_interval():
    # Reference: Cochran (1977), Sampling Techniques, section 6.3: the variance of a ratio of
    # totals R = sum y / sum x is n sum (y_i - R x_i)**2 / ((n - 1) (sum x)**2); with Student's
    # t on n - 1 degrees of freedom.
    rng = np.random.default_rng(10)
    x = rng.gamma(3.0, 5.0, size=80)
    y = x * 1.05 + rng.normal(0.0, 2.0, size=80)
    ratio = y.sum() / x.sum()
    se = np.sqrt(80 * ((y - ratio * x) ** 2).sum() / (79 * x.sum() ** 2))
    half = scipy_stats.t.ppf(0.975, 79) * se * 100
    leaf = summarize_model(
        {"forward": x[None], "reverse": y[None]}, reference_order="forward", n_tokens=np.ones(80)
    )["reverse"]
    assert leaf["gap_pct"] == approx(100 * (ratio - 1))
    assert leaf["gap_pct_low"] == approx(100 * (ratio - 1) - half)
    assert leaf["gap_pct_high"] == approx(100 * (ratio - 1) + half)


@pytest.mark.parametrize("paired", [True, False])
def test_seed_only_variation_gives_the_one_sample_t_interval_of_the_per_seed_gaps(paired):
    # Reference: scipy.stats.ttest_1samp(...).confidence_interval. When every unit of a seed
    # moves by the same factor (no unit-to-unit variation), the gap's uncertainty is that of
    # the mean of the seeds' gaps alone.
    rng = np.random.default_rng(11)
    effect = rng.normal(0.0, 0.02, size=5)  # per-seed relative effect of the order
    reference = np.full((5, 40), 30.0)
    order = reference * (1.0 + effect[:, None])
    leaf = summarize_model(
        {"forward": reference, "reverse": order},
        reference_order="forward",
        n_tokens=np.ones(40),
        paired_seeds=paired,
    )["reverse"]
    expected = scipy_stats.ttest_1samp(100 * effect, 0.0).confidence_interval(0.95)
    assert leaf["gap_pct_low"] == approx(expected.low)
    assert leaf["gap_pct_high"] == approx(expected.high)


def test_the_p_value_agrees_with_the_interval():
    from retrograde.stats import gap_interval

    rng = np.random.default_rng(12)
    for _ in range(200):
        reference = rng.gamma(4.0, 10.0, size=(4, 30))
        order = reference * (1 + rng.normal(0.0, 0.02, size=(4, 1))) + rng.normal(0, 2, (4, 30))
        for paired in (True, False):
            out = gap_interval(order, reference, level=0.95, with_seeds=True, paired=paired)
            assert (out.p_value < 0.05) == (out.low > 0 or out.high < 0)
            assert out.low < out.gap_pct < out.high


def test_significant_gaps_have_intervals_that_exclude_zero():
    rng = np.random.default_rng(13)
    for repetition in range(30):
        losses = simulate(rng, n_units=60, n_seeds=3, shift=0.02)
        leaf = summarize_model(
            losses, reference_order="forward", n_tokens=np.ones(60), seed=repetition
        )["reverse"]
        if leaf["p_value"] < 0.05:
            assert leaf["gap_pct_low"] > 0 or leaf["gap_pct_high"] < 0


@pytest.mark.parametrize(
    ("n_seeds", "paired", "widest"),
    # Paired, 3 seeds leave the seed variance 2 degrees of freedom: a t interval on them is
    # on average about 1.95x the known-variance width (t_2 quantile 4.30 x E[s]/sigma 0.886
    # / 1.96). Unpaired (Welch; what the table uses for fits of two orders that share
    # nothing, as here) it has up to 4: about 1.33x, the goal of at most 1.5x.
    [(3, True, 2.1), (10, True, 1.5), (3, False, 1.5), (10, False, 1.5)],
)
def test_t_interval_covers_zero_at_its_level_and_is_not_much_wider_than_needed(
    n_seeds, paired, widest
):
    # Calibration on the noise model above (true gap 0; independent training effects per
    # order): 300 repetitions, binomial sd of the coverage ~1.3%. The longer version, with
    # real fits, is benchmarks/bench_coverage.py.
    rng = np.random.default_rng(2025 + n_seeds)
    covered, widths, gaps = [], [], []
    for repetition in range(300):
        leaf = summarize_model(
            simulate(rng, n_units=100, n_seeds=n_seeds, shift=0.0, seed_sd=0.01),
            reference_order="forward",
            n_tokens=np.ones(100),
            paired_seeds=paired,
            n_flips=10,
            seed=repetition,
        )["reverse"]
        covered.append(leaf["gap_pct_low"] <= 0.0 <= leaf["gap_pct_high"])
        widths.append(leaf["gap_pct_high"] - leaf["gap_pct_low"])
        gaps.append(leaf["gap_pct"])
    assert 0.92 <= np.mean(covered) <= 0.98
    assert np.mean(widths) <= widest * 3.92 * np.std(gaps, ddof=1)


def test_bootstrap_interval_is_still_available_and_close_on_a_large_sample():
    losses = simulate(np.random.default_rng(14), n_units=400, n_seeds=1, shift=0.02)
    t_leaf, boot_leaf = (
        summarize_model(
            losses, reference_order="forward", n_tokens=np.ones(400), interval=kind, n_boot=4000
        )["reverse"]
        for kind in ("t", "bootstrap")
    )
    width = t_leaf["gap_pct_high"] - t_leaf["gap_pct_low"]
    assert boot_leaf["gap_pct_low"] == approx(t_leaf["gap_pct_low"], abs=0.1 * width)
    assert boot_leaf["gap_pct_high"] == approx(t_leaf["gap_pct_high"], abs=0.1 * width)
    with pytest.raises(ConfigError, match="interval='z' is invalid"):
        summarize_model(losses, reference_order="forward", n_tokens=np.ones(400), interval="z")


# ------------------------------------------------------------- end-of-unit cost


def test_end_marker_cost_has_the_closed_form_for_a_model_that_never_knows_the_position():
    from retrograde.stats import end_marker_cost

    for length in (1, 20, 64, 1000):
        end, content = end_marker_cost(length)
        assert end == pytest.approx(math.log2(length + 1) / length)
        assert content == pytest.approx(math.log2((length + 1) / length))
    assert sum(end_marker_cost(64)) == pytest.approx(0.1165, abs=5e-5)
    assert sum(end_marker_cost(20)) == pytest.approx(0.2900, abs=5e-5)
    assert end_marker_cost(5, known_positions=5) == (0.0, 0.0)  # knows every position


def test_a_bigram_on_long_fixed_length_units_pays_the_position_blind_end_cost():
    # A bigram sees the begin marker only before the first token, so at the other L events
    # (L - 1 tokens, then the end marker) it cannot tell where it is; on a long first-order
    # chain it learns the transitions almost exactly, so its excess over the exact floor is
    # the end-of-unit cost alone.
    from retrograde import families, sources
    from retrograde.stats import end_marker_cost

    length = 128
    source = sources.make("markov", vocab_size=4, order=1, length=length, chain_seed=0)
    test = source.generate(1000, seed=101)
    logprobs = families.make("ngram", order=2).fit(source.generate(3000, seed=1)).logprobs(test)
    unit = -logprobs.sums()
    end = -logprobs.values[logprobs.offsets[1:] - 1]
    leaf = summarize_model(
        {"forward": unit[None]},
        reference_order="forward",
        n_tokens=test.lengths,
        floors=source.nll(test),
        end_nll={"forward": end[None]},
    )["forward"]
    # The formula of a model that never knows the position, to 1e-3 bits per token:
    assert leaf["excess_bits_per_token"] == pytest.approx(sum(end_marker_cost(length)), abs=1e-3)
    # and, closer, its form for one known position (the bigram's begin marker):
    end_bits, content_bits = end_marker_cost(length, known_positions=1)
    assert leaf["end_bits_per_token"] == pytest.approx(end_bits, abs=1e-4)
    assert leaf["content_excess_bits_per_token"] == pytest.approx(content_bits, abs=5e-4)
    assert leaf["unit_length"] == length


def test_content_gap_leaves_out_the_end_marker_the_whole_gap_keeps():
    # Two orders that differ only in their content tokens; both pay the same end marker.
    rng = np.random.default_rng(15)
    content = rng.gamma(4.0, 10.0, size=(3, 50))
    end = np.full((3, 50), 8.0)
    losses = {"forward": content + end, "reverse": content * 1.10 + end}
    leaves = summarize_model(
        losses,
        reference_order="forward",
        n_tokens=np.full(50, 16),
        end_nll={"forward": end, "reverse": end},
        floors=np.full(50, 20.0),
    )
    reverse = leaves["reverse"]
    assert reverse["content_gap_pct"] == approx(10.0)
    whole = 100 * (losses["reverse"].sum() / losses["forward"].sum() - 1)
    assert reverse["gap_pct"] == approx(whole) and reverse["gap_pct"] < 10.0  # diluted
    assert reverse["content_gap_pct_low"] <= 10.0 <= reverse["content_gap_pct_high"]
    assert reverse["end_bits_per_token"] == approx(8.0 / LN2 / 16)
    assert reverse["content_excess_bits_per_token"] == approx(
        reverse["excess_bits_per_token"] - reverse["end_bits_per_token"]
    )
    assert leaves["forward"]["content_gap_pct"] == 0.0


def test_end_losses_must_match_the_unit_losses():
    losses = {"forward": np.ones((2, 4)) * 3, "reverse": np.ones((2, 4)) * 4}
    with pytest.raises(DataError, match="end_nll has no losses for order"):
        summarize_model(
            losses,
            reference_order="forward",
            n_tokens=np.ones(4),
            end_nll={"forward": np.ones((2, 4))},
        )
    with pytest.raises(DataError, match="no larger than the unit's whole loss"):
        summarize_model(
            losses,
            reference_order="forward",
            n_tokens=np.ones(4),
            end_nll={"forward": np.ones((2, 4)) * 5, "reverse": np.ones((2, 4))},
        )


def test_a_reference_without_content_loss_gets_no_content_gap_but_keeps_the_end_cost():
    # Units of one token the model always gets right: all the loss is the end marker's.
    end = np.full((1, 12), 0.5)
    losses = {"forward": end.copy(), "reverse": end * 1.2}
    leaves = summarize_model(
        losses,
        reference_order="forward",
        n_tokens=np.ones(12),
        end_nll={"forward": end, "reverse": end * 1.2},
    )
    assert "content_gap_pct" not in leaves["reverse"]
    assert leaves["reverse"]["end_bits_per_token"] == approx(0.6 / LN2)


def test_a_t_intervals_lower_end_stops_at_minus_100_percent():
    # A gap is 100 (R - 1) with R a ratio of losses >= 0, so it is never below -100%
    # (common practice, no source: an interval is cut to the parameter's range).
    from retrograde.stats import gap_interval

    rng = np.random.default_rng(3)
    reference = rng.gamma(4.0, 10.0, size=(3, 20))
    order = reference * np.array([[0.2], [1.0], [3.0]])  # seeds that disagree wildly
    row = gap_interval(order, reference, level=0.99, with_seeds=True, paired=True)
    assert row.low == -100.0 < row.gap_pct < row.high
    low, high = row.at(0.999)
    assert low == -100.0 and high > row.high


def test_segment_breakdown_takes_an_empty_last_unit():
    # The separator count per unit once indexed past the tokens when the last unit was
    # empty (the same code as the fields order's; now data.earlier_in_unit).
    from retrograde import Ragged, SequenceSet
    from retrograde.stats import segment_breakdown

    units = SequenceSet.from_list([[1, 0, 2], []], vocab_size=3)
    losses = Ragged(np.full(5, np.log(2.0)), np.array([0, 4, 5]))
    out = segment_breakdown({"forward": losses}, units, separator=0, max_segments=2)
    assert out["forward"]["segment_0"]["tokens"] == 2  # the separator and the token before
    assert out["forward"]["segment_1+"]["tokens"] == 1
