"""Scoring helpers: unit NLL, bits per token / byte, losses mapped back to natural order."""

import math

import numpy as np
import pytest
import scipy.stats

from retrograde import Ragged, SequenceSet
from retrograde.errors import DataError
from retrograde.stats import bits_per_byte, bits_per_token, natural_order_losses, unit_nll


def test_unit_nll_is_minus_the_row_sum_end_marker_included():
    rows = [[-0.25, -1.5, -0.125], [-2.0], [-0.5, -0.75]]
    nll = unit_nll(Ragged.from_list(rows))
    assert nll.tolist() == [-math.fsum(r) for r in rows]


def test_bits_per_token_of_an_ideal_code_equals_the_shannon_entropy():
    # A sample whose symbol frequencies equal p, scored with log p, costs exactly H(p) bits
    # per symbol. Reference: scipy.stats.entropy with base 2.
    p = np.array([0.5, 0.25, 0.125, 0.125])
    counts = (p * 64).astype(int)
    logprobs = np.repeat(np.log(p), counts)
    got = bits_per_token(-logprobs.sum(), counts.sum())
    assert float(got) == pytest.approx(scipy.stats.entropy(p, base=2), rel=1e-12)


def test_uniform_byte_model_costs_eight_bits_per_byte_and_per_token():
    # Fact of the trade (common practice, no source): a uniform code over 256 symbols
    # spends log2(256) = 8 bits per symbol.
    total_nats = 1000 * math.log(256)
    assert float(bits_per_token(total_nats, 1000)) == pytest.approx(8.0)
    assert float(bits_per_byte(total_nats, 1000)) == pytest.approx(8.0)
    assert float(bits_per_byte(total_nats, 2000)) == pytest.approx(4.0)


def test_bits_per_token_works_elementwise_on_seed_arrays():
    totals = np.array([1.0, 2.0]) * math.log(2)
    assert bits_per_token(totals, np.array([1, 4])).tolist() == pytest.approx([1.0, 0.5])


def test_zero_token_count_is_refused_with_a_message():
    with pytest.raises(DataError, match="count of tokens is 0"):
        bits_per_token(1.0, 0)


def test_reverse_positions_map_losses_back_to_natural_order():
    units = SequenceSet.from_list([[5, 6, 7], [8, 9]], vocab_size=10)
    # The model saw the reversed units (7 6 5 | 9 8) and scored them in that order.
    scores = Ragged.from_list([[-0.3, -0.2, -0.1, -1.0], [-0.5, -0.4, -2.0]])
    positions = np.array([2, 1, 0, 4, 3])  # reversed.tokens == units.tokens[positions]
    natural = natural_order_losses(scores, positions, units)
    assert natural.to_list()[0].tolist() == [0.1, 0.2, 0.3, 1.0]
    assert natural.to_list()[1].tolist() == [0.4, 0.5, 2.0]


def test_natural_order_losses_match_a_per_unit_reference_loop_and_keep_unit_totals():
    rng = np.random.default_rng(0)
    lengths = rng.integers(0, 9, size=40)
    units = SequenceSet.from_list([rng.integers(0, 5, n) for n in lengths], vocab_size=5)
    # A random within-unit permutation for every unit, in flat indices.
    perms = [rng.permutation(n) for n in lengths]
    positions = np.concatenate(
        [p + start for p, start in zip(perms, units.offsets[:-1], strict=True)]
    )
    scores = Ragged.from_list([-rng.random(n + 1) for n in lengths])
    natural = natural_order_losses(scores, positions, units)
    for i, perm in enumerate(perms):
        expected = np.empty(len(perm) + 1)
        expected[perm] = -scores[i][:-1]  # slot j of the model's order is natural perm[j]
        expected[-1] = -scores[i][-1]
        np.testing.assert_array_equal(natural[i], expected)
    np.testing.assert_allclose(natural.sums(), unit_nll(scores), rtol=1e-12)


def test_positions_that_cross_units_are_refused():
    units = SequenceSet.from_list([[1, 2], [3, 4]], vocab_size=5)
    scores = Ragged.from_list([[-1.0, -1.0, -1.0], [-1.0, -1.0, -1.0]])
    with pytest.raises(DataError, match="within-unit permutation"):
        natural_order_losses(scores, np.array([0, 2, 1, 3]), units)
    with pytest.raises(DataError, match="within-unit permutation"):
        natural_order_losses(scores, np.array([0, 0, 2, 3]), units)


def test_scores_of_the_wrong_shape_are_refused():
    units = SequenceSet.from_list([[1, 2]], vocab_size=5)
    with pytest.raises(DataError, match=r"len\(unit\) \+ 1"):
        natural_order_losses(Ragged.from_list([[-1.0, -1.0]]), np.array([0, 1]), units)


@pytest.mark.parametrize(
    ("name", "params"),
    [
        ("reverse", {}),
        ("block_reverse", {"size": 3}),
        ("stride", {"step": 2}),
        ("rotate", {"shift": 2}),
        ("permutation", {"seed": 5}),
        ("within_segment_reverse", {"separators": [0]}),
    ],
)
def test_every_built_in_order_maps_each_loss_back_to_the_token_it_scored(name, params):
    from retrograde import orders

    rng = np.random.default_rng(1)
    units = SequenceSet.from_list([rng.integers(0, 9, n) for n in (0, 1, 5, 8, 13)], vocab_size=9)
    order = orders.make(name, **params)
    reordered = order.apply_set(units)
    # A fake model whose loss at each slot is (1 + the token it sees there): mapped back,
    # the loss at natural position t must be 1 + the natural token at t.
    rows = [np.append(-(1.0 + reordered[i]), -0.5) for i in range(len(units))]
    natural = natural_order_losses(Ragged.from_list(rows), order.positions_set(units), units)
    for i in range(len(units)):
        np.testing.assert_array_equal(natural[i], np.append(1.0 + units[i], 0.5))


def test_docstring_examples_run():
    import doctest

    import retrograde.stats._scoring

    result = doctest.testmod(retrograde.stats._scoring)
    assert result.attempted > 0 and result.failed == 0
