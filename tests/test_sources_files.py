"""File sources: text, jsonl, fasta and tokens stream Documents with byte counts and ids."""

import json
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde import SequenceSet
from retrograde.data import prepare_units
from retrograde.errors import ConfigError, DataError
from retrograde.sources import make


def _texts(source):
    return [document.text for document in source.documents()]


# ------------------------------------------------------------------------------ text
def test_text_with_crlf_line_endings_reads_like_lf(tmp_path):
    (tmp_path / "crlf.txt").write_bytes(b"alpha beta\r\ngamma\r\n\r\ndelta\r\n")
    (tmp_path / "lf.txt").write_bytes(b"alpha beta\ngamma\n\ndelta\n")
    for split in ("file", "paragraph", "line"):
        crlf = list(make("text", files=str(tmp_path / "crlf.txt"), split=split).documents())
        lf = list(make("text", files=str(tmp_path / "lf.txt"), split=split).documents())
        assert [d.text for d in crlf] == [d.text for d in lf]
        assert [d.n_bytes for d in crlf] == [d.n_bytes for d in lf]
        assert all("\r" not in d.text for d in crlf)
    paragraphs = make("text", files=str(tmp_path / "crlf.txt"), split="paragraph")
    assert _texts(paragraphs) == ["alpha beta\ngamma", "delta"]


@pytest.mark.parametrize(
    ("name", "params"),
    [
        ("text", {"split": "file"}),
        ("text", {"split": "paragraph"}),
        ("text", {"split": "line"}),
        ("text", {"split": "line", "errors": "replace"}),
        ("jsonl", {}),
        ("fasta", {}),
    ],
)
def test_lone_carriage_returns_are_refused_naming_file_line_and_offset(tmp_path, name, params):
    # Old Mac line ends: read as LF files, the three lines would merge into one.
    body = {
        "text": b"first\r\nsecond\rthird\r",
        "jsonl": b'{"text": "a"}\r\n{"text": "b"}\r{"text": "c"}\r',
        "fasta": b">r1\r\nAC\rGT\r",
    }[name]
    path = tmp_path / "old-mac.txt"
    path.write_bytes(body)
    offset = body.index(b"\r", body.index(b"\n"))
    with pytest.raises(DataError) as info:
        list(make(name, files=str(path), **params).documents())
    message = str(info.value)
    assert message.startswith(f"{path}:2: carriage return without a line feed")
    assert f"at byte offset {offset} of the file" in message and "convert the line ends" in message


def test_a_carriage_return_as_the_last_byte_ends_the_last_line(tmp_path):
    (tmp_path / "a.txt").write_bytes(b"one\r\ntwo\r")
    for split in ("file", "line"):
        texts = _texts(make("text", files=str(tmp_path / "a.txt"), split=split))
        assert texts == (["one\ntwo\n"] if split == "file" else ["one", "two"])


def test_text_splits_by_file_paragraph_or_line_with_byte_counts(tmp_path):
    (tmp_path / "a.txt").write_text("é one\ntwo\n\n\nthree\n", encoding="utf-8")
    files = str(tmp_path / "a.txt")
    whole = list(make("text", files=files, split="file").documents())
    assert [d.text for d in whole] == ["é one\ntwo\n\n\nthree\n"]
    assert whole[0].n_bytes == len("é one\ntwo\n\n\nthree\n".encode())
    paragraphs = list(make("text", files=files, split="paragraph").documents())
    assert [(d.text, d.n_bytes) for d in paragraphs] == [("é one\ntwo", 10), ("three", 5)]
    assert [d.where for d in paragraphs] == [f"{files}:1", f"{files}:5"]
    lines = list(make("text", files=files, split="line").documents())
    # blank lines make no document; n_bytes counts UTF-8 bytes ("é" is 2 bytes)
    assert [(d.text, d.n_bytes, d.doc_id) for d in lines] == [
        ("é one", 6, 0),
        ("two", 3, 1),
        ("three", 5, 2),
    ]


