"""A document as a source yields it, before units are cut.

A document is either text (``text``) or already-tokenized ids (``tokens``), never both. Its
``doc_id`` groups the units cut from it (the bootstrap resamples whole documents), and
``where`` names it in error messages (``"corpus.txt"``, ``"data.jsonl:12"``, ``"genes.fa:>chr1"``).

A source may also give a document's ``key`` (the id a user's file of test ids names; by
default ``where``) and its ``split`` (``"train"``, ``"valid"`` or ``"test"``, fixed by the
data, e.g. a JSONL field), which then overrides the hash split for its units.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Document"]


@dataclass(frozen=True)
class Document:
    doc_id: int
    where: str
    text: str | None = None
    tokens: np.ndarray | None = None
    #: UTF-8 bytes of the natural text (for bits per byte); None when unknown
    n_bytes: int | None = None
    #: the id of this document's units in a file of test ids; None means ``where``
    key: str | None = None
    #: the split the data fixes for this document's units; None: the hash decides
    split: str | None = None
    #: a text file's name and the file line the text starts on: units cut one per line
    #: are then named ``file:line`` by their own line
    file: str | None = None
    first_line: int | None = None
    #: exact negative log-likelihood of the document in nats (a generator's own truth, end
    #: marker included), when the source knows it; it becomes the unit's floor
    nll: float | None = None

    @property
    def unit_id(self) -> str:
        """The id a file of test ids names this document's units by."""
        return self.where if self.key is None else self.key

    def line_ids(self, n_lines: int) -> list[str]:
        """The ids of the units cut one per line: ``file:line`` of each line, else :attr:`unit_id`."""
        if self.key is None and self.file is not None and self.first_line is not None:
            return [f"{self.file}:{self.first_line + k}" for k in range(n_lines)]
        return [self.unit_id] * n_lines

    def __post_init__(self) -> None:
        if (self.text is None) == (self.tokens is None):
            raise ValueError("a Document holds exactly one of text or tokens")
