"""GF(2) linear algebra and the ``linear_gf2`` calibration source."""

import itertools
import math

import numpy as np
import pytest
import sympy
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde import SequenceSet
from retrograde.errors import ConfigError, DataError
from retrograde.sources import _gf2, make


def test_inverse_times_matrix_is_the_identity_mod_2():
    source = make("linear_gf2", n_bits=48, nonzeros=3, matrix_seed=11)
    identity = np.eye(48, dtype=np.int64)
    # Plain integer products reduced mod 2, independent of _gf2.matmul.
    product = (source.matrix_.astype(np.int64) @ source.inverse_.astype(np.int64)) % 2
    assert np.array_equal(product, identity)
    product = (source.inverse_.astype(np.int64) @ source.matrix_.astype(np.int64)) % 2
    assert np.array_equal(product, identity)


@pytest.mark.parametrize("matrix_seed", [0, 1, 2])
def test_inverse_agrees_with_sympy_inv_mod_2(matrix_seed):
    source = make("linear_gf2", n_bits=9, nonzeros=2, matrix_seed=matrix_seed)
    reference = sympy.Matrix(source.matrix_.astype(int).tolist()).inv_mod(2)
    assert source.inverse_.astype(int).tolist() == reference.tolist()


def test_inverse_refuses_a_matrix_whose_rows_all_have_even_weight():
    # Every row has an even number of ones, so A @ (1,..,1) = 0 mod 2 and A is singular.
    rng = np.random.default_rng(0)
    matrix = rng.integers(0, 2, size=(8, 8))
    matrix[:, -1] = matrix[:, :-1].sum(axis=1) % 2
    assert sympy.Matrix(matrix.tolist()).det() % 2 == 0  # sympy agrees it is singular mod 2
    with pytest.raises(ValueError, match="singular"):
        _gf2.inverse(matrix)


def test_zero_nonzeros_gives_a_permutation_matrix():
    matrix = make("linear_gf2", n_bits=20, nonzeros=0, matrix_seed=5).matrix_
    assert matrix.sum() == 20
    assert np.array_equal(matrix.sum(axis=0), np.ones(20))
    assert np.array_equal(matrix.sum(axis=1), np.ones(20))


@pytest.mark.parametrize("nonzeros", [1, 2, 4, 7])
def test_nonzeros_sets_the_ones_per_row_of_each_triangular_factor(nonzeros):
    n = 24
    source = make("linear_gf2", n_bits=n, nonzeros=nonzeros, matrix_seed=3)
    lower, upper = source.factors_["lower"], source.factors_["upper"]
    rows = np.arange(n)
    # As documented: 1 on the diagonal plus min(nonzeros, room) ones per row.
    assert np.array_equal(np.tril(lower, -1).sum(axis=1), np.minimum(nonzeros, rows))
    assert np.array_equal(np.triu(upper, 1).sum(axis=1), np.minimum(nonzeros, n - 1 - rows))
    assert np.array_equal(np.diag(lower), np.ones(n)) and np.array_equal(np.diag(upper), np.ones(n))
    assert not np.triu(lower, 1).any() and not np.tril(upper, -1).any()
    nnz = int(source.matrix_.sum())
    assert n <= nnz <= min(n * n, n * (1 + nonzeros) ** 2)
    metadata = source.metadata()
    assert metadata["nonzeros_matrix"] == nnz
    assert metadata["nonzeros_inverse"] == int(source.inverse_.sum())
    assert metadata["nonzeros_lower_factor"] == n + int(np.minimum(nonzeros, rows).sum())


def test_more_nonzeros_make_a_denser_matrix():
    counts = [
        int(make("linear_gf2", n_bits=64, nonzeros=m, matrix_seed=0).matrix_.sum())
        for m in (0, 1, 3, 8)
    ]
    assert counts == sorted(counts) and counts[0] == 64 and counts[-1] > 4 * 64


