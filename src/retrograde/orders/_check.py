"""The bijection check every order goes through before its data are used (DESIGN.md, invariant 3).

Kept apart from :mod:`retrograde.orders` (which re-exports :func:`verify_bijection`) because
it must also judge duck-typed custom orders that know nothing of the :class:`Order` base.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..errors import BijectionError, PluginError, RetrogradeError

__all__ = ["verify_bijection"]


def _excerpt(unit: np.ndarray, describe: Callable[[np.ndarray], str] | None) -> str:
    shown = unit[:12]
    more = "..." if len(unit) > len(shown) else ""
    if describe is not None:
        try:
            return repr(describe(shown)) + more
        except Exception:  # an excerpt must never hide the real error
            pass
    return "[" + ", ".join(str(int(t)) for t in shown) + (", ..." if more else "") + "]"


def verify_bijection(
    order: Any,
    units: SequenceSet,
    *,
    order_name: str,
    describe: Callable[[np.ndarray], str] | None = None,
) -> None:
    """Round-trip every unit through ``order``; raise :class:`BijectionError` on the first failure.

    Checks, unit by unit (vectorized over the set): the reordered unit keeps its length, the
    reported positions permute the unit and reproduce ``apply``, and ``invert`` recovers the
    natural unit from the reordered one alone. ``describe`` (e.g. a tokenizer's ``decode``)
    renders the excerpt in the error; by default token ids are shown.

    Examples
    --------
        >>> from retrograde import orders
    >>> units = SequenceSet.from_list([[3, 1, 2], [5, 4]])
    >>> verify_bijection(orders.make("reverse"), units, order_name="reverse")  # passes silently
    """

    def fail(unit_index: int, what: str) -> BijectionError:
        unit = units[unit_index]
        return BijectionError(
            f"order {order_name!r} is not a bijection: {what} for unit {unit_index} "
            f"(length {len(unit)}, starts {_excerpt(unit, describe)}); fix the order's "
            "apply/invert or choose another order"
        )

    try:
        if not hasattr(order, "apply_set"):  # a duck-typed custom order: one unit at a time
            _check_each_unit(order, units, fail)
            return
        positions = np.asarray(order.positions_set(units))
        _check_index_dtype(positions, "positions_set")
        _check_positions(positions, units, fail)
        _check_apply_and_invert(order, positions, units, fail)
    except RetrogradeError as exc:
        if isinstance(exc, PluginError) and not str(exc).startswith("order "):
            raise PluginError(f"order {order_name!r} ({_class_path(order)}) {exc}") from exc
        raise
    except Exception as exc:  # the order's own code failed: one line, not a traceback
        if type(order).__module__.split(".")[0] == "retrograde":
            raise  # a bug of ours: keep the traceback
        raise PluginError(
            f"order {order_name!r} ({_class_path(order)}) raised {type(exc).__name__}: {exc}; "
            "fix the order's code (--debug shows the traceback)"
        ) from exc


def _class_path(order: Any) -> str:
    return f"{type(order).__module__}.{type(order).__qualname__}"


def _check_index_dtype(positions: np.ndarray, method: str) -> None:
    """Positions are integer indices; anything else breaks the order's contract."""
    if positions.dtype.kind not in "iu":
        raise PluginError(
            f"{method} returned {positions.dtype} positions; an order returns int64 flat "
            "indices (reordered position k holds natural index result[k])"
        )


Fail = Callable[[int, str], BijectionError]


def _check_each_unit(order: Any, units: SequenceSet, fail: Fail) -> None:
    for i in range(len(units)):
        x = units[i]
        y = np.asarray(order.apply(x))
        if y.shape != x.shape:
            raise fail(i, f"apply changed the length to {y.size}")
        if not np.array_equal(np.sort(y), np.sort(x)) or not np.array_equal(
            np.asarray(order.invert(y)), x
        ):
            raise fail(i, "invert(apply(x)) != x")


def _check_positions(positions: np.ndarray, units: SequenceSet, fail: Fail) -> None:
    """The reported positions permute each unit's own tokens."""
    unit_of_token = units.row_ids()
    if positions.shape != units.tokens.shape:
        raise fail(0, f"positions_set gave {positions.size} indices for {units.tokens.size} tokens")
    inside = (positions >= units.offsets[unit_of_token]) & (
        positions < units.offsets[unit_of_token + 1]
    )
    if not inside.all():
        raise fail(int(unit_of_token[~inside][0]), "a position points outside its unit")
    hits = np.bincount(positions, minlength=len(positions))
    if (hits != 1).any():
        raise fail(int(unit_of_token[np.flatnonzero(hits != 1)[0]]), "positions repeat a token")


def _check_apply_and_invert(
    order: Any, positions: np.ndarray, units: SequenceSet, fail: Fail
) -> None:
    """``apply`` agrees with the positions, and ``invert`` recovers every natural unit."""
    unit_of_token = units.row_ids()
    reordered = order.apply_set(units)
    if not np.array_equal(reordered.offsets, units.offsets):
        changed = np.flatnonzero(reordered.lengths != units.lengths)
        raise fail(int(changed[0]) if len(changed) else 0, "apply changed a unit's length")
    wrong = reordered.tokens != units.tokens[positions]
    if wrong.any():
        raise fail(int(unit_of_token[wrong][0]), "apply disagrees with the reported positions")
    recovered = order.invert_set(reordered)
    if recovered.tokens.shape != units.tokens.shape:
        raise fail(0, "invert changed the number of tokens")
    wrong = np.asarray(recovered.tokens) != units.tokens
    if wrong.any():
        raise fail(int(unit_of_token[wrong][0]), "invert(apply(x)) != x")