def test_text_globs_expand_sorted_and_doc_ids_run_across_files(tmp_path):
    for name, body in (("b.txt", "b1\nb2\n"), ("a.txt", "a1\n"), ("notes.md", "skip\n")):
        (tmp_path / name).write_text(body)
    source = make("text", files=[str(tmp_path / "*.txt")], split="line")
    assert [p.name for p in source.paths()] == ["a.txt", "b.txt"]
    assert [(d.doc_id, d.text) for d in source.documents()] == [(0, "a1"), (1, "b1"), (2, "b2")]


def test_text_drops_a_utf8_byte_order_mark(tmp_path):
    (tmp_path / "bom.txt").write_bytes(b"\xef\xbb\xbfhello\n")
    for split in ("file", "line"):
        document = next(make("text", files=str(tmp_path / "bom.txt"), split=split).documents())
        assert document.text.rstrip("\n") == "hello"


def test_invalid_utf8_names_the_file_line_and_byte_offset(tmp_path):
    path = tmp_path / "bad.txt"
    path.write_bytes(b"fine\nalso fine\nbro\xffken\n")
    for split in ("line", "paragraph", "file"):
        with pytest.raises(DataError) as info:
            list(make("text", files=str(path), split=split).documents())
        # 'fine\n' (5) + 'also fine\n' (10) + 'bro' (3): the bad byte is at offset 18
        assert str(info.value).startswith(f"{path}:3: invalid UTF-8 at byte offset 18")
        assert "errors='replace'" in str(info.value)
    replaced = make("text", files=str(path), split="line", errors="replace")
    assert _texts(replaced)[-1] == "bro\ufffdken"


def test_missing_files_globs_without_matches_folders_and_blank_files_are_refused(tmp_path):
    with pytest.raises(DataError, match="file 'nope.txt' not found"):
        make("text", files="nope.txt")
    with pytest.raises(DataError, match="matches no file"):
        make("text", files=str(tmp_path / "*.none"))
    with pytest.raises(DataError, match="is a folder"):
        make("text", files=str(tmp_path))
    (tmp_path / "blank.txt").write_text("\n  \n")
    with pytest.raises(DataError, match="no text in"):
        list(make("text", files=str(tmp_path / "blank.txt")).documents())


def test_text_parameters_are_checked_with_a_suggestion(tmp_path):
    (tmp_path / "a.txt").write_text("x\n")
    with pytest.raises(ConfigError) as info:
        make("text", files=str(tmp_path / "a.txt"), split="lines")
    assert str(info.value) == (
        "source 'text': parameter split='lines' is invalid; allowed: one of 'file', "
        "'paragraph', 'line' (did you mean 'line'?)"
    )
    with pytest.raises(ConfigError, match="parameter files=3 is invalid"):
        make("text", files=3)
    with pytest.raises(ConfigError, match="allowed: a path or glob, or a non-empty list of them"):
        make("text", files={"a": str(tmp_path / "a.txt")})
    with pytest.raises(ConfigError, match="unexpected keyword argument 'path'"):
        make("text", path="a.txt")


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_a_200_mb_text_file_is_streamed_with_bounded_memory(tmp_path):
    path = tmp_path / "big.txt"
    line = ("lorem ipsum dolor sit amet " * 3).encode() + b"\n"  # 82 bytes
    paragraph = line * 10 + b"\n"  # ten lines, then a blank line
    block = paragraph * 1280  # ~1 MB
    with open(path, "wb") as handle:
        for _ in range(200):
            handle.write(block)
    script = textwrap.dedent(
        f"""
        from retrograde.sources import make
        count = total = 0
        for split in ("line", "paragraph"):
            for document in make("text", files={str(path)!r}, split=split).documents():
                count += 1
                total += document.n_bytes
        # VmHWM: this process's peak resident set (kB). Unlike ru_maxrss it does not
        # inherit the parent's peak across fork + exec.
        status = open("/proc/self/status").read().split("VmHWM:")[1]
        peak_mb = int(status.split()[0]) / 1024
        print(count, total, peak_mb)
        """
    )
    output = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, check=True
    ).stdout.split()
    count, total, peak_mb = int(output[0]), int(output[1]), float(output[2])
    n_paragraphs = 200 * 1280
    n_lines = 10 * n_paragraphs
    assert count == n_lines + n_paragraphs
    line_bytes = len(line) - 1  # without its LF
    assert total == n_lines * line_bytes + n_paragraphs * (10 * line_bytes + 9)
    # Reading the 200 MB file whole would need > 200 MB (twice that as str); streaming
    # keeps the interpreter, numpy and one line (Linux ru_maxrss is in kilobytes).
    assert peak_mb < 150, f"peak resident memory {peak_mb:.0f} MB"


