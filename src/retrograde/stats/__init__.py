"""Statistics: losses per unit and position, paired order gaps with intervals, profiles.

The layer above the plug-ins: arrays of per-position log-probabilities in, JSON-able
numbers out (``docs/statistics.md``). Every function is pure and deterministic for its seed;
every number written out goes through :func:`rounded`.

- scoring: :func:`unit_nll`, :func:`bits_per_token`, :func:`bits_per_byte`,
  :func:`natural_order_losses` (per-position losses mapped back to the natural order);
- gaps: :func:`summarize_model` (bits per token, gap, interval, p-values per order; the
  content gap without the end marker), :func:`adjust_holm`, :func:`simultaneous_intervals`
  (intervals at the level Holm judged each row), :func:`below_floor`,
  :func:`end_marker_cost`, the report's cautions;
- the t interval: :func:`gap_interval` (a :class:`GapInterval` from a variance
  decomposition), :func:`mean_squares`, :func:`satterthwaite_df`;
- training: :func:`still_falling`, :func:`worse_than_baseline` (signs of an under-trained
  model);
- fairness: :func:`best_trials` (each order's tuning trial, by validation loss),
  :func:`mean_budget`, :func:`unequal_budgets` (orders that consumed different budgets);
- profiles: :func:`position_profile`, :func:`span_breakdown` (with per-unit spans:
  :func:`span_masks`), :func:`segment_breakdown`;
- resampling kernels: :func:`bootstrap_totals`, :func:`sign_flip_pvalue`,
  :func:`bootstrap_pvalue`, :func:`holm`.
"""

from __future__ import annotations

from ._bootstrap import (
    bootstrap_pvalue,
    bootstrap_totals,
    group_sums,
    holm,
    resample_counts,
    seed_weight_scale,
    sign_flip_pvalue,
)
from ._end_marker import end_marker_cost
from ._fairness import (
    BUDGET_FIELDS,
    BUDGET_TOLERANCE,
    COMPARED_BUDGETS,
    best_trials,
    mean_budget,
    unequal_budgets,
)
from ._gaps import (
    FLOOR_Z,
    INTERVALS,
    MIN_DOCUMENTS_FOR_GROUPING,
    MIN_SEEDS_FOR_TRAINING_NOISE,
    adjust_holm,
    below_floor,
    grouping_warning,
    seed_warning,
    summarize_model,
)
from ._intervals import GapInterval, gap_interval, mean_squares, satterthwaite_df
from ._numbers import SIGNIFICANT_DIGITS, rounded
from ._profiles import position_profile, segment_breakdown, span_breakdown, span_masks
from ._scoring import bits_per_byte, bits_per_token, natural_order_losses, unit_nll
from ._simultaneous import simultaneous_intervals
from ._training import BASELINE_NGRAM_ORDER, STEEP_FALL, still_falling, worse_than_baseline

__all__ = [
    "BASELINE_NGRAM_ORDER",
    "BUDGET_FIELDS",
    "BUDGET_TOLERANCE",
    "COMPARED_BUDGETS",
    "FLOOR_Z",
    "INTERVALS",
    "MIN_DOCUMENTS_FOR_GROUPING",
    "MIN_SEEDS_FOR_TRAINING_NOISE",
    "SIGNIFICANT_DIGITS",
    "STEEP_FALL",
    "GapInterval",
    "adjust_holm",
    "below_floor",
    "best_trials",
    "bits_per_byte",
    "bits_per_token",
    "bootstrap_pvalue",
    "bootstrap_totals",
    "end_marker_cost",
    "gap_interval",
    "group_sums",
    "grouping_warning",
    "holm",
    "mean_budget",
    "mean_squares",
    "natural_order_losses",
    "position_profile",
    "resample_counts",
    "rounded",
    "satterthwaite_df",
    "seed_weight_scale",
    "seed_warning",
    "segment_breakdown",
    "sign_flip_pvalue",
    "simultaneous_intervals",
    "span_breakdown",
    "span_masks",
    "still_falling",
    "summarize_model",
    "unequal_budgets",
    "unit_nll",
    "worse_than_baseline",
]
