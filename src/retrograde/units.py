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

import hashlib
import itertools
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._document import Document
from ._validation import check_choice, check_float, check_int, invalid
from .errors import ConfigError, DataError
from .sequences import MAX_VOCAB_SIZE, SequenceSet
from .tokenize import ByteTokenizer, CharTokenizer, Tokenizer

__all__ = ["MODES", "SPLITS", "PreparedUnits", "assign_splits", "check_fractions", "prepare_units"]

SPLITS = ("train", "valid", "test")
MODES = ("line", "document", "window")
_OWNER = "units"


def check_fractions(fractions: Sequence[Any]) -> tuple[float, float, float]:
    """Validate split fractions; returns ``(train, valid, test)``.

    Three fractions must each lie in (0, 1) and sum to 1. Two fractions ``(train, valid)``
    must sum to less than 1; test gets the rest.

    >>> check_fractions([0.8, 0.1])
    (0.8, 0.1, 0.1)
    """
    # Any sequence (a list, a tuple, an OmegaConf ListConfig, an array), but not a string.
    is_sequence = isinstance(fractions, (Sequence, np.ndarray)) and not isinstance(fractions, str)
    values = list(fractions) if is_sequence else [fractions]
    if len(values) not in (2, 3):
        raise invalid(_OWNER, "fractions", fractions, "two (train, valid) or three fractions")
    parts = [
        check_float(_OWNER, "fractions", v, 0.0, 1.0, low_open=True, high_open=True) for v in values
    ]
    total = sum(parts)
    if len(parts) == 2:
        if total >= 1.0:
            raise invalid(_OWNER, "fractions", fractions, "train + valid < 1 (test gets the rest)")
        parts.append(round(1.0 - total, 12))
    elif abs(total - 1.0) > 1e-9:
        raise invalid(_OWNER, "fractions", fractions, "three numbers in (0, 1) that sum to 1")
    return parts[0], parts[1], parts[2]


def _salt_key(salt: str) -> bytes:
    return hashlib.blake2b(str(salt).encode("utf-8"), digest_size=32).digest()


def assign_splits(
    keys: Sequence[bytes], fractions: Sequence[float] = (0.8, 0.1, 0.1), salt: str = "retrograde"
) -> np.ndarray:
    """(len(keys),) int8 split of each unit: 0 train, 1 valid, 2 test.

    A unit's split depends only on its content ``key``, the ``salt`` and the fractions:
    ``u = blake2b(key, key=blake2b(salt))`` read as a 53-bit fraction in [0, 1), then
    train if ``u < f_train``, valid if ``u < f_train + f_valid``, else test.

    >>> assign_splits([b"same", b"same"], salt="s").tolist() == [assign_splits([b"same"], salt="s")[0]] * 2
    True
    """
    train, valid, _ = check_fractions(fractions)
    base = hashlib.blake2b(digest_size=8, key=_salt_key(salt))

    def fraction_bits(key: bytes) -> int:
        hasher = base.copy()
        hasher.update(key)
        return int.from_bytes(hasher.digest(), "little") >> 11  # top 53 bits

    bits = np.fromiter((fraction_bits(k) for k in keys), dtype=np.uint64, count=len(keys))
    uniform = bits.astype(np.float64) * 2.0**-53  # exact: 53-bit integers fit a float64
    return np.where(uniform < train, 0, np.where(uniform < train + valid, 1, 2)).astype(np.int8)


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
            "splits": per_split,
        }


def _utf8(text: str) -> bytes:
    # surrogateescape gives back the raw bytes of text decoded that way (invalid UTF-8 kept).
    return text.encode("utf-8", "surrogateescape")


def _piece_sequence(tokenizer: Tokenizer, text: str) -> Sequence[Any]:
    """A sliceable sequence with one item per token, cheap for the built-in tokenizers."""
    if isinstance(tokenizer, CharTokenizer):
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


