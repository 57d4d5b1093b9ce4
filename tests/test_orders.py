"""Order transforms: every registered order is a bijection; built-ins match outside references."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from sympy.combinatorics import Permutation as SympyPermutation

from retrograde import SequenceSet, orders
from retrograde.data import tokenizers
from retrograde.errors import BijectionError, ConfigError, DataError


def build(name):
    """An order from the registry with its example parameters (found by discovery, no hand list)."""
    factory = orders.registry.get(name)
    return orders.make(name, **getattr(factory, "example_params", {}))


# Units of random length 0..500 over a random vocabulary of 1..50 token ids.
unit_strategy = st.integers(1, 50).flatmap(
    lambda vocab: arrays(np.int32, st.integers(0, 500), elements=st.integers(0, vocab - 1))
)
units_strategy = st.lists(unit_strategy, min_size=0, max_size=6)

ALL_ORDERS = orders.names()


def test_builtin_orders_are_registered():
    expected = {
        "forward",
        "identity",
        "reverse",
        "block_reverse",
        "stride",
        "rotate",
        "permutation",
        "segment_reverse",
        "within_segment_reverse",
    }
    assert expected <= set(ALL_ORDERS)


# ----------------------------------------------------------- conformance (every order)
@pytest.mark.parametrize("name", ALL_ORDERS)
@settings(max_examples=50, deadline=None)
@given(x=unit_strategy)
def test_every_order_inverts_its_own_output(name, x):
    order = build(name)
    assert np.array_equal(order.invert(order.apply(x)), x)


@pytest.mark.parametrize("name", ALL_ORDERS)
@settings(max_examples=50, deadline=None)
@given(x=unit_strategy)
def test_every_order_permutes_the_tokens_and_reports_that_permutation(name, x):
    order = build(name)
    y = order.apply(x)
    assert np.array_equal(np.sort(y), np.sort(x))  # same multiset of tokens
    p = order.positions(x)
    assert p.dtype == np.int64
    assert np.array_equal(np.sort(p), np.arange(len(x)))  # p is a permutation of positions
    assert np.array_equal(y, x[p])


@pytest.mark.parametrize("name", ALL_ORDERS)
@settings(max_examples=25, deadline=None)
@given(rows=units_strategy)
def test_every_order_set_level_matches_one_unit_at_a_time(name, rows):
    order = build(name)
    units = SequenceSet.from_list(rows, doc_ids=np.arange(len(rows)))
    reordered = order.apply_set(units)
    assert [r.tolist() for r in reordered] == [order.apply(u).tolist() for u in units]
    assert np.array_equal(reordered.tokens, units.tokens[order.positions_set(units)])
    assert np.array_equal(reordered.doc_ids, units.doc_ids)
    assert np.array_equal(order.invert_set(reordered).tokens, units.tokens)
    orders.verify_bijection(order, units, order_name=name)


@pytest.mark.parametrize("name", ALL_ORDERS)
def test_every_order_reports_json_able_params_and_refuses_unknown_ones(name):
    order = build(name)
    assert isinstance(order.get_params(), dict)
    with pytest.raises(ConfigError, match=name):
        orders.make(name, no_such_parameter=1, **order.get_params())


# ------------------------------------------------------------ built-ins vs references
@settings(max_examples=60, deadline=None)
@given(x=unit_strategy)
def test_reverse_is_an_involution_and_matches_python_reversed(x):
    order = orders.make("reverse")
    assert order.apply(x).tolist() == list(reversed(x.tolist()))  # Python builtin reference
    assert np.array_equal(order.apply(order.apply(x)), x)


@settings(max_examples=60, deadline=None)
@given(x=unit_strategy, step=st.integers(1, 9))
def test_stride_matches_concatenated_python_slices(x, step):
    # Reference: x[0::step] + x[1::step] + ... (Python extended slicing).
    x = x.tolist()
    expected = [t for r in range(step) for t in x[r::step]]
    assert orders.make("stride", step=step).apply(np.array(x, dtype=np.int32)).tolist() == expected


@settings(max_examples=60, deadline=None)
@given(x=unit_strategy, shift=st.integers(-700, 700))
def test_rotate_matches_numpy_roll_to_the_left(x, shift):
    assert np.array_equal(orders.make("rotate", shift=shift).apply(x), np.roll(x, -shift))


@settings(max_examples=60, deadline=None)
@given(x=unit_strategy, size=st.integers(1, 12))
def test_block_reverse_reverses_each_python_chunk(x, size):
    x = x.tolist()
    expected = [t for start in range(0, len(x), size) for t in reversed(x[start : start + size])]
    order = orders.make("block_reverse", size=size)
    assert order.apply(np.array(x, dtype=np.int32)).tolist() == expected


def test_block_reverse_of_size_one_is_the_identity_and_size_at_least_length_is_reverse():
    x = np.arange(7)
    assert orders.make("block_reverse", size=1).apply(x).tolist() == x.tolist()
    assert orders.make("block_reverse", size=7).apply(x).tolist() == x[::-1].tolist()


def test_permutation_draws_one_fixed_permutation_per_length_from_numpy():
    order = orders.make("permutation", seed=7)
    # Reference: numpy's Generator seeded with the documented [seed, length] entropy.
    expected = np.random.default_rng([7, 10]).permutation(10)
    assert np.array_equal(order.positions(np.arange(10)), expected)
    a, b = np.arange(10, 20), np.arange(30, 40)
    assert np.array_equal(order.apply(a) - 10, order.apply(b) - 30)  # same length, same shuffle
    assert not np.array_equal(orders.make("permutation", seed=8).positions(a), expected)


@settings(max_examples=40, deadline=None)
@given(x=unit_strategy)
def test_inverse_positions_agree_with_sympy_permutation_inverse(x):
    order = orders.make("permutation", seed=3)
    p = order.positions(x)
    units = SequenceSet.from_list([order.apply(x)])
    # sympy's array form: the inverse permutation of p (independent implementation).
    expected = (~SympyPermutation(p.tolist())).array_form if len(p) else []
    assert order.inverse_positions_set(units).tolist() == list(expected)


words = st.lists(st.text(alphabet="abc", min_size=0, max_size=5), min_size=1, max_size=8)


@given(words=words)
def test_segment_reverse_matches_str_split_and_join(words):
    text = " ".join(words)
    x = np.array([ord(c) for c in text], dtype=np.int32)
    order = orders.make("segment_reverse", separators=[ord(" ")])
    # Reference: Python's str.split / str.join (empty segments from repeated spaces kept).
    expected = " ".join(reversed(text.split(" ")))
    assert "".join(chr(t) for t in order.apply(x)) == expected


@given(words=words)
def test_within_segment_reverse_matches_str_split_and_join(words):
    text = " ".join(words)
    x = np.array([ord(c) for c in text], dtype=np.int32)
    order = orders.make("within_segment_reverse", separators=[ord(" ")])
    expected = " ".join(word[::-1] for word in text.split(" "))
    assert "".join(chr(t) for t in order.apply(x)) == expected


def test_segment_orders_keep_leading_trailing_and_repeated_separators_as_separators():
    x = np.array([0, 1, 2, 0, 0, 3, 0])
    assert orders.make("segment_reverse", separators=[0]).apply(x).tolist() == [
        0,
        3,
        0,
        0,
        1,
        2,
        0,
    ]
    assert orders.make("within_segment_reverse", separators=0).apply(x).tolist() == [
        0,
        2,
        1,
        0,
        0,
        3,
        0,
    ]


def test_segment_separators_accept_any_integer_sequence_such_as_an_omegaconf_list():
    from omegaconf import OmegaConf

    order = orders.make("segment_reverse", separators=OmegaConf.create([0, 5]))
    assert order.get_params() == {"separators": [0, 5]}
    assert orders.make("segment_reverse", separators=np.array([5, 0])).separators == (0, 5)


def test_segment_reverse_with_several_separator_ids_keeps_each_separator_between_its_neighbours():
    # "a,b c" with separators {',', ' '}: runs a , b ' ' c -> c ' ' b , a
    x = np.array([1, 9, 2, 8, 3])
    assert orders.make("segment_reverse", separators=[8, 9]).apply(x).tolist() == [3, 8, 2, 9, 1]


# --------------------------------------------------------------------- parameters
@pytest.mark.parametrize(
    ("name", "params", "key"),
    [
        ("block_reverse", {"size": 0}, "size"),
        ("stride", {"step": 1.5}, "step"),
        ("rotate", {"shift": "2"}, "shift"),
        ("permutation", {"seed": -1}, "seed"),
        ("segment_reverse", {"separators": []}, "separators"),
        ("within_segment_reverse", {"separators": [-3]}, "separators"),
        ("within_segment_reverse", {"separators": ""}, "separators"),
        ("segment_reverse", {"separators": [b" "]}, "separators"),
    ],
)
def test_bad_parameters_name_the_order_key_value_and_what_is_allowed(name, params, key):
    with pytest.raises(ConfigError) as info:
        orders.make(name, **params)
    message = str(info.value)
    assert f"order {name!r}: parameter {key}=" in message and "allowed:" in message


def test_unknown_order_name_lists_known_orders_and_suggests_the_closest():
    with pytest.raises(ConfigError, match="did you mean 'reverse'") as info:
        orders.make("revers")
    assert "block_reverse" in str(info.value)


# ------------------------------------------------------------- bijection check
class SortOrder(orders.Order):
    """Not invertible: sorting forgets the original positions."""

    name = "sort"

    def positions(self, x):
        return np.argsort(x, kind="stable").astype(np.int64)


def test_non_invertible_custom_order_is_refused_with_the_unit_named():
    order = orders.make(f"{__name__}.SortOrder")  # a custom order given as _target_
    units = SequenceSet.from_list([[1, 2, 3], [4, 5], [9, 7, 8], [1, 1]])
    with pytest.raises(BijectionError) as info:
        orders.verify_bijection(order, units, order_name="sort")
    message = str(info.value)
    assert "order 'sort'" in message and "unit 2" in message and "[9, 7, 8]" in message
    assert "\n" not in message


def test_bijection_check_shows_decoded_excerpt_when_given_a_decoder():
    units = SequenceSet.from_list([[ord(c) for c in "bca"]])
    with pytest.raises(BijectionError, match="'bca'"):
        orders.verify_bijection(
            SortOrder(),
            units,
            order_name="sort",
            describe=lambda ids: "".join(chr(t) for t in ids),
        )


class ReverseWhenEndsAreEven(orders.Order):
    """Content-dependent but invertible: reversal keeps both ends even, so it undoes itself."""

    name = "reverse_when_ends_are_even"

    def positions(self, x):
        flip = len(x) > 0 and x[0] % 2 == 0 and x[-1] % 2 == 0
        return np.arange(len(x))[::-1].copy() if flip else np.arange(len(x))

    def invert(self, y):
        self.invert_calls = getattr(self, "invert_calls", 0) + 1
        return self.apply(y)


@settings(max_examples=30, deadline=None)
@given(rows=units_strategy)
def test_custom_order_with_its_own_per_unit_invert_is_checked_through_that_invert(rows):
    order = ReverseWhenEndsAreEven()
    units = SequenceSet.from_list(rows)
    orders.verify_bijection(order, units, order_name=order.name)
    assert getattr(order, "invert_calls", 0) == len(units)  # the set level used the custom invert
    assert [u.tolist() for u in order.invert_set(order.apply_set(units))] == [
        u.tolist() for u in units
    ]


class DropLast:
    """A duck-typed custom order (no Order base) that loses a token."""

    def apply(self, x):
        return x[:-1]

    def invert(self, y):
        return y


def test_duck_typed_custom_orders_go_through_the_same_check():
    units = SequenceSet.from_list([[1], [2, 3]])
    with pytest.raises(BijectionError, match="unit 0"):
        orders.verify_bijection(DropLast(), units, order_name="drop_last")


def test_order_class_without_positions_is_refused_at_construction():
    class Nothing(orders.Order):
        pass

    with pytest.raises(TypeError, match="positions"):
        Nothing()


def test_set_level_orders_are_fast_on_a_million_tokens():
    rng = np.random.default_rng(0)
    lengths = rng.integers(0, 200, size=10_000)
    units = SequenceSet(
        rng.integers(0, 50, size=int(lengths.sum())).astype(np.int32),
        np.concatenate([[0], np.cumsum(lengths)]),
    )
    for name in ALL_ORDERS:
        orders.verify_bijection(build(name), units, order_name=name)


# ------------------------------------------------------------- separators given as text
def test_a_text_separator_is_looked_up_in_the_fitted_vocabulary_and_reverses_words():
    text = "the cat sat on the mat"
    tokenizer = tokenizers.make("chars").fit([list(text)])
    order = orders.make("segment_reverse", separators=" ")
    assert order.needs_tokenizer and order.get_params() == {"separators": [" "]}
    bound = order.with_tokenizer(tokenizer, where="study.orders.words on source 'corpus'")
    assert bound.separators == (tokenizer.token_id(" "),)
    out = tokenizer.decode(bound.apply(tokenizer.encode(text)))
    # Reference: Python's str.split / str.join (common practice, no source).
    assert out == " ".join(reversed(text.split(" ")))
    within = orders.make("within_segment_reverse", separators=[" "]).with_tokenizer(tokenizer)
    assert tokenizer.decode(within.apply(tokenizer.encode(text))) == " ".join(
        word[::-1] for word in text.split(" ")
    )


def test_text_and_id_separators_mix_and_a_words_tokenizer_finds_whitespace_pieces():
    tokenizer = tokenizers.make("words").fit([tokenizers.make("words").pieces("a, b c")])
    order = orders.make("segment_reverse", separators=[",", " "]).with_tokenizer(tokenizer)
    assert set(order.separators) == {tokenizer.token_id(","), tokenizer.token_id(" ")}
    assert orders.make("segment_reverse", separators=[7, "x"]).separators == (7,)


@pytest.mark.parametrize(
    ("separators", "tokenizer_name", "expected"),
    [
        ("#", "chars", "separator '#' is not in the chars vocabulary fitted on the train split"),
        ("ab", "chars", "separator 'ab' is 2 tokens under the chars tokenizer, not one"),
        ("é", "bytes", "separator 'é' is 2 tokens under the bytes tokenizer, not one"),
        (" ", None, "separators [' '] are text, but the source has no text tokenizer"),
    ],
)
def test_a_text_separator_the_vocabulary_cannot_give_is_one_line_naming_order_and_source(
    separators, tokenizer_name, expected
):
    tokenizer = None
    if tokenizer_name is not None:
        tokenizer = tokenizers.make(tokenizer_name)
        tokenizer.fit([tokenizer.pieces("a b")])
    order = orders.make("segment_reverse", separators=separators)
    with pytest.raises(DataError) as info:
        order.with_tokenizer(tokenizer, where="study.orders.words on source 'corpus'")
    message = str(info.value)
    assert message.startswith("study.orders.words on source 'corpus': ") and expected in message
    assert "\n" not in message


def test_an_order_with_text_separators_refuses_to_run_before_the_lookup():
    with pytest.raises(ConfigError, match="with_tokenizer"):
        orders.make("segment_reverse", separators=" ").apply(np.array([1, 2, 3]))


def test_fields_order_keeps_an_empty_last_unit():
    # Found by the property test above: an empty unit after the last token made the
    # field count index one past the end of the tokens.
    from retrograde import orders

    order = orders.make("fields", fields=["b", "a"], natural=["a", "b"], separator=0)
    units = SequenceSet.from_list([[3, 0, 4], []], vocab_size=5)
    reordered = order.apply_set(units)
    assert [list(u) for u in reordered] == [[4, 0, 3], []]
    assert [list(u) for u in reordered] == [list(order.apply(u)) for u in units]
