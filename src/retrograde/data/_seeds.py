"""The seed a fit draws its own random numbers from: one stream per (cell seed, order).

A cell's seed does two things. It chooses *training units* (a ``train_fraction``
subsample, a ``train_sample`` draw): the same units in every order, so those fits of two
orders are paired by the seed. And it seeds the family's *own* randomness (initial
weights, batch order). For a family that declares ``Family.own_stream_per_order`` the fit
stage gives that randomness a stream of each order's own, :func:`order_seed`, so fits of
two orders share no random numbers: same-seed fits are independent, which lets the
interval estimate each order's seed variation apart (``docs/statistics.md``, "Seeds").
"""

from __future__ import annotations

import hashlib

__all__ = ["order_seed"]


def order_seed(seed: int, order: str) -> int:
    """The seed of order ``order``'s own random numbers for cell seed ``seed``.

    The first four bytes of SHA-256 of ``"retrograde/order-seed/<order>/<seed>"``, below
    ``2**31`` (any random-number library takes it). A pure function of its inputs: every
    machine and run draws the same stream for a cell, and different orders (or seeds) draw
    streams that share nothing.

    Examples
    --------
    >>> order_seed(0, "forward") == order_seed(0, "forward")
    True
    >>> order_seed(0, "forward") != order_seed(0, "reverse")
    True
    >>> 0 <= order_seed(12, "reverse") < 2**31
    True
    """
    text = f"retrograde/order-seed/{order}/{int(seed)}".encode()
    return int.from_bytes(hashlib.sha256(text).digest()[:4], "big") >> 1
