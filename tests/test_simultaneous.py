"""Simultaneous intervals: in every row the interval shown excludes 0 exactly when the row is
significant (Holm), and the per-cell interval stays in metrics.json."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from retrograde.errors import DataError
from retrograde.report import format_table
from retrograde.stats import adjust_holm, simultaneous_intervals, summarize_model


def build_table(seed: int, n_seeds: int, n_units: int, effects: list[float], noise: float):
    """A table of len(effects) sources x one model x (forward, reverse), and its draws."""
    rng = np.random.default_rng(seed)
    table, draws = {}, {}
    for index, effect in enumerate(effects):
        base = rng.gamma(4.0, 10.0, size=n_units)
        forward = base + rng.normal(0.0, noise, size=(n_seeds, n_units))
        reverse = base * (1 + effect) + rng.normal(0.0, noise, size=(n_seeds, n_units))
        source = f"s{index}"
        draws[source] = {"m": {}}
        table[source] = {
            "m": summarize_model(
                {"forward": forward, "reverse": reverse},
                reference_order="forward",
                n_tokens=np.full(n_units, 10),
                n_boot=400,
                seed=index,
                bootstrap_gaps=draws[source]["m"],
            )
        }
    adjust_holm(table)
    simultaneous_intervals(table, draws)
    return table


def reverse_rows(table):
    return [models["m"]["reverse"] for models in table.values()]


# Sizes and seed counts cover: 1-2 seeds (the p-value is the sign-flip test's alone),
# 3 and 5 seeds (the bootstrap p-value counts too), gaps near and far from the threshold.
CASES = [
    (seed, n_seeds, effects)
    for seed in range(6)
    for n_seeds in (1, 2, 3, 5)
    for effects in (
        [0.0, 0.005, 0.01, 0.02, 0.05, 0.1],
        [0.0, 0.0, 0.0, 0.003, 0.006, 0.012, 0.024, -0.01],
    )
]


@pytest.mark.parametrize(("seed", "n_seeds", "effects"), CASES)
def test_every_rows_interval_excludes_zero_exactly_when_the_row_is_significant(
    seed, n_seeds, effects
):
    table = build_table(seed, n_seeds, 40, effects, noise=3.0)
    for leaf in reverse_rows(table):
        excludes = leaf["gap_pct_simultaneous_low"] > 0 or leaf["gap_pct_simultaneous_high"] < 0
        assert excludes == leaf["significant"], leaf
        assert (
            leaf["gap_pct_simultaneous_low"] <= leaf["gap_pct"] <= leaf["gap_pct_simultaneous_high"]
        )
    # ... and the Markdown a reader sees says the same row by row
    for line in format_table(table, "markdown").splitlines():
        if "`reverse`" not in line:
            continue
        cells = [c.strip() for c in line.strip("|").split("|")]
        interval = cells[3].split("[")[1].split("]")[0]
        low, high = (float(x) for x in interval.split(","))
        assert (low > 0 or high < 0) == (cells[-1] == "**yes**"), line


def test_the_level_of_a_significant_row_is_holms_step_and_the_rest_share_the_stopping_step():
    table = build_table(3, 5, 60, [0.2, 0.1, 0.05, 0.0, 0.0], noise=1.0)
    rows = reverse_rows(table)
    p_values = np.array([leaf["p_value"] for leaf in rows])
    # Reference: statsmodels' Holm decides the same rows (Holm 1979).
    reject = multipletests(p_values, alpha=0.05, method="holm")[0]
    assert [leaf["significant"] for leaf in rows] == reject.tolist()
    m, r = len(rows), int(reject.sum())
    ranks = np.argsort(p_values, kind="stable").tolist()
    for index, leaf in enumerate(rows):
        k = ranks.index(index) + 1  # 1-based rank of this p-value
        divisor = m - k + 1 if leaf["significant"] else m - r
        assert leaf["simultaneous_level"] == pytest.approx(1 - 0.05 / divisor, rel=1e-6)


def test_simultaneous_intervals_contain_the_per_cell_ones_which_metrics_json_keeps():
    table = build_table(1, 3, 50, [0.0, 0.03, 0.1], noise=2.0)
    for leaf in reverse_rows(table):
        assert leaf["gap_pct_simultaneous_low"] <= leaf["gap_pct_low"]
        assert leaf["gap_pct_high"] <= leaf["gap_pct_simultaneous_high"]
    assert '"gap_pct_low"' in format_table(table, "json")
    assert '"gap_pct_simultaneous_low"' in format_table(table, "json")


def test_one_tested_gap_gets_the_plain_percentile_interval_at_95_percent():
    table = build_table(2, 3, 50, [0.2], noise=2.0)
    (leaf,) = reverse_rows(table)
    assert leaf["simultaneous_level"] == 0.95 and leaf["significant"]
    assert leaf["gap_pct_simultaneous_low"] == leaf["gap_pct_low"]
    assert leaf["gap_pct_simultaneous_high"] == leaf["gap_pct_high"]


def test_a_row_decided_by_the_sign_flip_test_is_stretched_to_zero_and_marked():
    # Constructed: the bootstrap draws lie above 0, the decisive p-value does not pass Holm.
    table = {"s": {"m": {"forward": {}, "reverse": {"gap_pct": 2.0, "p_value": 0.2}}}}
    adjust_holm(table)
    draws = {"s": {"m": {"reverse": np.linspace(1.0, 3.0, 1001)}}}
    leaf = simultaneous_intervals(table, draws)["s"]["m"]["reverse"]
    assert leaf["significant"] is False
    assert (leaf["gap_pct_simultaneous_low"], leaf["gap_pct_simultaneous_high"]) == (0.0, 2.95)
    assert leaf["gap_pct_simultaneous_extended"] is True
    # a small p-value whose draws straddle 0 is not significant: both must agree
    table = {"s": {"m": {"forward": {}, "reverse": {"gap_pct": 0.5, "p_value": 0.001}}}}
    adjust_holm(table)
    draws = {"s": {"m": {"reverse": np.linspace(-1.0, 2.0, 1001)}}}
    leaf = simultaneous_intervals(table, draws)["s"]["m"]["reverse"]
    assert leaf["significant"] is False and leaf["gap_pct_simultaneous_extended"] is False


def test_without_a_holm_verdict_or_draws_it_says_what_to_call_first():
    table = {"s": {"m": {"forward": {}, "reverse": {"p_value": 0.01}}}}
    with pytest.raises(DataError, match="adjust_holm"):
        simultaneous_intervals(table, {})
    adjust_holm(table)
    with pytest.raises(DataError, match="bootstrap draws"):
        simultaneous_intervals(table, {})
