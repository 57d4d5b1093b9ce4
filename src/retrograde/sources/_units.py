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

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..data import DEFAULT_UNIT_MODE, SPLITS, SequenceSet, assign_splits, prepare_units
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
) -> SourceUnits:
    """The train / valid / test units of ``source``.

    ``tokenizer``, ``mode``, ``window`` and ``remainder`` cut a file source's documents;
    ``n_units`` and ``seed`` are a calibration source's generation.
    """
    if isinstance(source, CalibrationSource):
        return _calibration_units(source, n_units, seed, fractions, salt)
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
    )
    info = {
        "vocab_size": prepared.vocab_size,
        "spans": {},
        "summary": prepared.summary(),
    }
    return SourceUnits(dict(prepared.splits), None, prepared.tokenizer, info)


def _calibration_units(
    source: CalibrationSource, n_units: int, seed: int, fractions: Sequence[float], salt: str
) -> SourceUnits:
    units = source.generate(n_units, seed)
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
