"""The units of one source, split train / valid / test: the one function that makes them.

The pipeline's ``units`` stage and ``retrograde check`` both call :func:`source_units`, so
what ``check`` round-trips is exactly what the pipeline fits. It dispatches on the
source's class:

- a :class:`CalibrationSource` generates ``n_units`` units once, splits them by the salted
  hash of their content (identical units share a split, DESIGN.md invariant 1) and gives the
  exact negative log-likelihood of every test unit (its *floor*);
- a :class:`FileSource` streams documents through :func:`retrograde.data.prepare_units`
  (cut, hash split of each unit's natural content, vocabulary fitted on train only).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..data import (
    DEFAULT_UNIT_MODE,
    SPLITS,
    SequenceSet,
    assign_splits,
    prepare_units,
    subsample,
)
from ..data.tokenizers import Tokenizer
from ..errors import DataError
from ._base import CalibrationSource, FileSource, Source

__all__ = ["SourceUnits", "source_units"]


@dataclass
class SourceUnits:
    """What :func:`source_units` makes."""

    #: ``train``, ``valid``, ``test`` -> units in the natural order
    splits: dict[str, SequenceSet]
    #: exact nats per test unit (end marker included), calibration sources only
    floors: np.ndarray | None = None
    #: the tokenizer fitted on the training units (text sources only)
    tokenizer: Tokenizer | None = None
    #: JSON-able facts: vocab_size, spans, metadata or the units summary
    info: dict[str, Any] = field(default_factory=dict)


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
    prepared = prepare_units(
        source.documents(),
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
    info = {
        "vocab_size": prepared.vocab_size,
        "spans": {},
        "summary": prepared.summary(),
    }
    return SourceUnits(dict(prepared.splits), None, prepared.tokenizer, info)


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
