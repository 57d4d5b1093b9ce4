"""``fasta``: FASTA files, one text document per record.

A record is a header line starting with ``>`` followed by sequence lines, which are joined
with all whitespace removed. The alphabet is kept as given (``N``, ``-``, lower-case soft
masking, amino-acid letters); ``fold_case=True`` upper-cases it. Lines starting with ``;``
are comments. Records with an empty sequence are skipped. A document's ``where`` reads
``file:>id`` with ``id`` the first word of the header.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..data import Document
from ..errors import DataError
from ..validation import invalid
from ._base import EncodedFileSource, iter_lines

__all__ = ["FastaSource"]


class FastaSource(EncodedFileSource):
    """FASTA files.

    Parameters
    ----------
    files : str or list of str
        Paths or glob patterns.
    fold_case : bool
        Upper-case every sequence (soft-masked regions then read like the rest).
    errors : {"strict", "replace"}
        Invalid UTF-8: refuse naming the file and byte offset, or read it as U+FFFD.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "g.fa"
    >>> _ = path.write_text(">chr1 demo\\nACgt\\nNN\\n>chr2\\nTTA\\n")
    >>> [(d.where.split(":")[-1], d.text) for d in FastaSource(files=str(path)).documents()]
    [('>chr1', 'ACgtNN'), ('>chr2', 'TTA')]
    """

    name = "fasta"

    def __init__(self, *, files: Any, fold_case: bool = False, errors: str = "strict") -> None:
        self.files = files
        self.fold_case = fold_case
        self.errors = errors
        self._validate_params()

    def _validate_params(self) -> None:
        if not isinstance(self.fold_case, bool):
            raise invalid(self._owner, "fold_case", self.fold_case, "true or false")
        self._check_files()

    def documents(self) -> Iterator[Document]:
        doc_id = 0
        for path in self.paths():
            for where, sequence in _records(path, self.errors):
                if not sequence:
                    continue
                if self.fold_case:
                    sequence = sequence.upper()
                yield Document(doc_id, where, text=sequence, n_bytes=len(sequence.encode("utf-8")))
                doc_id += 1
        if doc_id == 0:
            raise DataError(
                f"{self._owner}: no sequence records in {', '.join(map(str, self.paths()))}; "
                "records start with a '>' header line"
            )


def _records(path: Path, errors: str) -> Iterator[tuple[str, str]]:
    """``(where, sequence)`` per record, streamed; sequence lines joined, whitespace removed."""
    where = ""
    chunks: list[str] = []
    for line_number, line, _ in iter_lines(path, errors):
        if line.startswith(">"):
            if where:
                yield where, "".join(chunks)
            words = line[1:].split()
            where = f"{path}:>{words[0] if words else f'record-at-line-{line_number}'}"
            chunks = []
        elif line.startswith(";") or not line.strip():
            continue
        elif not where:
            raise DataError(
                f"{path}:{line_number}: sequence data before the first '>' header; "
                "is this a FASTA file? every record starts with a '>' line"
            )
        else:
            chunks.append("".join(line.split()))
    if where:
        yield where, "".join(chunks)
