"""Paired order gaps with uncertainty and the Holm adjustment (re-exported by ``retrograde.stats``).

The statistics follow DESIGN.md section 8 and are explained in ``docs/statistics.md``.
For one model on one source, ``NLL[order][s, i]`` is the loss in nats of test unit ``i``
under the model trained with seed ``s`` on that order (end marker included). Then

- ``bits_per_token = sum_i mean_s NLL[s, i] / ln 2 / sum_i n_tokens[i]``;
- ``gap_pct = 100 * (T_order / T_reference - 1)`` with ``T = sum_i mean_s NLL[s, i]``;
- the interval is a percentile bootstrap of that ratio that resamples units (grouped by
  document when ``doc_ids`` is given) and, with 3 or more seeds, seeds as well (with
  widened seed weights, see :func:`retrograde._bootstrap.seed_weight_scale`);
- ``p_value_sign_flip`` is a paired sign-flip test on the seed-averaged per-unit
  (per-document) differences; ``p_value`` is that, or with 3 or more seeds the larger of it
  and the two-level bootstrap p-value (:func:`bootstrap_pvalue`), so that training
  randomness cannot make a gap "significant" that its interval does not support;
- ``seed_spread_pct`` is the standard deviation over seeds of the per-seed gap.

Every function is pure and deterministic for a given ``seed``; floats in the returned
leaves are rounded to ``SIGNIFICANT_DIGITS`` significant digits so ``metrics.json`` is
byte-stable and reads well in ``dvc metrics diff``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import DataError
from ..validation import check_float, check_int
from ._bootstrap import (
    bootstrap_pvalue,
    bootstrap_totals,
    group_sums,
    holm,
    seed_weight_scale,
    sign_flip_pvalue,
)
from ._numbers import rounded

__all__ = [
    "FLOOR_Z",
    "MIN_DOCUMENTS_FOR_GROUPING",
    "MIN_SEEDS_FOR_TRAINING_NOISE",
    "adjust_holm",
    "below_floor",
    "grouping_warning",
    "seed_warning",
    "summarize_model",
]

#: with fewer seeds the interval resamples units only (seed resampling of 1-2 values is noise)
MIN_SEEDS_FOR_TRAINING_NOISE = 3
#: with fewer test documents the bootstrap resamples units one by one (resampling 1-9
#: documents would give a degenerate or wildly unstable interval); the report warns
MIN_DOCUMENTS_FOR_GROUPING = 10
_LN2 = math.log(2.0)
_OWNER = "stats 'summarize_model'"


#: how many standard errors below the exact floor a model may score before it is refused
FLOOR_Z = 4.0


def below_floor(unit_nll: np.ndarray, floors: np.ndarray, z: float = FLOOR_Z) -> float | None:
    """The mean per-unit excess (nats) when a model scores below the exact floor beyond noise.

    No model can beat the true distribution on average: per unit, ``NLL - floor`` has mean
    ``KL >= 0``. On a finite test set the mean difference can still dip below 0 by chance,
    by about one standard error; a mean more than ``z`` standard errors below 0 (and below
    0 at all when every difference is equal) means the numbers are wrong: test units leaked
    into training, or the model's probabilities do not sum to 1. Returns that mean, or
    ``None`` when the model is consistent with the floor.

    Examples
    --------
    >>> below_floor(np.array([2.0, 2.1, 1.9]), np.array([2.0, 2.0, 2.0])) is None
    True
    >>> round(below_floor(np.array([1.0, 1.1, 0.9]), np.array([2.0, 2.0, 2.0])), 6)
    -1.0
    """
    differences = np.asarray(unit_nll, dtype=np.float64) - np.asarray(floors, dtype=np.float64)
    mean = float(differences.mean())
    spread = float(differences.std(ddof=1)) if len(differences) > 1 else 0.0
    standard_error = spread / math.sqrt(len(differences))
    return mean if mean + z * standard_error < 0 else None


def seed_warning(n_seeds: int) -> str | None:
    """The caution a report shows when too few seeds were fitted, else ``None``."""
    if n_seeds >= MIN_SEEDS_FOR_TRAINING_NOISE:
        return None
    return (
        f"with {n_seeds} seed{'s' if n_seeds != 1 else ''} the interval ignores training "
        f"randomness (it resamples test units only); fit at least "
        f"{MIN_SEEDS_FOR_TRAINING_NOISE} seeds"
    )


def grouping_warning(source: str, n_documents: int) -> str | None:
    """The caution a report shows when a source has too few test documents, else ``None``."""
    if n_documents >= MIN_DOCUMENTS_FOR_GROUPING:
        return None
    return (
        f"source {source!r} has only {n_documents} test document"
        f"{'s' if n_documents != 1 else ''}, so its intervals resample units one by one and "
        "are too narrow if units of a document are alike; give the source more documents "
        "(e.g. text split=paragraph or split=line)"
    )


def _checked_inputs(
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


def summarize_model(
    unit_nll: Mapping[str, np.ndarray],
    *,
    reference_order: str,
    n_tokens: np.ndarray,
    n_bytes: np.ndarray | None = None,
    doc_ids: np.ndarray | None = None,
    floors: np.ndarray | None = None,
    level: float = 0.95,
    n_boot: int = 2000,
    seed: int = 0,
    n_flips: int = 2000,
    bootstrap_gaps: dict[str, np.ndarray] | None = None,
) -> dict[str, dict[str, Any]]:
    """Bits per token and paired gaps to the reference order for one model on one source.

    Parameters
    ----------
    unit_nll : mapping order -> (n_seeds, n_units) float
        Loss in nats of every test unit (end marker included) for each seed; the same units
        and the same seed list in every order.
    reference_order : str
        The order gaps are measured against (its leaf has gap 0).
    n_tokens : (n_units,) int
        Real tokens per unit (the end marker is not counted).
    n_bytes : (n_units,) int, optional
        Natural UTF-8 bytes per unit; adds ``bits_per_byte``.
    doc_ids : (n_units,) int, optional
        Document of each unit; the bootstrap and the sign flips then work on whole documents
        (when there are at least ``MIN_DOCUMENTS_FOR_GROUPING`` of them; else on units, and
        :func:`grouping_warning` explains why).
    floors : (n_units,) float, optional
        Exact NLL in nats of each unit (calibration sources); adds ``floor_bits_per_token``
        and ``excess_bits_per_token``.
    level : float
        Confidence level of the interval, in (0, 1).
    n_boot, n_flips : int
        Bootstrap replicates and Monte Carlo sign patterns.
    seed : int
        Seed of every random draw: the same inputs and seed give the same numbers.
    bootstrap_gaps : dict, optional
        When given, filled with ``{order: (n_boot,) bootstrap gaps in percent}`` (the draws
        behind the interval), for :func:`retrograde.stats.simultaneous_intervals`.

    Returns
    -------
    dict
        ``{order: leaf}``; a leaf has ``bits_per_token``, ``gap_pct``, ``gap_pct_low``,
        ``gap_pct_high``, ``p_value``, ``p_value_sign_flip``, ``seeds``, ``seed_spread_pct`` (``None`` with one
        seed), ``units``, ``tokens``, ``groups`` (documents or units resampled) and, when
        known, ``documents``, ``bits_per_byte``, ``floor_bits_per_token``,
        ``excess_bits_per_token``.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> forward = rng.gamma(5.0, 2.0, size=(3, 40))
    >>> leaves = summarize_model({"forward": forward, "reverse": forward * 1.1},
    ...                          reference_order="forward", n_tokens=np.full(40, 5), n_boot=200)
    >>> leaves["reverse"]["gap_pct"], leaves["forward"]["gap_pct"]
    (10.0, 0.0)
    """
    level = check_float(_OWNER, "level", level, 0.0, 1.0, low_open=True, high_open=True)
    n_boot = check_int(_OWNER, "n_boot", n_boot, 10)
    n_flips = check_int(_OWNER, "n_flips", n_flips, 10)
    seed = check_int(_OWNER, "seed", seed, 0)
    orders, nll = _checked_inputs(unit_nll, reference_order, np.asarray(n_tokens))
    n_orders, n_seeds, n_units = nll.shape
    n_bytes = _optional_per_unit("n_bytes", n_bytes, n_units)
    doc_ids = _optional_per_unit("doc_ids", doc_ids, n_units)
    floors = _optional_per_unit("floors", floors, n_units)
    total_tokens = int(np.sum(n_tokens))

    group_index, n_groups = np.arange(n_units), n_units
    n_documents = None
    if doc_ids is not None:
        _, document_index = np.unique(doc_ids, return_inverse=True)
        n_documents = int(document_index.max()) + 1
        if n_documents >= MIN_DOCUMENTS_FOR_GROUPING:
            group_index, n_groups = document_index.ravel(), n_documents
    per_group = group_sums(nll, group_index.ravel(), n_groups)  # (n_orders, n_seeds, n_groups)
    rng = np.random.default_rng(seed)

    totals = nll.sum(axis=2).mean(axis=1)  # (n_orders,) nats, seed-averaged
    if np.any(nll[0].sum(axis=1) <= 0):
        raise DataError(
            f"order {reference_order!r}: the total test loss of some seed is not positive, so "
            "gaps relative to it are undefined; check that the test units are not empty"
        )
    gaps = 100.0 * (totals / totals[0] - 1.0)
    per_seed_gaps = 100.0 * (nll.sum(axis=2) / nll[0].sum(axis=1) - 1.0)  # (n_orders, n_seeds)
    replicates = bootstrap_totals(
        per_group,
        n_boot=n_boot,
        rng=rng,
        seed_weight_scale=(
            seed_weight_scale(n_seeds, level) if n_seeds >= MIN_SEEDS_FOR_TRAINING_NOISE else None
        ),
    )  # (n_boot, n_orders)
    boot_gaps = 100.0 * (replicates / replicates[:, :1] - 1.0)
    tail = (1.0 - level) / 2.0
    lows, highs = np.quantile(boot_gaps, [tail, 1.0 - tail], axis=0)
    if bootstrap_gaps is not None:
        bootstrap_gaps.update({order: boot_gaps[:, i].copy() for i, order in enumerate(orders)})
    differences = per_group[1:].mean(axis=1) - per_group[0].mean(axis=0)  # (n_orders-1, n_groups)
    sign_flip = np.ones(n_orders)
    if n_orders > 1:
        sign_flip[1:], _ = sign_flip_pvalue(differences.T, n_flips=n_flips, rng=rng)
    p_values = sign_flip.copy()
    if n_seeds >= MIN_SEEDS_FOR_TRAINING_NOISE:
        # The sign flips treat the seed-averaged losses as fixed, so training randomness
        # alone makes them reject a true null (measured: 49% at level 0.05 with a 1% seed
        # effect). The bootstrap p-value includes it; taking the larger keeps the
        # `significant` flag in line with the interval.
        p_values = np.maximum(sign_flip, bootstrap_pvalue(boot_gaps))

    leaves: dict[str, dict[str, Any]] = {}
    for index, order in enumerate(orders):
        bits_per_token = totals[index] / _LN2 / max(total_tokens, 1)
        leaf: dict[str, Any] = {
            "bits_per_token": rounded(bits_per_token),
            "gap_pct": rounded(gaps[index]),
            "gap_pct_low": rounded(lows[index]),
            "gap_pct_high": rounded(highs[index]),
            "p_value": rounded(p_values[index]),
            "p_value_sign_flip": rounded(sign_flip[index]),
            "seeds": n_seeds,
            "seed_spread_pct": (
                rounded(np.std(per_seed_gaps[index], ddof=1)) if n_seeds > 1 else None
            ),
            "units": n_units,
            "tokens": total_tokens,
            "groups": n_groups,  # what the bootstrap resampled: documents, or else units
        }
        if n_documents is not None:
            leaf["documents"] = n_documents
        if n_bytes is not None:
            leaf["bits_per_byte"] = rounded(totals[index] / _LN2 / max(int(n_bytes.sum()), 1))
        if floors is not None:
            floor_bits = float(np.sum(floors)) / _LN2 / max(total_tokens, 1)
            leaf["floor_bits_per_token"] = rounded(floor_bits)
            leaf["excess_bits_per_token"] = rounded(bits_per_token - floor_bits)
        leaves[order] = leaf
    return {order: leaves[order] for order in unit_nll}


def adjust_holm(
    table: Mapping[str, Mapping[str, Mapping[str, dict[str, Any]]]],
    *,
    reference_order: str | Mapping[str, str] = "forward",
    alpha: float = 0.05,
) -> dict[str, dict[str, dict[str, dict[str, Any]]]]:
    """Add ``p_value_holm`` and ``significant`` to every non-reference leaf of the table.

    All non-reference gaps in ``{source: {model: {order: leaf}}}`` form one family of tests
    (Holm 1979). ``reference_order`` is one name, or a mapping source -> name. The table is
    changed in place and returned. A gap is ``significant`` when its adjusted p-value is
    below ``alpha``.
    """
    alpha = check_float("stats 'adjust_holm'", "alpha", alpha, 0.0, 1.0, low_open=True)
    leaves: list[dict[str, Any]] = []
    for source, models in table.items():
        reference = reference_order if isinstance(reference_order, str) else reference_order[source]
        for model, orders in models.items():
            if reference not in orders:
                raise DataError(
                    f"table {source}.{model}: reference order {reference!r} is missing "
                    f"(orders: {sorted(orders)}); pass reference_order to adjust_holm"
                )
            leaves.extend(leaf for order, leaf in orders.items() if order != reference)
    adjusted = holm(np.array([leaf["p_value"] for leaf in leaves], dtype=np.float64))
    for leaf, p_holm in zip(leaves, adjusted, strict=True):
        leaf["p_value_holm"] = rounded(p_holm)
        leaf["significant"] = bool(p_holm < alpha)
    return table  # type: ignore[return-value]
