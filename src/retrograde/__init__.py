"""retrograde: order-ablation experiments for sequence models, as DVC + Hydra stages.

Public API (stable names):

- :class:`SequenceSet` — ragged integer units with a ``.npy`` folder format.
- :mod:`retrograde.orders` — ``make(name, **params)``, ``names()``.
- :mod:`retrograde.sources` — ``make(name, **params)``, ``names()``.
- :mod:`retrograde.families` — ``make(name, **params)``, ``names()``, ``load(folder)``.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import RetrogradeError
from .sequences import Ragged, SequenceSet

__all__ = ["Ragged", "RetrogradeError", "SequenceSet", "__version__"]
