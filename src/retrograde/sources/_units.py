"""The units of one source, split train / valid / test: the one function that makes them.

The pipeline's ``units`` stage and ``retrograde check`` both call :func:`source_units`, so
what ``check`` round-trips is exactly what the pipeline fits. It dispatches on the
source's class:

- a :class:`CalibrationSource` generates ``n_units`` units once, splits them by the salted
  hash of their content (identical units share a split, DESIGN.md invariant 1) and gives the
  exact negative log-likelihood of every test unit (its *floor*);
- a :class:`FileSource` streams documents through :func:`retrograde.data.prepare_units`
  (cut, hash split of each unit's natural content, vocabulary fitted on train only). When
  its documents carry their exact negative log-likelihood (``Document.nll``, e.g. the
  ``records`` source's ``nll=`` field), those become the floors (one document must be one
  unit: unit mode ``document``). A source with named fields (``span_names()``, the
  ``records`` source) gets every token labelled with its span (:func:`field_span_ids`).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..data import (
    DEFAULT_UNIT_MODE,
    FIELD_SEPARATOR,
    SPLITS,
    Document,
    SequenceSet,
    assign_splits,
    earlier_in_unit,
    prepare_units,
    subsample,
)
from ..data.tokenizers import Tokenizer
from ..errors import DataError
from ._base import CalibrationSource, FileSource, Source

__all__ = ["CODE_POINTS", "SourceUnits", "character_units", "field_span_ids", "source_units"]


@dataclass
class SourceUnits:
    """What :func:`source_units` makes."""

    #: ``train``, ``valid``, ``test`` -> units in the natural order
    splits: dict[str, SequenceSet]
    #: exact nats per test unit (end marker included), calibration sources only
    floors: np.ndarray | None = None
    #: the tokenizer fitted on the training units (text sources only)
    tokenizer: Tokenizer | None = None
    #: JSON-able facts: vocab_size, spans, metadata or the units summary; sources with
    #: per-unit spans add ``span_names`` and ``records`` (fields, separator id)
    info: dict[str, Any] = field(default_factory=dict)
    #: per split, (n_tokens,) int16 index into ``info["span_names"]`` of every natural-order
    #: token (-1: in no span); None for sources without per-unit spans
    span_ids: dict[str, np.ndarray] | None = None


def source_units(
    source: Source,
    *,
    fractions: Sequence[float],
    salt: str,
    tokenizer: Tokenizer | None = None,
    mode: str | None = None,
    window: int | None = None,
    remainder: str = "drop",
    n_units: int = 1000,
    seed: int = 0,
    test_ids: Mapping[str, str] | None = None,
    max_units: int | None = None,
    subsample_seed: int = 0,
) -> SourceUnits:
    """The train / valid / test units of ``source``.

    ``tokenizer``, ``mode``, ``window`` and ``remainder`` cut a file source's documents;
    ``n_units`` and ``seed`` are a calibration source's generation. ``test_ids`` (unit id
    -> where it was listed) fixes a file source's test split; ``max_units`` and
    ``subsample_seed`` keep a seeded sample of the units (see
    :func:`retrograde.data.prepare_units`).
    """
    if isinstance(source, CalibrationSource):
        if test_ids:
            raise DataError(
                f"source {source.name!r} generates its units: a file of test ids needs a file "
                "source; remove split.test_ids (calibration units are split by their hash)"
            )
        return _calibration_units(source, n_units, seed, fractions, salt, max_units, subsample_seed)
    if not isinstance(source, FileSource):
        raise DataError(
            f"source {source!r} is neither a FileSource nor a CalibrationSource; subclass one "
            "of them (retrograde.sources)"
        )
    declared = getattr(source, "declared_vocab_size", None)  # optional for plug-ins
    if callable(getattr(source, "span_names", None)):
        # One unit per record: a window would cut fields apart, lines would split a field.
        if mode == "window":
            raise DataError(
                f"source {source.name!r}: a record is one unit, so units.mode 'window' does "
                "not apply; use 'document' (or leave units.mode unset)"
            )
        mode = "document"
    floors_by_document: dict[int, float] = {}
    prepared = prepare_units(
        _collect_floors(source.documents(), floors_by_document),
        tokenizer=tokenizer,
        mode=mode or DEFAULT_UNIT_MODE,
        window=window,
        fractions=fractions,
        salt=salt,
        remainder=remainder,
        vocab_size=declared() if callable(declared) else None,
        test_ids=test_ids,
        max_units=max_units,
        subsample_seed=subsample_seed,
    )
    info: dict[str, Any] = {
        "vocab_size": prepared.vocab_size,
        "spans": {},
        "summary": prepared.summary(),
    }
    splits = dict(prepared.splits)
    floors = None
    if floors_by_document:
        floors = _document_floors(source, splits["test"], floors_by_document, prepared.mode)
    separator = None
    if prepared.tokenizer is not None:
        separator = prepared.tokenizer.token_id(FIELD_SEPARATOR)
    if getattr(prepared.tokenizer, "reorder", "tokens") == "characters":
        # Orders act on characters; the reorder stage tokenizes the reordered text.
        assert prepared.tokenizer is not None
        splits = {k: character_units(u, prepared.tokenizer) for k, u in splits.items()}
        separator = ord(FIELD_SEPARATOR)
        info["reorder"] = "characters"
        info["fit"] = prepared.tokenizer.fit_mode  # type: ignore[attr-defined]
    span_ids = None
    span_names = getattr(source, "span_names", None)
    if callable(span_names) and separator is not None:
        names = list(span_names())
        span_ids = {
            split: field_span_ids(units, separator, len(names) - 1, f"source {source.name!r}")
            for split, units in splits.items()
        }
        info["span_names"] = names
        info["records"] = {"fields": names[:-1], "separator_id": separator}
    return SourceUnits(splits, floors, prepared.tokenizer, info, span_ids)


#: code points lie below this; character units use it as their vocabulary size
CODE_POINTS = 0x110000


def character_units(units: SequenceSet, tokenizer: Tokenizer) -> SequenceSet:
    """The units as Unicode code points (ids ``0 .. 0x10FFFF``), decoded from a lossless
    tokenizer's ids; ``doc_ids`` and ``n_bytes`` kept.

    >>> from retrograde.data import tokenizers
    >>> tok = tokenizers.make("chars").fit([list("abc")])
    >>> character_units(SequenceSet.from_list([tok.encode("cab")]), tok)[0].tolist()
    [99, 97, 98]
    """
    rows = []
    for unit in units:
        text = tokenizer.decode(unit)
        rows.append(np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype="<u4"))
    return SequenceSet.from_list(
        rows, vocab_size=CODE_POINTS, doc_ids=units.doc_ids, n_bytes=units.n_bytes
    )


def _collect_floors(
    documents: Iterable[Document], floors_by_document: dict[int, float]
) -> Iterator[Document]:
    """Pass the documents on, noting each one's exact NLL (if it has one) by ``doc_id``."""
    for document in documents:
        if document.nll is not None:
            floors_by_document[document.doc_id] = float(document.nll)
        yield document


