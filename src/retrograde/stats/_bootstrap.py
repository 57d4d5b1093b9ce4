"""Resampling kernels behind :mod:`retrograde.stats`: pure, vectorized, seeded.

- :func:`bootstrap_totals` — a two-level (seeds x units) bootstrap of seed-averaged totals,
  the "pigeonhole" bootstrap for crossed designs (Owen 2007, *Ann. Appl. Stat.* 1(2)):
  seeds and groups of units are resampled independently and a cell's weight is the product
  of its seed weight and its group count. Seed weights are rescaled (:func:`seed_weight_scale`)
  so that a handful of seeds does not understate training randomness.
- :func:`sign_flip_pvalue` — a paired sign-flip (randomization) test on per-group
  differences, exact for few groups and Monte Carlo with the add-one correction otherwise.
- :func:`bootstrap_pvalue` — two-sided p-values read off the bootstrap replicates.
- :func:`holm` — Holm's (1979) step-down adjustment of p-values.

Resampling weights are drawn in chunks of at most ``_CHUNK_ELEMENTS`` numbers and applied
with matrix products, so no Python loop runs per resample or per unit.
"""

from __future__ import annotations

import itertools

import numpy as np
from threadpoolctl import threadpool_limits

__all__ = [
    "bootstrap_pvalue",
    "bootstrap_totals",
    "group_sums",
    "holm",
    "resample_counts",
    "seed_weight_scale",
    "sign_flip_pvalue",
]

#: most random numbers drawn at once (about 32 MB of int64); bounds memory, not results
_CHUNK_ELEMENTS = 4_000_000
#: up to this many groups the sign-flip test enumerates all 2**n_groups sign patterns
EXACT_MAX_GROUPS = 16


def group_sums(values: np.ndarray, group_index: np.ndarray, n_groups: int) -> np.ndarray:
    """Sum ``values`` (..., n_units) over units sharing a group: (..., n_groups).

    Examples
    --------
    >>> group_sums(np.array([[1.0, 2.0, 4.0]]), np.array([0, 1, 0]), 2).tolist()
    [[5.0, 2.0]]
    """
    lead = values.shape[:-1]
    flat = values.reshape(-1, values.shape[-1])  # (n_rows, n_units)
    rows = np.arange(flat.shape[0], dtype=np.int64)[:, None] * n_groups
    summed = np.bincount(
        (rows + group_index[None, :]).ravel(),
        weights=flat.ravel(),
        minlength=flat.shape[0] * n_groups,
    )
    return summed.reshape(*lead, n_groups)


def resample_counts(n_items: int, n_resamples: int, rng: np.random.Generator) -> np.ndarray:
    """(n_resamples, n_items) float64 multinomial counts: how often each item was drawn.

    Each row sums to ``n_items`` (an ordinary bootstrap resample, with replacement).
    """
    draws = rng.integers(0, n_items, size=(n_resamples, n_items), dtype=np.int32)
    counts = np.empty((n_resamples, n_items))
    # One bincount per row keeps the scatter target (n_items,) in cache: about 3x faster
    # than a single bincount over all rows at 100k items.
    for row in range(n_resamples):
        counts[row] = np.bincount(draws[row], minlength=n_items)
    return counts


