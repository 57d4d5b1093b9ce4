"""Orders: named, parameterized bijections applied inside each unit.

``make(name, **params)`` builds one (a registered name, or a dotted ``_target_`` path to a
class of your own); ``names()`` lists the registered ones; :func:`verify_bijection` is the
round-trip check every order passes on the real data before it is used. Built-ins:
``forward`` (alias ``identity``), ``reverse``, ``block_reverse(size)``, ``stride(step)``,
``rotate(shift)``, ``permutation(seed)``, ``segment_reverse(separators)`` and
``within_segment_reverse(separators)``, and ``fields(fields, reverse)`` for records sources
(permute whole fields, reverse inside some; see ``docs/guide.md``).

To add a built-in order, write its class in ``_builtin.py`` and list it in
``BUILTIN_ORDERS``; an order of your own subclasses :class:`Order` and is named by a dotted
path or the entry-point group ``retrograde.orders``.

Examples
--------
>>> import numpy as np
>>> make("reverse").apply(np.array([1, 2, 3])).tolist()
[3, 2, 1]
"""

from __future__ import annotations

from typing import Any

from ..registry import Registry
from ._base import Order, unit_positions
from ._builtin import (
    BUILTIN_ORDERS,
    BlockReverse,
    Forward,
    Permutation,
    Reverse,
    Rotate,
    SegmentReverse,
    Stride,
    WithinSegmentReverse,
)
from ._check import verify_bijection
from ._fields import Fields

__all__ = [
    "BlockReverse",
    "Fields",
    "Forward",
    "Order",
    "Permutation",
    "Reverse",
    "Rotate",
    "SegmentReverse",
    "Stride",
    "WithinSegmentReverse",
    "make",
    "names",
    "registry",
    "unit_positions",
    "verify_bijection",
]

registry: Registry[Order] = Registry("order", "retrograde.orders", Order)
_ORDERS: tuple[type[Order], ...] = (*BUILTIN_ORDERS, Fields)
for _order in _ORDERS:
    registry.register(_order.name)(_order)
registry.register("identity")(Forward)


def make(name: str, **params: Any) -> Order:
    """Build the order ``name`` (a registered name or a dotted ``_target_`` path)."""
    return registry.make(name, **params)


def names() -> list[str]:
    """Sorted names of every registered order (built-ins and entry points)."""
    return registry.names()