def test_every_generated_unit_is_x_followed_by_a_times_x_mod_2():
    source = make("linear_gf2", n_bits=16, nonzeros=2, matrix_seed=1)
    units = source.generate(300, seed=4)
    matrix = units.tokens.reshape(300, 32).astype(np.int64)
    x, y = matrix[:, :16], matrix[:, 16:]
    assert np.array_equal(y, (x @ source.matrix_.T.astype(np.int64)) % 2)
    # x is uniform: each bit is 1 about half the time (binomial, 4800 draws, 5 sigma).
    assert abs(x.mean() - 0.5) < 5 * math.sqrt(0.25 / x.size)
    assert units.vocab_size == 2 and units.lengths.tolist() == [32] * 300


def test_floor_is_n_ln_2_and_a_tampered_unit_is_refused():
    source = make("linear_gf2", n_bits=10, nonzeros=1, matrix_seed=0)
    units = source.generate(4, seed=0)
    assert source.nll(units) == pytest.approx(np.full(4, 10 * math.log(2)))
    tokens = units.tokens.copy()
    tokens[2 * 20 + 15] ^= 1  # flip one y bit of unit 2
    with pytest.raises(DataError, match="unit 2 has probability 0"):
        source.nll(units.with_tokens(tokens))


def test_the_matrix_depends_on_matrix_seed_only():
    source = make("linear_gf2", n_bits=12, nonzeros=2, matrix_seed=8)
    same = make("linear_gf2", n_bits=12, nonzeros=2, matrix_seed=8)
    assert np.array_equal(source.matrix_, same.matrix_)
    other = make("linear_gf2", n_bits=12, nonzeros=2, matrix_seed=9)
    assert not np.array_equal(source.matrix_, other.matrix_)
    assert not np.array_equal(source.generate(5, seed=0).tokens, source.generate(5, seed=1).tokens)


def test_spans_name_x_and_y_and_refuse_another_length():
    source = make("linear_gf2", n_bits=6, nonzeros=1)
    assert source.spans(12) == {"x": (0, 6), "y": (6, 12)}
    with pytest.raises(DataError, match="units have 12 tokens, not 10"):
        source.spans(10)


@pytest.mark.parametrize(
    ("params", "text"),
    [
        ({"n_bits": 0}, "parameter n_bits=0 is invalid; allowed: an integer >= 1 and <= 1024"),
        (
            {"n_bits": 4, "nonzeros": 4},
            "parameter nonzeros=4 is invalid; allowed: an integer >= 0 and <= 3",
        ),
        ({"matrix_seed": -1}, "parameter matrix_seed=-1 is invalid"),
        (
            {"structure": "band"},
            "parameter structure='band' is invalid; allowed: one of 'lu', 'banded'"
            " (did you mean 'banded'?)",
        ),
    ],
)
def test_invalid_parameters_are_refused(params, text):
    with pytest.raises(ConfigError, match="source 'linear_gf2'") as info:
        make("linear_gf2", **params)
    assert text in str(info.value)


def test_nll_refuses_a_unit_of_the_wrong_length():
    source = make("linear_gf2", n_bits=3, nonzeros=0)
    with pytest.raises(DataError, match="unit 0 has 5 tokens, expected 6"):
        source.nll(SequenceSet.from_list([[0, 1, 0, 1, 1]], vocab_size=2))


@settings(max_examples=40, deadline=None)
@given(
    n=st.integers(1, 40),
    nonzeros_fraction=st.floats(0, 1),
    seed=st.integers(0, 2**32 - 1),
)
def test_any_constructed_matrix_is_invertible_and_its_inverse_checks_out(
    n, nonzeros_fraction, seed
):
    nonzeros = int(nonzeros_fraction * (n - 1))
    matrix, _ = _gf2.random_invertible(n, nonzeros, np.random.default_rng(seed))
    inverse = _gf2.inverse(matrix)
    identity = np.eye(n, dtype=np.int64)
    assert np.array_equal((matrix.astype(np.int64) @ inverse) % 2, identity)
    assert np.array_equal((inverse.astype(np.int64) @ matrix) % 2, identity)


