"""The :class:`Order` base class: a named bijection applied inside each unit.

An order reports the *position permutation* it applied, ``p`` with ``apply(x) == x[p]``, so
per-position losses can be mapped back to the natural order, and can undo itself from its
output alone (``invert``). The core methods work on a whole :class:`SequenceSet` at once
(flat int64 index arrays, no Python loop per token); the per-unit methods wrap them.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from ..data import SequenceSet
from ..errors import PluginError

__all__ = ["Order", "unit_positions"]


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

    @property
    def needs_tokenizer(self) -> bool:
        """True when a parameter names tokens by text (see :meth:`with_tokenizer`)."""
        return False

    def with_tokenizer(self, tokenizer: Any, *, where: str = "") -> Order:
        """This order for one source: parameters given as text looked up in its vocabulary.

        ``tokenizer`` is the source's fitted tokenizer, or None for a source whose units are
        token ids; ``where`` starts any error message (the order and source). Orders
        without text parameters return themselves.
        """
        return self

    def __repr__(self) -> str:
        args = ", ".join(f"{key}={value!r}" for key, value in sorted(self._params.items()))
        return f"{self.name or type(self).__name__}({args})"

    def for_source(self, info: Mapping[str, Any]) -> Order:
        """This order for one source, given its units' ``info.json`` (as a dict).

        Most orders need nothing from the source and return ``self``; an order that needs
        the source's facts (the ``fields`` order: field names and separator id) returns a
        copy with them filled in. The reorder stage and ``retrograde check`` call it.
        """
        return self

    # ----------------------------------------------------------- set level (core)
    def positions_set(self, units: SequenceSet) -> np.ndarray:
        """(n_tokens,) int64 flat indices ``p`` with ``apply_set(units).tokens == units.tokens[p]``.

        Each unit's indices stay inside that unit.
        """
        parts = []
        for unit, start in zip(units, units.offsets[:-1], strict=True):
            positions = np.asarray(self.positions(unit))
            if positions.dtype.kind not in "iu":  # astype would truncate 0.5 to 0 silently
                raise PluginError(
                    f"positions returned {positions.dtype} positions; an order returns int64 "
                    "indices into the unit"
                )
            parts.append(positions + start)
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


def unit_positions(units: SequenceSet) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(position inside unit, unit length, unit start), each (n_tokens,) int64."""
    lengths = units.lengths
    starts = np.repeat(units.offsets[:-1], lengths)
    return units.positions(), np.repeat(lengths, lengths), starts
