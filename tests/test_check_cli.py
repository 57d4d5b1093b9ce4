"""``retrograde check``: counts, vocabulary, duplicates, round-trip verdicts, one-line errors."""

import json

import numpy as np
import pytest

from retrograde import orders
from retrograde.cli import main

CORPUS = "the cat sat\non the mat\nthe cat sat\n\nand so on and on\n" + "".join(
    f"line {i} of the corpus\n" for i in range(40)
)


@pytest.fixture
def corpus(tmp_path):
    path = tmp_path / "corpus.txt"
    path.write_text(CORPUS, encoding="utf-8")
    return path


def run_check(capsys, *argv):
    status = main(["check", *map(str, argv)])
    out, err = capsys.readouterr()
    return status, out, err


def test_check_prints_counts_vocabulary_duplicates_and_verdicts(capsys, corpus):
    status, out, err = run_check(capsys, corpus, "--order", "reverse", "--order", "stride:step=3")
    assert status == 0 and err == ""
    assert "vocab_size" in out and "duplicates: 2 units" in out
    for name in ("train", "valid", "test"):
        assert name in out
    assert "reverse" in out and "stride:step=3" in out and out.count(" ok") == 2


def test_check_json_counts_agree_with_python_line_splitting(capsys, corpus):
    status, out, _ = run_check(capsys, corpus, "--json", "--tokenizer", "words")
    summary = json.loads(out)
    assert status == 0
    # Reference: str.splitlines counts the non-empty lines (Python standard library).
    non_empty = [line for line in CORPUS.splitlines() if line]
    assert sum(s["units"] for s in summary["splits"].values()) == len(non_empty)
    assert summary["duplicates"] == 2 and summary["tokenizer"] == "words"
    assert set(summary["orders"]) == {
        name
        for name in orders.names()
        if name not in {"segment_reverse", "within_segment_reverse", "fields"}  # need params
    }


def test_check_resolves_string_separators_through_the_fitted_vocabulary(capsys, corpus):
    status, out, _ = run_check(
        capsys, corpus, "--tokenizer", "words", "--order", 'segment_reverse:separators=[" "]'
    )
    assert status == 0 and 'segment_reverse:separators=[" "]  ok' in out


def test_check_window_units(capsys, corpus):
    status, out, _ = run_check(
        capsys, corpus, "--unit", "window", "--window", "8", "--json", "--order", "reverse"
    )
    summary = json.loads(out)
    assert status == 0
    n_chars = len(CORPUS)  # one document; chars are code points (all ASCII here)
    kept = sum(s["tokens"] for s in summary["splits"].values())
    assert kept == n_chars - n_chars % 8 and summary["dropped_tokens"] == n_chars % 8


class SortOrder(orders.Order):
    """Sorting loses the original positions: not invertible."""

    name = "sort"

    def positions(self, x):
        return np.argsort(x, kind="stable").astype(np.int64)


def test_a_non_invertible_custom_order_fails_the_check_naming_the_unit(capsys, corpus):
    status, out, _ = run_check(capsys, corpus, "--order", f"{__name__}.SortOrder")
    assert status == 1
    assert "FAILED" in out and "is not a bijection" in out and "for unit " in out
    assert "split" in out


def test_bytes_tokenizer_reads_invalid_utf8_unchanged(capsys, tmp_path):
    path = tmp_path / "latin1.txt"
    path.write_bytes("caf\u00e9\nna\u00efve\n".encode("latin-1") * 5)
    status, out, _ = run_check(capsys, path, "--tokenizer", "bytes", "--json")
    assert status == 0 and json.loads(out)["vocab_size"] == 257


def test_errors_replace_reads_invalid_utf8_as_replacement_characters(capsys, tmp_path):
    path = tmp_path / "latin1.txt"
    path.write_bytes("caf\u00e9\n".encode("latin-1") * 5)
    status, _, err = run_check(capsys, path, "--errors", "replace")
    assert status == 0 and err == ""


