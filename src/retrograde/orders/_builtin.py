"""Order transforms: named bijections applied inside each unit.

An order rearranges the tokens of every unit without adding, dropping or changing any.
Each order reports the *position permutation* it applied, ``p`` with ``apply(x) == x[p]``,
so per-position losses can be mapped back to the natural order, and can undo itself from
its output alone (``invert``). The core methods work on a whole :class:`SequenceSet` at
once (flat int64 index arrays, no Python loop per token); the per-unit methods wrap them.

Built-ins: ``forward`` (alias ``identity``), ``reverse``, ``block_reverse(size)``,
``stride(step)``, ``rotate(shift)``, ``permutation(seed)``, ``segment_reverse(separators)``
and ``within_segment_reverse(separators)``. Custom orders subclass :class:`Order` and are
named by a dotted path (``_target_``) or the entry-point group ``retrograde.orders``; every
order, built-in or custom, goes through :func:`verify_bijection` before its data are used.

The segment orders cut a unit into *runs*: each separator token is a run of its own and
each maximal stretch of other tokens is one run. ``segment_reverse`` reverses the order of
the runs, ``within_segment_reverse`` reverses inside each run. Separators stay separators
and runs keep their lengths, so the output has the same runs and each segment order is its
own inverse. Leading, trailing and repeated separators are kept as runs (the empty segments
between them hold no tokens); a unit without separators is one segment.

Examples
--------
>>> import numpy as np
>>> from retrograde.orders import make
>>> order = make("block_reverse", size=2)
>>> order.apply(np.array([1, 2, 3, 4, 5])).tolist()
[2, 1, 4, 3, 5]
>>> order.invert(np.array([2, 1, 4, 3, 5])).tolist()
[1, 2, 3, 4, 5]
"""

from __future__ import annotations

import numbers
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from ..data import SequenceSet
from ..validation import check_int, invalid
from ._base import Order, unit_positions

__all__ = [
    "BUILTIN_ORDERS",
    "BlockReverse",
    "Forward",
    "Permutation",
    "Reverse",
    "Rotate",
    "SegmentReverse",
    "Stride",
    "WithinSegmentReverse",
]


class Forward(Order):
    """The natural order (the default reference order)."""

    name = "forward"

    def __init__(self) -> None:
        super().__init__()

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        return np.arange(len(units.tokens), dtype=np.int64)


class Reverse(Order):
    """Last token first. An involution: ``apply(apply(x)) == x``."""

    name = "reverse"

    def __init__(self) -> None:
        super().__init__()

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = unit_positions(units)
        return start + length - 1 - local


class BlockReverse(Order):
    """Reverse inside consecutive blocks of ``size`` tokens; a shorter last block is reversed too.

    >>> BlockReverse(size=3).apply(np.arange(8)).tolist()
    [2, 1, 0, 5, 4, 3, 7, 6]
    """

    name = "block_reverse"

    def __init__(self, *, size: int = 4) -> None:
        super().__init__(size=size)
        self.size = check_int("order 'block_reverse'", "size", size, low=1)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = unit_positions(units)
        block_start = local - local % self.size
        block_end = np.minimum(block_start + self.size, length)
        return start + block_start + block_end - 1 - local


class Stride(Order):
    """Interleave: positions ``0, step, 2*step, ...`` first, then ``1, 1+step, ...``, and so on.

    >>> Stride(step=3).apply(np.arange(8)).tolist()
    [0, 3, 6, 1, 4, 7, 2, 5]
    """

    name = "stride"

    def __init__(self, *, step: int = 2) -> None:
        super().__init__(step=step)
        self.step = check_int("order 'stride'", "step", step, low=1)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = unit_positions(units)
        # A unit of n = full * step + extra tokens has full + 1 positions with residue r < extra
        # and full positions with each other residue, so the residues r' < r fill the first
        # r * full + min(r, extra) output slots.
        full, extra = np.divmod(length, self.step)
        residue = local % self.step
        destination = residue * full + np.minimum(residue, extra) + local // self.step
        positions = np.empty(len(local), dtype=np.int64)
        positions[start + destination] = start + local
        return positions


class Rotate(Order):
    """Cyclic left shift: ``apply(x)[j] == x[(j + shift) % len(x)]`` (negative shifts go right).

    >>> Rotate(shift=2).apply(np.arange(5)).tolist()
    [2, 3, 4, 0, 1]
    """

    name = "rotate"

    def __init__(self, *, shift: int = 1) -> None:
        super().__init__(shift=shift)
        self.shift = check_int("order 'rotate'", "shift", shift)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = unit_positions(units)
        # length >= 1 for every token that exists, so the modulus is safe.
        return start + (local + self.shift) % np.maximum(length, 1)