# ----------------------------------------------------------------------------- jsonl
def test_jsonl_reads_a_string_field_and_names_the_line_of_a_missing_field(tmp_path):
    path = tmp_path / "d.jsonl"
    rows = [{"text": "héllo", "id": 1}, {"text": "world"}, {"body": "oops"}]
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    source = make("jsonl", files=str(path), field="text")
    with pytest.raises(DataError) as info:
        list(source.documents())
    assert str(info.value) == (
        f"{path}:3: field 'text' is missing (keys: body); "
        "add it or set the source's field= to the right key"
    )
    path.write_text("\n".join(json.dumps(r) for r in rows[:2]) + "\n\n")
    documents = list(source.documents())
    assert [(d.text, d.n_bytes, d.where) for d in documents] == [
        ("héllo", 6, f"{path}:1"),
        ("world", 5, f"{path}:2"),
    ]


def test_jsonl_token_lists_become_token_documents(tmp_path):
    path = tmp_path / "ids.jsonl"
    path.write_text('{"ids": [3, 1, 4]}\n{"ids": []}\n')
    documents = list(make("jsonl", files=str(path), field="ids").documents())
    assert [d.tokens.tolist() for d in documents] == [[3, 1, 4], []]
    assert documents[0].text is None and documents[0].n_bytes is None


@pytest.mark.parametrize(
    ("lines", "message"),
    [
        (['{"t": "a"}', '{"t": "b"'], ":2: invalid JSON at column"),
        (['{"t": "a"}', "[1, 2]"], ":2: expected a JSON object, got list"),
        (['{"t": "a"}', '{"t": [1, 2]}'], ":2: field 't' holds tokens but earlier lines hold text"),
        (['{"t": [1, -2]}'], ":1: field 't' must be a string or a list of non-negative integers"),
        (['{"t": 5}'], ":1: field 't' must be a string"),
    ],
)
def test_jsonl_errors_name_file_and_line(tmp_path, lines, message):
    path = tmp_path / "x.jsonl"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(DataError, match=message.replace("[", r"\[")):
        list(make("jsonl", files=str(path), field="t").documents())


# ----------------------------------------------------------------------------- fasta
FASTA = """\
;old-style comment line
>seq1 first record, two sequence lines
ACGTNacgt
TTGA
>seq2
>seq3 description
MKV LLA
GG
"""


def test_fasta_joins_multi_line_records_and_keeps_the_alphabet(tmp_path):
    # FASTA as NCBI describes it (from memory): a '>' header line, then sequence lines.
    path = tmp_path / "x.fa"
    path.write_text(FASTA)
    documents = list(make("fasta", files=str(path)).documents())
    assert [(d.where, d.text) for d in documents] == [
        (f"{path}:>seq1", "ACGTNacgtTTGA"),
        (f"{path}:>seq3", "MKVLLAGG"),  # seq2 is empty and skipped
    ]
    assert [d.doc_id for d in documents] == [0, 1]
    assert [d.n_bytes for d in documents] == [13, 8]
    folded = make("fasta", files=str(path), fold_case=True)
    assert _texts(folded)[0] == "ACGTNACGTTTGA"


