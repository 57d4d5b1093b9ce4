"""Units and split: cut in natural order, hash split before the vocabulary, train-only fit."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from retrograde.data import SPLITS, Document, assign_splits, check_fractions, prepare_units
from retrograde.data import tokenizers as tokenize
from retrograde.errors import ConfigError, DataError


def text_doc(text, doc_id=0, where="corpus.txt"):
    return Document(doc_id=doc_id, where=where, text=text)


def all_units(prepared):
    """{decoded unit text: split name} over every split."""
    out = {}
    for name, units in prepared.splits.items():
        for unit in units:
            out[prepared.tokenizer.decode(unit)] = name
    return out


# ------------------------------------------------------------------------ split
def test_same_unit_text_lands_in_the_same_split_regardless_of_corpus_order():
    lines = [f"line number {i}" for i in range(300)]
    rng = np.random.default_rng(0)
    shuffled = [lines[i] for i in rng.permutation(len(lines))]
    a = prepare_units([text_doc("\n".join(lines))], tokenizer=tokenize.make("chars"), mode="line")
    b = prepare_units(
        [text_doc("\n".join(shuffled))], tokenizer=tokenize.make("chars"), mode="line"
    )
    assert all_units(a) == all_units(b)


def test_identical_units_go_to_the_same_split_and_are_reported_as_duplicates():
    text = "\n".join(["repeat me"] * 5 + [f"unique {i}" for i in range(50)] + ["twice"] * 2)
    prepared = prepare_units([text_doc(text)], tokenizer=tokenize.make("words"), mode="line")
    homes = [
        name
        for name, units in prepared.splits.items()
        for unit in units
        if prepared.tokenizer.decode(unit) == "repeat me"
    ]
    assert len(homes) == 5 and len(set(homes)) == 1
    assert prepared.duplicates == 7 and prepared.duplicated_contents == 2
    assert prepared.summary()["duplicates"] == 7


def test_changing_the_salt_changes_the_assignment():
    keys = [f"unit {i}".encode() for i in range(1000)]
    a = assign_splits(keys, (0.8, 0.1, 0.1), salt="one")
    b = assign_splits(keys, (0.8, 0.1, 0.1), salt="two")
    assert np.array_equal(a, assign_splits(keys, (0.8, 0.1, 0.1), salt="one"))
    assert np.mean(a != b) > 0.2  # independent draws disagree on ~34% of units


@pytest.mark.parametrize("fractions", [(0.8, 0.1, 0.1), (0.6, 0.25, 0.15), (0.5, 0.3)])
def test_fractions_hold_within_two_percent_on_ten_thousand_units(fractions):
    keys = [f"document {i} text".encode() for i in range(10_000)]
    split = assign_splits(keys, fractions, salt="retrograde")
    expected = np.array(check_fractions(fractions))
    observed = np.bincount(split, minlength=3) / len(keys)
    assert np.all(np.abs(observed - expected) <= 0.02)
    # Outside reference: scipy's chi-square goodness-of-fit test; a good hash looks
    # multinomial, so the test must not reject at the 0.1% level.
    counts = np.bincount(split, minlength=3)
    assert stats.chisquare(counts, expected * len(keys)).pvalue > 1e-3


@pytest.mark.parametrize(
    "fractions",
    [(0.8, 0.3, 0.1), (0.0, 0.5, 0.5), (1.0, 0.0), (0.6, 0.5), (0.9,), (0.5, 0.3, -0.1)],
)
def test_fractions_outside_the_unit_interval_or_summing_past_one_are_refused(fractions):
    with pytest.raises(ConfigError, match=r"split: parameter fractions=.* is invalid; allowed"):
        check_fractions(fractions)


def test_fractions_accept_any_number_sequence_such_as_an_omegaconf_list():
    from omegaconf import OmegaConf

    assert check_fractions(OmegaConf.create([0.7, 0.2, 0.1])) == (0.7, 0.2, 0.1)
    assert check_fractions(np.array([0.5, 0.25, 0.25])) == (0.5, 0.25, 0.25)


# -------------------------------------------------------------------- unit modes
def test_line_mode_skips_empty_lines_strips_carriage_returns_and_keeps_doc_ids():
    docs = [text_doc("a b\r\n\nc d\n", doc_id=7), text_doc("e f", doc_id=9, where="b.txt")]
    prepared = prepare_units(
        docs, tokenizer=tokenize.make("chars"), mode="line", fractions=(0.98, 0.01, 0.01)
    )
    found = {}
    for units in prepared.splits.values():
        for unit, doc_id, n_bytes in zip(units, units.doc_ids, units.n_bytes, strict=True):
            found[prepared.tokenizer.decode(unit)] = (int(doc_id), int(n_bytes))
    assert found == {"a b": (7, 3), "c d": (7, 3), "e f": (9, 3)}


def test_document_mode_makes_one_unit_per_non_empty_document():
    docs = [text_doc("héllo\nworld", 0), text_doc("", 1), text_doc("bye", 2)]
    prepared = prepare_units(docs, tokenizer=tokenize.make("bytes"), mode="document")
    total = sum(len(s) for s in prepared.splits.values())
    assert total == 2
    n_bytes = np.concatenate([s.n_bytes for s in prepared.splits.values()])
    assert sorted(n_bytes.tolist()) == [3, len("héllo\nworld".encode())]


@settings(max_examples=50, deadline=None)
@given(length=st.integers(0, 200), window=st.integers(2, 20))
def test_window_mode_cuts_non_overlapping_windows_like_a_numpy_reshape(length, window):
    tokens = np.arange(length) % 13
    docs = [Document(doc_id=3, where="t.npy", tokens=tokens)]
    if length < window:
        with pytest.raises(DataError, match="no units"):
            prepare_units(docs, tokenizer=None, mode="window", window=window)
        return
    prepared = prepare_units(
        docs, tokenizer=None, mode="window", window=window, fractions=(0.4, 0.3, 0.3)
    )
    rows = sorted(tuple(unit.tolist()) for s in prepared.splits.values() for unit in s)
    # Reference: numpy reshape of the stream truncated to whole windows (common practice).
    expected = sorted(map(tuple, tokens[: length // window * window].reshape(-1, window).tolist()))
    assert rows == expected
    assert prepared.dropped_tokens == length % window


def test_window_remainder_keep_keeps_a_shorter_last_window_and_never_crosses_documents():
    docs = [text_doc("abcdefg", 0), text_doc("xyz", 1)]
    prepared = prepare_units(
        docs,
        tokenizer=tokenize.make("chars"),
        mode="window",
        window=3,
        remainder="keep",
        fractions=(0.98, 0.01, 0.01),
    )
    found = sorted(
        (prepared.tokenizer.decode(u), int(d))
        for s in prepared.splits.values()
        for u, d in zip(s, s.doc_ids, strict=True)
    )
    assert found == [("abc", 0), ("def", 0), ("g", 0), ("xyz", 1)]
    assert prepared.dropped_tokens == 0


def test_word_windows_count_word_tokens_not_characters():
    prepared = prepare_units(
        [text_doc("one two three four five")],
        tokenizer=tokenize.make("words"),
        mode="window",
        window=4,
        fractions=(0.98, 0.01, 0.01),
    )
    lengths = np.concatenate([s.lengths for s in prepared.splits.values()])
    assert lengths.tolist() == [4, 4]  # 9 pieces: 2 whole windows, 1 piece dropped
    assert prepared.dropped_tokens == 1


# -------------------------------------------------------------- vocabulary, ids
def test_vocabulary_is_fitted_on_training_units_only():
    lines = [f"common {i % 7}" for i in range(400)] + ["zebra quokka"]
    corpus = [text_doc("\n".join(lines))]
    split_by_salt = {
        f"salt{i}": assign_splits([b"zebra quokka"], salt=f"salt{i}")[0] for i in range(40)
    }
    in_train = next(salt for salt, split in split_by_salt.items() if split == 0)
    held_out = next(salt for salt, split in split_by_salt.items() if split != 0)

    seen = prepare_units(corpus, tokenizer=tokenize.make("words"), mode="line", salt=in_train)
    assert seen.tokenizer.token_id("zebra") != seen.tokenizer.unknown_id

    unseen = prepare_units(corpus, tokenizer=tokenize.make("words"), mode="line", salt=held_out)
    assert unseen.tokenizer.token_id("zebra") == unseen.tokenizer.unknown_id
    split_name = SPLITS[split_by_salt[held_out]]
    assert unseen.summary()["splits"][split_name]["unknown_tokens"] == 2  # zebra, quokka
    assert unseen.tokenizer.vocab_size == seen.tokenizer.vocab_size - 2
    assert all(s.vocab_size == unseen.tokenizer.vocab_size for s in unseen.splits.values())


def test_token_documents_keep_their_ids_and_vocabulary_is_largest_id_plus_one():
    docs = [Document(doc_id=i, where=f"doc{i}", tokens=np.array([i, 2 * i, 40])) for i in range(30)]
    prepared = prepare_units(docs, tokenizer=None, mode="document")
    assert prepared.tokenizer is None
    assert all(s.vocab_size == 59 for s in prepared.splits.values())  # max id 58
    for s in prepared.splits.values():
        for unit, doc_id in zip(s, s.doc_ids, strict=True):
            assert unit.tolist() == [doc_id, 2 * doc_id, 40]
        assert s.n_bytes is None


def test_preparing_twice_gives_identical_arrays():
    text = "\n".join(f"row {i} of the table" for i in range(200))
    a = prepare_units([text_doc(text)], tokenizer=tokenize.make("chars"), mode="line")
    b = prepare_units([text_doc(text)], tokenizer=tokenize.make("chars"), mode="line")
    for name in SPLITS:
        assert np.array_equal(a.splits[name].tokens, b.splits[name].tokens)
        assert np.array_equal(a.splits[name].offsets, b.splits[name].offsets)
    assert a.summary() == b.summary()


# ------------------------------------------------------------------------ errors
def test_window_shorter_than_two_tokens_is_refused():
    with pytest.raises(
        ConfigError, match=r"parameter window=1 is invalid; allowed: an integer >= 2"
    ):
        prepare_units([text_doc("abc")], tokenizer=tokenize.make("chars"), mode="window", window=1)


def test_window_without_window_mode_and_unknown_modes_are_refused():
    with pytest.raises(ConfigError, match="window=4"):
        prepare_units([text_doc("abc")], tokenizer=tokenize.make("chars"), mode="line", window=4)
    with pytest.raises(ConfigError, match="did you mean 'line'"):
        prepare_units([text_doc("abc")], tokenizer=tokenize.make("chars"), mode="lines")


def test_a_corpus_without_units_names_the_source():
    with pytest.raises(DataError, match="empty.txt: no units"):
        prepare_units(
            [text_doc("\n\n", where="empty.txt")], tokenizer=tokenize.make("chars"), mode="line"
        )


def test_line_mode_on_token_documents_is_refused():
    with pytest.raises(ConfigError, match="needs text documents"):
        prepare_units(
            [Document(doc_id=0, where="t", tokens=np.array([1]))], tokenizer=None, mode="line"
        )


def test_split_is_fast_on_100k_units():
    text = "\n".join(f"unit {i} with some words" for i in range(100_000))
    prepared = prepare_units([text_doc(text)], tokenizer=tokenize.make("chars"), mode="line")
    assert sum(len(s) for s in prepared.splits.values()) == 100_000


def test_token_ids_too_large_for_int32_are_refused_naming_the_document():
    documents = [Document(doc_id=0, where="ids.npy:row 3", tokens=np.array([1, 2**31], np.int64))]
    with pytest.raises(DataError, match=r"ids.npy:row 3: token id 2147483648 is too large"):
        prepare_units(documents, tokenizer=None, mode="document")