# ------------------------------------------------------------- one-line user errors
def one_line_error(capsys, *argv):
    status, out, err = run_check(capsys, *argv)
    assert status == 2
    assert err.startswith("retrograde: error: ") and err.count("\n") == 1
    assert "Traceback" not in err
    return err


def test_missing_file_is_a_one_line_error(capsys, tmp_path):
    err = one_line_error(capsys, tmp_path / "absent.txt")
    assert "absent.txt: no such file" in err


def test_empty_file_is_a_one_line_error(capsys, tmp_path):
    (tmp_path / "empty.txt").write_bytes(b"")
    assert "the file is empty" in one_line_error(capsys, tmp_path / "empty.txt")


def test_blank_file_has_no_units(capsys, tmp_path):
    (tmp_path / "blank.txt").write_text("\n\n\n")
    assert "no units" in one_line_error(capsys, tmp_path / "blank.txt")


@pytest.mark.parametrize("tokenizer", ["chars", "words"])
def test_invalid_utf8_names_the_byte_offset_and_the_replace_option(capsys, tmp_path, tokenizer):
    path = tmp_path / "bad.txt"
    path.write_bytes(b"good line\nbad \xff here\n")
    err = one_line_error(capsys, path, "--tokenizer", tokenizer)
    # The first invalid byte is at offset 14 (10 bytes "good line\n" + 4 bytes "bad ").
    assert "bad.txt:2: invalid UTF-8 at byte offset 14" in err and "--errors replace" in err


def test_unknown_order_name_lists_known_orders_and_suggests_one(capsys, corpus):
    err = one_line_error(capsys, corpus, "--order", "revrse")
    assert "did you mean 'reverse'" in err and "block_reverse" in err


@pytest.mark.parametrize(
    "fractions", [["0", "0.5", "0.5"], ["1.2", "0.1", "0.1"], ["0.6", "0.5"], ["0.7", "0.2", "0.2"]]
)
def test_fractions_outside_the_unit_interval_or_summing_past_one_are_refused(
    capsys, corpus, fractions
):
    err = one_line_error(capsys, corpus, "--fractions", *fractions)
    assert "parameter fractions=" in err and "allowed" in err


def test_window_shorter_than_two_is_refused(capsys, corpus):
    err = one_line_error(capsys, corpus, "--unit", "window", "--window", "1")
    assert "parameter window=1 is invalid; allowed: an integer >= 2" in err


def test_bad_order_parameter_is_refused_before_reading_the_file(capsys, tmp_path):
    err = one_line_error(capsys, tmp_path / "absent.txt", "--order", "block_reverse:size=0")
    assert "order 'block_reverse': parameter size=0" in err


def test_separator_missing_from_the_vocabulary_is_refused(capsys, corpus):
    err = one_line_error(capsys, corpus, "--order", 'segment_reverse:separators=["#"]')
    assert "separator '#' is not in the chars vocabulary" in err


def test_check_file_lists_the_vocabulary_escaped_first_40_or_all(capsys, corpus):
    status, out, _ = run_check(capsys, corpus, "--tokenizer", "words")
    assert status == 0 and f"vocabulary of '{corpus}' (words, " in out
    assert " 0 <unknown>" in out and "' '" in out  # a space shows as a quoted literal
    status, out, _ = run_check(capsys, corpus, "--tokenizer", "bytes")
    assert "first 40; `check --vocab` or `--json` lists all" in out
    status, out, _ = run_check(capsys, corpus, "--tokenizer", "bytes", "--vocab")
    assert "first 40" not in out and " 256 '\\xff'" in out  # byte 255 escaped
    status, out, _ = run_check(capsys, corpus, "--json")
    vocabulary = json.loads(out)["vocabulary"]
    assert vocabulary["tokenizer"] == "chars" and len(vocabulary["tokens"]) == vocabulary["size"]
