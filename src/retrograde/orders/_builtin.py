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
from ..errors import ConfigError, DataError
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


def _check_separators(owner: str, separators: Any) -> tuple[int | str, ...]:
    """Separator ids (integers >= 0) and texts (non-empty strings), deduplicated, ids first."""
    allowed = (
        "a non-empty list of token ids (integers >= 0) or texts (one token each, e.g. ' '), "
        "or one of them"
    )
    if isinstance(separators, numbers.Integral) and not isinstance(separators, bool):
        separators = [separators]
    if isinstance(separators, str):
        separators = [separators]
    # Any sequence (a list, a tuple, an OmegaConf ListConfig, an array), but not bytes.
    if isinstance(separators, np.ndarray):
        separators = separators.tolist()
    if isinstance(separators, bytes) or not isinstance(separators, Sequence):
        raise invalid(owner, "separators", separators, allowed)
    if len(separators) == 0:
        raise invalid(owner, "separators", separators, allowed)
    ids: set[int] = set()
    texts: list[str] = []
    for value in separators:
        if isinstance(value, str) and value:
            texts += [] if value in texts else [value]
        elif (
            isinstance(value, numbers.Integral) and not isinstance(value, bool) and int(value) >= 0
        ):
            ids.add(int(value))
        else:
            raise invalid(owner, "separators", separators, allowed)
    return (*sorted(ids), *texts)


class _SegmentOrder(Order):
    """Shared segmentation: a unit is a sequence of *runs*, each either a single separator
    token or a maximal stretch of non-separator tokens.

    Separators stay separators after reordering and runs keep their lengths, so the inverse
    finds the same runs in the output; both segment orders are involutions. Leading,
    trailing and repeated separators are runs of their own (empty segments between them
    hold no tokens and vanish).

    A separator given as text (``" "``) names a token of a text tokenizer; its id depends on
    the vocabulary fitted on the training units, so :meth:`with_tokenizer` looks it up
    before the order is applied (the ``reorder`` stage and ``retrograde check`` do).
    """

    example_params: ClassVar[dict[str, Any]] = {"separators": [0]}

    def __init__(self, *, separators: Any) -> None:
        given = _check_separators(f"order {self.name!r}", separators)
        #: separator token ids (complete once every text separator is looked up)
        self.separators = tuple(sorted(v for v in given if isinstance(v, int)))
        #: separators given as text, still to be looked up in a tokenizer's vocabulary
        self.separator_texts = tuple(v for v in given if isinstance(v, str))
        super().__init__(separators=list(given))

    @property
    def needs_tokenizer(self) -> bool:
        return bool(self.separator_texts)

    def with_tokenizer(self, tokenizer: Any, *, where: str = "") -> Order:
        """This order with its text separators replaced by their ids in ``tokenizer``.

        ``tokenizer`` is the source's fitted tokenizer (None for a source of token ids).
        Each text must be exactly one token that the vocabulary knows; otherwise a one-line
        :class:`~retrograde.errors.DataError` starts with ``where`` (the order and source).

        >>> from retrograde.data import tokenizers
        >>> tok = tokenizers.make("chars").fit([list("a b")])
        >>> SegmentReverse(separators=" ").with_tokenizer(tok).separators
        (1,)
        """
        if not self.separator_texts:
            return self
        prefix = f"{where}: " if where else f"order {self.name!r}: "
        if tokenizer is None:
            raise DataError(
                f"{prefix}separators {list(self.separator_texts)!r} are text, but the source "
                "has no text tokenizer (its units are token ids); give the separators as ids"
            )
        ids = set(self.separators)
        for text in self.separator_texts:
            pieces = tokenizer.pieces(text)
            token = tokenizer.token_id(pieces[0]) if len(pieces) == 1 else None
            if token is None:
                raise DataError(
                    f"{prefix}separator {text!r} is {len(pieces)} tokens under the "
                    f"{tokenizer.name} tokenizer, not one; give a single token"
                )
            if token == tokenizer.unknown_id:
                raise DataError(
                    f"{prefix}separator {text!r} is not in the {tokenizer.name} vocabulary "
                    "fitted on the train split; give a token that occurs there "
                    "(`retrograde check` prints the vocabulary)"
                )
            ids.add(token)
        return type(self)(separators=sorted(ids))

    def _resolved(self) -> tuple[int, ...]:
        if self.separator_texts:
            raise ConfigError(
                f"order {self.name!r}: separators {list(self.separator_texts)!r} are text; "
                "look them up with with_tokenizer(the source's tokenizer) before applying"
            )
        return self.separators

    def _runs(self, units: SequenceSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(run id of every token, run starts, run ends); runs never cross units."""
        tokens = units.tokens
        n_tokens = len(tokens)
        is_separator = np.isin(tokens, self._resolved())
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
