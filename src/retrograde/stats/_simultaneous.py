"""Intervals that agree with the Holm-adjusted verdict (re-exported by ``retrograde.stats``).

The per-cell interval (``gap_pct_low`` / ``gap_pct_high``, at ``stats.level``) ignores how
many gaps the table tests, while ``significant`` is Holm-adjusted over all of them, so the
two can disagree (a per-cell interval that excludes 0 on a row that is not significant).
:func:`simultaneous_intervals` adds to every tested leaf the bootstrap percentile interval
at the level at which Holm's step-down procedure judged that row:

- Holm sorts the ``m`` p-values and compares the ``k``-th smallest (``k`` from 1) with
  ``alpha / (m - k + 1)``, stopping at the first that fails; so a significant row was
  decided at level ``1 - alpha / (m - k + 1)``, and every row that is not significant at
  the step where the procedure stopped, ``1 - alpha / (m - r)`` with ``r`` rows significant.
- The row's interval is the percentile interval of its bootstrap gaps at that level.

A significant row's p-value is at least its bootstrap p-value (3 or more seeds), and a
bootstrap p-value below ``a`` puts fewer than ``a / 2`` of the draws on the far side of 0,
so the interval at ``1 - a`` excludes 0. The two directions can still part where another
test decides: with fewer than 3 seeds the p-value is the sign-flip test's alone, and the
add-one correction makes the bootstrap p-value slightly larger than the share of draws
beyond 0. Then the verdict that needs both wins: a row is significant only when its
interval excludes 0 too, and a row that is not significant whose bootstrap interval alone
excludes 0 gets its interval stretched to 0 (``gap_pct_simultaneous_extended``: the test
that decided the row does not exclude 0). So in every row the interval shown excludes 0
exactly when the row is significant.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import DataError
from ..validation import check_float
from ._numbers import rounded

__all__ = ["simultaneous_intervals"]

Table = Mapping[str, Mapping[str, Mapping[str, dict[str, Any]]]]


def simultaneous_intervals(
    table: Table,
    replicates: Mapping[str, Mapping[str, Mapping[str, np.ndarray]]],
    *,
    reference_order: str | Mapping[str, str] = "forward",
    alpha: float = 0.05,
) -> Table:
    """Add Holm-level intervals to every tested leaf; the table is changed and returned.

    Call after :func:`retrograde.stats.adjust_holm` (with the same ``alpha``), with
    ``replicates[source][model][order]`` the bootstrap gaps that
    :func:`retrograde.stats.summarize_model` filled in. Adds ``gap_pct_simultaneous_low``,
    ``gap_pct_simultaneous_high``, ``simultaneous_level`` and
    ``gap_pct_simultaneous_extended``, and sets ``significant`` to False where the interval
    contains 0 (see the module docstring).

    Examples
    --------
    >>> table = {"s": {"m": {"forward": {}, "reverse": {"p_value": 0.001}}}}
    >>> table["s"]["m"]["reverse"].update(p_value_holm=0.001, significant=True)
    >>> draws = {"s": {"m": {"reverse": np.linspace(1.0, 3.0, 2001)}}}
    >>> leaf = simultaneous_intervals(table, draws)["s"]["m"]["reverse"]
    >>> leaf["simultaneous_level"], leaf["gap_pct_simultaneous_low"], leaf["significant"]
    (0.95, 1.05, True)
    """
    alpha = check_float("stats 'simultaneous_intervals'", "alpha", alpha, 0.0, 1.0, low_open=True)
    tested: list[tuple[dict[str, Any], np.ndarray]] = []
    for source, models in table.items():
        reference = reference_order if isinstance(reference_order, str) else reference_order[source]
        for model, orders in models.items():
            for order, leaf in orders.items():
                if order == reference:
                    continue
                if "significant" not in leaf or "p_value" not in leaf:
                    raise DataError(
                        f"table {source}.{model}.{order}: no Holm verdict; call adjust_holm first"
                    )
                try:
                    draws = np.asarray(replicates[source][model][order], dtype=np.float64)
                except KeyError:
                    raise DataError(
                        f"table {source}.{model}.{order}: no bootstrap draws; pass the "
                        "replicates summarize_model filled in"
                    ) from None
                tested.append((leaf, draws))
    m = len(tested)
    # Holm's order: p-values ascending, ties in table order (as retrograde.stats.holm sorts).
    ranked = np.argsort([leaf["p_value"] for leaf, _ in tested], kind="stable")
    n_significant = sum(bool(leaf["significant"]) for leaf, _ in tested)
    for rank, index in enumerate(ranked):
        leaf, draws = tested[index]
        divisor = m - rank if leaf["significant"] else m - n_significant
        level = 1.0 - alpha / max(divisor, 1)
        low, high = np.quantile(draws, [(1.0 - level) / 2.0, (1.0 + level) / 2.0])
        excludes_zero = low > 0 or high < 0
        extended = False
        if leaf["significant"] and not excludes_zero:
            leaf["significant"] = False
        elif not leaf["significant"] and excludes_zero:
            low, high, extended = min(low, 0.0), max(high, 0.0), True
        leaf["gap_pct_simultaneous_low"] = rounded(low)
        leaf["gap_pct_simultaneous_high"] = rounded(high)
        leaf["simultaneous_level"] = rounded(level)
        leaf["gap_pct_simultaneous_extended"] = extended
    return table
