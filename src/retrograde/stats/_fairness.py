"""Fair comparisons: each order's best tuning trial, budgets per leaf, unequal budgets.

Pure functions on plain numbers; the table stage reads the cells and writes the results.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from ._numbers import rounded

__all__ = [
    "BUDGET_FIELDS",
    "BUDGET_TOLERANCE",
    "COMPARED_BUDGETS",
    "best_trials",
    "mean_budget",
    "unequal_budgets",
]

#: the fields of a cell's ``budget.json`` and of a leaf's ``budget``
BUDGET_FIELDS = ("train_tokens", "steps", "cpu_s", "wall_s", "n_params")
#: the budgets compared across orders: counts, which the same work reproduces exactly.
#: Times are left out: on a shared machine they vary by more than 5% from run to run.
COMPARED_BUDGETS = ("train_tokens", "steps", "n_params")
#: orders whose budgets differ by more than this fraction are named in the report
BUDGET_TOLERANCE = 0.05


def best_trials(
    valid_bits: Mapping[str, Mapping[str, float]], orders: Sequence[str]
) -> dict[str, str]:
    """Each order's trial with the lowest validation bits per token.

    ``valid_bits[trial][order]`` is the trial's validation loss in that order (mean over
    seeds). Ties go to the earlier trial, so the choice does not depend on dict order
    beyond the trials' own. Test losses never enter.

    >>> best_trials({"t0": {"a": 2.0, "b": 1.0}, "t1": {"a": 1.5, "b": 1.0}}, ["a", "b"])
    {'a': 't1', 'b': 't0'}
    """
    chosen = {}
    for order in orders:
        best = None
        for trial, by_order in valid_bits.items():
            if best is None or by_order[order] < valid_bits[best][order]:
                best = trial
        if best is None:
            raise ValueError("best_trials needs at least one trial")
        chosen[order] = best
    return chosen


def mean_budget(budgets: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """The mean of each budget field over seeds; ``None`` where any seed's is unknown.

    >>> mean_budget([{"train_tokens": 10, "steps": None, "cpu_s": 1.0, "wall_s": 2.0,
    ...               "n_params": 5}, {"train_tokens": 20, "steps": None, "cpu_s": 3.0,
    ...               "wall_s": 2.0, "n_params": 5}])
    {'train_tokens': 15.0, 'steps': None, 'cpu_s': 2.0, 'wall_s': 2.0, 'n_params': 5.0}
    """
    out: dict[str, Any] = {}
    for field in BUDGET_FIELDS:
        values = [budget.get(field) for budget in budgets]
        known = [v for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
        if not values or len(known) != len(values):
            out[field] = None
        elif field in ("cpu_s", "wall_s"):
            out[field] = round(sum(known) / len(known), 3)
        else:
            out[field] = rounded(sum(known) / len(known))
    return out


def unequal_budgets(
    budgets: Mapping[str, Mapping[str, Any]],
    fields: Sequence[str] = COMPARED_BUDGETS,
    tolerance: float = BUDGET_TOLERANCE,
) -> dict[str, float]:
    """The budget fields whose values across orders differ by more than ``tolerance``.

    Returns ``{field: max / min - 1}`` for each field known in every order whose spread
    exceeds the tolerance (a zero minimum with a positive maximum counts as infinite).

    >>> unequal_budgets({"forward": {"train_tokens": 100, "steps": 10},
    ...                  "reverse": {"train_tokens": 120, "steps": 10}}, ["train_tokens", "steps"])
    {'train_tokens': 0.2}
    """
    found = {}
    for field in fields:
        found_values = [by_order.get(field) for by_order in budgets.values()]
        values = [float(v) for v in found_values if isinstance(v, (int, float))]
        if len(values) < 2 or len(values) != len(found_values):
            continue
        low, high = min(values), max(values)
        if high <= 0:
            continue
        spread = float("inf") if low <= 0 else high / low - 1.0
        if spread > tolerance:
            found[field] = rounded(spread) if spread != float("inf") else spread
    return found
