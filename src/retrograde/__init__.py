"""retrograde: order-ablation experiments for sequence models, as DVC + Hydra stages.

The package is layered; each folder is one layer and imports only from the layers below
it (``DEVELOPERS.md`` draws them):

- :mod:`retrograde.data` — units of token ids (:class:`SequenceSet`), documents, tokenizers,
  unit cutting and the hash split;
- :mod:`retrograde.orders`, :mod:`retrograde.sources`, :mod:`retrograde.families` — the
  three kinds of plug-in, each with ``make(name, **params)``, ``names()`` and a registry;
- :mod:`retrograde.stats` — paired gaps with intervals, profiles;
- :mod:`retrograde.report` — the gap table as JSON, Markdown, CSV and figures;
- :mod:`retrograde.config` — typed config, Hydra composition, the pipeline's layout;
- :mod:`retrograde.stages` — the DVC stage entry points;
- :mod:`retrograde.host` — the host repository: init, the run driver, checks;
- :mod:`retrograde.commands` and :mod:`retrograde.cli` — the command line.

Plug-in authors use :class:`Document`, :mod:`retrograde.validation` (parameter checks whose
errors read like the built-ins') and the base classes ``retrograde.orders.Order``,
``retrograde.sources.FileSource`` / ``CalibrationSource`` and ``retrograde.families.Family``.
"""

from __future__ import annotations

__version__ = "0.1.0"

from typing import TYPE_CHECKING, Any

from . import errors, validation
from .errors import RetrogradeError

if TYPE_CHECKING:
    from .data import Document, Ragged, SequenceSet

__all__ = [
    "Document",
    "Ragged",
    "RetrogradeError",
    "SequenceSet",
    "__version__",
    "errors",
    "validation",
]


def __getattr__(name: str) -> Any:
    # The data classes load numpy: imported on first use, so that a stage command handing
    # itself to the run's stage server (retrograde.stages.server) starts in milliseconds.
    if name in ("Document", "Ragged", "SequenceSet"):
        from . import data

        return getattr(data, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
