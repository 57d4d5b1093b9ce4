"""``tokens``: token ids from a team's own tokenizer, kept as given.

Each entry of ``files`` is a :class:`~retrograde.SequenceSet` folder (every unit becomes one
token document, with its ``n_bytes`` when the folder has them) or a ``.npy`` file (a 1-D
integer array is one document; a 2-D array is one document per row). Globs may match both.
Arrays are memory-mapped, so a large file is read page by page.

The vocabulary size is ``vocab_size`` when given (every id must lie below it), else the
largest ``vocab_size`` the folders' ``meta.json`` declare, else the largest id + 1: a
model's distributions then cover the team's whole vocabulary, not only the ids seen.

Units of a folder that share a document id (its ``doc_ids.npy``) keep sharing one, so the
bootstrap resamples them together instead of treating pieces of one document as
independent; ids are renumbered so that different folders and files never share one.
"""

from __future__ import annotations

import glob
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from ..data import Document, SequenceSet
from ..errors import DataError, MissingFileError
from ..validation import check_int
from ._base import _GLOB_CHARS, FileSource, _as_path_list, check_regular_file

__all__ = ["TokensSource"]


class TokensSource(FileSource):
    """Token-id arrays (``SequenceSet`` folders or ``.npy`` files).

    Parameters
    ----------
    files : str or list of str
        Folders written by ``SequenceSet.save``, ``.npy`` files, or globs over them.
    vocab_size : int or None, default None
        The tokenizer's vocabulary size; ``None`` takes the folders' own (or the largest
        id + 1).

    Examples
    --------
    >>> import pathlib, tempfile
    >>> import numpy as np
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "ids.npy"
    >>> np.save(path, np.array([[3, 1, 2], [0, 0, 4]], dtype=np.int32))
    >>> [d.tokens.tolist() for d in TokensSource(files=str(path)).documents()]
    [[3, 1, 2], [0, 0, 4]]
    """

    name = "tokens"

    def __init__(self, *, files: Any, vocab_size: int | None = None) -> None:
        self.files = files
        self.vocab_size = vocab_size
        self._validate_params()

    def _validate_params(self) -> None:
        if self.vocab_size is not None:
            check_int(self._owner, "vocab_size", self.vocab_size, 1)
        self.paths()

    def declared_vocab_size(self) -> int | None:
        """``vocab_size`` if given, else the largest one the folders declare, else None."""
        if self.vocab_size is not None:
            return int(self.vocab_size)
        declared = [
            SequenceSet.load(path, mmap=True).vocab_size for path in self.paths() if path.is_dir()
        ]
        sizes = [int(size) for size in declared if size is not None]
        return max(sizes) if sizes else None

    def paths(self) -> list[Path]:
        """The ``.npy`` files and folders read; a folder's own files are listed inside it."""
        found: list[Path] = []
        for pattern in _as_path_list(self._owner, "files", self.files):
            if _GLOB_CHARS & set(pattern):
                matches = [Path(m) for m in sorted(glob.glob(pattern, recursive=True))]
                for match in matches:
                    if match.suffix == ".npy" and not match.is_dir():
                        check_regular_file(self._owner, match)  # a FIFO would block np.load
                matches = [m for m in matches if _is_input(m)]
                if not matches:
                    raise MissingFileError(
                        f"{self._owner}: files pattern {pattern!r} matches no .npy file or "
                        f"sequence folder (relative to {Path.cwd()}); check the pattern"
                    )
            else:
                path = Path(pattern)
                if not path.exists():
                    raise MissingFileError(
                        f"{self._owner}: {pattern!r} not found (relative to {Path.cwd()})"
                    )
                if not path.is_dir():
                    check_regular_file(self._owner, path)
                if not _is_input(path):
                    raise DataError(
                        f"{self._owner}: {pattern!r} is neither a .npy file nor a folder "
                        "written by SequenceSet.save (with meta.json)"
                    )
                matches = [path]
            found.extend(m for m in matches if m not in found)
        return found

    def documents(self) -> Iterator[Document]:
        next_id = 0
        for path in self.paths():
            renumbered: dict[int, int] = {}  # this folder's doc id -> ours
            for where, tokens, n_bytes, group in _read(path):
                if group is None:
                    doc_id, next_id = next_id, next_id + 1
                elif group in renumbered:
                    doc_id = renumbered[group]
                else:
                    doc_id = renumbered[group] = next_id
                    next_id += 1
                if self.vocab_size is not None and len(tokens):
                    largest = int(np.max(tokens))
                    if largest >= self.vocab_size:
                        raise DataError(
                            f"{where}: token id {largest} is not below {self._owner}'s "
                            f"vocab_size={self.vocab_size}; raise vocab_size or check the ids"
                        )
                yield Document(doc_id, where, tokens=tokens, n_bytes=n_bytes)
        if next_id == 0:
            raise DataError(f"{self._owner}: the files hold no units; check {self.files!r}")


def _is_input(path: Path) -> bool:
    if path.is_dir():
        return (path / "meta.json").is_file()
    return path.is_file() and path.suffix == ".npy"


def _read(path: Path) -> Iterator[tuple[str, np.ndarray, int | None, int | None]]:
    """``(where, tokens, n_bytes, group)`` per document of one folder or ``.npy`` file.

    ``group`` is the folder's own document id of the unit, None when it has none.
    """
    if path.is_dir():
        units = SequenceSet.load(path, mmap=True)
        for index in range(len(units)):
            n_bytes = None if units.n_bytes is None else int(units.n_bytes[index])
            group = None if units.doc_ids is None else int(units.doc_ids[index])
            yield f"{path}:unit {index}", units[index], n_bytes, group
        return
    try:
        array = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        raise DataError(
            f"{path}: not a plain .npy array ({exc}); save it with numpy.save"
        ) from None
    if array.dtype.kind not in "iu" or array.ndim not in (1, 2):
        raise DataError(
            f"{path}: expected a 1-D or 2-D integer array of token ids, got "
            f"{array.ndim}-D {array.dtype}; convert it with numpy.asarray(ids, dtype='int32')"
        )
    if array.size and int(array.min()) < 0:
        raise DataError(f"{path}: token ids must be >= 0, found {int(array.min())}")
    rows = [array] if array.ndim == 1 else array
    for index, row in enumerate(rows):
        where = str(path) if array.ndim == 1 else f"{path}:row {index}"
        yield where, row, None, None
