"""Sources: where units come from. ``make(name, **params)``, ``names()``, ``registry``.

File sources (``text``, ``jsonl``, ``fasta``, ``tokens``, and the invented ``demo`` corpus)
stream :class:`~retrograde._document.Document` records; calibration sources (``markov``,
``linear_gf2``, ``automaton``) generate fixed-length units and give each unit's exact
negative log-likelihood. See ``docs/sources.md``.

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

from .._registry import Registry
from ._base import CalibrationSource, FileSource, Source

__all__ = ["CalibrationSource", "FileSource", "Source", "make", "names", "registry"]

registry: Registry[Source] = Registry("source", "retrograde.sources")


def make(name: str, **params: Any) -> Source:
    """Build the source ``name`` (a registered name or a dotted ``_target_`` path)."""
    return registry.make(name, **params)


def names() -> list[str]:
    """Sorted names of every registered source."""
    return registry.names()


# Built-in sources register themselves on import (keep these imports last).
from . import automaton, demo, fasta, jsonl, linear_gf2, markov, text, tokens  # noqa: E402,F401
