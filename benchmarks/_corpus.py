"""Benchmark data: Python source files that ship with this machine, cut into line units.

The corpus is real text that needs no download. Source ``"python"``: the standard
library's ``.py`` files (``sysconfig.get_paths()["stdlib"]``, without ``site-packages``),
then, when more text is needed, the ``.py`` files of the running interpreter's
``site-packages`` (numpy, scipy, scikit-learn, DVC, ... as installed here); each group in
sorted path order. Source ``"unicode"``: only the ``site-packages`` ``.py`` files whose
bytes are not all ASCII (Unicode tables, emoji and locale data, docstrings in other
scripts, pretty-printer tests), in sorted path order: real code with thousands of
distinct, mostly rare, characters. The text is cut exactly as the pipeline's ``units``
stage cuts a text source with ``unit: line``: :func:`retrograde.data.prepare_units`
(salted-hash split 80/10/10, vocabulary fitted on the training lines) with the project's
``chars`` or ``words`` tokenizer.
"""

from __future__ import annotations

import sysconfig
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from retrograde.data import Document, SequenceSet, prepare_units
from retrograde.data.tokenizers import make as make_tokenizer

__all__ = [
    "CHARS_PER_WORD_TOKEN",
    "load_prefix",
    "load_split",
    "prefix",
    "prepare_corpus",
    "source_text",
]

#: characters per ``words`` token on the standard library (31.5 M chars -> 10.8 M tokens,
#: measured here); used to read enough text for a word-token budget, with a margin
CHARS_PER_WORD_TOKEN = 3.3


SOURCES = ("python", "unicode")


def _python_files() -> Iterator[Path]:
    paths = sysconfig.get_paths()
    stdlib = Path(paths["stdlib"])
    yield from sorted(
        path
        for path in stdlib.rglob("*.py")
        if "site-packages" not in path.relative_to(stdlib).parts
    )
    yield from sorted(Path(paths["purelib"]).rglob("*.py"))


def _unicode_files() -> Iterator[Path]:
    for path in sorted(Path(sysconfig.get_paths()["purelib"]).rglob("*.py")):
        if not path.read_bytes().isascii():
            yield path


def source_text(n_chars: int, source: str = "python") -> tuple[str, int]:
    """The first ``n_chars`` characters of the corpus and the number of files read."""
    if source not in SOURCES:
        raise ValueError(f"unknown source {source!r}; known: {', '.join(SOURCES)}")
    pieces: list[str] = []
    total = 0
    n_files = 0
    for path in _python_files() if source == "python" else _unicode_files():
        # Invalid UTF-8 is rare in these files; replacing it keeps the run deterministic.
        text = path.read_bytes().decode("utf-8", errors="replace")
        pieces.append(text if text.endswith("\n") else text + "\n")
        total += len(pieces[-1])
        n_files += 1
        if total >= n_chars:
            break
    if total < n_chars:
        raise RuntimeError(
            f"only {total:,} characters of {source!r} Python source here; need {n_chars:,}"
        )
    return "".join(pieces)[:n_chars], n_files


def prepare_corpus(
    kind: str,
    n_train_tokens: int,
    folder: Path,
    *,
    n_test_tokens: int = 0,
    source: str = "python",
) -> dict[str, Any]:
    """Write ``folder/{train,test}/`` (SequenceSet folders) with at least the tokens asked for.

    ``kind`` is the tokenizer (``chars`` or ``words``), ``source`` the text (see the module
    docstring). Returns counts for the report, with the distinct characters of the text.
    """
    chars_per_token = 1.0 if kind == "chars" else CHARS_PER_WORD_TOKEN
    # The train split gets ~80% of the lines and test ~10%; read 10% more text than that.
    n_chars = int(max(n_train_tokens / 0.8, n_test_tokens / 0.1) * chars_per_token * 1.1)
    while True:  # small corpora can fall short by split noise: read twice as much, retry
        text, n_files = source_text(n_chars, source)
        prepared = prepare_units(
            [Document(doc_id=0, where="python-sources", text=text)],
            tokenizer=make_tokenizer(kind),
            mode="line",
        )
        train, test = prepared.splits["train"], prepared.splits["test"]
        if len(train.tokens) >= n_train_tokens and len(test.tokens) >= n_test_tokens:
            break
        n_chars *= 2
    train.save(folder / "train")
    test.save(folder / "test")
    return {
        "source": source,
        "characters": len(text),
        "distinct_characters": len(set(text)),
        "files": n_files,
        "train_tokens": len(train.tokens),
        "train_units": len(train),
        "test_tokens": len(test.tokens),
        "test_units": len(test),
        "vocab_size": int(prepared.vocab_size),
    }


def load_split(folder: Path, split: str) -> SequenceSet:
    return SequenceSet.load(folder / split)


def load_prefix(folder: Path, split: str, n_tokens: int) -> SequenceSet:
    """:func:`prefix` of a saved split, read through a memory map so only it stays resident.

    A measured process then holds the data a pipeline stage would hold (its own units), not
    the whole prepared corpus.
    """
    mapped = _prefix_view(SequenceSet.load(folder / split, mmap=True), n_tokens)
    return SequenceSet(
        np.array(mapped.tokens), np.array(mapped.offsets), vocab_size=mapped.vocab_size
    )


def prefix(units: SequenceSet, n_tokens: int) -> SequenceSet:
    """The shortest run of leading units holding at least ``n_tokens`` tokens (or all)."""
    return _prefix_view(units, n_tokens)


def _prefix_view(units: SequenceSet, n_tokens: int) -> SequenceSet:
    n_units = int(min(len(units), 1 + units.offsets[1:].searchsorted(n_tokens)))
    return SequenceSet(
        units.tokens[: units.offsets[n_units]],
        units.offsets[: n_units + 1],
        vocab_size=units.vocab_size,
    )
