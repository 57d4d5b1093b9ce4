"""Paired order gaps with uncertainty and the Holm adjustment (re-exported by ``retrograde.stats``).

The statistics follow DESIGN.md section 8 and are explained in ``docs/statistics.md``.
For one model on one source, ``NLL[order][s, i]`` is the loss in nats of test unit ``i``
under the model trained with seed ``s`` on that order (end marker included). Then

- ``bits_per_token = sum_i mean_s NLL[s, i] / ln 2 / sum_i n_tokens[i]``;
- ``gap_pct = 100 * (T_order / T_reference - 1)`` with ``T = sum_i mean_s NLL[s, i]``;
- the interval is, by default, a Student-t interval from a variance decomposition of that
  ratio over test units (grouped by document when ``doc_ids`` is given) and, with 3 or
  more seeds, training runs (:func:`retrograde.stats.gap_interval`); with
  ``interval="bootstrap"`` the earlier two-level percentile bootstrap (widened seed
  weights, :func:`retrograde.stats.seed_weight_scale`);
- ``p_value_sign_flip`` is a paired sign-flip test on the seed-averaged per-unit
  (per-document) differences; ``p_value`` is the larger of it and the interval's own
  p-value (the bootstrap's only from 3 seeds on), so that training randomness cannot make
  a gap "significant" that its interval does not support;
- with the end marker's losses, the same gap over the content tokens alone
  (``content_gap_pct``) and the end marker's bits per token;
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
from ..validation import check_choice, check_float, check_int
from ._bootstrap import holm, sign_flip_pvalue
from ._intervals import GapInterval, bootstrap_intervals, t_intervals
from ._losses import MIN_DOCUMENTS_FOR_GROUPING, ModelLosses, checked_inputs, model_losses
from ._numbers import rounded

__all__ = [
    "FLOOR_Z",
    "INTERVALS",
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
#: how the gap interval is computed (``stats.interval``): see :func:`summarize_model`
INTERVALS = ("t", "bootstrap")
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


def summarize_model(
    unit_nll: Mapping[str, np.ndarray],
    *,
    reference_order: str,
    n_tokens: np.ndarray,
    n_bytes: np.ndarray | None = None,
    doc_ids: np.ndarray | None = None,
    floors: np.ndarray | None = None,
    end_nll: Mapping[str, np.ndarray] | None = None,
    level: float = 0.95,
    interval: str = "t",
    paired_seeds: bool = True,
    n_boot: int = 2000,
    seed: int = 0,
    n_flips: int = 2000,
    gap_distributions: dict[str, Any] | None = None,
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
        Document of each unit; the interval and the sign flips then work on whole documents
        (when there are at least ``MIN_DOCUMENTS_FOR_GROUPING`` of them; else on units, and
        :func:`grouping_warning` explains why).
    floors : (n_units,) float, optional
        Exact NLL in nats of each unit (calibration sources); adds ``floor_bits_per_token``
        and ``excess_bits_per_token``.
    end_nll : mapping order -> (n_seeds, n_units) float, optional
        The end marker's share of ``unit_nll``; adds ``end_bits_per_token`` and the same gap
        over the content tokens alone: ``content_gap_pct`` with its interval (and
        ``content_excess_bits_per_token`` with ``floors``).
    level : float
        Confidence level of the interval, in (0, 1).
    interval : {"t", "bootstrap"}
        ``t`` (default): Student-t interval from a variance decomposition of the gap
        (:func:`retrograde.stats.gap_interval`); ``bootstrap``: the earlier two-level
        percentile bootstrap with widened seed weights (:func:`retrograde.stats.bootstrap_totals`),
        kept to reproduce older tables; too wide with few seeds (``docs/statistics.md``).
    paired_seeds : bool
        ``True`` (default): seed ``s`` of every order forms one pair, and the seeds' part of
        the interval comes from the per-seed gaps; valid whatever two fits with the same
        seed share (a training sample, initial weights). ``False`` treats the fits of
        different orders as independent and estimates each order's seed variation apart
        (Welch's form, up to twice the degrees of freedom): right when they share nothing,
        too wide when same-seed fits are alike, too narrow when they are opposed. The table
        stage chooses per model with :func:`retrograde.config.seeds_paired`
        (``docs/statistics.md``, "Seeds and pairs").
    n_boot, n_flips : int
        Bootstrap replicates (``interval="bootstrap"``) and Monte Carlo sign patterns.
    seed : int
        Seed of every random draw: the same inputs and seed give the same numbers.
    gap_distributions : dict, optional
        When given, filled with what each order's interval was drawn from, for
        :func:`retrograde.stats.simultaneous_intervals`: its :class:`GapInterval` (the t
        distribution: centre, standard error, degrees of freedom), or with
        ``interval="bootstrap"`` its (n_boot,) bootstrap gaps in percent.

    Returns
    -------
    dict
        ``{order: leaf}``; a leaf has ``bits_per_token``, ``gap_pct``, ``gap_pct_low``,
        ``gap_pct_high``, ``p_value``, ``p_value_sign_flip``, ``seeds``, ``seed_spread_pct``
        (``None`` with one seed), ``units``, ``tokens``, ``groups`` (documents or units
        resampled) and, when known, ``unit_length`` (every test unit has that many tokens),
        ``documents``, ``bits_per_byte``, ``floor_bits_per_token``,
        ``excess_bits_per_token``, ``end_bits_per_token``, ``content_gap_pct``,
        ``content_gap_pct_low``, ``content_gap_pct_high`` and
        ``content_excess_bits_per_token``.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> forward = rng.gamma(5.0, 2.0, size=(3, 40))
    >>> leaves = summarize_model({"forward": forward, "reverse": forward * 1.1},
    ...                          reference_order="forward", n_tokens=np.full(40, 5))
    >>> leaves["reverse"]["gap_pct"], leaves["forward"]["gap_pct"]
    (10.0, 0.0)
    """
    level = check_float(_OWNER, "level", level, 0.0, 1.0, low_open=True, high_open=True)
    interval = check_choice(_OWNER, "interval", interval, INTERVALS)
    n_boot = check_int(_OWNER, "n_boot", n_boot, 10)
    n_flips = check_int(_OWNER, "n_flips", n_flips, 10)
    seed = check_int(_OWNER, "seed", seed, 0)
    orders, nll = checked_inputs(unit_nll, reference_order, np.asarray(n_tokens))
    data = model_losses(nll, orders, n_tokens, n_bytes, doc_ids, floors, end_nll)
    rng = np.random.default_rng(seed)
    with_seeds = nll.shape[1] >= MIN_SEEDS_FOR_TRAINING_NOISE
    if interval == "t":
        whole = t_intervals(data.per_group, level, with_seeds, paired_seeds)
        parts = (
            None
            if data.content is None
            else t_intervals(data.content, level, with_seeds, paired_seeds)
        )
        distributions: list[Any] = list(whole)
    else:
        whole, parts, distributions = _bootstrap_rows(data, level, with_seeds, n_boot, rng)
    if gap_distributions is not None:
        gap_distributions.update(zip(orders, distributions, strict=True))
    # The sign flips treat the seed-averaged losses as fixed, so training randomness alone
    # makes them reject a true null (measured: 49% at level 0.05 with a 1% seed effect).
    # The interval's own p-value includes it; taking the larger keeps `significant` in line
    # with the interval (with the bootstrap, as before, only from 3 seeds on).
    sign_flip = _sign_flip_pvalues(data.per_group, n_flips, rng)
    p_values = sign_flip.copy()
    if interval == "t" or with_seeds:
        p_values = np.maximum(sign_flip, [row.p_value for row in whole])
    leaves = {}
    for index, order in enumerate(orders):
        leaves[order] = _leaf(data, index, whole[index], p_values[index], sign_flip[index])
        leaves[order].update(_end_fields(data, index, None if parts is None else parts[index]))
    return {order: leaves[order] for order in unit_nll}


