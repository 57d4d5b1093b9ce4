"""Sources: where units come from. ``make(name, **params)``, ``names()``, ``registry``.

File sources (``text``, ``jsonl``, ``records``, ``fasta``, ``tokens``, and the invented ``demo`` corpus)
stream :class:`~retrograde.data.Document` records; calibration sources (``markov``,
``linear_gf2``, ``automaton``) generate fixed-length units and give each unit's exact
negative log-likelihood. :func:`source_units` makes the train / valid / test units of any
source, as the pipeline's ``units`` stage and ``retrograde check`` both need them. See
``docs/sources.md``.

To add a built-in source, write its module here and list its class in ``_BUILTIN`` below.

Examples
--------
>>> from retrograde import sources
>>> source = sources.make("markov", vocab_size=3, order=1, length=8, chain_seed=1)
>>> units = source.generate(2, seed=0)
>>> units.lengths.tolist(), source.nll(units).shape
([8, 8], (2,))
"""

from __future__ import annotations

from typing import Any

from ..registry import Registry
from ._base import (
    CalibrationSource,
    EncodedFileSource,
    FileSource,
    Source,
    find_lone_carriage_return,
)
from ._units import CODE_POINTS, SourceUnits, character_units, field_span_ids, source_units
from .automaton import AutomatonSource
from .demo import DemoSource
from .fasta import FastaSource
from .jsonl import JsonlSource
from .linear_gf2 import LinearGF2Source
from .markov import MarkovSource
from .records import SEPARATOR_SPAN, RecordsSource
from .text import TextSource
from .tokens import TokensSource

__all__ = [
    "CODE_POINTS",
    "SEPARATOR_SPAN",
    "AutomatonSource",
    "CalibrationSource",
    "DemoSource",
    "EncodedFileSource",
    "FastaSource",
    "FileSource",
    "JsonlSource",
    "LinearGF2Source",
    "MarkovSource",
    "RecordsSource",
    "Source",
    "SourceUnits",
    "TextSource",
    "TokensSource",
    "character_units",
    "field_span_ids",
    "find_lone_carriage_return",
    "make",
    "names",
    "registry",
    "source_units",
]

_BUILTIN: tuple[type[Source], ...] = (
    TextSource,
    JsonlSource,
    RecordsSource,
    FastaSource,
    TokensSource,
    DemoSource,
    MarkovSource,
    LinearGF2Source,
    AutomatonSource,
)

registry: Registry[Source] = Registry("source", "retrograde.sources", Source)
for _source in _BUILTIN:
    registry.register(_source.name)(_source)


def make(name: str, **params: Any) -> Source:
    """Build the source ``name`` (a registered name or a dotted ``_target_`` path)."""
    return registry.make(name, **params)


def names() -> list[str]:
    """Sorted names of every registered source."""
    return registry.names()