def _document_floors(
    source: Source, test: SequenceSet, floors_by_document: dict[int, float], mode: str
) -> np.ndarray:
    """(n_test_units,) floors, one document's NLL per unit (one unit per document)."""
    owner = f"source {source.name!r}"
    if mode != "document":
        raise DataError(
            f"{owner}: its records carry their exact NLL, which is the floor of one unit "
            f"only when each record is one unit; set the source's units.mode to 'document' "
            f"(it is {mode!r})"
        )
    assert test.doc_ids is not None
    missing = [int(d) for d in test.doc_ids if int(d) not in floors_by_document]
    if missing:
        raise DataError(
            f"{owner}: document {missing[0]} has no exact NLL while others do; give every "
            "record one or none"
        )
    return np.array([floors_by_document[int(d)] for d in test.doc_ids], dtype=np.float64)


def field_span_ids(units: SequenceSet, separator: int, n_fields: int, owner: str) -> np.ndarray:
    """(n_tokens,) int16: field ``k`` for the tokens after the ``k``-th separator of their
    unit, ``n_fields`` for the separators themselves.

    Every unit must hold exactly ``n_fields - 1`` separators (its field boundaries).

    Examples
    --------
    >>> units = SequenceSet.from_list([[5, 9, 6, 6, 9, 7]], vocab_size=10)
    >>> field_span_ids(units, 9, 3, "source 'records'").tolist()
    [0, 3, 1, 1, 3, 2]
    """
    is_separator = (np.asarray(units.tokens) == separator).astype(np.int64)
    per_unit = np.bincount(units.row_ids(), weights=is_separator, minlength=len(units))
    wrong = np.flatnonzero(per_unit != n_fields - 1)
    if len(wrong):
        raise DataError(
            f"{owner}: unit {int(wrong[0])} has {int(per_unit[wrong[0]])} field separators "
            f"after tokenization, expected {n_fields - 1}; the tokenizer must keep the "
            "separator (U+001F) a token of its own and in its vocabulary (raise max_vocab)"
        )
    before = earlier_in_unit(units, is_separator)  # separators before each token
    return np.where(is_separator == 1, n_fields, before).astype(np.int16)


def _calibration_units(
    source: CalibrationSource,
    n_units: int,
    seed: int,
    fractions: Sequence[float],
    salt: str,
    max_units: int | None = None,
    subsample_seed: int = 0,
) -> SourceUnits:
    units = source.generate(n_units, seed)
    kept = subsample(len(units), max_units, subsample_seed)
    if kept is not None:
        units = units.subset(kept)
    # One key per unit (a loop over units, not tokens): its little-endian int32 bytes.
    keys = [units[i].astype("<i4").tobytes() for i in range(len(units))]
    split_of_unit = np.asarray(assign_splits(keys, tuple(fractions), salt))
    splits = {name: units.subset(split_of_unit == k) for k, name in enumerate(SPLITS)}
    floors = np.asarray(source.nll(splits["test"]), dtype=np.float64)
    info = {
        "vocab_size": int(source.vocab_size),
        "spans": source.spans(source.unit_length),
        "metadata": source.metadata(),
    }
    return SourceUnits(splits, floors, None, info)
