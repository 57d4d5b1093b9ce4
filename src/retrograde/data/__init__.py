"""Data and units: ragged arrays of token ids, documents, tokenizers, unit cutting and splits.

The bottom layer: it knows nothing of orders, models or statistics. Everything another
layer needs is imported from here (``from retrograde.data import SequenceSet``); the
``_``-modules are its implementation.

- :class:`SequenceSet` / :class:`Ragged` — units of token ids (``.npy`` folder format) and
  per-position values;
- :class:`Document` — what a source yields before units are cut;
- :mod:`retrograde.data.tokenizers` — ``bytes``, ``chars``, ``words``, and the learned ``bpe``
  and ``unigram`` (SentencePiece, optional extra ``tokenizers``) (``make``, ``names``, ``load``);
- :func:`prepare_units` — cut, split by a salted content hash, fit the vocabulary on train;
- the one rule for split fractions (:func:`check_fractions`) and for unit cutting
  (:func:`check_units`), with the package's only defaults;
- which training units a seed trains on (:func:`resample_train`, :func:`resolve_train_sample`)
  for families with no randomness of their own;
- nested subsamples of the training units for the data-size sweep (:func:`nested_subsample`);
- the seed of each order's own random numbers (:func:`order_seed`);
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
from ._seeds import order_seed
from ._sequences import (
    FORMAT,
    INT32_LIMIT,
    MAX_VOCAB_SIZE,
    Ragged,
    SequenceSet,
    earlier_in_unit,
    index_dtype,
)
from ._splits import (
    DEFAULT_FRACTIONS,
    DEFAULT_SALT,
    SPLITS,
    assign_splits,
    check_fractions,
    read_unit_ids,
    split_with_given,
    subsample,
)
from ._subsample import nested_subsample, subsample_size
from ._train_sample import (
    DEFAULT_TRAIN_SAMPLE,
    MIN_DOCUMENT_GROUPS,
    TRAIN_SAMPLE_SCHEMES,
    TRAIN_SAMPLES,
    resample_train,
    resolve_train_sample,
    sample_index,
)
from ._units import (
    DEFAULT_UNIT_MODE,
    REMAINDERS,
    UNIT_MODES,
    PreparedUnits,
    check_units,
    prepare_units,
)
from .tokenizers import FIELD_SEPARATOR

__all__ = [
    "DEFAULT_FRACTIONS",
    "DEFAULT_SALT",
    "DEFAULT_TRAIN_SAMPLE",
    "DEFAULT_UNIT_MODE",
    "FIELD_SEPARATOR",
    "FORMAT",
    "INT32_LIMIT",
    "MAX_VOCAB_SIZE",
    "MIN_DOCUMENT_GROUPS",
    "REMAINDERS",
    "SPLITS",
    "TRAIN_SAMPLES",
    "TRAIN_SAMPLE_SCHEMES",
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
    "earlier_in_unit",
    "nested_subsample",
    "order_seed",
    "subsample_size",
    "check_units",
    "index_dtype",
    "open_for_writing",
    "prepare_units",
    "read_unit_ids",
    "resample_train",
    "resolve_train_sample",
    "sample_index",
    "split_with_given",
    "subsample",
    "tokenizers",
    "working_directory",
    "write_npz",
]
