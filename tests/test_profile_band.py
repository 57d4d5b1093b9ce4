"""The position profile's buckets and its uncertainty band."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats as scipy_stats

from retrograde import Ragged
from retrograde.stats import position_profile

LN2 = math.log(2.0)


def losses(rng: np.random.Generator, lengths: list[int]) -> Ragged:
    return Ragged.from_list([rng.gamma(2.0, 1.0, size=n + 1) for n in lengths])


def test_fixed_length_units_longer_than_the_buckets_get_whole_positions_per_bucket():
    rng = np.random.default_rng(0)
    forward, reverse = losses(rng, [64] * 30), losses(rng, [64] * 30)
    profile = position_profile({"forward": forward, "reverse": reverse}, reference_order="forward")
    # 64 positions into at most 50 buckets: ceil(64 / 50) = 2 positions each, 32 buckets
    assert profile["position"] == "absolute" and profile["bucket_width"] == 2
    assert profile["x"] == [float(2 * j) for j in range(32)]
    assert profile["tokens"] == [60] * 32  # 2 positions x 30 units, no bucket of 1 or 3
    assert profile["units"] == [30] * 32
    by_hand = [np.mean([forward[i][2 * j : 2 * j + 2] for i in range(30)]) / LN2 for j in range(32)]
    assert profile["bits"]["forward"] == pytest.approx(by_hand, rel=1e-5)


def test_the_band_of_exact_positions_is_the_standard_error_of_per_unit_differences():
    rng = np.random.default_rng(1)
    forward, reverse = losses(rng, [12] * 40), losses(rng, [12] * 40)
    profile = position_profile({"forward": forward, "reverse": reverse}, reference_order="forward")
    differences = (reverse.values - forward.values).reshape(40, 13)[:, :12] / LN2
    # reference: scipy.stats.sem (ddof 1) over units, position by position
    assert profile["diff_se"]["reverse"] == pytest.approx(
        scipy_stats.sem(differences, axis=0).tolist(), rel=1e-5
    )
    assert profile["diff_se"]["forward"] == [0.0] * 12


def test_the_band_of_a_bucket_treats_units_as_clusters():
    rng = np.random.default_rng(2)
    lengths = rng.integers(5, 40, size=60).tolist()
    forward, reverse = losses(rng, lengths), losses(rng, lengths)
    profile = position_profile(
        {"forward": forward, "reverse": reverse}, reference_order="forward", n_buckets=4
    )
    assert profile["position"] == "relative"
    # reference: statsmodels OLS of the per-token differences on a constant with
    # cluster-robust (unit) standard errors; without its small-sample factor, times
    # sqrt(G / (G - 1)) for G units, it is the linearized ratio-mean standard error
    for bucket in range(4):
        rows, groups = [], []
        for unit, n in enumerate(lengths):
            positions = np.arange(n)
            inside = (positions * 4) // n == bucket
            difference = (reverse[unit][:n] - forward[unit][:n])[inside] / LN2
            rows += difference.tolist()
            groups += [unit] * int(inside.sum())
        fit = sm.OLS(np.array(rows), np.ones((len(rows), 1))).fit(
            cov_type="cluster", cov_kwds={"groups": np.array(groups), "use_correction": False}
        )
        g = len(set(groups))
        assert profile["units"][bucket] == g
        assert profile["diff_bits"]["reverse"][bucket] == pytest.approx(fit.params[0], rel=1e-5)
        assert profile["diff_se"]["reverse"][bucket] == pytest.approx(
            fit.bse[0] * math.sqrt(g / (g - 1)), rel=1e-5
        )
