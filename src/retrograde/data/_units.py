"""Cut documents into units, split them by a salted content hash, then tokenize.

The order of work keeps the experiment honest (DESIGN.md, invariants 1 and 2):

1. cut every document into units in its natural order (``line``, ``document`` or
   ``window`` of ``L`` tokens) using the vocabulary-free pre-tokenization;
2. assign each unit to train / valid / test by a salted hash of its natural content, so
   identical units always land in the same split whatever the corpus order;
3. fit the tokenizer's vocabulary on the training units only;
4. encode every unit. Orders are applied later, to these token ids.

Unit modes
----------
``line``
    Text documents split at ``"\\n"`` (a trailing ``"\\r"`` is dropped); empty lines are
    skipped: they carry no tokens and would all be duplicates of each other.
``document``
    A whole document is one unit; empty documents are skipped.
``window``
    Non-overlapping windows of ``window`` tokens cut from each document in natural order,
    never across documents. ``remainder="drop"`` drops each document's last partial window
    (its tokens are counted in ``dropped_tokens``); ``remainder="keep"`` keeps it as a
    shorter unit.

``n_bytes`` of a text unit is the UTF-8 size of its own text (no line terminator).
"""

from __future__ import annotations

import itertools
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError, DataError
from ..validation import check_choice, check_int, invalid
from ._document import Document
from ._sequences import MAX_VOCAB_SIZE, SequenceSet
from ._splits import (
    DEFAULT_FRACTIONS,
    DEFAULT_SALT,
    SPLITS,
    check_fractions,
    split_with_given,
    subsample,
)
from .tokenizers import ByteTokenizer, CharTokenizer, Tokenizer

__all__ = [
    "DEFAULT_UNIT_MODE",
    "REMAINDERS",
    "UNIT_MODES",
    "PreparedUnits",
    "check_units",
    "prepare_units",
]

UNIT_MODES = ("line", "document", "window")
#: the unit mode of a source that names none, and of ``retrograde check FILE``
DEFAULT_UNIT_MODE = "line"
REMAINDERS = ("drop", "keep")
_OWNER = "units"


def check_units(
    mode: Any, window: Any, remainder: Any, owner: str = _OWNER
) -> tuple[str, int | None, str]:
    """The one rule for how units are cut; returns ``(mode, window, remainder)``.

    ``window`` is an integer >= 2 with ``mode="window"`` and ``None`` otherwise.

    >>> check_units("window", 64, "drop")
    ('window', 64, 'drop')
    """
    mode = check_choice(owner, "mode", mode, UNIT_MODES)
    remainder = check_choice(owner, "remainder", remainder, REMAINDERS)
    if mode == "window":
        if window is None:
            raise invalid(owner, "window", window, "an integer >= 2 (required with mode='window')")
        return mode, check_int(owner, "window", window, low=2), remainder
    if window is not None:
        raise invalid(
            owner, "window", window, f"null (windows are only cut with mode='window', not {mode!r})"
        )
    return mode, None, remainder


@dataclass
class PreparedUnits:
    """Units per split, ready to reorder: the output of :func:`prepare_units`."""

    #: ``train``, ``valid``, ``test`` -> units with ``vocab_size``, ``doc_ids`` (and ``n_bytes``)
    splits: dict[str, SequenceSet]
    #: the tokenizer fitted on the training units; None for token documents
    tokenizer: Tokenizer | None
    #: units whose exact content occurs more than once in the corpus (all copies counted)
    duplicates: int
    #: distinct contents that occur more than once
    duplicated_contents: int = 0
    #: tokens in dropped partial windows (``remainder="drop"``)
    dropped_tokens: int = 0
    mode: str = "line"
    #: units cut before a ``max_units`` cap kept a sample of them
    units_before_cap: int | None = None
    #: whether the data fixed some splits (a test-ids file or a split field)
    fixed_splits: bool = False

    @property
    def vocab_size(self) -> int:
        return int(self.splits["train"].vocab_size or 0)

    def summary(self) -> dict[str, Any]:
        """JSON-able counts: units, tokens, tokens per unit and unknowns per split."""
        per_split: dict[str, Any] = {}
        for name, units in self.splits.items():
            lengths = units.lengths
            info: dict[str, Any] = {
                "units": len(units),
                "tokens": int(lengths.sum()),
                "tokens_per_unit": {
                    "mean": round(float(lengths.mean()), 3) if len(units) else 0.0,
                    "min": int(lengths.min()) if len(units) else 0,
                    "max": int(lengths.max()) if len(units) else 0,
                },
            }
            if self.tokenizer is not None:
                info["unknown_tokens"] = int(np.sum(units.tokens == self.tokenizer.unknown_id))
            if units.n_bytes is not None:
                info["bytes"] = int(units.n_bytes.sum())
            per_split[name] = info
        return {
            "mode": self.mode,
            "tokenizer": None if self.tokenizer is None else self.tokenizer.name,
            "vocab_size": self.vocab_size,
            "duplicates": self.duplicates,
            "duplicated_contents": self.duplicated_contents,
            "dropped_tokens": self.dropped_tokens,
            "units_before_cap": self.units_before_cap,
            "fixed_splits": self.fixed_splits,
            "splits": per_split,
        }