def test_fasta_with_crlf_line_endings_reads_the_same(tmp_path):
    (tmp_path / "crlf.fa").write_bytes(FASTA.replace("\n", "\r\n").encode())
    (tmp_path / "lf.fa").write_text(FASTA)
    crlf = _texts(make("fasta", files=str(tmp_path / "crlf.fa")))
    assert crlf == _texts(make("fasta", files=str(tmp_path / "lf.fa")))


def test_fasta_refuses_sequence_before_the_first_header_and_bad_fold_case(tmp_path):
    path = tmp_path / "x.fa"
    path.write_text("ACGT\n>s\nAC\n")
    with pytest.raises(DataError, match=r"x.fa:1: sequence data before the first '>' header"):
        list(make("fasta", files=str(path)).documents())
    with pytest.raises(ConfigError, match="parameter fold_case='yes' is invalid"):
        make("fasta", files=str(path), fold_case="yes")


# ---------------------------------------------------------------------------- tokens
def test_tokens_reads_a_sequence_folder_with_its_byte_counts(tmp_path):
    units = SequenceSet.from_list([[1, 2], [3], [0, 0, 5]], vocab_size=6, n_bytes=[4, 2, 9])
    units.save(tmp_path / "set")
    documents = list(make("tokens", files=str(tmp_path / "set")).documents())
    assert [d.tokens.tolist() for d in documents] == [[1, 2], [3], [0, 0, 5]]
    assert [d.n_bytes for d in documents] == [4, 2, 9]
    assert [d.doc_id for d in documents] == [0, 1, 2]


def test_tokens_keeps_the_units_of_one_folder_document_together(tmp_path):
    first = SequenceSet.from_list([[1], [2], [3], [4]], vocab_size=5, doc_ids=[7, 7, 2, 7])
    first.save(tmp_path / "a")
    second = SequenceSet.from_list([[1, 1], [2, 2]], vocab_size=5, doc_ids=[7, 8])
    second.save(tmp_path / "b")
    np.save(tmp_path / "c.npy", np.array([[3, 3], [4, 4]], dtype=np.int32))
    source = make("tokens", files=[str(tmp_path / n) for n in ("a", "b", "c.npy")])
    documents = list(source.documents())
    # Folder a's document 7 stays one document; b's 7 is another; .npy rows are one each.
    assert [d.doc_id for d in documents] == [0, 0, 1, 0, 2, 3, 4, 5]
    # The units stage carries them through to every split, where the bootstrap reads them.
    prepared = prepare_units(documents, tokenizer=None, mode="document")
    groups: dict[int, list[list[int]]] = {}
    for units in prepared.splits.values():
        for unit, doc_id in zip(units.to_list(), units.doc_ids.tolist(), strict=True):
            groups.setdefault(doc_id, []).append(unit.tolist())
    groups = {doc_id: sorted(members) for doc_id, members in groups.items()}
    assert sorted(groups.values()) == sorted(
        [[[1], [2], [4]], [[3]], [[1, 1]], [[2, 2]], [[3, 3]], [[4, 4]]]
    )


def test_tokens_vocabulary_is_the_declared_one_not_only_the_ids_seen(tmp_path):
    SequenceSet.from_list([[1, 2], [3]], vocab_size=50).save(tmp_path / "small")
    SequenceSet.from_list([[4]], vocab_size=70).save(tmp_path / "large")
    np.save(tmp_path / "ids.npy", np.array([5, 6], dtype=np.int32))
    folders = make("tokens", files=[str(tmp_path / "small"), str(tmp_path / "large")])
    assert folders.declared_vocab_size() == 70  # the largest a folder declares
    assert make("tokens", files=str(tmp_path / "ids.npy")).declared_vocab_size() is None
    given = make("tokens", files=str(tmp_path / "ids.npy"), vocab_size=100)
    assert given.declared_vocab_size() == 100
    prepared = prepare_units(
        given.documents(), tokenizer=None, mode="document", vocab_size=given.declared_vocab_size()
    )
    assert {units.vocab_size for units in prepared.splits.values()} == {100}
    undeclared = make("tokens", files=str(tmp_path / "ids.npy"))
    prepared = prepare_units(undeclared.documents(), tokenizer=None, mode="document")
    assert prepared.vocab_size == 7  # the largest id + 1


