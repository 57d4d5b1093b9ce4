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

from ._order_check import verify_bijection
from ._registry import Registry
from ._validation import check_int, invalid
from .sequences import SequenceSet

__all__ = ["Order", "make", "names", "registry", "verify_bijection"]

registry: Registry[Order] = Registry("order", "retrograde.orders")


def make(name: str, **params: Any) -> Order:
    """Build the order ``name`` (a registered name or a dotted ``_target_`` path)."""
    return registry.make(name, **params)


def names() -> list[str]:
    """Sorted names of every registered order (built-ins and entry points)."""
    return registry.names()


def _one_unit(x: np.ndarray) -> SequenceSet:
    x = np.asarray(x)
    if x.ndim != 1:
        raise ValueError(f"an order works on 1-D arrays, got shape {x.shape}")
    return SequenceSet(x, np.array([0, len(x)], dtype=np.int64))


def _inverse_permutation(p: np.ndarray) -> np.ndarray:
    inverse = np.empty_like(p)
    inverse[p] = np.arange(len(p), dtype=p.dtype)
    return inverse


class Order:
    """Base class of every order transform.

    Subclasses store keyword-only parameters in ``__init__`` (validated there, in one
    place) and implement :meth:`positions_set` (vectorized) or :meth:`positions` (one unit;
    the set-level method then loops over units). The default inverse assumes the
    permutation depends only on the unit length; orders whose permutation depends on the
    content override :meth:`inverse_positions_set` (vectorized) or :meth:`invert` (one unit).
    """

    #: registry name, set by each built-in subclass
    name: ClassVar[str] = ""
    #: parameters the conformance tests and docs use when the order has required ones
    example_params: ClassVar[dict[str, Any]] = {}

    def __init__(self, **params: Any) -> None:
        cls = type(self)
        if cls.positions_set is Order.positions_set and cls.positions is Order.positions:
            # Each default is written in terms of the other; one must be real.
            raise TypeError(f"order class {cls.__name__} must define positions_set or positions")
        self._params = dict(params)

    def get_params(self) -> dict[str, Any]:
        """The keyword parameters this order was built with (JSON-able)."""
        return dict(self._params)

    def __repr__(self) -> str:
        args = ", ".join(f"{key}={value!r}" for key, value in sorted(self._params.items()))
        return f"{self.name or type(self).__name__}({args})"

    # ----------------------------------------------------------- set level (core)
    def positions_set(self, units: SequenceSet) -> np.ndarray:
        """(n_tokens,) int64 flat indices ``p`` with ``apply_set(units).tokens == units.tokens[p]``.

        Each unit's indices stay inside that unit.
        """
        parts = [
            self.positions(unit) + start
            for unit, start in zip(units, units.offsets[:-1], strict=True)
        ]
        return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, np.int64)

    def inverse_positions_set(self, reordered: SequenceSet) -> np.ndarray:
        """(n_tokens,) flat indices ``q`` with ``invert_set(reordered).tokens == reordered.tokens[q]``.

        Computed from the reordered units alone. The default inverts the permutation that
        :meth:`positions_set` gives for units of the same lengths.
        """
        return _inverse_permutation(self.positions_set(reordered))

    def apply_set(self, units: SequenceSet) -> SequenceSet:
        """Every unit reordered; lengths, ``vocab_size``, ``doc_ids`` and ``n_bytes`` kept."""
        return units.with_tokens(units.tokens[self.positions_set(units)])

    def invert_set(self, reordered: SequenceSet) -> SequenceSet:
        """The natural-order units that :meth:`apply_set` turned into ``reordered``."""
        cls = type(self)
        if cls.invert is not Order.invert and (
            cls.inverse_positions_set is Order.inverse_positions_set
        ):
            # A custom order that only knows how to invert one unit: trust its invert.
            parts = [np.asarray(self.invert(unit)) for unit in reordered]
            return reordered.with_tokens(np.concatenate(parts) if parts else reordered.tokens)
        return reordered.with_tokens(reordered.tokens[self.inverse_positions_set(reordered)])

    # ----------------------------------------------------------------- one unit
    def positions(self, x: np.ndarray) -> np.ndarray:
        """(len(x),) int64 ``p`` with ``apply(x) == x[p]``."""
        return self.positions_set(_one_unit(x))

    def apply(self, x: np.ndarray) -> np.ndarray:
        """The unit ``x`` (1-D int array) in this order."""
        x = np.asarray(x)
        return x[self.positions(x)]

    def invert(self, y: np.ndarray) -> np.ndarray:
        """The natural-order unit whose reordering is ``y``."""
        y = np.asarray(y)
        return y[self.inverse_positions_set(_one_unit(y))]