def _utf8(text: str) -> bytes:
    # surrogateescape gives back the raw bytes of text decoded that way (invalid UTF-8 kept).
    return text.encode("utf-8", "surrogateescape")


def _learned(tokenizer: Tokenizer | None) -> bool:
    """A tokenizer whose pieces are only known once fitted (``bpe``, ``unigram``)."""
    return bool(getattr(tokenizer, "learned", False))


def _piece_sequence(tokenizer: Tokenizer, text: str) -> Sequence[Any]:
    """A sliceable sequence with one item per token, cheap for the built-in tokenizers."""
    if isinstance(tokenizer, CharTokenizer) or _learned(tokenizer):  # learned: characters
        return text  # a str is a sequence of one-character pieces
    if isinstance(tokenizer, ByteTokenizer):
        return _utf8(text)  # bytes are a sequence of byte values
    return tokenizer.pieces(text)


def _content_key(pieces: Sequence[Any]) -> bytes:
    if isinstance(pieces, str):
        return _utf8(pieces)
    if isinstance(pieces, (bytes, bytearray)):
        return bytes(pieces)
    return _utf8("".join(pieces))


def _concatenate(contents: list[Any]) -> Sequence[Any]:
    """All units' pieces as one sequence of the same kind (str, bytes or list)."""
    first = contents[0]
    if isinstance(first, str):
        return "".join(contents)
    if isinstance(first, (bytes, bytearray)):
        return b"".join(contents)
    return list(itertools.chain.from_iterable(contents))


def _window_bounds(n_tokens: int, window: int, remainder: str) -> list[tuple[int, int]]:
    stop = n_tokens if remainder == "keep" else n_tokens - n_tokens % window
    return [(a, min(a + window, n_tokens)) for a in range(0, stop, window)]


def _document_kind(document: Document, tokenizer: Tokenizer | None, mode: str) -> str:
    """``"text"`` or ``"tokens"``; refuses a document the settings cannot cut."""
    kind = "tokens" if document.tokens is not None else "text"
    if kind == "text" and tokenizer is None:
        raise ConfigError(
            f"{document.where}: text documents need a tokenizer; choose bytes, chars or words"
        )
    if kind == "tokens" and tokenizer is not None:
        raise ConfigError(
            f"{document.where}: token documents are already tokenized; pass tokenizer=None"
        )
    if kind == "tokens" and mode == "line":
        raise ConfigError(
            f"{document.where}: unit mode 'line' needs text documents; "
            "use mode 'document' or 'window' for token documents"
        )
    return kind


def _token_pieces(document: Document) -> list[Any]:
    """A token document as one (n,) int64 piece sequence, its ids checked."""
    tokens = np.asarray(document.tokens).astype(np.int64).reshape(-1)
    if len(tokens) and tokens.min() < 0:
        raise DataError(f"{document.where}: token ids must be >= 0, found {tokens.min()}")
    if len(tokens) and tokens.max() >= MAX_VOCAB_SIZE:
        raise DataError(
            f"{document.where}: token id {tokens.max()} is too large; ids are stored as "
            f"int32, so they must lie below {MAX_VOCAB_SIZE} (renumber the vocabulary)"
        )
    return [tokens]


def _text_pieces(document: Document, tokenizer: Tokenizer, mode: str) -> list[Any]:
    """A text document's lines (``line`` mode) or whole text, each as a piece sequence."""
    text = document.text
    assert text is not None
    texts = [line.removesuffix("\r") for line in text.split("\n")] if mode == "line" else [text]
    return [_piece_sequence(tokenizer, t) for t in texts]


@dataclass
class _Cut:
    """Natural-order units as cut: contents, doc ids, fixed splits (-1: none), unit ids."""

    contents: list[Any]
    doc_ids: list[int]
    given: list[int]
    unit_ids: list[str]
    dropped: int
    where: str


