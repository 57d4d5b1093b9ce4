"""Tokenizers: ``bytes``, ``chars`` (Unicode code points) and ``words`` (regex split).

Every tokenizer reserves id 0 (:data:`UNKNOWN_ID`) for the unknown token, so ``vocab_size``
always covers it. Tokenizing happens in two steps so units can be cut and split *before*
any vocabulary exists: :meth:`Tokenizer.pieces` is a vocabulary-free pre-tokenization (one
piece per future token), and :meth:`Tokenizer.fit` learns the vocabulary from the pieces of
the training units only.

- ``bytes``: the 256 UTF-8 byte values get ids 1..256 (``vocab_size`` 257); always lossless.
  Text decoded with ``errors="surrogateescape"`` keeps its raw invalid bytes.
- ``chars``: code points seen in training (optionally capped) get ids 1..V-1 in code-point
  order; other characters are unknown.
- ``words``: runs of letters, runs of digits, runs of whitespace, and single other
  characters (punctuation, ``_``, marks), so ``"".join(pieces(text)) == text``; ids by
  training frequency (ties by the piece's text), optionally capped.

``chars`` and ``words`` round-trip text exactly when no piece is unknown.

Examples
--------
>>> tok = make("words").fit([make("words").pieces("the cat, the hat")])
>>> tok.pieces("the dog.")
['the', ' ', 'dog', '.']
>>> tok.decode(tok.encode("the hat"))
'the hat'
>>> tok.encode("the dog").tolist()[2] == tok.unknown_id
True
"""

from __future__ import annotations

import itertools
import json
import os
import re
from collections import Counter
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..errors import DataError, FitError
from ..registry import Registry
from ..validation import check_int
from ._files import atomic_write_json

__all__ = [
    "FIELD_SEPARATOR",
    "UNKNOWN_ID",
    "Tokenizer",
    "load",
    "make",
    "names",
    "registry",
    "token_texts",
]

UNKNOWN_ID = 0
#: the character between the fields of a record (U+001F, the ASCII "unit separator"); every
#: tokenizer makes it a token of its own, so each field boundary is one token
FIELD_SEPARATOR = "\x1f"
TOKENIZER_FORMAT = "retrograde.tokenizer/1"
#: what ``decode`` writes for the unknown token
UNKNOWN_TEXT = "\ufffd"


def make(name: str, **params: Any) -> Tokenizer:
    """Build an unfitted tokenizer ``name`` (``bytes``, ``chars`` or ``words``)."""
    return registry.make(name, **params)


def names() -> list[str]:
    return registry.names()


#: how :func:`token_texts` shows the unknown token (id 0)
UNKNOWN_LABEL = "<unknown>"


def token_texts(tokenizer: Tokenizer) -> list[str]:
    """What every id of a fitted tokenizer stands for, escaped for printing: entry ``i`` is id ``i``.

    Id 0 is ``<unknown>``; other entries are Python string literals, so a space, a line
    feed or a control character stays visible (``' '``, ``'\\n'``); byte ids read as
    byte literals (``'\\xff'``).

    >>> token_texts(make("chars").fit([list("a b")]))
    ['<unknown>', "' '", "'a'", "'b'"]
    """
    texts = [UNKNOWN_LABEL]
    for token in range(1, tokenizer.vocab_size):
        if isinstance(tokenizer, ByteTokenizer):
            texts.append(repr(bytes([token - 1]))[1:])  # b'\xff' -> '\xff'
        else:
            texts.append(repr(tokenizer.decode([token])))
    return texts


def load(path: str | os.PathLike[str]) -> Tokenizer:
    """Read a tokenizer written by :meth:`Tokenizer.save`."""
    path = Path(path)
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DataError(f"{path}: no such tokenizer file; write one with Tokenizer.save") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: not a tokenizer file ({exc})") from exc
    if not isinstance(meta, dict) or meta.get("format") != TOKENIZER_FORMAT:
        raise DataError(f"{path}: format is not {TOKENIZER_FORMAT!r}; write it with Tokenizer.save")
    tokenizer = make(meta["name"], **meta["params"])
    if meta.get("vocab") is not None:
        tokenizer._set_vocab(meta["vocab"])
    return tokenizer


