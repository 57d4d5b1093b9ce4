"""Tokenizers: bytes, chars and words; unknown id 0; fitted on training pieces; JSON files."""

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nltk.tokenize import wordpunct_tokenize

from retrograde.data import tokenizers as tokenize
from retrograde.errors import ConfigError, DataError, FitError


def fitted(name, *texts, **params):
    tokenizer = tokenize.make(name, **params)
    return tokenizer.fit([tokenizer.pieces(text) for text in texts])


def test_the_three_tokenizers_are_registered_and_reserve_id_zero_for_unknown():
    assert {"bytes", "chars", "words"} <= set(tokenize.names())
    for name in ("bytes", "chars", "words"):
        assert fitted(name, "abc").unknown_id == 0


# ------------------------------------------------------------------------- bytes
@settings(max_examples=100, deadline=None)
@given(text=st.text())
def test_bytes_round_trips_any_text_and_counts_utf8_bytes(text):
    tokenizer = tokenize.make("bytes")
    ids = tokenizer.encode(text)
    assert tokenizer.decode(ids) == text
    # Reference: Python's own UTF-8 encoder.
    assert (ids - 1).tolist() == list(text.encode("utf-8"))
    assert tokenizer.encode_pieces(tokenizer.pieces(text)).tolist() == ids.tolist()


def test_bytes_follows_the_utf8_example_of_rfc_3629():
    # RFC 3629, section 7: "日本語" is encoded as E6 97 A5 E6 9C AC E8 AA 9E (from memory).
    ids = tokenize.make("bytes").encode("日本語")
    assert (ids - 1).tolist() == [0xE6, 0x97, 0xA5, 0xE6, 0x9C, 0xAC, 0xE8, 0xAA, 0x9E]


def test_bytes_has_257_ids_and_keeps_invalid_utf8_decoded_with_surrogateescape():
    tokenizer = tokenize.make("bytes")
    assert tokenizer.vocab_size == 257 and tokenizer.lossless
    raw = b"ok \xff\xfe end"
    text = raw.decode("utf-8", "surrogateescape")
    ids = tokenizer.encode(text)
    assert (ids - 1).tolist() == list(raw)
    assert tokenizer.decode(ids).encode("utf-8", "surrogateescape") == raw
    assert tokenizer.token_id(" ") == ord(" ") + 1


# ------------------------------------------------------------------------- chars
@settings(max_examples=100, deadline=None)
@given(text=st.text())
def test_chars_round_trips_text_covered_by_its_training_units(text):
    tokenizer = fitted("chars", text)
    ids = tokenizer.encode(text)
    assert len(ids) == len(text)  # one id per code point
    assert tokenizer.decode(ids) == text
    assert tokenizer.vocab_size == len(set(text)) + 1
    assert tokenizer.encode_pieces(tokenizer.pieces(text)).tolist() == ids.tolist()


def test_chars_gives_ids_in_code_point_order_and_counts_unknowns():
    tokenizer = fitted("chars", "banana")
    assert tokenizer.encode("abn").tolist() == [1, 2, 3]
    ids = tokenizer.encode("bandana!")
    assert int(np.sum(ids == tokenizer.unknown_id)) == 2  # 'd' and '!' never seen in training
    assert tokenizer.decode(ids) == "ban\ufffdana\ufffd"
    assert not tokenizer.lossless


def test_chars_cap_keeps_the_most_frequent_characters():
    tokenizer = fitted("chars", "aaabbc", max_vocab=3)  # unknown + two characters
    assert tokenizer.vocab_size == 3
    assert tokenizer.encode("abc").tolist() == [1, 2, 0]


def test_chars_counts_astral_code_points_as_one_token():
    tokenizer = fitted("chars", "a\U0001f600b")
    assert len(tokenizer.encode("\U0001f600")) == 1
    assert tokenizer.decode(tokenizer.encode("ba\U0001f600")) == "ba\U0001f600"


# ------------------------------------------------------------------------- words
@settings(max_examples=100, deadline=None)
@given(text=st.text())
def test_words_pieces_cover_the_text_exactly(text):
    assert "".join(tokenize.make("words").pieces(text)) == text


@settings(max_examples=100, deadline=None)
@given(text=st.text())
def test_words_round_trip_when_nothing_is_unknown(text):
    tokenizer = fitted("words", text)
    assert tokenizer.decode(tokenizer.encode(text)) == text


word = st.text(alphabet="abcdeéß", min_size=1, max_size=6)
sentence = st.lists(
    st.tuples(word, st.sampled_from(["", ",", ".", "!", "?"])), min_size=1, max_size=10
)