def _cut(
    documents: Iterable[Document],
    tokenizer: Tokenizer | None,
    mode: str,
    window: int,
    remainder: str,
    with_ids: bool = False,
) -> _Cut:
    """Natural-order units (see :class:`_Cut`); unit ids only ``with_ids`` (they cost a
    string per unit).

    A unit's content is its piece sequence (text units: a str for ``chars``, bytes for
    ``bytes``, a list of pieces otherwise) or an int64 array (token units).
    """
    contents: list[Any] = []
    doc_ids: list[int] = []
    given: list[int] = []
    unit_ids: list[str] = []
    dropped, first_where, first_kind = 0, "", None
    for document in documents:
        first_where = first_where or document.where
        kind = _document_kind(document, tokenizer, mode)
        if first_kind is not None and kind != first_kind:
            raise DataError(f"{document.where}: mixes {kind} with {first_kind} documents")
        first_kind = kind
        if kind == "tokens":
            pieces = _token_pieces(document)
        else:
            assert tokenizer is not None
            pieces = _text_pieces(document, tokenizer, mode)
        if mode == "window":
            sequence = pieces[0]
            bounds = _window_bounds(len(sequence), window, remainder)
            dropped += len(sequence) - (bounds[-1][1] if bounds else 0)
            pieces = [sequence[a:b] for a, b in bounds]
        kept = [k for k, unit in enumerate(pieces) if len(unit)]
        contents.extend(pieces[k] for k in kept)
        doc_ids.extend([document.doc_id] * len(kept))
        split = -1 if document.split is None else SPLITS.index(document.split)
        given.extend([split] * len(kept))
        if with_ids and mode == "line":
            ids = document.line_ids(len(pieces))
            unit_ids.extend(ids[k] for k in kept)
        elif with_ids:
            unit_ids.extend([document.unit_id] * len(kept))
    return _Cut(contents, doc_ids, given, unit_ids, dropped, first_where)


def _mark_test_ids(cut: _Cut, test_ids: Mapping[str, str]) -> None:
    """Fix the listed units to the test split; an id no unit has is refused (one line)."""
    known = set(cut.unit_ids)
    for unit_id, where in test_ids.items():
        if unit_id not in known:
            example = cut.unit_ids[0] if cut.unit_ids else "none"
            raise DataError(
                f"{where}: unit id {unit_id!r} matches no document of the source (ids look "
                f"like {example!r}); fix the id or remove the line"
            )
    for index, unit_id in enumerate(cut.unit_ids):
        if unit_id in test_ids:
            cut.given[index] = SPLITS.index("test")


def _keep(cut: _Cut, kept: np.ndarray | None) -> _Cut:
    if kept is None:
        return cut
    pick = kept.tolist()
    return _Cut(
        [cut.contents[i] for i in pick],
        [cut.doc_ids[i] for i in pick],
        [cut.given[i] for i in pick],
        [cut.unit_ids[i] for i in pick] if cut.unit_ids else [],
        cut.dropped,
        cut.where,
    )


def _encode(
    contents: list[Any],
    split_of_unit: np.ndarray,
    keys: list[bytes],
    tokenizer: Tokenizer | None,
    vocab_size: int | None,
) -> tuple[np.ndarray, np.ndarray, int, np.ndarray | None]:
    """(tokens, unit lengths, vocab_size, n_bytes): the vocabulary is fitted on the training
    units only."""
    if tokenizer is None:
        tokens = np.concatenate(contents)
        lengths = np.fromiter((len(c) for c in contents), np.int64, len(contents))
        return tokens, lengths, max(int(tokens.max()) + 1, vocab_size or 0), None
    tokenizer.fit(c for c, split in zip(contents, split_of_unit, strict=True) if split == 0)
    n_bytes = np.fromiter((len(k) for k in keys), np.int64, len(keys))
    if _learned(tokenizer):
        # A learned tokenizer merges characters: each unit is encoded on its own.
        encoded = tokenizer.encode_many(contents)  # type: ignore[attr-defined]
        lengths = np.fromiter((len(e) for e in encoded), np.int64, len(encoded))
        return np.concatenate(encoded), lengths, tokenizer.vocab_size, n_bytes
    # Pieces encode independently (one id each), so one call on the concatenation
    # replaces a call per unit: (n_tokens,) int32.
    tokens = tokenizer.encode_pieces(_concatenate(contents))
    lengths = np.fromiter((len(c) for c in contents), np.int64, len(contents))
    return tokens, lengths, tokenizer.vocab_size, n_bytes


