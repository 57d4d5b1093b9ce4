"""The ``markov`` calibration source: exact stationary law, entropy rate, reversal, floors."""

import math

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

from retrograde import SequenceSet
from retrograde.errors import ConfigError, DataError
from retrograde.sources import make
from retrograde.sources.markov import (
    entropy_rate,
    sequence_nll,
    stationary_distribution,
    time_reversed,
)

# A non-reversible 3-state chain (mostly cycling 0 -> 1 -> 2 -> 0), chosen by hand.
CYCLE = np.array([[0.1, 0.6, 0.3], [0.2, 0.1, 0.7], [0.5, 0.2, 0.3]])


def test_two_state_chain_has_the_closed_form_entropy_rate():
    alpha, beta = 0.2, 0.3
    transition = np.array([[1 - alpha, alpha], [beta, 1 - beta]])
    stationary = stationary_distribution(transition)
    # Cover & Thomas, Elements of Information Theory (2nd ed.), the two-state chain example
    # of Section 4.2 (from memory): mu = (beta, alpha) / (alpha + beta) and
    # H = beta/(alpha+beta) H(alpha) + alpha/(alpha+beta) H(beta) = 0.785673 bits per symbol.
    assert stationary == pytest.approx([beta / (alpha + beta), alpha / (alpha + beta)], abs=1e-12)
    assert entropy_rate(transition, stationary) / math.log(2) == pytest.approx(0.785673, abs=1e-6)


def test_entropy_rate_matches_theorem_4_2_4_with_scipy_as_reference():
    rng = np.random.default_rng(3)
    transition = rng.dirichlet(np.ones(5), size=5)
    # Reference stationary law: scipy's left eigenvector for eigenvalue 1.
    values, vectors = scipy.linalg.eig(transition.T)
    reference = np.real(vectors[:, np.argmin(np.abs(values - 1))])
    reference /= reference.sum()
    stationary = stationary_distribution(transition)
    assert stationary == pytest.approx(reference, abs=1e-12)
    # Cover & Thomas Thm 4.2.4: H = sum_i mu_i H(P_i.), row entropies from scipy.stats.entropy.
    expected = float(reference @ scipy.stats.entropy(transition, axis=1))
    assert entropy_rate(transition, stationary) == pytest.approx(expected, rel=1e-12)


def test_time_reversed_chain_of_a_non_reversible_chain_has_the_same_entropy_rate():
    transition = CYCLE
    stationary = stationary_distribution(transition)
    # Time reversal (Norris, Markov Chains, Thm 1.9.1, from memory): P~_ij = mu_j P_ji / mu_i.
    by_formula = stationary[None, :] * transition.T / stationary[:, None]
    reversed_transition, reversed_stationary = time_reversed(transition, stationary)
    assert reversed_transition == pytest.approx(by_formula, abs=1e-12)
    assert not np.allclose(reversed_transition, transition)  # the chain is not reversible
    assert reversed_stationary == pytest.approx(stationary, abs=1e-12)
    assert entropy_rate(reversed_transition, reversed_stationary) == pytest.approx(
        entropy_rate(transition, stationary), rel=1e-12
    )


@pytest.mark.parametrize("order", [1, 2, 3])
def test_reversed_units_have_the_same_probability_under_the_reversed_chain(order):
    # P(x_1..x_L) under the chain equals P(x_L..x_1) under its time reversal (exact identity).
    source = make("markov", vocab_size=3, order=order, length=20, chain_seed=7)
    units = source.generate(50, seed=2)
    matrix = units.tokens.reshape(50, 20).astype(np.int64)
    reversed_transition, reversed_stationary = time_reversed(source.transition_, source.stationary_)
    assert np.abs(reversed_transition.sum(axis=1) - 1).max() < 1e-12
    backwards = sequence_nll(matrix[:, ::-1].copy(), reversed_transition, reversed_stationary)
    assert backwards == pytest.approx(source.nll(units), abs=1e-9)
    assert entropy_rate(reversed_transition, reversed_stationary) == pytest.approx(
        source.entropy_rate(), rel=1e-10
    )


