"""The report's fairness sections: what tuning chose per order, budgets against the reference."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = ["budget_vs_reference", "markdown_tuning"]

Table = Mapping[str, Mapping[str, Mapping[str, Mapping[str, Any]]]]

#: the counted budgets compared across orders (times vary with the machine's load)
_COMPARED = ("train_tokens", "steps", "n_params")


def _setting_text(setting: Mapping[str, Any]) -> str:
    return ", ".join(f"{key}={value}" for key, value in setting.items()) or "–"


def _signed(value: Any, spec: str = "+.2f") -> str:
    return "–" if not isinstance(value, (int, float)) else format(value, spec)


def markdown_tuning(table: Table) -> str:
    """One row per tuned (model, order): the winning setting and how tuning moved the gap.

    Empty when no leaf has ``tuned_params``.
    """
    lines: list[str] = []
    for source, models in table.items():
        tuned = {m: o for m, o in models.items() if any("tuned_params" in x for x in o.values())}
        if not tuned:
            continue
        lines += [
            f"### Source `{source}`",
            "",
            "| model | order | winning setting (trial) | valid bits/token | gap % tuned | "
            "gap % shared setting | change (points) |",
            "|---|---|---|---|---|---|---|",
        ]
        for model, orders in tuned.items():
            for order, leaf in orders.items():
                cells = [
                    f"`{model}`",
                    f"`{order}`",
                    f"{_setting_text(leaf.get('tuned_params', {}))} (`{leaf.get('tuned_model')}`)",
                    _signed(leaf.get("valid_bits_per_token"), ".4f"),
                    _signed(leaf.get("gap_pct")),
                    _signed(leaf.get("shared_gap_pct")),
                    _signed(leaf.get("tuning_gap_change_pct")),
                ]
                lines.append("| " + " | ".join(cells) + " |")
        lines.append("")
    return "\n".join(lines)


def budget_vs_reference(orders: Mapping[str, Mapping[str, Any]], order: str) -> str:
    """How ``order``'s counted budgets compare with the reference order's, for a report row:
    ``equal``, or each field that differs (``train_tokens +23%``), flagged beyond 5% when
    the table compares that field for the model (its leaf's ``budget_unequal``)."""
    from ._markdown import is_reference_leaf

    reference = next((o for o, leaf in orders.items() if is_reference_leaf(leaf)), None)
    mine = orders[order].get("budget")
    if reference is None or not isinstance(mine, Mapping):
        return "–"
    if order == reference:
        return "reference"
    theirs = orders[reference].get("budget") or {}
    # flagged: the fields the table compares for this model (an n-gram's n_params counts
    # what its data holds, so it is shown but not flagged: Family.parameters_follow_data)
    counted = orders[order].get("budget_unequal")
    compared = _COMPARED if counted is None else tuple(counted)
    parts = []
    for field in _COMPARED:
        a, b = mine.get(field), theirs.get(field)
        if not isinstance(a, (int, float)) or not isinstance(b, (int, float)) or b <= 0:
            continue
        change = a / b - 1.0
        if abs(change) > 0.0005:
            flag = " **(>5%)**" if abs(change) > 0.05 and field in compared else ""
            parts.append(f"{field} {change:+.1%}{flag}")
    return "; ".join(parts) or "equal"
