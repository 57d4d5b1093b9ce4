"""Where an order loses: mean loss per natural-order position, per named span, per segment.

Inputs are ``natural_losses[order]``: a :class:`~retrograde.sequences.Ragged` with, per test
unit, the loss in nats at each *natural-order* position (mapped back through the order's
bijection, averaged over seeds) and the end marker last, so row ``i`` has ``len_i + 1``
values. Outputs are JSON-able dicts in bits. Public names are re-exported by
:mod:`retrograde.stats`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..data import Ragged, SequenceSet, earlier_in_unit
from ..errors import DataError
from ..validation import check_float, check_int
from ._bootstrap import resample_counts
from ._gaps import MIN_DOCUMENTS_FOR_GROUPING
from ._numbers import rounded

__all__ = ["position_profile", "segment_breakdown", "span_breakdown", "span_masks"]

_LN2 = math.log(2.0)


def _check_same_units(natural_losses: Mapping[str, Ragged]) -> tuple[list[str], np.ndarray]:
    orders = list(natural_losses)
    if not orders:
        raise DataError("no orders to profile; natural_losses is empty")
    lengths = natural_losses[orders[0]].lengths
    for order in orders[1:]:
        if not np.array_equal(natural_losses[order].lengths, lengths):
            raise DataError(
                f"order {order!r}: per-position losses do not match {orders[0]!r} unit by "
                "unit; map every order's losses back to the natural order of the same units"
            )
    return orders, lengths


def position_profile(
    natural_losses: Mapping[str, Ragged], *, reference_order: str, n_buckets: int = 50
) -> dict[str, Any]:
    """Mean loss per natural-order position (or position bucket), and its gap to the reference.

    ``natural_losses[order]`` holds, per test unit, the loss in nats at each natural-order
    position with the end marker last. When every unit has the same length ``L``, positions
    stay in tokens (``position: "absolute"``): exact when ``L <= n_buckets``, else grouped in
    buckets of ``ceil(L / n_buckets)`` whole positions (every bucket equally wide but perhaps
    the last, so no bucket mixes one and two positions), ``x`` the first position of each.
    Otherwise position ``j`` of a unit with ``L`` tokens falls in bucket
    ``floor(j * n_buckets / L)`` and ``x`` is the bucket's middle as a fraction of the unit
    (``position: "relative"``). The end marker is reported apart (``end_bits``).

    Uncertainty: ``diff_se[order]`` is the standard error of each bucket's mean difference to
    the reference, with units as the independent draws (a unit's positions in one bucket are
    correlated): the linearized variance of a ratio mean, ``sqrt(n / (n - 1) * sum_i (s_i -
    m c_i)^2) / sum_i c_i`` over the ``n`` units with ``c_i`` tokens and difference sum ``s_i``
    in the bucket, mean ``m`` (Cochran 1977, *Sampling Techniques*, section 6.4).

    Returns
    -------
    dict
        ``{"reference_order", "position": "absolute" | "relative", "bucket_width", "x": [...],
        "tokens": [...], "units": [...], "bits": {order: [...]}, "diff_bits": {order: [...]},
        "diff_se": {order: [...]}, "end_bits": {order: float}}``; bits are mean bits per
        token; empty buckets hold ``None`` (``diff_se`` also when a bucket has one unit).
        ``bucket_width`` is positions per bucket (absolute) or ``None`` (relative).
    """
    n_buckets = check_int("stats 'position_profile'", "n_buckets", n_buckets, 1)
    orders, lengths = _check_same_units(natural_losses)
    if reference_order not in natural_losses:
        raise DataError(f"reference order {reference_order!r} has no position losses")
    token_lengths = lengths - 1  # the last value of each row is the end marker
    any_losses = natural_losses[orders[0]]
    positions = any_losses.positions()  # (n_values,)
    length_of_value = np.repeat(token_lengths, lengths)
    is_token = positions < length_of_value
    fixed = len(token_lengths) > 0 and np.all(token_lengths == token_lengths[0])
    width: int | None
    if fixed:
        length = int(token_lengths[0])
        width = max(1, -(-length // n_buckets))
        mode, n_bins = "absolute", -(-length // width)
        bucket = positions[is_token] // width
        x = [float(j * width) for j in range(n_bins)]
    else:
        mode, n_bins, width = "relative", n_buckets, None
        bucket = (positions[is_token] * n_buckets) // length_of_value[is_token]
        x = [rounded((j + 0.5) / n_buckets) for j in range(n_bins)]
    counts = np.bincount(bucket, minlength=n_bins)
    unit_of_value = np.repeat(np.arange(len(lengths), dtype=np.int64), lengths)[is_token]
    cell = unit_of_value * n_bins + bucket  # (unit, bucket) of every token
    n_cells = len(lengths) * n_bins
    cell_counts = np.bincount(cell, minlength=n_cells).reshape(len(lengths), n_bins)
    units_per_bucket = (cell_counts > 0).sum(axis=0)

    def mean_bits(losses: Ragged) -> np.ndarray:
        summed = np.bincount(bucket, weights=losses.values[is_token], minlength=n_bins)
        with np.errstate(invalid="ignore", divide="ignore"):
            return summed / counts / _LN2

    means = {order: mean_bits(natural_losses[order]) for order in orders}
    end_values = {o: natural_losses[o].values[~is_token] for o in orders}
    reference_values = natural_losses[reference_order].values[is_token]

    def standard_error(order: str) -> np.ndarray:
        differences = (natural_losses[order].values[is_token] - reference_values) / _LN2
        sums = np.bincount(cell, weights=differences, minlength=n_cells).reshape(-1, n_bins)
        mean = means[order] - means[reference_order]
        with np.errstate(invalid="ignore", divide="ignore"):
            residual = np.where(cell_counts > 0, sums - mean[None, :] * cell_counts, 0.0)
            n = units_per_bucket
            variance = n / (n - 1.0) * (residual**2).sum(axis=0)
            return np.sqrt(variance) / counts

    def listed(values: np.ndarray) -> list[float | None]:
        return [rounded(v) if np.isfinite(v) else None for v in values]

    return {
        "reference_order": reference_order,
        "position": mode,
        "bucket_width": width,
        "x": x,
        "tokens": counts.astype(int).tolist(),
        "units": units_per_bucket.astype(int).tolist(),
        "bits": {o: listed(means[o]) for o in orders},
        "diff_bits": {o: listed(means[o] - means[reference_order]) for o in orders},
        "diff_se": {o: listed(standard_error(o)) for o in orders},
        "end_bits": {
            o: rounded(end_values[o].mean() / _LN2) if len(end_values[o]) else None for o in orders
        },
    }


Spans = Mapping[str, "tuple[int, int] | np.ndarray"]


def span_masks(span_ids: np.ndarray, names: list[str]) -> dict[str, np.ndarray]:
    """Per-token span labels (``span_ids.npy`` of a split) as one boolean mask per span name.

    Examples
    --------
    >>> masks = span_masks(np.array([0, 2, 1, 1, -1]), ["a", "b", "separators"])
    >>> {name: mask.tolist() for name, mask in masks.items()}["b"]
    [False, False, True, True, False]
    """
    labels = np.asarray(span_ids)
    return {name: labels == k for k, name in enumerate(names)}


def _token_mask(
    span: tuple[int, int] | np.ndarray, name: str, positions: np.ndarray, length: np.ndarray
) -> np.ndarray:
    """(n_tokens,) bool: the natural-order tokens in ``span`` (a fixed range or a mask)."""
    if isinstance(span, np.ndarray):
        if span.shape != positions.shape:
            raise DataError(
                f"span {name!r}: its mask has {span.size} entries for {positions.size} test "
                "tokens; span labels must come from the same test units"
            )
        return span.astype(bool)
    start, end = int(span[0]), int(span[1])
    if not 0 <= start <= end:
        raise DataError(f"span {name!r}: ({start}, {end}) is not a range 0 <= start <= end")
    return (positions >= start) & (positions < end) & (positions < length)


def span_breakdown(
    natural_losses: Mapping[str, Ragged],
    spans: Spans,
    *,
    reference_order: str | None = None,
    doc_ids: np.ndarray | None = None,
    level: float = 0.95,
    n_boot: int = 2000,
    seed: int = 0,
) -> dict[str, dict[str, dict[str, Any]]]:
    """Loss per named natural-order span for every order, and its difference to the reference.

    ``spans[name]`` is either a fixed range ``(start, end)`` of token positions
    ``start <= j < end`` in every unit (clipped to the unit; calibration sources), or a
    (n_tokens,) boolean mask over the natural-order test tokens, concatenated unit by unit
    (per-unit spans such as the fields of a ``records`` source, see :func:`span_masks`).
    The end marker is never in a span. Perplexity is ``2 ** bits_per_token``.

    With ``reference_order``, every span of every other order also gets ``diff_bits_per_unit``:
    the mean over test units of (the span's bits in this order minus in the reference
    order), with a percentile bootstrap interval (``diff_bits_per_unit_low``/``_high``) that
    resamples units (whole documents when ``doc_ids`` holds at least
    ``MIN_DOCUMENTS_FOR_GROUPING`` of them), the same draws for every span and order. The
    losses are seed-averaged, so the interval holds the test-set sampling only.

    Returns
    -------
    dict
        ``{order: {span: {"bits_per_token", "perplexity", "bits_per_unit", "tokens"[,
        "diff_bits_per_unit", "diff_bits_per_unit_low", "diff_bits_per_unit_high"]}}}``.

    Examples
    --------
    >>> losses = Ragged.from_list([[math.log(2), math.log(4), 0.0]])  # 2 tokens + end marker
    >>> span_breakdown({"forward": losses}, {"x": (0, 1), "y": (1, 2)})["forward"]["y"]
    {'bits_per_token': 2.0, 'perplexity': 4.0, 'bits_per_unit': 2.0, 'tokens': 1}
    """
    orders, lengths = _check_same_units(natural_losses)
    if reference_order is not None and reference_order not in natural_losses:
        raise DataError(f"reference order {reference_order!r} has no span losses")
    first = natural_losses[orders[0]]
    is_token = first.positions() < np.repeat(lengths - 1, lengths)  # drop end markers
    positions = first.positions()[is_token]  # (n_tokens,) natural position in the unit
    token_length = np.repeat(lengths - 1, lengths - 1)
    unit_of_token = np.repeat(np.arange(len(lengths), dtype=np.int64), lengths - 1)
    n_units = len(lengths)
    token_losses = {o: natural_losses[o].values[is_token] / _LN2 for o in orders}  # bits
    masks = {name: _token_mask(span, name, positions, token_length) for name, span in spans.items()}
    # (n_orders, n_spans, n_units) bits of each span in each unit.
    per_unit = np.array(
        [
            [
                np.bincount(unit_of_token[mask], weights=token_losses[o][mask], minlength=n_units)
                for mask in masks.values()
            ]
            for o in orders
        ]
    ).reshape(len(orders), len(masks), n_units)
    result: dict[str, dict[str, dict[str, Any]]] = {order: {} for order in orders}
    for k, (name, mask) in enumerate(masks.items()):
        n_inside = int(mask.sum())
        for index, order in enumerate(orders):
            bits = float(per_unit[index, k].sum())
            per_token = bits / n_inside if n_inside else float("nan")
            result[order][name] = {
                "bits_per_token": rounded(per_token) if n_inside else None,
                "perplexity": rounded(2.0**per_token) if n_inside else None,
                "bits_per_unit": rounded(bits / max(n_units, 1)),
                "tokens": n_inside,
            }
    if reference_order is None or n_units == 0:
        return result
    level = check_float(
        "stats 'span_breakdown'", "level", level, 0.0, 1.0, low_open=True, high_open=True
    )
    n_boot = check_int("stats 'span_breakdown'", "n_boot", n_boot, 10)
    group, n_groups = np.arange(n_units), n_units
    if doc_ids is not None:
        _, document = np.unique(np.asarray(doc_ids), return_inverse=True)
        if document.max() + 1 >= MIN_DOCUMENTS_FOR_GROUPING:
            group, n_groups = document.ravel(), int(document.max()) + 1
    differences = per_unit - per_unit[orders.index(reference_order)][None]  # (o, s, n_units)
    flat = differences.reshape(-1, n_units)  # (n_orders * n_spans, n_units)
    by_group = np.zeros((flat.shape[0], n_groups))
    np.add.at(by_group.T, group, flat.T)
    rng = np.random.default_rng(seed)
    replicates = np.empty((n_boot, flat.shape[0]))
    chunk = max(1, min(n_boot, 4_000_000 // max(n_groups, 1)))
    for start in range(0, n_boot, chunk):
        size = min(chunk, n_boot - start)
        replicates[start : start + size] = resample_counts(n_groups, size, rng) @ by_group.T
    replicates /= n_units  # mean over units of each resample
    tail = (1.0 - level) / 2.0
    lows, highs = np.quantile(replicates, [tail, 1.0 - tail], axis=0)
    means = flat.mean(axis=1)
    for row, (index, k) in enumerate(np.ndindex(len(orders), len(masks))):
        if orders[index] == reference_order:
            continue  # its difference to itself is 0 by definition
        leaf = result[orders[index]][list(masks)[k]]
        leaf["diff_bits_per_unit"] = rounded(means[row])
        leaf["diff_bits_per_unit_low"] = rounded(lows[row])
        leaf["diff_bits_per_unit_high"] = rounded(highs[row])
    return result


def segment_breakdown(
    natural_losses: Mapping[str, Ragged],
    units: SequenceSet,
    *,
    separator: int,
    max_segments: int = 8,
) -> dict[str, dict[str, dict[str, Any]]]:
    """Loss per separator-delimited segment of each unit (file sources), for every order.

    Segment ``k`` of a unit is its tokens after the ``k``-th occurrence of ``separator``
    (natural order) up to and including the next one; segments from ``max_segments - 1`` on
    are pooled as ``segment_<max_segments - 1>+``. Each segment is reported as in
    :func:`span_breakdown` (bits per token, perplexity, bits per unit, tokens).

    Examples
    --------
    >>> units = SequenceSet.from_list([[5, 0, 6, 7]], vocab_size=8)  # 0 separates two segments
    >>> losses = Ragged.from_list([[math.log(2)] * 2 + [math.log(8)] * 2 + [0.0]])
    >>> out = segment_breakdown({"forward": losses}, units, separator=0, max_segments=2)
    >>> out["forward"]["segment_0"]["bits_per_token"], out["forward"]["segment_1+"]["tokens"]
    (1.0, 2)
    """
    max_segments = check_int("stats 'segment_breakdown'", "max_segments", max_segments, 1)
    orders, lengths = _check_same_units(natural_losses)
    if not np.array_equal(lengths, units.lengths + 1):
        raise DataError(
            "units do not match the per-position losses (each unit needs len + 1 losses); "
            "pass the natural-order test units the losses were computed on"
        )
    is_separator = (units.tokens == separator).astype(np.int64)  # (n_tokens,)
    # Separators seen *before* each token of its unit: the separator closes its own segment.
    before = earlier_in_unit(units, is_separator)
    segment = np.minimum(before, max_segments - 1)  # (n_tokens,)
    token_values = np.ones(len(natural_losses[orders[0]].values), dtype=bool)
    token_values[natural_losses[orders[0]].offsets[1:] - 1] = False  # drop the end markers
    counts = np.bincount(segment, minlength=max_segments)
    result: dict[str, dict[str, dict[str, Any]]] = {order: {} for order in orders}
    for order in orders:
        sums = np.bincount(
            segment, weights=natural_losses[order].values[token_values], minlength=max_segments
        )
        for k in range(max_segments):
            name = f"segment_{k}+" if k == max_segments - 1 and max_segments > 1 else f"segment_{k}"
            bits = sums[k] / _LN2
            per_token = bits / counts[k] if counts[k] else float("nan")
            result[order][name] = {
                "bits_per_token": rounded(per_token) if counts[k] else None,
                "perplexity": rounded(2.0**per_token) if counts[k] else None,
                "bits_per_unit": rounded(bits / max(len(units), 1)),
                "tokens": int(counts[k]),
            }
    return result
