"""A document as a source yields it, before units are cut.

A document is either text (``text``) or already-tokenized ids (``tokens``), never both. Its
``doc_id`` groups the units cut from it (the bootstrap resamples whole documents), and
``where`` names it in error messages (``"corpus.txt"``, ``"data.jsonl:12"``, ``"genes.fa:>chr1"``).
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
    #: exact negative log-likelihood of the document in nats (a generator's own truth, end
    #: marker included), when the source knows it; it becomes the unit's floor
    nll: float | None = None

    def __post_init__(self) -> None:
        if (self.text is None) == (self.tokens is None):
            raise ValueError("a Document holds exactly one of text or tokens")
