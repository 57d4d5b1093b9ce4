"""Model families: ``make(name, **params)``, ``names()``, ``load(folder)``, ``registry``.

Every family follows the contract of :class:`Family` (``families/_base.py``): keyword-only
parameters, ``fit(train, valid, seed)``, ``logprobs(units)`` (one natural-log probability per
token plus one for the end marker), full distributions from ``next_token_probs``, and a
``numerics_version`` raised whenever its code changes its numbers. Built-ins: ``ngram``,
``mlp``, ``command`` (a team's own trainer), and with the optional torch extra ``gru``,
``lstm`` and ``transformer`` (torch is imported only when one of them fits).

To add a built-in family, write its module here and list its class in ``_BUILTIN`` below.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from ..errors import DataError
from ..registry import Registry
from ._base import FAMILY_FORMAT, Family
from ._probe import check_probe, probe_positions, probe_size
from ._progress import progress_bar, progress_log
from .command import CommandFamily
from .mlp import MLP
from .ngram import NGram
from .recurrent import GRU, LSTM
from .transformer import Transformer

__all__ = [
    "GRU",
    "LSTM",
    "MLP",
    "CommandFamily",
    "Family",
    "NGram",
    "Transformer",
    "check_probe",
    "load",
    "make",
    "names",
    "probe_positions",
    "progress_bar",
    "progress_log",
    "probe_size",
    "registry",
]

_BUILTIN: tuple[type[Family], ...] = (NGram, MLP, CommandFamily, GRU, LSTM, Transformer)

registry: Registry[Family] = Registry("family", "retrograde.families", Family, "families")
for _family in _BUILTIN:
    registry.register(_family.name)(_family)


def make(name: str, **params: Any) -> Family:
    """Build an unfitted model of family ``name``."""
    return registry.make(name, **params)


def names() -> list[str]:
    return registry.names()


def load(folder: str | os.PathLike[str]) -> Family:
    """Load a model written by ``Family.save``."""
    folder = Path(folder)
    meta_path = folder / "family.json"
    if not meta_path.is_file():
        raise DataError(f"{folder}: not a saved model (no family.json)")
    meta = json.loads(meta_path.read_text())
    if meta.get("format") != FAMILY_FORMAT:
        raise DataError(f"{meta_path}: format {meta.get('format')!r} is not {FAMILY_FORMAT!r}")
    factory = registry.get(meta["family"])
    assert isinstance(factory, type) and issubclass(factory, Family)
    return factory._from_saved(folder, meta)
