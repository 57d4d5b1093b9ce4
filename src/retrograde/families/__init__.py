"""Model families: ``make(name, **params)``, ``names()``, ``load(folder)``."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .._registry import Registry
from ..errors import DataError
from ._base import FAMILY_FORMAT, Family

__all__ = ["Family", "load", "make", "names", "registry"]

registry: Registry[Family] = Registry("family", "retrograde.families", "families")


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


# Built-in families register themselves on import (keep these imports last).
from . import _builtin  # noqa: E402,F401