def test_tokens_refuses_an_id_at_or_above_the_given_vocab_size(tmp_path):
    np.save(tmp_path / "ids.npy", np.array([[1, 2], [3, 9]], dtype=np.int32))
    source = make("tokens", files=str(tmp_path / "ids.npy"), vocab_size=9)
    with pytest.raises(DataError, match=r"ids.npy:row 1: token id 9 is not below source 'tokens'"):
        list(source.documents())
    with pytest.raises(ConfigError, match="parameter vocab_size=0 is invalid"):
        make("tokens", files=str(tmp_path / "ids.npy"), vocab_size=0)


def test_tokens_reads_npy_files_one_document_per_1d_array_or_2d_row(tmp_path):
    np.save(tmp_path / "a.npy", np.array([5, 6, 7], dtype=np.int64))
    np.save(tmp_path / "b.npy", np.array([[1, 2], [3, 4]], dtype=np.int32))
    source = make("tokens", files=str(tmp_path / "*.npy"))
    assert [d.tokens.tolist() for d in source.documents()] == [[5, 6, 7], [1, 2], [3, 4]]
    assert [p.name for p in source.paths()] == ["a.npy", "b.npy"]


def test_tokens_refuses_non_integer_or_negative_arrays_and_other_files(tmp_path):
    np.save(tmp_path / "f.npy", np.array([0.5, 1.0]))
    with pytest.raises(DataError, match="expected a 1-D or 2-D integer array"):
        list(make("tokens", files=str(tmp_path / "f.npy")).documents())
    np.save(tmp_path / "n.npy", np.array([1, -1]))
    with pytest.raises(DataError, match="token ids must be >= 0, found -1"):
        list(make("tokens", files=str(tmp_path / "n.npy")).documents())
    (tmp_path / "t.txt").write_text("1 2 3")
    with pytest.raises(DataError, match="neither a .npy file nor a folder"):
        make("tokens", files=str(tmp_path / "t.txt"))


_LINE_TEXT = st.text(
    st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n"), max_size=20
)


@settings(max_examples=60, deadline=None)
@given(lines=st.lists(_LINE_TEXT, max_size=12), ending=st.sampled_from(["\n", "\r\n"]))
def test_line_split_yields_every_non_blank_line_with_its_utf8_size(lines, ending):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "x.txt"
        path.write_bytes("".join(line + ending for line in lines).encode("utf-8"))
        # A leading U+FEFF on line 1 is read as a byte-order mark and dropped.
        if lines and lines[0].startswith("\ufeff"):
            lines = [lines[0][1:], *lines[1:]]
        kept = [line for line in lines if line.strip()]
        if not kept:
            with pytest.raises(DataError, match="no text in"):
                list(make("text", files=str(path), split="line").documents())
            return
        documents = list(make("text", files=str(path), split="line").documents())
        assert [d.text for d in documents] == kept
        assert [d.n_bytes for d in documents] == [len(line.encode("utf-8")) for line in kept]


def test_files_may_come_from_a_hydra_list_config(tmp_path):
    from omegaconf import OmegaConf

    (tmp_path / "a.txt").write_text("hi\n")
    config = OmegaConf.create({"files": [str(tmp_path / "a.txt")], "split": "line"})
    assert _texts(make("text", **config)) == ["hi"]