def bootstrap_totals(
    per_group: np.ndarray,
    *,
    n_boot: int,
    rng: np.random.Generator,
    seed_weight_scale: float | None,
) -> np.ndarray:
    """Bootstrap replicates of each variant's seed-averaged total.

    Parameters
    ----------
    per_group : (n_variants, n_seeds, n_groups) float64
        Loss summed over the units of each group (document, or the unit itself), for each
        variant (order) and seed. Every variant is resampled with the *same* weights, so
        ratios between variants are paired.
    n_boot : int
        Number of bootstrap replicates.
    rng : numpy.random.Generator
        Source of randomness (seeded by the caller).
    seed_weight_scale : float or None
        Also resample seeds (the outer level) with weights ``w = 1 + scale (k - 1)`` from
        multinomial seed counts ``k``; ``None`` keeps every seed at weight 1. A scale of 1 is
        the plain bootstrap; see :func:`seed_weight_scale` for the one the statistics use.

    Returns
    -------
    (n_boot, n_variants) float64
        ``sum_s w_s sum_g c_g per_group[v, s, g] / n_seeds`` for each replicate, with ``c``
        multinomial group counts and ``w`` the seed weights.
    """
    n_variants, n_seeds, n_groups = per_group.shape
    by_group = per_group.transpose(2, 0, 1).reshape(n_groups, n_variants * n_seeds)
    totals = np.empty((n_boot, n_variants))
    chunk = max(1, min(n_boot, _CHUNK_ELEMENTS // max(n_groups, 1)))
    with _one_blas_thread():
        for start in range(0, n_boot, chunk):
            size = min(chunk, n_boot - start)
            group_counts = resample_counts(n_groups, size, rng)  # (size, n_groups)
            per_seed = (group_counts @ by_group).reshape(size, n_variants, n_seeds)
            if seed_weight_scale is None:
                seed_weights = np.ones((size, n_seeds))
            else:
                seed_counts = resample_counts(n_seeds, size, rng)  # (size, n_seeds)
                seed_weights = 1.0 + seed_weight_scale * (seed_counts - 1.0)
            totals[start : start + size] = np.einsum("bvs,bs->bv", per_seed, seed_weights) / n_seeds
    return totals


def _one_blas_thread() -> threadpool_limits:
    """Run matrix products on one BLAS thread.

    Measured: 10 orders x 5 seeds x 100k units took 11 s single-threaded but 95-155 s with
    multi-threaded BLAS on a busy 2-core machine (threads fighting over cores). One thread
    also fixes the summation order, so results do not depend on the machine's core count.
    """
    return threadpool_limits(limits=1, user_api="blas")


def seed_weight_scale(n_seeds: int, level: float) -> float:
    """Scale of the seed-level bootstrap weights for ``n_seeds`` seeds at confidence ``level``.

    ``sqrt(S / (S - 1))`` undoes the plain bootstrap's shrinking of a mean's variance by
    ``(S - 1) / S`` (the rescaling bootstrap of Rao & Wu 1988, JASA 83:231). The factor
    ``t_{S-1} / z`` (Student-t over normal quantile at ``level``) widens the seed level as a
    t interval would for S values; it is this project's small-sample heuristic, checked by
    simulation in ``benchmarks/bench_coverage.py`` (not a published method).

    Examples
    --------
    >>> round(seed_weight_scale(5, 0.95), 3)  # sqrt(5/4) * 2.776 / 1.960
    1.584
    """
    from scipy.stats import norm, t  # scipy is a core dependency; imported when needed

    upper = 1.0 - (1.0 - level) / 2.0
    return float(np.sqrt(n_seeds / (n_seeds - 1.0)) * t.ppf(upper, n_seeds - 1) / norm.ppf(upper))


def sign_flip_pvalue(
    differences: np.ndarray, *, n_flips: int, rng: np.random.Generator
) -> tuple[np.ndarray, bool]:
    """Two-sided paired sign-flip p-values for the sum of differences.

    Under the null hypothesis (no difference between the paired conditions) each group's
    difference is as likely to have either sign, so the observed ``|sum d|`` is compared with
    ``|sum s_g d_g|`` over random signs ``s``.

    Parameters
    ----------
    differences : (n_groups, n_tests) float64
        Per-group paired differences, one column per test (the columns share sign draws).
    n_flips : int
        Monte Carlo sign patterns when ``n_groups > EXACT_MAX_GROUPS``.
    rng : numpy.random.Generator

    Returns
    -------
    p_values : (n_tests,) float64
        Exact ``P(|T*| >= |T|)`` over all ``2**n_groups`` patterns, or the Monte Carlo
        estimate ``(1 + hits) / (1 + n_flips)`` (never 0).
    exact : bool
        Whether the p-values are exact.

    Examples
    --------
    >>> p, exact = sign_flip_pvalue(np.array([[1.0], [2.0], [3.0]]), n_flips=0,
    ...                             rng=np.random.default_rng(0))
    >>> float(p[0]), exact  # only all-plus and all-minus reach |6| among 8 patterns
    (0.25, True)
    """
    n_groups, n_tests = differences.shape
    observed = np.abs(differences.sum(axis=0))  # (n_tests,)
    # Floating-point sums of the same numbers in another order differ in the last bits;
    # a relative tolerance keeps exact ties (e.g. the observed pattern itself) counted.
    tolerance = 1e-9 * np.maximum(np.abs(differences).sum(axis=0), 1e-300)
    threshold = observed - tolerance
    if n_groups <= EXACT_MAX_GROUPS:
        patterns = np.array(list(itertools.product((1.0, -1.0), repeat=n_groups)))
        patterns = patterns.reshape(-1, n_groups)  # (2**n_groups, n_groups)
        hits = (np.abs(patterns @ differences) >= threshold).sum(axis=0)
        return hits / len(patterns), True
    hits = np.zeros(n_tests, dtype=np.int64)
    chunk = max(1, min(n_flips, _CHUNK_ELEMENTS // n_groups))
    with _one_blas_thread():
        for start in range(0, n_flips, chunk):
            size = min(chunk, n_flips - start)
            signs = rng.integers(0, 2, size=(size, n_groups), dtype=np.int8) * 2.0 - 1.0
            hits += (np.abs(signs @ differences) >= threshold).sum(axis=0)
    return (1.0 + hits) / (1.0 + n_flips), False


def bootstrap_pvalue(replicated_gaps: np.ndarray) -> np.ndarray:
    """Two-sided bootstrap p-values of "gap = 0": twice the smaller tail share beyond 0.

    ``replicated_gaps`` is ``(n_boot, n_tests)``; the add-one correction keeps p above 0
    (``2 / (n_boot + 1)`` at least), and a column that is exactly 0 everywhere gets 1.

    Examples
    --------
    >>> bootstrap_pvalue(np.array([[1.0, -1.0], [2.0, 1.0], [3.0, 2.0], [4.0, 3.0]])).tolist()
    [0.4, 0.8]
    """
    n_boot = len(replicated_gaps)
    below = (1.0 + (replicated_gaps <= 0).sum(axis=0)) / (n_boot + 1.0)
    above = (1.0 + (replicated_gaps >= 0).sum(axis=0)) / (n_boot + 1.0)
    return np.minimum(1.0, 2.0 * np.minimum(below, above))


def holm(p_values: np.ndarray) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values, in the input order.

    The k-th smallest of m p-values becomes ``max_{j<=k} min(1, (m - j + 1) p_(j))``.

    Examples
    --------
    >>> holm(np.array([0.01, 0.04, 0.03])).tolist()
    [0.03, 0.06, 0.06]
    """
    p_values = np.asarray(p_values, dtype=np.float64)
    m = len(p_values)
    if m == 0:
        return p_values.copy()
    order = np.argsort(p_values, kind="stable")
    scaled = np.minimum(1.0, (m - np.arange(m)) * p_values[order])
    adjusted = np.empty(m)
    adjusted[order] = np.maximum.accumulate(scaled)
    return adjusted
