"""Data and units: ragged arrays of token ids, documents, tokenizers, unit cutting and splits.

The bottom layer: it knows nothing of orders, models or statistics. Everything another
layer needs is imported from here (``from retrograde.data import SequenceSet``); the
``_``-modules are its implementation.

- :class:`SequenceSet` / :class:`Ragged` — units of token ids (``.npy`` folder format) and
  per-position values;
- :class:`Document` — what a source yields before units are cut;
- :mod:`retrograde.data.tokenizers` — ``bytes``, ``chars``, ``words`` (``make``, ``names``, ``load``);
- :func:`prepare_units` — cut, split by a salted content hash, fit the vocabulary on train;
- the one rule for split fractions (:func:`check_fractions`) and for unit cutting
  (:func:`check_units`), with the package's only defaults;
- nested subsamples of the training units for the data-size sweep (:func:`nested_subsample`);
- atomic file writing (a temporary sibling, then a rename).
"""

from __future__ import annotations

from . import tokenizers
from ._document import Document
from ._files import (
    atomic_dir,
    atomic_write_bytes,
    atomic_write_json,
    atomic_write_text,
    open_for_writing,
    working_directory,
    write_npz,
)
from ._sequences import FORMAT, INT32_LIMIT, MAX_VOCAB_SIZE, Ragged, SequenceSet, index_dtype
from ._splits import DEFAULT_FRACTIONS, DEFAULT_SALT, SPLITS, assign_splits, check_fractions
from ._subsample import nested_subsample, subsample_size
from ._units import (
    DEFAULT_UNIT_MODE,
    REMAINDERS,
    UNIT_MODES,
    PreparedUnits,
    check_units,
    prepare_units,
)

__all__ = [
    "DEFAULT_FRACTIONS",
    "DEFAULT_SALT",
    "DEFAULT_UNIT_MODE",
    "FORMAT",
    "INT32_LIMIT",
    "MAX_VOCAB_SIZE",
    "REMAINDERS",
    "SPLITS",
    "UNIT_MODES",
    "Document",
    "PreparedUnits",
    "Ragged",
    "SequenceSet",
    "assign_splits",
    "atomic_dir",
    "atomic_write_bytes",
    "atomic_write_json",
    "atomic_write_text",
    "check_fractions",
    "nested_subsample",
    "subsample_size",
    "check_units",
    "index_dtype",
    "open_for_writing",
    "prepare_units",
    "tokenizers",
    "working_directory",
    "write_npz",
]
