"""Checked inputs of :func:`retrograde.stats.summarize_model` and what its leaves share.

:func:`checked_inputs` stacks one model's per-unit losses (reference order first) and
refuses shapes, orders or values that make no gap; :func:`model_losses` checks the optional
per-unit arrays, groups units by document (when there are enough documents) and returns a
:class:`ModelLosses` that every order's leaf reads.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..data import MIN_DOCUMENT_GROUPS
from ..errors import DataError
from ._bootstrap import group_sums

__all__ = ["MIN_DOCUMENTS_FOR_GROUPING", "ModelLosses", "checked_inputs", "model_losses"]

#: with fewer test documents the interval resamples units one by one (resampling 1-9
#: documents would give a degenerate or wildly unstable interval); the report warns. The
#: same rule as a training half-sample's (:data:`retrograde.data.MIN_DOCUMENT_GROUPS`).
MIN_DOCUMENTS_FOR_GROUPING = MIN_DOCUMENT_GROUPS
_LN2 = math.log(2.0)


def checked_inputs(
    unit_nll: Mapping[str, np.ndarray], reference_order: str, n_tokens: np.ndarray
) -> tuple[list[str], np.ndarray]:
    """(orders with the reference first, stacked (n_orders, n_seeds, n_units) float64)."""
    if reference_order not in unit_nll:
        raise DataError(
            f"reference order {reference_order!r} has no losses (orders: {sorted(unit_nll)}); "
            "add it to study.orders or set the reference order to one that was fitted"
        )
    orders = [reference_order, *(o for o in unit_nll if o != reference_order)]
    shapes = {o: np.shape(unit_nll[o]) for o in orders}
    reference_shape = shapes[reference_order]
    if len(reference_shape) != 2 or 0 in reference_shape:
        raise DataError(
            f"order {reference_order!r}: losses must be a non-empty (n_seeds, n_units) array, "
            f"got shape {reference_shape}"
        )
    for order, shape in shapes.items():
        if shape != reference_shape:
            raise DataError(
                f"order {order!r}: losses have shape {shape} but {reference_order!r} has "
                f"{reference_shape}; every order must be scored on the same test units and seeds"
            )
    if np.shape(n_tokens) != (reference_shape[1],):
        raise DataError(
            f"n_tokens has shape {np.shape(n_tokens)}; expected one count per test unit "
            f"({reference_shape[1]})"
        )
    stacked = np.stack([np.asarray(unit_nll[o], dtype=np.float64) for o in orders])
    if not np.all(np.isfinite(stacked)):
        bad = orders[int(np.argwhere(~np.isfinite(stacked))[0][0])]
        raise DataError(
            f"order {bad!r}: some unit losses are infinite or NaN; the model gave a zero "
            "probability, use a family that smooths every outcome"
        )
    return orders, stacked


def _optional_per_unit(name: str, values: np.ndarray | None, n_units: int) -> np.ndarray | None:
    if values is None:
        return None
    values = np.asarray(values)
    if values.shape != (n_units,):
        raise DataError(
            f"{name} has shape {values.shape}; expected one value per test unit ({n_units})"
        )
    return values


@dataclass
class ModelLosses:
    """One model's checked losses and per-unit facts, shared by every order's leaf."""

    nll: np.ndarray  # (n_orders, n_seeds, n_units) nats, the reference first
    n_tokens: np.ndarray  # (n_units,) real tokens per unit
    group_index: np.ndarray  # (n_units,) the group (document, or else unit) of each unit
    n_groups: int
    n_documents: int | None
    n_bytes: np.ndarray | None
    floors: np.ndarray | None
    end: np.ndarray | None  # (n_orders, n_seeds, n_units) the end marker's nats

    def __post_init__(self) -> None:
        self.total_tokens = int(np.sum(self.n_tokens))
        self.totals = self.nll.sum(axis=2).mean(axis=1)  # (n_orders,) nats, seed-averaged
        # (n_orders, n_seeds) each seed's own gap, percent
        self.per_seed_gaps = 100.0 * (self.nll.sum(axis=2) / self.nll[0].sum(axis=1) - 1.0)
        # (n_orders, n_seeds, n_groups) whole losses, then (with end) content losses
        self.per_group = group_sums(self.nll, self.group_index, self.n_groups)
        self.content = None
        if self.end is not None:
            content = group_sums(self.nll - self.end, self.group_index, self.n_groups)
            # a reference with no content loss has no relative content gap
            self.content = None if np.any(content[0].sum(axis=1) <= 0) else content

    def bits_per_token(self, index: int) -> Any:
        return self.totals[index] / _LN2 / max(self.total_tokens, 1)


def model_losses(
    nll: np.ndarray,
    orders: list[str],
    n_tokens: np.ndarray,
    n_bytes: np.ndarray | None,
    doc_ids: np.ndarray | None,
    floors: np.ndarray | None,
    end_nll: Mapping[str, np.ndarray] | None,
) -> ModelLosses:
    """The checked optional inputs, and the groups the interval and sign flips draw."""
    n_units = nll.shape[2]
    n_bytes = _optional_per_unit("n_bytes", n_bytes, n_units)
    doc_ids = _optional_per_unit("doc_ids", doc_ids, n_units)
    floors = _optional_per_unit("floors", floors, n_units)
    end = _checked_end_nll(end_nll, orders, nll)
    if np.any(nll[0].sum(axis=1) <= 0):
        raise DataError(
            f"order {orders[0]!r}: the total test loss of some seed is not positive, so "
            "gaps relative to it are undefined; check that the test units are not empty"
        )
    group_index, n_groups, n_documents = np.arange(n_units), n_units, None
    if doc_ids is not None:
        _, document_index = np.unique(doc_ids, return_inverse=True)
        n_documents = int(document_index.max()) + 1
        if n_documents >= MIN_DOCUMENTS_FOR_GROUPING:
            group_index, n_groups = document_index.ravel(), n_documents
    return ModelLosses(
        nll, np.asarray(n_tokens), group_index.ravel(), n_groups, n_documents, n_bytes, floors, end
    )


def _checked_end_nll(
    end_nll: Mapping[str, np.ndarray] | None, orders: list[str], nll: np.ndarray
) -> np.ndarray | None:
    """(n_orders, n_seeds, n_units) end-marker nats in ``orders``' order, or ``None``."""
    if end_nll is None:
        return None
    missing = [o for o in orders if o not in end_nll]
    if missing:
        raise DataError(f"end_nll has no losses for order(s) {missing}; give one per order")
    end = np.stack([np.asarray(end_nll[o], dtype=np.float64) for o in orders])
    if end.shape != nll.shape:
        raise DataError(
            f"end_nll has shape {end.shape[1:]} per order; expected {nll.shape[1:]} like the "
            "unit losses (one end-marker loss per seed and test unit)"
        )
    if not np.all(np.isfinite(end)) or np.any(end < 0) or np.any(end > nll + 1e-9 * np.abs(nll)):
        raise DataError(
            "end_nll must be finite, >= 0 and no larger than the unit's whole loss; pass "
            "minus the log-probability of each unit's end marker"
        )
    return end