def _cut(
    documents: Iterable[Document],
    tokenizer: Tokenizer | None,
    mode: str,
    window: int,
    remainder: str,
) -> tuple[list[Any], list[int], int, str]:
    """Natural-order units: (unit contents, doc ids, dropped tokens, first document's where).

    A unit's content is its piece sequence (text units: a str for ``chars``, bytes for
    ``bytes``, a list of pieces otherwise) or an int64 array (token units).
    """
    contents: list[Any] = []
    doc_ids: list[int] = []
    dropped = 0
    first_where = ""
    kind = None
    for document in documents:
        first_where = first_where or document.where
        this_kind = "tokens" if document.tokens is not None else "text"
        if kind is not None and this_kind != kind:
            raise DataError(f"{document.where}: mixes {this_kind} with {kind} documents")
        kind = this_kind
        if tokenizer is None and this_kind == "text":
            raise ConfigError(
                f"{document.where}: text documents need a tokenizer; choose bytes, chars or words"
            )
        if tokenizer is not None and this_kind == "tokens":
            raise ConfigError(
                f"{document.where}: token documents are already tokenized; pass tokenizer=None"
            )
        if this_kind == "tokens":
            if mode == "line":
                raise ConfigError(
                    f"{document.where}: unit mode 'line' needs text documents; "
                    "use mode 'document' or 'window' for token documents"
                )
            tokens = np.asarray(document.tokens).astype(np.int64).reshape(-1)
            if len(tokens) and tokens.min() < 0:
                raise DataError(f"{document.where}: token ids must be >= 0, found {tokens.min()}")
            if len(tokens) and tokens.max() >= MAX_VOCAB_SIZE:
                raise DataError(
                    f"{document.where}: token id {tokens.max()} is too large; ids are stored as "
                    f"int32, so they must lie below {MAX_VOCAB_SIZE} (renumber the vocabulary)"
                )
            texts_or_tokens: list[Any] = [tokens]
        else:
            text, text_tokenizer = document.text, tokenizer
            assert text is not None and text_tokenizer is not None
            texts = (
                [line.removesuffix("\r") for line in text.split("\n")] if mode == "line" else [text]
            )
            texts_or_tokens = [_piece_sequence(text_tokenizer, t) for t in texts]
        if mode == "window":
            sequence = texts_or_tokens[0]
            bounds = _window_bounds(len(sequence), window, remainder)
            dropped += len(sequence) - (bounds[-1][1] if bounds else 0)
            texts_or_tokens = [sequence[a:b] for a, b in bounds]
        non_empty = [unit for unit in texts_or_tokens if len(unit)]
        contents.extend(non_empty)
        doc_ids.extend([document.doc_id] * len(non_empty))
    return contents, doc_ids, dropped, first_where


def prepare_units(
    documents: Iterable[Document],
    *,
    tokenizer: Tokenizer | None,
    mode: str,
    window: int | None = None,
    fractions: Sequence[float] = (0.8, 0.1, 0.1),
    salt: str = "retrograde",
    remainder: str = "drop",
    vocab_size: int | None = None,
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

    Examples
    --------
    >>> from retrograde._document import Document
    >>> from retrograde.tokenize import make
    >>> docs = [Document(doc_id=0, where="x.txt", text="ab\\ncd\\nab\\n")]
    >>> prepared = prepare_units(docs, tokenizer=make("chars"), mode="line")
    >>> sum(len(s) for s in prepared.splits.values()), prepared.duplicates
    (3, 2)
    """
    mode = check_choice(_OWNER, "mode", mode, MODES)
    remainder = check_choice(_OWNER, "remainder", remainder, ("drop", "keep"))
    check_fractions(fractions)
    if mode == "window":
        if window is None:
            raise invalid(_OWNER, "window", window, "an integer >= 2 (required with mode='window')")
        window = check_int(_OWNER, "window", window, low=2)
    elif window is not None:
        raise invalid(
            _OWNER,
            "window",
            window,
            f"None (windows are only cut with mode='window', not {mode!r})",
        )

    contents, doc_ids, dropped, where = _cut(documents, tokenizer, mode, window or 0, remainder)
    if not contents:
        raise DataError(
            f"{where or 'the source'}: no units (every {mode if mode != 'window' else 'document'} "
            "is empty); check the input file and the unit mode"
        )
    keys = [
        np.asarray(c, dtype="<i8").tobytes() if tokenizer is None else _content_key(c)
        for c in contents
    ]
    split_of_unit = assign_splits(keys, fractions, salt)
    counts = Counter(keys)
    duplicates = sum(n for n in counts.values() if n > 1)
    duplicated_contents = sum(1 for n in counts.values() if n > 1)

    lengths = np.fromiter((len(c) for c in contents), np.int64, len(contents))
    if tokenizer is not None:
        tokenizer.fit(c for c, split in zip(contents, split_of_unit, strict=True) if split == 0)
        # Pieces encode independently (one id each), so one call on the concatenation
        # replaces a call per unit: (n_tokens,) int32.
        tokens = tokenizer.encode_pieces(_concatenate(contents))
        vocab_size = tokenizer.vocab_size
        n_bytes: np.ndarray | None = np.fromiter((len(k) for k in keys), np.int64, len(keys))
    else:
        tokens = np.concatenate(contents)
        vocab_size = max(int(tokens.max()) + 1, vocab_size or 0)
        n_bytes = None

    corpus = SequenceSet(
        tokens,
        np.concatenate([[0], np.cumsum(lengths)]),
        vocab_size=vocab_size,
        doc_ids=np.asarray(doc_ids, dtype=np.int64),
        n_bytes=n_bytes,
    )
    splits = {name: corpus.subset(split_of_unit == index) for index, name in enumerate(SPLITS)}
    return PreparedUnits(
        splits=splits,
        tokenizer=tokenizer,
        duplicates=duplicates,
        duplicated_contents=duplicated_contents,
        dropped_tokens=dropped,
        mode=mode,
    )
