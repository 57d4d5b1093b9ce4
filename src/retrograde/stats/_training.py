"""Signs of an under-trained model: a learning curve still falling steeply at its end, and a
model worse than a simple baseline fitted on the same units (re-exported by
``retrograde.stats``).

A gap compares two fits of one family; when those fits have not learned the data, the gap
says more about the training budget than about the order. Two checks, each cheap:

- :func:`still_falling`: the last epoch was the best so far and beat the best earlier
  epoch by more than ``STEEP_FALL`` (1%) of its value. At that rate ten more epochs would
  lower the validation loss by about a tenth; a curve that early stopping ended has a
  better epoch before its last and is never flagged, and neither is a one-point curve
  (a counting family such as ``ngram``).
- :func:`worse_than_baseline`: bits per token above a baseline's on the same test units.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["BASELINE_NGRAM_ORDER", "STEEP_FALL", "still_falling", "worse_than_baseline"]

#: a last-epoch gain above this share of the validation loss counts as "still falling"
STEEP_FALL = 0.01
#: the baseline the table stage fits: an n-gram of this order (a bigram)
BASELINE_NGRAM_ORDER = 2


def still_falling(curve: Sequence[Mapping[str, Any]], steep: float = STEEP_FALL) -> bool:
    """Whether a learning curve ends still falling steeply (see the module docstring).

    Examples
    --------
    >>> still_falling([{"valid_bits_per_token": v} for v in (3.0, 2.5, 2.2)])
    True
    >>> still_falling([{"valid_bits_per_token": v} for v in (3.0, 2.5, 2.49)])  # 0.4%
    False
    >>> still_falling([{"valid_bits_per_token": v} for v in (3.0, 2.2, 2.4)])  # stopped early
    False
    """
    values = [
        float(point["valid_bits_per_token"])
        for point in curve
        if point.get("valid_bits_per_token") is not None
    ]
    if len(values) < 2 or values[-1] <= 0:
        return False
    gain = min(values[:-1]) - values[-1]
    return gain > steep * values[-1]


def worse_than_baseline(bits_per_token: float, baseline_bits_per_token: float) -> bool:
    """Whether a model scores more bits per token than the baseline on the same test units.

    Both are totals over the same units, so the comparison is paired; any excess beyond
    the leaves' rounding counts (a bigram model scored against the bigram baseline is not
    worse than itself).

    >>> worse_than_baseline(2.11421, 2.1142049), worse_than_baseline(2.12, 2.11)
    (False, True)
    """
    return bits_per_token - baseline_bits_per_token > 1e-4
