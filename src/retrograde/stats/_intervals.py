"""The gap interval: a t interval from a variance decomposition of the seed-averaged gap.

For one order against the reference, ``order[s, g]`` and ``reference[s, g]`` are the loss
(nats) of test group ``g`` (a document, or a unit) under the model fitted with seed ``s``;
``S`` seeds, ``G`` groups. The gap is ``100 (R - 1)`` with ``R = T_o / T_r`` and
``T = sum_g mean_s x[s, g]``. Linearizing the ratio (the delta method for a ratio
estimator, Cochran 1977, *Sampling Techniques*, 3rd ed., section 6.3),

    R_hat - R ~ sum_g mean_s z[s, g],   z[s, g] = (order[s, g] - R reference[s, g]) / T_r,

so the variance of the gap is that of a sum over a crossed (seeds x groups) layout. With
``Z_s = sum_g z[s, g]`` (seed ``s``'s own gap, linearized) and the two-way mean squares of
:func:`mean_squares` (one value a cell; the random-effects two-factor model without
replication, e.g. Montgomery, *Design and Analysis of Experiments*, chapter 13):

- **training runs** (3 or more seeds): ``var_s(Z_s) / S = G MS_seed / S`` with ``S - 1``
  degrees of freedom: the seed main effect plus the seed-by-unit interaction, as a t
  interval over the seeds' own gaps would count them. *Paired* (the default: seed ``s`` of
  every order is one pair, whatever the two fits share) it is computed on ``z``;
  *unpaired* (only for fits of different orders that share nothing) on each order apart,
  ``order / T_r`` and ``R reference / T_r``, and the two are added (Welch's
  unequal-variance form, up to twice the pairs' ``S - 1`` degrees of freedom);
- **test units**: the unit main effect ``G (MS_group - MS_interaction) / S``, i.e.
  ``G var_g(mean_s z[s, g])`` less the interaction already counted above, kept when
  positive. With fewer than 3 seeds it is ``G var_g(mean_s z[s, g])`` alone (``G - 1``
  degrees of freedom): the ratio estimator's textbook variance on seed-averaged losses.

The variance is the sum of those parts; the critical value is Student's t with
Satterthwaite's (1946, *Biometrics Bulletin* 2:110) degrees of freedom for that linear
combination of mean squares (never fewer than its least certain positive part's), and the
p-value is the same t statistic's, so ``p < 1 - level`` exactly when the interval excludes 0.
A lower end below -100% is cut there (``LOWEST_GAP``): no order's loss is below 0, and
the cut never moves an end across 0.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from ._bootstrap import bootstrap_pvalue, bootstrap_totals, seed_weight_scale

__all__ = [
    "LOWEST_GAP",
    "GapInterval",
    "bootstrap_intervals",
    "gap_interval",
    "mean_squares",
    "satterthwaite_df",
    "t_intervals",
]


#: no gap is below -100% (a loss is never negative): a t interval's lower end stops there
LOWEST_GAP = -100.0


class GapInterval(NamedTuple):
    """A gap (percent), its interval, the t test's p-value, degrees of freedom and standard
    error (percent; 0 when nothing varies or the interval is not a t interval)."""

    gap_pct: float
    low: float
    high: float
    p_value: float
    df: float
    standard_error: float = 0.0

    def at(self, level: float) -> tuple[float, float]:
        """``(low, high)`` of the t interval at ``level``: the same centre, standard error
        and degrees of freedom (:func:`retrograde.stats.simultaneous_intervals` uses it).

        Examples
        --------
        >>> row = GapInterval(2.0, 0.0, 0.0, 0.0, float("inf"), standard_error=1.0)
        >>> tuple(round(x, 4) for x in row.at(0.95))
        (0.04, 3.96)
        """
        half_width = _half_width(level, self.df, self.standard_error)
        return max(self.gap_pct - half_width, LOWEST_GAP), self.gap_pct + half_width


def _half_width(level: float, df: float, standard_error: float) -> float:
    """Half the width of a two-sided t interval at ``level`` (0 when nothing varies)."""
    from scipy.stats import t as student_t  # scipy is a core dependency; imported when needed

    if standard_error == 0.0:
        return 0.0
    return float(student_t.ppf(0.5 + level / 2.0, df)) * standard_error


def mean_squares(z: np.ndarray) -> tuple[float, float, float]:
    """``(MS_seed, MS_group, MS_interaction)`` of a two-way layout ``z`` (S, G), one value a cell.

    With row means ``z_s.``, column means ``z_.g`` and grand mean ``z_..``:
    ``MS_seed = G sum_s (z_s. - z_..)**2 / (S - 1)``,
    ``MS_group = S sum_g (z_.g - z_..)**2 / (G - 1)`` and
    ``MS_interaction = sum (z - z_s. - z_.g + z_..)**2 / ((S - 1) (G - 1))``.

    Examples
    --------
    >>> mean_squares(np.array([[1.0, 2.0, 3.0], [2.0, 3.0, 4.0]]))
    (1.5, 2.0, 0.0)
    """
    n_seeds, n_groups = z.shape
    grand = float(z.mean())
    by_seed = z.mean(axis=1)  # (S,)
    by_group = z.mean(axis=0)  # (G,)
    ms_seed = n_groups * float(((by_seed - grand) ** 2).sum()) / max(n_seeds - 1, 1)
    ms_group = n_seeds * float(((by_group - grand) ** 2).sum()) / max(n_groups - 1, 1)
    residual = z - by_seed[:, None] - by_group[None, :] + grand
    ms_interaction = float((residual**2).sum()) / max((n_seeds - 1) * (n_groups - 1), 1)
    return ms_seed, ms_group, ms_interaction


def satterthwaite_df(terms: Sequence[tuple[float, float]]) -> float:
    """Degrees of freedom of ``sum_j v_j`` where ``v_j`` (may be negative) has ``d_j`` of them.

    ``(sum_j v_j)**2 / sum_j (v_j**2 / d_j)`` (Satterthwaite 1946); ``inf`` when every
    ``v_j`` is 0. With two terms ``s1**2/n1`` and ``s2**2/n2`` this is Welch's t-test's df.

    Examples
    --------
    >>> satterthwaite_df([(1.0, 4.0), (1.0, 4.0)])
    8.0
    """
    total = sum(value for value, _ in terms)
    spread = sum(value * value / df for value, df in terms if value != 0)
    return float(total * total / spread) if spread > 0 else float("inf")


def gap_interval(
    order: np.ndarray,
    reference: np.ndarray,
    *,
    level: float,
    with_seeds: bool,
    paired: bool,
) -> GapInterval:
    """The gap of ``order`` over ``reference`` (both (S, G) per-group nats) with its t interval.

    ``with_seeds`` adds the training-run terms (callers use it from 3 seeds on); ``paired``
    takes seed ``s`` of both orders as one pair (module docstring).

    Examples
    --------
    >>> reference = np.array([[10.0, 20.0, 30.0, 40.0]])
    >>> out = gap_interval(reference * 1.1, reference, level=0.95, with_seeds=False, paired=True)
    >>> round(out.gap_pct, 6), round(out.low, 6), round(out.high, 6)
    (10.0, 10.0, 10.0)
    """
    from scipy.stats import t as student_t  # scipy is a core dependency; imported when needed

    n_seeds, n_groups = order.shape
    total_reference = float(reference.sum(axis=1).mean())
    ratio = float(order.sum(axis=1).mean()) / total_reference
    gap = 100.0 * (ratio - 1.0)
    z = (order - ratio * reference) / total_reference  # (S, G)
    # Test units: the variance of sum_g over the seed-averaged z (G - 1 df).
    unit = n_groups * float(z.mean(axis=0).var(ddof=1)) if n_groups > 1 else 0.0
    terms: list[tuple[float, float]] = [(unit, n_groups - 1)] if n_groups > 1 else []
    if with_seeds and n_seeds > 1:
        # Training runs: var_s(sum_g z[s, :]) / S, which holds the seed main effect and the
        # interaction once; the interaction is then taken out of the unit term above, whose
        # part beyond it (the unit main effect) is kept when positive.
        layouts = [z] if paired else [order / total_reference, ratio * reference / total_reference]
        seed_terms, interaction = [], []
        for layout in layouts:
            ms_seed, _, ms_interaction = mean_squares(layout)
            seed_terms.append((n_groups * ms_seed / n_seeds, n_seeds - 1))
            if n_groups > 1:
                interaction.append(
                    (-n_groups * ms_interaction / n_seeds, (n_seeds - 1) * (n_groups - 1))
                )
        unit_main = unit + sum(value for value, _ in interaction)
        terms = seed_terms + (terms + interaction if unit_main > 0 else [])
    variance = max(sum(value for value, _ in terms), 0.0)
    # A negative term that nearly cancels a positive one can make Satterthwaite's df
    # collapse towards 0 (an unusable t quantile); take at least the df of the least
    # certain positive part, the seeds' S - 1 when they count.
    floor = min((df for value, df in terms if value > 0), default=float("inf"))
    df = max(satterthwaite_df(terms), floor)
    if variance == 0.0:  # nothing varies: the interval is the point, and only 0 is no gap
        return GapInterval(gap, gap, gap, 1.0 if gap == 0 else 0.0, df)
    standard_error = 100.0 * float(np.sqrt(variance))
    half_width = _half_width(level, df, standard_error)
    p_value = float(2.0 * student_t.sf(abs(gap) / standard_error, df))
    return GapInterval(
        gap,
        max(gap - half_width, LOWEST_GAP),
        gap + half_width,
        min(p_value, 1.0),
        df,
        standard_error,
    )


def t_intervals(
    per_group: np.ndarray, level: float, with_seeds: bool, paired: bool
) -> list[GapInterval]:
    """One :class:`GapInterval` per order of ``per_group`` (n_orders, n_seeds, n_groups)."""
    reference = per_group[0]
    return [
        gap_interval(losses, reference, level=level, with_seeds=with_seeds, paired=paired)
        if index
        else GapInterval(0.0, 0.0, 0.0, 1.0, float("inf"))
        for index, losses in enumerate(per_group)
    ]


def bootstrap_intervals(
    per_group: np.ndarray,
    n_orders: int,
    level: float,
    with_seeds: bool,
    n_boot: int,
    rng: np.random.Generator,
) -> tuple[list[GapInterval], np.ndarray]:
    """Percentile intervals of the two-level bootstrap (``interval="bootstrap"``), and the
    (n_boot, n_variants) bootstrap gaps behind them.

    ``per_group`` stacks blocks of ``n_orders`` variants (whole losses, then possibly
    content losses), each block with its reference first; all share one set of weights.
    """
    replicates = bootstrap_totals(
        per_group,
        n_boot=n_boot,
        rng=rng,
        seed_weight_scale=seed_weight_scale(per_group.shape[1], level) if with_seeds else None,
    )  # (n_boot, n_variants)
    reference_column = (np.arange(per_group.shape[0]) // n_orders) * n_orders
    boot_gaps = 100.0 * (replicates / replicates[:, reference_column] - 1.0)
    totals = per_group.sum(axis=2).mean(axis=1)
    gaps = 100.0 * (totals / totals[reference_column] - 1.0)
    tail = (1.0 - level) / 2.0
    lows, highs = np.quantile(boot_gaps, [tail, 1.0 - tail], axis=0)
    p_values = bootstrap_pvalue(boot_gaps)
    rows = [
        GapInterval(float(g), float(lo), float(hi), float(p), float("inf"))
        for g, lo, hi, p in zip(gaps, lows, highs, p_values, strict=True)
    ]
    return rows, boot_gaps