@settings(max_examples=100, deadline=None)
@given(parts=sentence)
def test_words_split_like_nltk_wordpunct_on_letters_and_single_punctuation(parts):
    text = " ".join(w + p for w, p in parts)
    pieces = tokenize.make("words").pieces(text)
    # Reference: NLTK's wordpunct_tokenize (regex \w+|[^\w\s]+) drops whitespace.
    assert [p for p in pieces if not p.isspace()] == wordpunct_tokenize(text)


def test_words_split_numbers_punctuation_and_whitespace_runs():
    pieces = tokenize.make("words").pieces("Pay 42.50 now!!\n\n  ok_go")
    assert pieces == ["Pay", " ", "42", ".", "50", " ", "now", "!", "!", "\n\n  ", "ok", "_", "go"]


def test_words_counts_unknowns_and_caps_by_frequency_with_ties_by_text():
    tokenizer = fitted("words", "b a b a c d", max_vocab=4)
    # counts: ' ' 5, a 2, b 2, c 1, d 1 -> keep ' ', a, b (a before b: tie broken by text)
    assert tokenizer.vocab_size == 4
    assert [tokenizer.token_id(p) for p in (" ", "a", "b", "c")] == [1, 2, 3, 0]
    ids = tokenizer.encode("a c e")
    assert int(np.sum(ids == 0)) == 2
    assert tokenizer.decode(ids) == "a \ufffd \ufffd"


def test_words_min_count_drops_rare_pieces():
    tokenizer = fitted("words", "x y x", min_count=2)
    assert tokenizer.token_id("x") != 0 and tokenizer.token_id("y") == 0


# -------------------------------------------------------------- persistence, errors
@pytest.mark.parametrize("name", ["bytes", "chars", "words"])
def test_saved_json_loads_to_a_tokenizer_that_encodes_identically(tmp_path, name):
    text = "Hello, wörld! 123 hello"
    tokenizer = fitted(name, text, **({} if name == "bytes" else {"max_vocab": 8}))
    path = tmp_path / "tokenizer.json"
    tokenizer.save(path)
    meta = json.loads(path.read_text())
    assert meta["name"] == name and meta["vocab_size"] == tokenizer.vocab_size
    loaded = tokenize.load(path)
    assert loaded.vocab_size == tokenizer.vocab_size
    assert loaded.encode(text).tolist() == tokenizer.encode(text).tolist()
    first = path.read_bytes()
    loaded.save(path)
    assert path.read_bytes() == first  # deterministic bytes


@pytest.mark.parametrize("name", ["chars", "words"])
def test_encoding_before_fit_is_refused(name):
    with pytest.raises(FitError, match="fit"):
        tokenize.make(name).encode("abc")


def test_bad_cap_names_the_tokenizer_parameter_and_what_is_allowed():
    with pytest.raises(ConfigError, match=r"tokenizer 'words': parameter max_vocab=1 is invalid"):
        tokenize.make("words", max_vocab=1)


def test_loading_a_missing_or_foreign_file_is_a_one_line_data_error(tmp_path):
    with pytest.raises(DataError, match="no such tokenizer file"):
        tokenize.load(tmp_path / "absent.json")
    (tmp_path / "other.json").write_text('{"format": "something else"}')
    with pytest.raises(DataError, match="format"):
        tokenize.load(tmp_path / "other.json")


# ------------------------------------------------- conformance (every registered tokenizer)
# Learned tokenizers (bpe, unigram) merge pieces; their contract: test_learned_tokenizers.py.
PIECEWISE = [n for n in tokenize.names() if not getattr(tokenize.registry.get(n), "learned", 0)]


@pytest.mark.parametrize("name", PIECEWISE)
@settings(max_examples=40, deadline=None)
@given(train=st.text(max_size=200), other=st.text(max_size=200))
def test_every_tokenizer_gives_one_id_per_piece_inside_its_vocabulary(name, train, other):
    tokenizer = fitted(name, train)
    for text in (train, other):
        ids = tokenizer.encode(text)
        assert ids.dtype == np.int32 and len(ids) == len(tokenizer.pieces(text))
        assert ids.tolist() == tokenizer.encode_pieces(tokenizer.pieces(text)).tolist()
        assert ((ids >= 0) & (ids < tokenizer.vocab_size)).all()
        if tokenizer.lossless or not np.any(ids == tokenizer.unknown_id):
            assert tokenizer.decode(ids) == text