def test_nll_equals_a_direct_product_of_transition_probabilities():
    source = make("markov", vocab_size=4, order=2, length=12, chain_seed=1)
    units = source.generate(5, seed=0)
    for index in range(5):
        unit = units[index].tolist()
        # A plain loop over the definition (the state is the last two symbols, oldest first).
        log_probability = math.log(source.stationary_[unit[0] * 4 + unit[1]])
        for t in range(2, 12):
            log_probability += math.log(source.transition_[unit[t - 2] * 4 + unit[t - 1], unit[t]])
        assert source.nll(units)[index] == pytest.approx(-log_probability, rel=1e-12)


@pytest.mark.parametrize("order", [1, 2])
def test_mean_nll_of_generated_units_matches_length_times_entropy_rate(order):
    source = make("markov", vocab_size=3, order=order, length=200, chain_seed=4)
    nll = source.nll(source.generate(4000, seed=9))
    standard_error = nll.std(ddof=1) / math.sqrt(len(nll))
    # Exact mean: entropy of the stationary start block plus (L - k) times the entropy rate.
    assert abs(nll.mean() - source.expected_nll()) < 4 * standard_error
    # L x entropy rate differs from it only by the start block (at most k ln V nats).
    start_slack = order * math.log(3)
    assert abs(nll.mean() - 200 * source.entropy_rate()) < 4 * standard_error + start_slack


def test_generated_transitions_follow_the_table_and_start_stationary():
    source = make("markov", vocab_size=3, order=1, length=50, chain_seed=2)
    matrix = source.generate(4000, seed=1).tokens.reshape(4000, 50)
    counts = np.zeros((3, 3))
    np.add.at(counts, (matrix[:, :-1].ravel(), matrix[:, 1:].ravel()), 1)
    for state in range(3):
        # Pearson chi-square goodness of fit per row (scipy.stats.chisquare as the reference).
        expected = counts[state].sum() * source.transition_[state]
        assert scipy.stats.chisquare(counts[state], expected).pvalue > 1e-4
    first = np.bincount(matrix[:, 0], minlength=3)
    assert scipy.stats.chisquare(first, 4000 * source.stationary_).pvalue > 1e-4


def test_units_are_deterministic_for_a_seed_and_the_chain_for_its_own_seed():
    source = make("markov", vocab_size=5, order=2, length=30, chain_seed=3)
    first, again = source.generate(10, seed=4), source.generate(10, seed=4)
    assert np.array_equal(first.tokens, again.tokens)
    assert not np.array_equal(first.tokens, source.generate(10, seed=5).tokens)
    other_units_same_chain = make("markov", vocab_size=5, order=2, length=30, chain_seed=3)
    assert np.array_equal(other_units_same_chain.transition_, source.transition_)
    assert not np.allclose(
        make("markov", vocab_size=5, order=2, length=30, chain_seed=4).transition_,
        source.transition_,
    )
    assert first.vocab_size == 5 and first.doc_ids.tolist() == list(range(10))


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"vocab_size": 40, "order": 2}, "too many; allowed: at most 1024"),
        ({"vocab_size": 1}, "parameter vocab_size=1 is invalid; allowed: an integer >= 2"),
        ({"concentration": 0.0}, "parameter concentration=0.0 is invalid"),
        ({"order": 3, "length": 2}, "parameter length=2 is invalid; allowed: an integer >= 3"),
        ({"order": 0}, "parameter order=0 is invalid"),
    ],
)
def test_invalid_parameters_are_refused_naming_key_value_and_range(params, message):
    with pytest.raises(ConfigError, match="source 'markov'") as info:
        make("markov", **params)
    assert message in str(info.value)


def test_nll_refuses_units_of_another_length():
    source = make("markov", vocab_size=3, length=10)
    with pytest.raises(DataError, match="unit 1 has 9 tokens, expected 10"):
        source.nll(SequenceSet.from_list([[0] * 10, [1] * 9], vocab_size=3))


def test_metadata_reports_the_entropy_rate_in_nats_and_bits():
    source = make("markov", vocab_size=3, order=1, length=10, chain_seed=0)
    metadata = source.metadata()
    assert metadata["entropy_rate_bits"] == pytest.approx(
        metadata["entropy_rate_nats"] / math.log(2)
    )
    assert metadata["expected_floor_nats_per_unit"] == pytest.approx(source.expected_nll())
    assert source.spans(10) == {"first_half": (0, 5), "second_half": (5, 10)}