def _sign_flip_pvalues(per_group: np.ndarray, n_flips: int, rng: np.random.Generator) -> Any:
    """(n_orders,) sign-flip p-values of the seed-averaged per-group differences (1 for the
    reference)."""
    sign_flip = np.ones(per_group.shape[0])
    if per_group.shape[0] > 1:
        differences = per_group[1:].mean(axis=1) - per_group[0].mean(axis=0)  # (n_orders-1, G)
        sign_flip[1:], _ = sign_flip_pvalue(differences.T, n_flips=n_flips, rng=rng)
    return sign_flip


def _leaf(
    data: ModelLosses, index: int, gap: GapInterval, p_value: float, p_sign_flip: float
) -> dict[str, Any]:
    """The leaf of order ``index``: bits, gap, interval, p-values, sizes (floor with floors)."""
    n_seeds, n_units = data.nll.shape[1:]
    spread = np.std(data.per_seed_gaps[index], ddof=1) if n_seeds > 1 else None
    leaf: dict[str, Any] = {
        "bits_per_token": rounded(data.bits_per_token(index)),
        "gap_pct": rounded(gap.gap_pct),
        "gap_pct_low": rounded(gap.low),
        "gap_pct_high": rounded(gap.high),
        "p_value": rounded(p_value),
        "p_value_sign_flip": rounded(p_sign_flip),
        "seeds": n_seeds,
        "seed_spread_pct": None if spread is None else rounded(spread),
        "units": n_units,
        "tokens": data.total_tokens,
        "groups": data.n_groups,  # the interval's independent draws: documents, or else units
    }
    lengths = data.n_tokens
    if np.all(lengths == lengths[0]):
        leaf["unit_length"] = int(lengths[0])
    if data.n_documents is not None:
        leaf["documents"] = data.n_documents
    if data.n_bytes is not None:
        bits = data.totals[index] / _LN2 / max(int(data.n_bytes.sum()), 1)
        leaf["bits_per_byte"] = rounded(bits)
    if data.floors is not None:
        floor_bits = float(np.sum(data.floors)) / _LN2 / max(data.total_tokens, 1)
        leaf["floor_bits_per_token"] = rounded(floor_bits)
        leaf["excess_bits_per_token"] = rounded(data.bits_per_token(index) - floor_bits)
    return leaf


