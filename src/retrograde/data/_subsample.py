"""Nested subsamples of a split: the data-size sweep's training units.

A fit with ``train_fraction`` f < 1 trains on the first ``round(f * n)`` units (at least
one) of a permutation of the ``n`` training units drawn from the cell's seed, kept in their
stored order. The permutation depends on the seed only, so for one seed

- every order trains on the same units (orders reorder tokens inside each unit and keep
  the units where they are), so gaps stay paired;
- the units of a smaller fraction are a subset of those of every larger one (nested), so
  a learning curve over fractions adds data and never swaps it;
- different seeds draw different subsets, so the interval's resampling of seeds also
  covers which units were drawn.

The validation and test units are never subsampled.
"""

from __future__ import annotations

import numpy as np

from ..errors import ConfigError

__all__ = ["nested_subsample", "subsample_size"]

#: mixed into the seed so the subsample stream is not the family's own seed stream
_STREAM = 0x7261_6E64  # "rand"


def subsample_size(n_units: int, fraction: float) -> int:
    """How many of ``n_units`` a fit with ``fraction`` trains on: ``round(f * n)``, >= 1."""
    if not 0.0 < float(fraction) <= 1.0:
        raise ConfigError(f"train_fraction={fraction!r} is invalid; allowed: 0 < value <= 1")
    return min(n_units, max(1, int(round(float(fraction) * n_units))))


def nested_subsample(n_units: int, fraction: float, seed: int) -> np.ndarray:
    """Sorted indices of the units a fit with ``fraction`` and ``seed`` trains on.

    >>> small, large = nested_subsample(10, 0.3, seed=0), nested_subsample(10, 0.6, seed=0)
    >>> len(small), len(large), set(small) <= set(large)
    (3, 6, True)
    >>> nested_subsample(4, 1.0, seed=5).tolist()
    [0, 1, 2, 3]
    """
    size = subsample_size(n_units, fraction)
    if size == n_units:
        return np.arange(n_units, dtype=np.int64)
    permutation = np.random.default_rng([_STREAM, int(seed)]).permutation(n_units)
    return np.sort(permutation[:size]).astype(np.int64)
