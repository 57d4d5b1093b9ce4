"""Stage ``reorder``: apply one order to every split of one source, verifying the round trip.

``python -m retrograde.stages.reorder --source NAME --order ORDER`` reads
``study.orders.ORDER`` from ``params.yaml`` and ``data/NAME/units/``, and writes
``data/NAME/orders/ORDER/{train,valid,test}/`` plus ``positions_test.npy`` (int64
(n_test_tokens,): reordered flat index j holds natural flat index ``positions[j]``), which
the table stage uses to map per-position losses back to the natural order.

When the source's learned tokenizer has ``reorder: characters``, the units are code points:
the order permutes characters (round trip verified on them), then the reordered text is
tokenized, by the tokenizer fitted on the natural training text (``fit: shared``) or by one
fitted here on this order's training text (``fit: per_order``), written as
``tokenizer.json`` beside the splits. Token counts then differ between orders, so no
``positions_test.npy`` is written (the table compares bits per byte).
"""

from __future__ import annotations

if __name__ == "__main__":  # a command of a run: the run's stage server may run it (server.py)
    from retrograde.stages.server import delegate

    delegate("reorder")

import argparse
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import orders
from ..config import load_params, order_dir, units_dir
from ..data import SPLITS, SequenceSet, atomic_dir, tokenizers
from ..errors import DataError, RetrogradeError
from . import run_stage

__all__ = ["bind_order", "main", "reorder_splits", "tokenize_characters", "with_vocabulary"]


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


def with_vocabulary(order: Any, units_folder: Path, order_name: str, source_name: str) -> Any:
    """``order`` with separators given as text looked up in the source's fitted vocabulary."""
    if not getattr(order, "needs_tokenizer", False):  # duck-typed custom orders have none
        return order
    path = units_folder / "tokenizer.json"
    tokenizer = tokenizers.load(path) if path.exists() else None
    where = f"study.orders.{order_name} on source {source_name!r}"
    return order.with_tokenizer(tokenizer, where=where)


def _body(args: argparse.Namespace) -> None:
    wdir = Path(args.params).resolve()
    spec = load_params(wdir).study.orders[args.order]
    source_units = wdir / str(units_dir(args.source))
    info = json.loads((source_units / "info.json").read_text(encoding="utf-8"))
    order = bind_order(orders.make(spec.name, **spec.params), info, args.order)
    order = with_vocabulary(order, source_units, args.order, args.source)
    splits = {name: SequenceSet.load(source_units / name) for name in SPLITS}
    reordered, positions_test = reorder_splits(splits, order, order_name=args.order)
    tokenizer = None
    if info.get("reorder") == "characters":
        tokenizer = tokenizers.load(source_units / "tokenizer.json")
        reordered, tokenizer = tokenize_characters(
            reordered, tokenizer, per_order=info.get("fit") == "per_order", order_name=args.order
        )
    with atomic_dir(wdir / str(order_dir(args.source, args.order))) as tmp:
        for name, units in reordered.items():
            units.save(tmp / name)
        if tokenizer is None:
            np.save(tmp / "positions_test.npy", positions_test)
        else:  # tokens no longer match natural positions one to one: no positions
            tokenizer.save(tmp / "tokenizer.json")


def tokenize_characters(
    splits: Mapping[str, SequenceSet], tokenizer: Any, *, per_order: bool, order_name: str
) -> tuple[dict[str, SequenceSet], Any]:
    """Reordered character units (code points) tokenized by a learned tokenizer.

    ``per_order``: the tokenizer is refitted (same settings) on this order's training text
    only; otherwise the one fitted on the natural training text is used. Every unit must
    decode back to its text (the tokenizer is lossless), else a one-line error names it.
    """
    texts = {
        name: [unit.astype("<u4").tobytes().decode("utf-32-le", "surrogatepass") for unit in units]
        for name, units in splits.items()
    }
    if per_order:
        tokenizer = tokenizers.make(tokenizer.name, **tokenizer.get_params())
        tokenizer.fit(texts["train"])
    out = {}
    for name, units in splits.items():
        encoded = tokenizer.encode_many(texts[name])
        for index, (text, ids) in enumerate(zip(texts[name], encoded, strict=True)):
            if tokenizer.decode(ids) != text:
                raise DataError(
                    f"order {order_name!r}: {name} unit {index} does not survive tokenization "
                    f"(starts {text[:20]!r}); the text holds a character the {tokenizer.name} "
                    "tokenizer cannot keep (U+2581); use reorder: tokens"
                )
        lengths = np.fromiter((len(e) for e in encoded), np.int64, len(encoded))
        out[name] = SequenceSet(
            np.concatenate(encoded) if encoded else np.zeros(0, np.int32),
            np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64),
            vocab_size=tokenizer.vocab_size,
            doc_ids=units.doc_ids,
            n_bytes=units.n_bytes,
        )
    return out, tokenizer


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, help="a key of study.sources")
    parser.add_argument("--order", required=True, help="a key of study.orders")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.reorder --source NAME --order ORDER``."""
    return run_stage("reorder", _configure, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