# ----------------------------------------------------------------------- banded structure
@pytest.mark.parametrize(("n", "nonzeros"), [(1, 0), (7, 1), (12, 3), (9, 8)])
def test_banded_rows_hold_at_most_one_plus_nonzeros_ones(n, nonzeros):
    source = make("linear_gf2", n_bits=n, nonzeros=nonzeros, structure="banded", matrix_seed=4)
    rows = np.arange(n)
    band = source.factors_["upper"]
    # Row i of the band has 1 + min(nonzeros, n - 1 - i) ones; P and Q only move them.
    assert sorted(source.matrix_.sum(axis=1).tolist()) == sorted(
        (1 + np.minimum(nonzeros, n - 1 - rows)).tolist()
    )
    rebuilt = (source.factors_["lower"] @ band)[source.factors_["row_order"]]
    assert np.array_equal(rebuilt[:, source.factors_["column_order"]], source.matrix_)
    assert source.metadata()["max_row_ones_matrix"] == 1 + min(nonzeros, n - 1)
    reference = sympy.Matrix(source.matrix_.astype(int).tolist()).inv_mod(2)
    assert source.inverse_.astype(int).tolist() == reference.tolist()


def test_the_inverse_of_a_one_band_matrix_is_the_full_upper_triangle():
    # (I + S)^-1 = I + S + ... + S^(n-1) over GF(2) for the nilpotent shift S (Neumann
    # series; common practice, no source), so every entry on and above the diagonal is 1.
    # Checked with sympy's inv_mod.
    band = _gf2.banded_upper(11, 1)
    reference = np.array(sympy.Matrix(band.astype(int).tolist()).inv_mod(2), dtype=np.int64)
    assert np.array_equal(reference, np.triu(np.ones((11, 11), dtype=np.int64)))
    assert np.array_equal(_gf2.inverse(band), reference)
    source = make("linear_gf2", n_bits=11, nonzeros=1, structure="banded", matrix_seed=0)
    assert source.metadata()["max_row_ones_inverse"] == 11  # P and Q keep the row weights
    assert source.metadata()["nonzeros_inverse"] == 11 * 12 // 2


def test_structure_changes_the_matrix_but_not_the_units_contract():
    lu = make("linear_gf2", n_bits=8, nonzeros=1, matrix_seed=3)
    banded = make("linear_gf2", n_bits=8, nonzeros=1, matrix_seed=3, structure="banded")
    assert lu.get_params()["structure"] == "lu" and banded.get_params()["structure"] == "banded"
    assert not np.array_equal(lu.matrix_, banded.matrix_)
    units = banded.generate(50, seed=0)
    assert banded.nll(units) == pytest.approx(np.full(50, 8 * math.log(2)))


# -------------------------------------------------------------------------- parity weights
def _fewest_by_brute_force(forms, cap):
    """The definition: try every subset of the earlier forms, smallest first."""
    result = []
    for t, form in enumerate(forms):
        found = None
        for k in range(len(forms[:t]) + 1):
            for subset in itertools.combinations(forms[:t], k):
                xor = 0
                for value in subset:
                    xor ^= value
                if xor == form:
                    found = k
                    break
            if found is not None:
                break
        result.append(-1 if found is None else min(found, cap + 1))
    return result


@settings(max_examples=60, deadline=None)
@given(
    forms=st.lists(st.integers(0, 2**5 - 1), min_size=1, max_size=11),
    cap=st.integers(1, 7),
)
def test_fewest_xor_terms_matches_trying_every_subset(forms, cap):
    assert _gf2.fewest_xor_terms(forms, cap) == _fewest_by_brute_force(forms, cap)