def prepare_units(
    documents: Iterable[Document],
    *,
    tokenizer: Tokenizer | None,
    mode: str = DEFAULT_UNIT_MODE,
    window: int | None = None,
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
    salt: str = DEFAULT_SALT,
    remainder: str = "drop",
    vocab_size: int | None = None,
    test_ids: Mapping[str, str] | None = None,
    max_units: int | None = None,
    subsample_seed: int = 0,
) -> PreparedUnits:
    """Cut, split, fit the vocabulary on train, and encode (see the module docstring).

    Parameters
    ----------
    documents : iterable of Document
        Text documents (with a tokenizer) or token documents (``tokenizer=None``; ids kept,
        ``vocab_size`` = largest id + 1).
    tokenizer : Tokenizer or None
        An unfitted tokenizer; it is fitted here, on the training units only.
    mode : {"line", "document", "window"}
    window : int
        Tokens per window (>= 2); required for, and only allowed with, ``mode="window"``.
    fractions : (train, valid, test) or (train, valid)
    salt : str
        Changing the salt draws a different (equally valid) split.
    remainder : {"drop", "keep"}
        What to do with each document's last partial window.
    vocab_size : int or None
        Token documents only: the vocabulary size they declare; the result's is the larger
        of it and the largest id + 1. Ignored for text (the tokenizer's vocabulary counts).
    test_ids : mapping unit id -> where it was listed, optional
        Fix the test split: units whose document's :attr:`~Document.unit_id` is listed are
        the test split (an unknown id is refused naming where it was listed); the others go
        to train or valid (:func:`~retrograde.data.split_with_given`). Documents that carry
        their own ``split`` keep it.
    max_units, subsample_seed : int
        Keep at most ``max_units`` units, drawn with :func:`~retrograde.data.subsample`
        after cutting and before the vocabulary is fitted (a quick study).

    Examples
    --------
    >>> from retrograde.data import Document, tokenizers
    >>> docs = [Document(doc_id=0, where="x.txt", text="ab\\ncd\\nab\\n")]
    >>> prepared = prepare_units(docs, tokenizer=tokenizers.make("chars"), mode="line")
    >>> sum(len(s) for s in prepared.splits.values()), prepared.duplicates
    (3, 2)
    """
    mode, window, remainder = check_units(mode, window, remainder)
    check_fractions(fractions)
    if mode == "window" and _learned(tokenizer):
        raise ConfigError(
            f"units: mode 'window' cuts windows of tokens, which a learned tokenizer "
            f"({tokenizer.name if tokenizer else ''}) knows only after fitting; use mode "
            "'line' or 'document'"
        )
    cut = _cut(documents, tokenizer, mode, window or 0, remainder, with_ids=bool(test_ids))
    if not cut.contents:
        raise DataError(
            f"{cut.where or 'the source'}: no units (every "
            f"{mode if mode != 'window' else 'document'} is empty); check the input file and "
            "the unit mode"
        )
    if test_ids:
        _mark_test_ids(cut, test_ids)
    n_cut = len(cut.contents)
    cut = _keep(cut, subsample(n_cut, max_units, subsample_seed))
    contents, doc_ids, dropped = cut.contents, cut.doc_ids, cut.dropped
    keys = [
        np.asarray(c, dtype="<i8").tobytes() if tokenizer is None else _content_key(c)
        for c in contents
    ]
    split_of_unit = split_with_given(keys, np.asarray(cut.given), fractions, salt)
    counts = Counter(keys)
    tokens, lengths, vocab_size, n_bytes = _encode(
        contents, split_of_unit, keys, tokenizer, vocab_size
    )
    corpus = SequenceSet(
        tokens,
        np.concatenate([[0], np.cumsum(lengths)]),
        vocab_size=vocab_size,
        doc_ids=np.asarray(doc_ids, dtype=np.int64),
        n_bytes=n_bytes,
    )
    return PreparedUnits(
        splits={name: corpus.subset(split_of_unit == k) for k, name in enumerate(SPLITS)},
        tokenizer=tokenizer,
        duplicates=sum(n for n in counts.values() if n > 1),
        duplicated_contents=sum(1 for n in counts.values() if n > 1),
        dropped_tokens=dropped,
        mode=mode,
        units_before_cap=n_cut,
        fixed_splits=bool((np.asarray(cut.given) >= 0).any()),
    )