class Tokenizer:
    """Base class: one piece of text per token; id 0 is the unknown token."""

    name: ClassVar[str] = ""
    #: True when ``decode(encode(text)) == text`` for every text
    lossless: ClassVar[bool] = False
    unknown_id: ClassVar[int] = UNKNOWN_ID

    def __init__(self, **params: Any) -> None:
        self._params = dict(params)

    def get_params(self) -> dict[str, Any]:
        return dict(self._params)

    # -- subclass hooks
    def pieces(self, text: str) -> list[Any]:
        """Vocabulary-free pre-tokenization of ``text``: one piece per future token."""
        raise NotImplementedError

    def fit(self, piece_lists: Iterable[Sequence[Any]]) -> Tokenizer:
        """Learn the vocabulary from the pieces of the training units; returns ``self``."""
        raise NotImplementedError

    def encode_pieces(self, pieces: Sequence[Any]) -> np.ndarray:
        """(len(pieces),) int32 token ids; unseen pieces get :attr:`unknown_id`."""
        raise NotImplementedError

    def decode(self, ids: Iterable[int] | np.ndarray) -> str:
        """Text of the token ids; the unknown token reads as U+FFFD."""
        raise NotImplementedError

    def token_id(self, piece: Any) -> int:
        """The id of one piece (:attr:`unknown_id` when it is not in the vocabulary)."""
        return int(self.encode_pieces([piece])[0])

    @property
    def vocab_size(self) -> int:
        """Number of token ids, unknown token included."""
        raise NotImplementedError

    def _get_vocab(self) -> list[Any] | None:
        return None

    def _set_vocab(self, vocab: list[Any]) -> None:
        raise NotImplementedError

    # -- shared
    def encode(self, text: str) -> np.ndarray:
        """(n_tokens,) int32 token ids of ``text``."""
        return self.encode_pieces(self.pieces(text))

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write name, params and vocabulary as JSON (atomically)."""
        atomic_write_json(
            path,
            {
                "format": TOKENIZER_FORMAT,
                "name": self.name,
                "params": self.get_params(),
                "vocab": self._get_vocab(),
                "vocab_size": self.vocab_size,
            },
        )


#: every tokenizer class, by name (built-ins, entry points, dotted paths)
registry: Registry[Tokenizer] = Registry("tokenizer", "retrograde.tokenizers", Tokenizer)


@registry.register("bytes")
class ByteTokenizer(Tokenizer):
    """UTF-8 bytes; byte value ``b`` has id ``b + 1``.

    >>> tok = make("bytes")
    >>> tok.encode("é").tolist(), tok.vocab_size
    ([196, 170], 257)
    """

    name = "bytes"
    lossless = True

    def __init__(self) -> None:
        super().__init__()

    def pieces(self, text: str) -> list[Any]:
        return list(text.encode("utf-8", "surrogateescape"))

    def fit(self, piece_lists: Iterable[Sequence[Any]]) -> ByteTokenizer:
        return self  # the vocabulary is fixed

    def encode(self, text: str) -> np.ndarray:
        data = np.frombuffer(text.encode("utf-8", "surrogateescape"), dtype=np.uint8)
        return data.astype(np.int32) + 1

    def encode_pieces(self, pieces: Sequence[Any]) -> np.ndarray:
        if isinstance(pieces, (bytes, bytearray)):
            return np.frombuffer(pieces, dtype=np.uint8).astype(np.int32) + 1
        # Pieces are byte values 0..255 (as ``pieces`` gives them); anything else is unknown.
        ids = np.asarray(pieces, dtype=np.int64).reshape(-1) + 1
        ids[(ids < 1) | (ids > 256)] = UNKNOWN_ID
        return ids.astype(np.int32)

    def token_id(self, piece: Any) -> int:
        if isinstance(piece, str):
            piece = piece.encode("utf-8", "surrogateescape")
        if isinstance(piece, bytes):
            return int(piece[0]) + 1 if len(piece) == 1 else UNKNOWN_ID
        return int(self.encode_pieces([piece])[0])

    def decode(self, ids: Iterable[int] | np.ndarray) -> str:
        ids = np.asarray(ids, dtype=np.int64).reshape(-1)
        byte_values = (ids[ids != UNKNOWN_ID] - 1).astype(np.uint8)
        return byte_values.tobytes().decode("utf-8", "surrogateescape")

    @property
    def vocab_size(self) -> int:
        return 257


def _check_cap(owner: str, max_vocab: Any, min_count: Any) -> None:
    if max_vocab is not None:
        check_int(owner, "max_vocab", max_vocab, low=2)
    check_int(owner, "min_count", min_count, low=1)


def _kept_by_frequency(counts: Counter[Any], max_vocab: int | None, min_count: int) -> list[Any]:
    """Pieces seen ``min_count`` times or more, most frequent first (ties by piece), capped
    so that with the unknown token at most ``max_vocab`` ids exist."""
    ranked = sorted((piece for piece, n in counts.items() if n >= min_count), key=lambda p: p)
    ranked.sort(key=lambda p: -counts[p])  # stable: equal counts stay in piece order
    return ranked if max_vocab is None else ranked[: max_vocab - 1]


@registry.register("chars")
class CharTokenizer(Tokenizer):
    """Unicode code points seen in training; ids 1.. in code-point order.

    Parameters
    ----------
    max_vocab : int, optional
        Largest ``vocab_size`` (unknown token included); the most frequent characters stay.
    min_count : int
        Characters seen fewer times in training are unknown.
    """

    name = "chars"

    def __init__(self, *, max_vocab: int | None = None, min_count: int = 1) -> None:
        super().__init__(max_vocab=max_vocab, min_count=min_count)
        _check_cap("tokenizer 'chars'", max_vocab, min_count)
        self.max_vocab = max_vocab
        self.min_count = min_count

    def pieces(self, text: str) -> list[Any]:
        return list(text)

    def fit(self, piece_lists: Iterable[Sequence[Any]]) -> CharTokenizer:
        counts: Counter[str] = Counter()
        for pieces in piece_lists:
            counts.update(pieces)
        kept = _kept_by_frequency(counts, self.max_vocab, self.min_count)
        self._set_vocab(sorted(ord(c) for c in kept))
        return self

    def _set_vocab(self, vocab: list[Any]) -> None:
        self.code_points_ = np.asarray(vocab, dtype=np.int64)  # sorted ascending
        self.__dict__.pop("_lookup", None)  # rebuilt for the new vocabulary on next use

    def _get_vocab(self) -> list[Any] | None:
        return [int(c) for c in self.code_points_]

    def _fitted(self) -> np.ndarray:
        if not hasattr(self, "code_points_"):
            raise FitError("tokenizer 'chars': call fit() on the training units before encoding")
        return self.code_points_

    def encode(self, text: str) -> np.ndarray:
        code_points = np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype="<u4")
        return self._encode_code_points(code_points.astype(np.int64))

    def _encode_code_points(self, code_points: np.ndarray) -> np.ndarray:
        # A dense lookup table (code point -> id; its last slot, unknown, catches every code
        # point above the largest known one) turns encoding into one gather.
        if not hasattr(self, "_lookup"):
            table = self._fitted()
            size = int(table.max()) + 2 if len(table) else 1
            self._lookup = np.full(size, UNKNOWN_ID, dtype=np.int32)
            self._lookup[table] = np.arange(1, len(table) + 1, dtype=np.int32)
        return self._lookup[np.minimum(code_points, len(self._lookup) - 1)]

    def encode_pieces(self, pieces: Sequence[Any]) -> np.ndarray:
        if isinstance(pieces, str):  # a string is its own sequence of one-character pieces
            return self.encode(pieces)
        if all(isinstance(p, str) and len(p) == 1 for p in pieces):
            return self.encode("".join(pieces))  # vectorized over code points
        return np.array([self.token_id(p) for p in pieces], dtype=np.int32)

    def token_id(self, piece: Any) -> int:
        if not isinstance(piece, str) or len(piece) != 1:
            return UNKNOWN_ID
        return int(self._encode_code_points(np.array([ord(piece)]))[0])

    def decode(self, ids: Iterable[int] | np.ndarray) -> str:
        table = np.concatenate([[ord(UNKNOWN_TEXT)], self._fitted()])
        code_points = table[np.asarray(ids, dtype=np.int64)].astype("<u4")
        return code_points.tobytes().decode("utf-32-le", "surrogatepass")

    @property
    def vocab_size(self) -> int:
        return len(self._fitted()) + 1


#: letters, digits, whitespace, then any single other character: covers every character.
#: The field separator U+001F counts as whitespace for ``\s``; it is kept a piece of its own.
WORD_PATTERN = re.compile(r"[^\W\d_]+|\d+|[^\S\x1f]+|_|[^\w\s]|\x1f")


@registry.register("words")
class WordTokenizer(Tokenizer):
    """Words, numbers, whitespace runs and single punctuation characters.

    Parameters
    ----------
    max_vocab : int, optional
        Largest ``vocab_size`` (unknown token included); the most frequent pieces stay.
    min_count : int
        Pieces seen fewer times in training are unknown.
    """

    name = "words"

    def __init__(self, *, max_vocab: int | None = None, min_count: int = 1) -> None:
        super().__init__(max_vocab=max_vocab, min_count=min_count)
        _check_cap("tokenizer 'words'", max_vocab, min_count)
        self.max_vocab = max_vocab
        self.min_count = min_count

    def pieces(self, text: str) -> list[Any]:
        return WORD_PATTERN.findall(text)

    def fit(self, piece_lists: Iterable[Sequence[Any]]) -> WordTokenizer:
        counts: Counter[str] = Counter()
        for pieces in piece_lists:
            counts.update(pieces)
        self._set_vocab(_kept_by_frequency(counts, self.max_vocab, self.min_count))
        return self

    def _set_vocab(self, vocab: list[Any]) -> None:
        self.vocab_ = [str(piece) for piece in vocab]
        self.ids_ = {piece: i + 1 for i, piece in enumerate(self.vocab_)}

    def _get_vocab(self) -> list[Any] | None:
        return list(self._fitted_vocab())

    def _fitted_vocab(self) -> list[str]:
        if not hasattr(self, "vocab_"):
            raise FitError("tokenizer 'words': call fit() on the training units before encoding")
        return self.vocab_

    def encode_pieces(self, pieces: Sequence[Any]) -> np.ndarray:
        self._fitted_vocab()
        # map() with dict.get runs the per-piece lookup in C (no Python frame per token).
        ids = map(self.ids_.get, pieces, itertools.repeat(UNKNOWN_ID))
        return np.fromiter(ids, dtype=np.int32, count=len(pieces))

    def decode(self, ids: Iterable[int] | np.ndarray) -> str:
        table = [UNKNOWN_TEXT, *self._fitted_vocab()]
        return "".join(table[int(i)] for i in np.asarray(ids).reshape(-1))

    @property
    def vocab_size(self) -> int:
        return len(self._fitted_vocab()) + 1


# The learned tokenizers (``bpe``, ``unigram``) register themselves in this registry; they
# live in their own module, which imports this one, so they are loaded last.
from . import _learned  # noqa: E402, F401
