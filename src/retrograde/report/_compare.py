"""Diff two gap tables, e.g. ``metrics.json`` at two git revisions.

A cell ``(source, model, order)`` present in both tables is

- ``changed`` when its two intervals ``[gap_pct_low, gap_pct_high]`` do not overlap: the
  change is larger than the uncertainty either run reports (a conservative rule; two
  overlapping 95% intervals can still hide a real difference);
- ``within`` when the gap or its interval moved but the intervals overlap;
- ``same`` when gap and interval are identical.

Cells in only one table are ``added`` or ``removed``. Reading the tables at git revisions
is the host layer's job (``retrograde.host.read_table_at``); everything here is pure.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ..errors import DataError
from ..validation import check_choice

__all__ = ["STATUSES", "CellChange", "compare_tables", "format_changes"]

#: every status, in the order a summary lists them
STATUSES = ("changed", "within", "added", "removed", "same")
_INTERVAL_KEYS = ("gap_pct", "gap_pct_low", "gap_pct_high")


@dataclass(frozen=True)
class CellChange:
    """One cell of the comparison; ``old``/``new`` are ``(gap, low, high)`` or ``None``."""

    source: str
    model: str
    order: str
    status: str
    old: tuple[float, float, float] | None
    new: tuple[float, float, float] | None

    @property
    def cell(self) -> str:
        """The key ``dvc metrics diff`` shows, without the field: ``source.model.order``."""
        return f"{self.source}.{self.model}.{self.order}"


def _cells(table: Mapping[str, Any], label: str) -> dict[tuple[str, str, str], tuple[float, ...]]:
    cells = {}
    for source, models in table.items():
        for model, orders in models.items():
            for order, leaf in orders.items():
                missing = [k for k in _INTERVAL_KEYS if not isinstance(leaf.get(k), (int, float))]
                if missing:
                    raise DataError(
                        f"{label}: cell {source}.{model}.{order} has no numeric {missing[0]}; "
                        "regenerate metrics.json with `retrograde run`"
                    )
                cells[(source, model, order)] = tuple(float(leaf[k]) for k in _INTERVAL_KEYS)
    return cells


def compare_tables(
    old: Mapping[str, Any], new: Mapping[str, Any], *, old_label: str = "A", new_label: str = "B"
) -> list[CellChange]:
    """Every cell of either table with its status; cells of ``old`` first, in their order.

    Examples
    --------
    >>> a = {"demo": {"mlp": {"reverse": {"gap_pct": 2.0, "gap_pct_low": 1.0, "gap_pct_high": 3.0}}}}
    >>> b = {"demo": {"mlp": {"reverse": {"gap_pct": 6.0, "gap_pct_low": 5.0, "gap_pct_high": 7.0}}}}
    >>> [(c.cell, c.status) for c in compare_tables(a, b)]
    [('demo.mlp.reverse', 'changed')]
    """
    old_cells, new_cells = _cells(old, old_label), _cells(new, new_label)
    changes = []
    for key in [*old_cells, *(k for k in new_cells if k not in old_cells)]:
        before, after = old_cells.get(key), new_cells.get(key)
        if before is None:
            status = "added"
        elif after is None:
            status = "removed"
        elif before == after:
            status = "same"
        elif before[2] < after[1] or after[2] < before[1]:
            status = "changed"
        else:
            status = "within"
        changes.append(CellChange(*key, status, before, after))  # type: ignore[arg-type]
    return changes


def _gap_text(values: tuple[float, float, float] | None) -> str:
    if values is None:
        return "–"
    gap, low, high = values
    return f"{gap:+.2f} [{low:+.2f}, {high:+.2f}]"


def format_changes(
    changes: list[CellChange],
    *,
    old_label: str,
    new_label: str,
    show_all: bool = False,
    fmt: str = "text",
) -> str:
    """The cells that differ (all with ``show_all``) and a summary, as aligned ``text`` or a
    ``markdown`` table (e.g. for a pull-request comment)."""
    fmt = check_choice("compare 'format_changes'", "format", fmt, ("text", "markdown"))
    shown = [c for c in changes if show_all or c.status != "same"]
    header = ("cell", f"gap % {old_label}", f"gap % {new_label}", "status")
    rows = [
        (
            c.cell,
            _gap_text(c.old),
            _gap_text(c.new),
            c.status.upper() if c.status == "changed" else c.status,
        )
        for c in shown
    ]
    if not shown:
        lines = []
    elif fmt == "markdown":
        bold = [
            (f"`{r[0]}`", r[1], r[2], f"**{r[3]}**" if r[3] == "CHANGED" else r[3]) for r in rows
        ]
        lines = ["| " + " | ".join(header) + " |", "|---|---|---|---|"]
        lines += ["| " + " | ".join(row) + " |" for row in bold]
        lines.append("")
    else:
        widths = [max(len(row[i]) for row in [header, *rows]) for i in range(len(header))]
        lines = [
            "  ".join(text.ljust(w) for text, w in zip(row, widths, strict=True)).rstrip()
            for row in [header, *rows]
        ]
    counts = {s: sum(c.status == s for c in changes) for s in STATUSES}
    summary = (
        f"{len(changes)} cells: {counts['changed']} changed beyond both intervals, "
        f"{counts['within']} moved within them, {counts['added']} added, "
        f"{counts['removed']} removed, {counts['same']} identical"
    )
    return "\n".join([*lines, summary]) + "\n"