def _local(units: SequenceSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(position inside unit, unit length, unit start), each (n_tokens,) int64."""
    lengths = units.lengths
    starts = np.repeat(units.offsets[:-1], lengths)
    return units.positions(), np.repeat(lengths, lengths), starts


@registry.register("identity")
@registry.register("forward")
class Forward(Order):
    """The natural order (the default reference order)."""

    name = "forward"

    def __init__(self) -> None:
        super().__init__()

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        return np.arange(len(units.tokens), dtype=np.int64)


@registry.register("reverse")
class Reverse(Order):
    """Last token first. An involution: ``apply(apply(x)) == x``."""

    name = "reverse"

    def __init__(self) -> None:
        super().__init__()

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = _local(units)
        return start + length - 1 - local


@registry.register("block_reverse")
class BlockReverse(Order):
    """Reverse inside consecutive blocks of ``size`` tokens; a shorter last block is reversed too.

    >>> make("block_reverse", size=3).apply(np.arange(8)).tolist()
    [2, 1, 0, 5, 4, 3, 7, 6]
    """

    name = "block_reverse"

    def __init__(self, *, size: int = 4) -> None:
        super().__init__(size=size)
        self.size = check_int("order 'block_reverse'", "size", size, low=1)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = _local(units)
        block_start = local - local % self.size
        block_end = np.minimum(block_start + self.size, length)
        return start + block_start + block_end - 1 - local


@registry.register("stride")
class Stride(Order):
    """Interleave: positions ``0, step, 2*step, ...`` first, then ``1, 1+step, ...``, and so on.

    >>> make("stride", step=3).apply(np.arange(8)).tolist()
    [0, 3, 6, 1, 4, 7, 2, 5]
    """

    name = "stride"

    def __init__(self, *, step: int = 2) -> None:
        super().__init__(step=step)
        self.step = check_int("order 'stride'", "step", step, low=1)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = _local(units)
        # A unit of n = full * step + extra tokens has full + 1 positions with residue r < extra
        # and full positions with each other residue, so the residues r' < r fill the first
        # r * full + min(r, extra) output slots.
        full, extra = np.divmod(length, self.step)
        residue = local % self.step
        destination = residue * full + np.minimum(residue, extra) + local // self.step
        positions = np.empty(len(local), dtype=np.int64)
        positions[start + destination] = start + local
        return positions


@registry.register("rotate")
class Rotate(Order):
    """Cyclic left shift: ``apply(x)[j] == x[(j + shift) % len(x)]`` (negative shifts go right).

    >>> make("rotate", shift=2).apply(np.arange(5)).tolist()
    [2, 3, 4, 0, 1]
    """

    name = "rotate"

    def __init__(self, *, shift: int = 1) -> None:
        super().__init__(shift=shift)
        self.shift = check_int("order 'rotate'", "shift", shift)

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        local, length, start = _local(units)
        # length >= 1 for every token that exists, so the modulus is safe.
        return start + (local + self.shift) % np.maximum(length, 1)


@registry.register("permutation")
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
        local, _, start = _local(units)
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


@registry.register("segment_reverse")
class SegmentReverse(_SegmentOrder):
    """Reverse the order of separator-delimited segments, keeping each segment's inside order.

    With a space as separator, ``"the cat sat"`` becomes ``"sat cat the"``.

    >>> make("segment_reverse", separators=[0]).apply(np.array([1, 2, 0, 3, 0, 4, 5])).tolist()
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


@registry.register("within_segment_reverse")
class WithinSegmentReverse(_SegmentOrder):
    """Reverse inside each separator-delimited segment, keeping the segments' order.

    With a space as separator, ``"the cat sat"`` becomes ``"eht tac tas"``.

    >>> order = make("within_segment_reverse", separators=[0])
    >>> order.apply(np.array([1, 2, 0, 3, 0, 4, 5])).tolist()
    [2, 1, 0, 3, 0, 5, 4]
    """

    name = "within_segment_reverse"

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        run_id, run_starts, run_ends = self._runs(units)
        index = np.arange(len(units.tokens), dtype=np.int64)
        return run_starts[run_id] + run_ends[run_id] - 1 - index