def _end_fields(data: ModelLosses, index: int, content: GapInterval | None) -> dict[str, Any]:
    """The end marker's bits, the content gap and the content excess (with end losses)."""
    if data.end is None:
        return {}
    end_bits = float(data.end[index].sum(axis=1).mean()) / _LN2 / max(data.total_tokens, 1)
    fields: dict[str, Any] = {"end_bits_per_token": rounded(end_bits)}
    if content is not None:
        fields["content_gap_pct"] = rounded(content.gap_pct)
        fields["content_gap_pct_low"] = rounded(content.low)
        fields["content_gap_pct_high"] = rounded(content.high)
    if data.floors is not None:
        # The exact floor charges the end marker nothing (fixed-length units), so it is
        # already a floor of the content tokens alone.
        floor_bits = float(np.sum(data.floors)) / _LN2 / max(data.total_tokens, 1)
        content_bits = data.bits_per_token(index) - end_bits
        fields["content_excess_bits_per_token"] = rounded(content_bits - floor_bits)
    return fields


def _bootstrap_rows(
    data: ModelLosses, level: float, with_seeds: bool, n_boot: int, rng: np.random.Generator
) -> tuple[list[GapInterval], list[GapInterval] | None, list[np.ndarray]]:
    """Bootstrap intervals of the whole gaps, of the content gaps (or None), and each
    order's (n_boot,) bootstrap gaps; whole and content losses share one set of weights."""
    n_orders = data.nll.shape[0]
    content = data.content
    stacked = data.per_group if content is None else np.concatenate([data.per_group, content])
    rows, boot_gaps = bootstrap_intervals(stacked, n_orders, level, with_seeds, n_boot, rng)
    parts = None if content is None else rows[n_orders:]
    return rows[:n_orders], parts, [boot_gaps[:, i].copy() for i in range(n_orders)]


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
