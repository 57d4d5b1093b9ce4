"""Stage ``reorder``: apply one order to every split of one source, verifying the round trip.

``python -m retrograde.stages.reorder --source NAME --order ORDER`` reads
``study.orders.ORDER`` from ``params.yaml`` and ``data/NAME/units/``, and writes
``data/NAME/orders/ORDER/{train,valid,test}/`` plus ``positions_test.npy`` (int64
(n_test_tokens,): reordered flat index j holds natural flat index ``positions[j]``), which
the table stage uses to map per-position losses back to the natural order.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import orders
from ..config import load_params, order_dir, units_dir
from ..data import SPLITS, SequenceSet, atomic_dir
from ..errors import RetrogradeError
from . import run_stage

__all__ = ["bind_order", "main", "reorder_splits"]


def bind_order(order: Any, info: Mapping[str, Any], order_name: str) -> Any:
    """``order`` for the source whose units' ``info.json`` is ``info`` (see ``Order.for_source``).

    An order that needs the source's facts (the ``fields`` order) gets them here; a
    mismatch is one line naming the order's config key and the source.
    """
    for_source = getattr(order, "for_source", None)  # duck-typed custom orders have none
    if for_source is None:
        return order
    try:
        return for_source(info)
    except RetrogradeError as exc:
        raise exc.prefixed(f"study.orders.{order_name} on source {info.get('source')!r}") from exc


def reorder_splits(
    splits: Mapping[str, SequenceSet], order: Any, *, order_name: str
) -> tuple[dict[str, SequenceSet], np.ndarray]:
    """Every split reordered (each unit's round trip checked first) and the test positions.

    Raises :class:`~retrograde.errors.BijectionError` naming the order and a failing unit.

    Examples
    --------
    >>> splits = {"test": SequenceSet.from_list([[1, 2, 3]], vocab_size=4)}
    >>> out, positions = reorder_splits(splits, orders.make("reverse"), order_name="reverse")
    >>> out["test"][0].tolist(), positions.tolist()
    ([3, 2, 1], [2, 1, 0])
    """
    reordered = {}
    for name, units in splits.items():
        orders.verify_bijection(order, units, order_name=order_name)
        reordered[name] = order.apply_set(units)
    positions_test = np.asarray(order.positions_set(splits["test"]), dtype=np.int64)
    return reordered, positions_test


def _body(args: argparse.Namespace) -> None:
    wdir = Path(args.params).resolve()
    spec = load_params(wdir).study.orders[args.order]
    source_units = wdir / str(units_dir(args.source))
    info = json.loads((source_units / "info.json").read_text(encoding="utf-8"))
    order = bind_order(orders.make(spec.name, **spec.params), info, args.order)
    splits = {name: SequenceSet.load(source_units / name) for name in SPLITS}
    reordered, positions_test = reorder_splits(splits, order, order_name=args.order)
    with atomic_dir(wdir / str(order_dir(args.source, args.order))) as tmp:
        for name, units in reordered.items():
            units.save(tmp / name)
        np.save(tmp / "positions_test.npy", positions_test)


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, help="a key of study.sources")
    parser.add_argument("--order", required=True, help="a key of study.orders")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.reorder --source NAME --order ORDER``."""
    return run_stage("reorder", _configure, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
