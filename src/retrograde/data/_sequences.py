"""Ragged integer and float arrays: :class:`SequenceSet` and :class:`Ragged`.

A ragged array stores many 1-D rows of different lengths as one flat ``values`` array plus
an ``offsets`` array of length ``n_rows + 1``: row ``i`` is ``values[offsets[i]:offsets[i+1]]``.

Folder format (``SequenceSet.save`` / ``SequenceSet.load``), readable with plain numpy::

    tokens.npy    int32 (n_tokens,)     all units' token ids, concatenated
    offsets.npy   int64 (n_units + 1,)  unit i is tokens[offsets[i]:offsets[i + 1]]
    doc_ids.npy   int64 (n_units,)      optional: the document each unit came from
    n_bytes.npy   int64 (n_units,)      optional: UTF-8 bytes of each unit's natural text
    meta.json     {"format": "retrograde.sequences/1", "vocab_size": V or null,
                   "n_units": ..., "n_tokens": ...}

Arrays are loaded with ``allow_pickle=False`` and may be memory-mapped (``mmap=True``).
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np

from ..errors import DataError
from ._files import atomic_dir

__all__ = [
    "FORMAT",
    "INT32_LIMIT",
    "MAX_VOCAB_SIZE",
    "Ragged",
    "SequenceSet",
    "earlier_in_unit",
    "index_dtype",
]

FORMAT = "retrograde.sequences/1"

#: Counts and indices below this fit int32. Index arrays use int32 below it to halve their
#: memory and int64 from it on (:func:`index_dtype`); tests lower it to run the int64 paths.
INT32_LIMIT = 1 << 31
#: Token ids are stored as int32 and the end marker takes id ``vocab_size``, so a vocabulary
#: may hold at most ``2**31 - 1`` ids.
MAX_VOCAB_SIZE = (1 << 31) - 1


def index_dtype(largest: int) -> type[np.signedinteger[Any]]:
    """``np.int32`` when every value up to ``largest`` fits it (below :data:`INT32_LIMIT`), else
    ``np.int64``.

    >>> index_dtype(10), index_dtype(2**31)
    (<class 'numpy.int32'>, <class 'numpy.int64'>)
    """
    return np.int32 if largest < INT32_LIMIT else np.int64


class Ragged:
    """Rows of different lengths in one flat array (``values``, ``offsets``)."""

    def __init__(self, values: np.ndarray, offsets: np.ndarray) -> None:
        values = np.asarray(values)
        offsets = np.asarray(offsets, dtype=np.int64)
        if values.ndim != 1 or offsets.ndim != 1 or len(offsets) == 0:
            raise ValueError("values and offsets must be 1-D and offsets non-empty")
        if offsets[0] != 0 or offsets[-1] != len(values) or np.any(np.diff(offsets) < 0):
            raise ValueError("offsets must start at 0, end at len(values) and never decrease")
        self.values = values
        self.offsets = offsets

    @classmethod
    def from_list(cls, rows: Sequence[Any], dtype: Any = np.float64) -> Ragged:
        arrays = [np.asarray(r, dtype=dtype).ravel() for r in rows]
        lengths = np.array([len(a) for a in arrays], dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        values = np.concatenate(arrays) if arrays else np.zeros(0, dtype=dtype)
        return cls(values.astype(dtype, copy=False), offsets)

    def __len__(self) -> int:
        return len(self.offsets) - 1

    def __getitem__(self, index: int) -> np.ndarray:
        n = len(self)
        if not -n <= index < n:
            raise IndexError(f"row {index} out of range for {n} rows")
        index %= n
        return self.values[self.offsets[index] : self.offsets[index + 1]]

    def __iter__(self) -> Iterator[np.ndarray]:
        for i in range(len(self)):
            yield self[i]

    @property
    def lengths(self) -> np.ndarray:
        """(n_rows,) int64 length of each row."""
        return np.diff(self.offsets)

    def row_ids(self) -> np.ndarray:
        """(n_values,) the row index of every flat value."""
        return np.repeat(np.arange(len(self), dtype=np.int64), self.lengths)

    def positions(self) -> np.ndarray:
        """(n_values,) the position of every flat value inside its row."""
        return np.arange(len(self.values), dtype=np.int64) - np.repeat(
            self.offsets[:-1], self.lengths
        )

    def sums(self) -> np.ndarray:
        """(n_rows,) float64 sum of each row (0 for empty rows).

        Each row is summed on its own (``np.add.reduceat``), not as a difference of running
        totals, whose rounding error grows with everything before the row (at 10**9
        log-probabilities a running total reaches ~5e9 nats and loses ~1e-6 nats per row).
        """
        out = np.zeros(len(self), dtype=np.float64)
        filled = self.lengths > 0
        if filled.any():
            values = np.asarray(self.values, dtype=np.float64)
            # Starts of the non-empty rows delimit exactly those rows (empty rows add nothing).
            out[filled] = np.add.reduceat(values, self.offsets[:-1][filled])
        return out

    def to_list(self) -> list[np.ndarray]:
        return [np.array(row) for row in self]


class SequenceSet(Ragged):
    """Units of integer token ids.

    ``vocab_size`` counts every token id a model may see (unknown token included); token ids
    lie in ``[0, vocab_size)``. The end-of-unit marker is *not* a token id: families score it
    as the extra outcome ``vocab_size``.

    Examples
    --------
    >>> s = SequenceSet.from_list([[1, 2, 3], [4]], vocab_size=5)
    >>> len(s), s[0].tolist(), s.lengths.tolist()
    (2, [1, 2, 3], [3, 1])
    """

    def __init__(
        self,
        tokens: np.ndarray,
        offsets: np.ndarray,
        *,
        vocab_size: int | None = None,
        doc_ids: np.ndarray | None = None,
        n_bytes: np.ndarray | None = None,
    ) -> None:
        tokens = np.asarray(tokens)
        if tokens.dtype.kind not in "iu":
            raise ValueError(f"token ids must be integers, got dtype {tokens.dtype}")
        super().__init__(tokens, offsets)
        n = len(self)
        self.vocab_size = None if vocab_size is None else int(vocab_size)
        self.doc_ids = None if doc_ids is None else np.asarray(doc_ids, dtype=np.int64)
        self.n_bytes = None if n_bytes is None else np.asarray(n_bytes, dtype=np.int64)
        for name, arr in (("doc_ids", self.doc_ids), ("n_bytes", self.n_bytes)):
            if arr is not None and arr.shape != (n,):
                raise ValueError(f"{name} must have one entry per unit ({n}), got {arr.shape}")
        if vocab_size is not None and not 0 <= int(vocab_size) <= MAX_VOCAB_SIZE:
            raise ValueError(f"vocab_size must lie in [0, {MAX_VOCAB_SIZE}], got {vocab_size}")
        limit = MAX_VOCAB_SIZE if vocab_size is None else int(vocab_size)
        if len(tokens) and (tokens.min() < 0 or tokens.max() >= limit):
            raise ValueError(
                f"token ids must lie in [0, {limit}); got {tokens.min()}..{tokens.max()}"
            )

    @property
    def tokens(self) -> np.ndarray:
        return self.values

    @classmethod
    def from_list(  # type: ignore[override]
        cls,
        rows: Sequence[Any],
        *,
        vocab_size: int | None = None,
        doc_ids: Any = None,
        n_bytes: Any = None,
    ) -> SequenceSet:
        # Rows are read as int64 first: a direct int32 cast would wrap ids >= 2**31 silently;
        # the range check in __init__ then refuses them.
        ragged = Ragged.from_list(rows, dtype=np.int64)
        values = ragged.values
        if not len(values) or (values.min() >= 0 and values.max() <= MAX_VOCAB_SIZE):
            ragged = Ragged(values.astype(np.int32), ragged.offsets)
        return cls(
            ragged.values, ragged.offsets, vocab_size=vocab_size, doc_ids=doc_ids, n_bytes=n_bytes
        )

    def with_tokens(self, tokens: np.ndarray) -> SequenceSet:
        """Same units, lengths and metadata with new token values (e.g. reordered)."""
        return SequenceSet(
            tokens,
            self.offsets,
            vocab_size=self.vocab_size,
            doc_ids=self.doc_ids,
            n_bytes=self.n_bytes,
        )

    def subset(self, index: np.ndarray) -> SequenceSet:
        """The units at ``index`` (an int array or boolean mask), metadata kept."""
        index = np.arange(len(self))[np.asarray(index)]
        lengths = self.lengths[index]
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        starts = self.offsets[:-1][index]
        flat = np.repeat(starts - offsets[:-1], lengths) + np.arange(offsets[-1])
        return SequenceSet(
            self.tokens[flat],
            offsets,
            vocab_size=self.vocab_size,
            doc_ids=None if self.doc_ids is None else self.doc_ids[index],
            n_bytes=None if self.n_bytes is None else self.n_bytes[index],
        )

    def effective_vocab_size(self) -> int:
        """``vocab_size`` if known, else one more than the largest id."""
        if self.vocab_size is not None:
            return self.vocab_size
        return int(self.tokens.max()) + 1 if len(self.tokens) else 1

    def save(self, folder: str | os.PathLike[str]) -> None:
        """Write the folder format (atomically: the folder appears whole or not at all)."""
        with atomic_dir(folder) as tmp:
            np.save(tmp / "tokens.npy", self.tokens.astype(np.int32, copy=False))
            np.save(tmp / "offsets.npy", self.offsets)
            if self.doc_ids is not None:
                np.save(tmp / "doc_ids.npy", self.doc_ids)
            if self.n_bytes is not None:
                np.save(tmp / "n_bytes.npy", self.n_bytes)
            meta = {
                "format": FORMAT,
                "vocab_size": self.vocab_size,
                "n_units": len(self),
                "n_tokens": int(len(self.tokens)),
            }
            (tmp / "meta.json").write_text(json.dumps(meta, indent=2, sort_keys=True) + "\n")

    @classmethod
    def load(cls, folder: str | os.PathLike[str], *, mmap: bool = False) -> SequenceSet:
        """Read the folder format; ``mmap=True`` memory-maps the arrays read-only."""
        folder = Path(folder)
        meta_path = folder / "meta.json"
        if not meta_path.is_file():
            raise DataError(
                f"{folder}: not a sequence folder (no meta.json); write one with SequenceSet.save"
            )
        try:
            meta = json.loads(meta_path.read_text())
        except json.JSONDecodeError as exc:
            raise DataError(f"{meta_path}: invalid JSON ({exc})") from exc
        if meta.get("format") != FORMAT:
            raise DataError(f"{meta_path}: format {meta.get('format')!r} is not {FORMAT!r}")
        mode: Literal["r"] | None = "r" if mmap else None

        def read(name: str, required: bool = True) -> np.ndarray | None:
            path = folder / name
            if not path.is_file():
                if required:
                    raise DataError(f"{folder}: missing {name}")
                return None
            return np.load(path, mmap_mode=mode, allow_pickle=False)

        tokens, offsets = read("tokens.npy"), read("offsets.npy")
        assert tokens is not None and offsets is not None
        try:
            return cls(
                tokens,
                offsets,
                vocab_size=meta.get("vocab_size"),
                doc_ids=read("doc_ids.npy", False),
                n_bytes=read("n_bytes.npy", False),
            )
        except ValueError as exc:
            raise DataError(f"{folder}: {exc}") from exc


def earlier_in_unit(units: Ragged, flags: np.ndarray) -> np.ndarray:
    """For every token, how many flagged tokens come before it in its own unit.

    ``flags`` is (n_tokens,) bool or 0/1 (e.g. "is a field separator"); the result is int64.
    Empty units (anywhere, the last included) are fine.

    Examples
    --------
    >>> units = Ragged(np.array([5, 0, 6, 0, 7, 0]), np.array([0, 3, 6, 6]))
    >>> earlier_in_unit(units, units.values == 0).tolist()
    [0, 0, 1, 0, 1, 1]
    """
    flags = np.asarray(flags, dtype=np.int64)
    before = np.cumsum(flags) - flags  # flagged tokens before each token, in all units
    if len(before):
        # an empty unit's start may lie past the last token; it is repeated 0 times
        starts = np.minimum(units.offsets[:-1], len(before) - 1)
        before -= np.repeat(before[starts], np.diff(units.offsets))
    return before