def test_parity_weights_read_the_rows_of_the_matrix_forwards():
    source = make("linear_gf2", n_bits=6, nonzeros=1, structure="banded", matrix_seed=2)
    weights = source.parity_weights()
    assert weights[:6] == [-1] * 6  # x is uniform: no bit follows from the earlier ones
    # A y bit is never worse than its row of A, and at least 1.
    for i, weight in enumerate(weights[6:]):
        assert 1 <= weight <= int(source.matrix_[i].sum())


def test_parity_weights_of_a_permuted_copy_read_backwards_are_all_one():
    source = make("linear_gf2", n_bits=7, nonzeros=0, matrix_seed=1)
    weights = source.parity_weights(np.arange(14)[::-1])
    assert weights == [-1] * 7 + [1] * 7  # y is a shuffle of x: each x bit is one y bit


def test_parity_weights_of_a_one_band_matrix_are_heavier_backwards():
    source = make("linear_gf2", n_bits=10, nonzeros=1, structure="banded", matrix_seed=298)
    forward = source.parity_weights()
    backward = source.parity_weights(np.arange(20)[::-1])
    assert max(forward) == 2
    assert sorted(backward[10:], reverse=True)[:3] == [7, 4, 4]


def test_parity_weights_refuse_a_list_that_is_not_a_permutation_or_a_cap_below_1():
    source = make("linear_gf2", n_bits=3, nonzeros=0)
    with pytest.raises(ValueError, match="permutation of 0..5"):
        source.parity_weights(np.array([0, 1, 2, 3, 4, 4]))
    with pytest.raises(ValueError, match="cap must be at least 1, got 0"):
        source.parity_weights(cap=0)


# ------------------------------------------------------------ the shipped source config
def _shipped_config() -> dict:
    from importlib import resources

    import yaml

    text = (resources.files("retrograde") / "conf/source/linear_gf2.yaml").read_text()
    return yaml.safe_load(text)


def test_the_shipped_config_is_sparse_forwards_and_dense_backwards():
    config = _shipped_config()
    source = make(config["name"], **config["params"])
    n = source.n_bits
    assert source.matrix_.sum(axis=1).max() <= 2  # each y bit: parity of <= 2 x bits
    # Reference: sympy's inv_mod gives A^-1 over GF(2); for a banded A with one
    # superdiagonal it is a permuted full upper triangle, n (n + 1) / 2 ones.
    inverse = np.array(sympy.Matrix(source.matrix_.astype(int).tolist()).inv_mod(2), dtype=np.int64)
    assert int(inverse.sum()) == n * (n + 1) // 2 and int(inverse.sum(axis=1).max()) == n


@pytest.mark.slow
def test_the_shipped_config_shows_an_mlp_reverse_gap_and_a_forward_fit_at_the_floor():
    # What docs/sources.md reports (benchmarks/bench_gf2_defaults.py), one seed.
    from retrograde import families, orders
    from retrograde.sources import source_units
    from retrograde.stats import unit_nll

    config = _shipped_config()
    source = make(config["name"], **config["params"])
    made = source_units(
        source, fractions=(0.8, 0.1, 0.1), salt="retrograde", **config["calibration"]
    )
    params = {
        "window": 2 * source.n_bits,
        "hidden": 64,
        "epochs": 20,
        "lr": 0.01,
        "batch_size": 128,
        "progress": False,
    }
    nats = {}
    for name in ("forward", "reverse"):
        order = orders.make(name)
        split = {k: order.apply_set(v) for k, v in made.splits.items()}
        fitted = families.make("mlp", **params).fit(split["train"], split["valid"], seed=0)
        nats[name] = float(unit_nll(fitted.logprobs(split["test"])).sum())
    floor = float(made.floors.sum())  # n ln 2 per unit, exact
    assert nats["forward"] < 1.02 * floor
    assert nats["reverse"] > 1.08 * nats["forward"]