class Permutation(Order):
    """One fixed random permutation per unit length, drawn from ``default_rng([seed, length])``.

    Units of the same length are shuffled the same way, so the inverse needs only the length.
    """

    name = "permutation"

    def __init__(self, *, seed: int = 0) -> None:
        super().__init__(seed=seed)
        self.seed = check_int("order 'permutation'", "seed", seed, low=0)

    def permutation_for_length(self, length: int) -> np.ndarray:
        """(length,) int64: the permutation every unit of this length gets."""
        return np.random.default_rng([self.seed, int(length)]).permutation(int(length))

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, _, start = unit_positions(units)
        # One draw per distinct length (at most ~sqrt(2 * n_tokens) of them), not per unit:
        # the permutations are concatenated into one table indexed by (length, position).
        distinct, unit_length_index = np.unique(units.lengths, return_inverse=True)
        length_index = np.repeat(unit_length_index.ravel(), units.lengths)
        table = [self.permutation_for_length(n) for n in distinct]
        table_offsets = np.concatenate([[0], np.cumsum(distinct)[:-1]]).astype(np.int64)
        flat_table = np.concatenate(table) if table else np.zeros(0, np.int64)
        return start + flat_table[table_offsets[length_index] + local]


def _check_separators(owner: str, separators: Any) -> tuple[int, ...]:
    allowed = "a non-empty list of token ids (integers >= 0)"
    if isinstance(separators, numbers.Integral) and not isinstance(separators, bool):
        separators = [separators]
    # Any sequence (a list, a tuple, an OmegaConf ListConfig, an array), but not a string.
    if isinstance(separators, np.ndarray):
        separators = separators.tolist()
    if isinstance(separators, (str, bytes)) or not isinstance(separators, Sequence):
        raise invalid(owner, "separators", separators, allowed)
    if len(separators) == 0:
        raise invalid(owner, "separators", separators, allowed)
    for value in separators:
        if not isinstance(value, numbers.Integral) or isinstance(value, bool) or value < 0:
            raise invalid(owner, "separators", separators, allowed)
    return tuple(sorted({int(value) for value in separators}))


class _SegmentOrder(Order):
    """Shared segmentation: a unit is a sequence of *runs*, each either a single separator
    token or a maximal stretch of non-separator tokens.

    Separators stay separators after reordering and runs keep their lengths, so the inverse
    finds the same runs in the output; both segment orders are involutions. Leading,
    trailing and repeated separators are runs of their own (empty segments between them
    hold no tokens and vanish).
    """

    example_params: ClassVar[dict[str, Any]] = {"separators": [0]}

    def __init__(self, *, separators: Any) -> None:
        self.separators = _check_separators(f"order {self.name!r}", separators)
        super().__init__(separators=list(self.separators))

    def _runs(self, units: SequenceSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(run id of every token, run starts, run ends); runs never cross units."""
        tokens = units.tokens
        n_tokens = len(tokens)
        is_separator = np.isin(tokens, self.separators)
        breaks = np.zeros(n_tokens, dtype=bool)
        breaks[units.offsets[:-1][units.lengths > 0]] = True
        breaks |= is_separator
        breaks[1:] |= is_separator[:-1]
        run_id = np.cumsum(breaks) - 1
        run_starts = np.flatnonzero(breaks)
        run_ends = np.append(run_starts[1:], n_tokens)
        return run_id, run_starts, run_ends

    def inverse_positions_set(self, reordered: SequenceSet) -> np.ndarray:
        return self.positions_set(reordered)  # an involution


class SegmentReverse(_SegmentOrder):
    """Reverse the order of separator-delimited segments, keeping each segment's inside order.

    With a space as separator, ``"the cat sat"`` becomes ``"sat cat the"``.

    >>> SegmentReverse(separators=[0]).apply(np.array([1, 2, 0, 3, 0, 4, 5])).tolist()
    [4, 5, 0, 3, 0, 1, 2]
    """

    name = "segment_reverse"

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        run_id, run_starts, run_ends = self._runs(units)
        if len(run_starts) == 0:
            return np.zeros(0, dtype=np.int64)
        run_unit = units.row_ids()[run_starts]
        # Output run order: unit by unit, each unit's runs last to first.
        run_order = np.lexsort((-np.arange(len(run_starts)), run_unit))
        lengths = (run_ends - run_starts)[run_order]
        output_starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
        return np.repeat(run_starts[run_order] - output_starts, lengths) + np.arange(
            len(units.tokens), dtype=np.int64
        )


class WithinSegmentReverse(_SegmentOrder):
    """Reverse inside each separator-delimited segment, keeping the segments' order.

    With a space as separator, ``"the cat sat"`` becomes ``"eht tac tas"``.

    >>> order = WithinSegmentReverse(separators=[0])
    >>> order.apply(np.array([1, 2, 0, 3, 0, 4, 5])).tolist()
    [2, 1, 0, 3, 0, 5, 4]
    """

    name = "within_segment_reverse"

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        run_id, run_starts, run_ends = self._runs(units)
        index = np.arange(len(units.tokens), dtype=np.int64)
        return run_starts[run_id] + run_ends[run_id] - 1 - index


#: every built-in order class; ``forward`` is also registered as ``identity``
BUILTIN_ORDERS: tuple[type[Order], ...] = (
    Forward,
    Reverse,
    BlockReverse,
    Stride,
    Rotate,
    Permutation,
    SegmentReverse,
    WithinSegmentReverse,
)
