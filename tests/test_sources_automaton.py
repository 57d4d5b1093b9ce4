"""The ``automaton`` calibration source: elementary cellular automata rows."""

import math

import numpy as np
import pytest

from retrograde.errors import ConfigError, DataError
from retrograde.sources import make
from retrograde.sources.automaton import evolve, permutive, step


def _single_one(width):
    row = np.zeros((1, width), dtype=np.uint8)
    row[0, width // 2] = 1
    return row


def test_rule_30_centre_column_from_a_single_one_matches_oeis_a051023():
    history = evolve(_single_one(41), 30, 14)[0]  # (14, 41); wide enough to never wrap
    # OEIS A051023: the centre column of rule 30 started from a single ON cell.
    assert history[:, 20].tolist() == [1, 1, 0, 1, 1, 1, 0, 0, 1, 1, 0, 0, 0, 1]


def test_rule_90_from_a_single_one_is_pascals_triangle_mod_2():
    rows, width = 16, 41
    history = evolve(_single_one(width), 90, rows)[0]
    centre = width // 2
    for t in range(rows):
        for offset in range(-t, t + 1):
            # Cell at distance `offset` from the centre after t steps is C(t, (t+offset)/2) mod 2
            # when t + offset is even, 0 otherwise (rule 90 is the XOR of the two neighbours).
            expected = math.comb(t, (t + offset) // 2) % 2 if (t + offset) % 2 == 0 else 0
            assert history[t, centre + offset] == expected
        assert history[t, : centre - t].sum() == 0 and history[t, centre + t + 1 :].sum() == 0


def test_step_uses_the_wolfram_numbering_with_a_periodic_boundary():
    # Rule 110 truth table (Wolfram numbering): 111->0 110->1 101->1 100->0 011->1 010->1 001->1 000->0
    table = {
        (1, 1, 1): 0,
        (1, 1, 0): 1,
        (1, 0, 1): 1,
        (1, 0, 0): 0,
        (0, 1, 1): 1,
        (0, 1, 0): 1,
        (0, 0, 1): 1,
        (0, 0, 0): 0,
    }
    row = np.array([1, 0, 0, 1, 1, 0, 1, 0], dtype=np.uint8)
    expected = [table[(row[i - 1], row[i], row[(i + 1) % 8])] for i in range(8)]
    assert step(row, 110).tolist() == expected


def test_permutive_rules_are_the_sixteen_each_side_and_four_both():
    left = [rule for rule in range(256) if permutive(rule)[0]]
    right = [rule for rule in range(256) if permutive(rule)[1]]
    # f(1,c,r) = 1 - f(0,c,r) leaves the 4 values f(0,.,.) free: 2**4 rules (common practice, no source).
    assert len(left) == 16 and len(right) == 16
    assert sorted(set(left) & set(right)) == [90, 105, 150, 165]
    assert 30 in left and 30 not in right and 86 in right  # rule 86 is rule 30 mirrored
    assert not any(permutive(110))


def test_a_left_permutive_rule_is_inverted_by_a_right_to_left_sweep():
    rng = np.random.default_rng(0)
    width = 25
    previous = rng.integers(0, 2, width).astype(np.uint8)
    following = step(previous, 30)
    # Rule 30 is new = l XOR (c OR r): knowing c, r and the new cell gives l, so two known
    # cells of the previous row determine the rest, sweeping from right to left.
    solved = np.zeros(width, dtype=np.uint8)
    solved[width - 1], solved[0] = previous[width - 1], previous[0]
    for i in range(width - 1, 1, -1):
        solved[i - 1] = following[i] ^ (solved[i] | solved[(i + 1) % width])
    assert np.array_equal(solved, previous)


def test_generated_units_follow_the_rule_and_start_from_a_uniform_row():
    source = make("automaton", rule=110, width=20, rows=6)
    units = source.generate(500, seed=3)
    history = units.tokens.reshape(500, 6, 20)
    for t in range(5):
        assert np.array_equal(step(history[:, t], 110), history[:, t + 1])
    assert abs(history[:, 0].mean() - 0.5) < 5 * math.sqrt(0.25 / (500 * 20))
    assert source.nll(units) == pytest.approx(np.full(500, 20 * math.log(2)))


def test_a_unit_that_breaks_the_rule_is_refused():
    source = make("automaton", rule=30, width=8, rows=3)
    units = source.generate(3, seed=0)
    tokens = units.tokens.copy()
    tokens[24 + 8 + 2] ^= 1  # unit 1, row 1, cell 2
    with pytest.raises(DataError, match="unit 1 has probability 0 .*rule 30"):
        source.nll(units.with_tokens(tokens))


def test_spans_name_every_row_and_metadata_reports_permutivity():
    source = make("automaton", rule=30, width=5, rows=3)
    assert source.spans(15) == {"row0": (0, 5), "row1": (5, 10), "row2": (10, 15)}
    metadata = source.metadata()
    assert metadata["left_permutive"] and not metadata["right_permutive"]
    assert metadata["floor_bits_per_token"] == pytest.approx(1 / 3)


@pytest.mark.parametrize(
    ("params", "text"),
    [
        ({"rule": 256}, "parameter rule=256 is invalid; allowed: an integer >= 0 and <= 255"),
        ({"width": 2}, "parameter width=2 is invalid"),
        ({"rows": 1}, "parameter rows=1 is invalid"),
    ],
)
def test_invalid_parameters_are_refused(params, text):
    with pytest.raises(ConfigError, match="source 'automaton'") as info:
        make("automaton", **params)
    assert text in str(info.value)
