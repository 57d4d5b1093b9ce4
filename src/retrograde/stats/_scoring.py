"""Turn per-position log-probabilities into losses: per unit, per token, per byte, per position.

Conventions (shared by every family and by the stats module):

- A family's ``logprobs(units)`` is a :class:`~retrograde.sequences.Ragged` whose row ``i``
  holds ``len(units[i]) + 1`` natural-log probabilities: one per token in the model's order,
  then one for the end-of-unit marker.
- A unit's negative log-likelihood (NLL) is minus the sum of its row, in nats, end marker
  included, so it is ``-log p(unit, its length)`` and comparable across orders.
- ``bits_per_token`` divides total bits by the number of *real* tokens (the end-marker cost
  stays in the numerator); ``bits_per_byte`` divides by the UTF-8 bytes of the natural text.
"""

from __future__ import annotations

import math

import numpy as np

from ..data import Ragged, SequenceSet
from ..errors import DataError

__all__ = ["bits_per_byte", "bits_per_token", "natural_order_losses", "unit_nll"]


def unit_nll(logprobs: Ragged) -> np.ndarray:
    """(n_units,) float64 total NLL of each unit in nats, end marker included.

    Examples
    --------
    >>> from retrograde.data import Ragged
    >>> unit_nll(Ragged.from_list([[-1.0, -0.5], [-2.0]])).tolist()
    [1.5, 2.0]
    """
    return -logprobs.sums()


def _per_count(total: float | np.ndarray, count: float | np.ndarray, what: str) -> np.ndarray:
    count = np.asarray(count, dtype=np.float64)
    if np.any(count <= 0):
        raise DataError(
            f"cannot express a loss per {what}: the count of {what}s is {count.min():g}; "
            f"score at least one unit with a positive {what} count"
        )
    return np.asarray(total, dtype=np.float64) / math.log(2) / count


def bits_per_token(total_nats: float | np.ndarray, n_tokens: float | np.ndarray) -> np.ndarray:
    """Total NLL in nats converted to bits and divided by the number of real tokens.

    Works element-wise on arrays (e.g. one value per seed).

    Examples
    --------
    >>> float(bits_per_token(2 * math.log(2), 4))
    0.5
    """
    return _per_count(total_nats, n_tokens, "token")


def bits_per_byte(total_nats: float | np.ndarray, n_bytes: float | np.ndarray) -> np.ndarray:
    """Total NLL in nats converted to bits and divided by the UTF-8 bytes of the natural text.

    Examples
    --------
    >>> float(bits_per_byte(8 * math.log(2), 16))
    0.5
    """
    return _per_count(total_nats, n_bytes, "byte")


def natural_order_losses(
    logprobs: Ragged, positions_flat: np.ndarray, units: SequenceSet
) -> Ragged:
    """Per-position NLL (nats) mapped back to the natural order, end marker last.

    Parameters
    ----------
    logprobs
        A family's scores of the *reordered* units: row ``i`` has ``len(units[i]) + 1``
        values in the model's order, the end marker last.
    positions_flat
        ``(n_tokens,)`` int64 flat indices as returned by ``Order.positions_set(natural)``:
        the token at flat index ``j`` of the reordered set came from flat index
        ``positions_flat[j]`` of the natural set (``reordered.tokens ==
        natural.tokens[positions_flat]``). Every index must stay inside its own unit.
    units
        The natural (or reordered: only the unit lengths are read) units.

    Returns
    -------
    Ragged
        Row ``i`` holds ``len(units[i]) + 1`` losses (nats, ``>= 0``): entry ``t`` is the
        loss of the natural token at position ``t``, the last entry the end marker's loss.

    Examples
    --------
    >>> from retrograde.data import Ragged, SequenceSet
    >>> units = SequenceSet.from_list([[7, 8, 9]], vocab_size=10)
    >>> reversed_scores = Ragged.from_list([[-0.9, -0.8, -0.7, -0.1]])  # model saw 9, 8, 7
    >>> natural_order_losses(reversed_scores, np.array([2, 1, 0]), units)[0].tolist()
    [0.7, 0.8, 0.9, 0.1]
    """
    n_units, n_tokens = len(units), len(units.tokens)
    expected = units.lengths + 1
    if len(logprobs) != n_units or not np.array_equal(logprobs.lengths, expected):
        raise DataError(
            f"log-probabilities do not match the units: expected {n_units} rows of "
            "len(unit) + 1 values (end marker included); rescore the same units"
        )
    positions = np.asarray(positions_flat, dtype=np.int64)
    unit_of_token = units.row_ids()  # (n_tokens,)
    if (
        positions.shape != (n_tokens,)
        or (n_tokens and (positions.min() < 0 or positions.max() >= n_tokens))
        or np.any(np.bincount(positions, minlength=n_tokens) != 1)
        or not np.array_equal(unit_of_token[positions], unit_of_token)
    ):
        raise DataError(
            "positions are not a within-unit permutation of the flat token indices; "
            "pass Order.positions_set(natural_units) for the same units"
        )
    # Flat index of every end marker in the (n_tokens + n_units,) score array.
    end_index = logprobs.offsets[1:] - 1
    is_token = np.ones(len(logprobs.values), dtype=bool)
    is_token[end_index] = False
    token_losses = np.empty(n_tokens, dtype=np.float64)
    # The model scored natural token positions[j] at its j-th token slot.
    token_losses[positions] = -logprobs.values[is_token]
    values = np.empty(len(logprobs.values), dtype=np.float64)
    # Natural token t of unit i sits at t + i in the output (i end markers before it).
    values[np.arange(n_tokens, dtype=np.int64) + unit_of_token] = token_losses
    values[end_index] = -logprobs.values[end_index]
    return Ragged(values, logprobs.offsets.copy())
