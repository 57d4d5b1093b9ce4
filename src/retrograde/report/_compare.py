"""Diff two gap tables, e.g. ``metrics.json`` at two git revisions.

A cell ``(source, model, order)`` present in both tables is

- ``changed`` when its two intervals ``[gap_pct_low, gap_pct_high]`` do not overlap: the
  change is larger than the uncertainty either run reports (a conservative rule; two
  overlapping 95% intervals can still hide a real difference);
- ``within`` when the gap or its interval moved but the intervals overlap;
- ``loss`` when gap and interval are identical but bits per token moved (a reference
  order's gap is 0 at every revision, so a better model of every order shows up here);
- ``same`` when gap, interval and bits per token are identical.

Cells in only one table are ``added`` or ``removed``. Every status shows bits per token at
both revisions and their change beside the gaps: a gap is relative, and a model that got
better (or worse) in every order keeps its gaps. Reading the tables at git revisions
is the host layer's job (``retrograde.host.read_table_at``); everything here is pure.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ..errors import DataError
from ..validation import check_choice

__all__ = ["CHANGE_FORMATS", "STATUSES", "CellChange", "compare_tables", "format_changes"]

#: every status, in the order a summary lists them
STATUSES = ("changed", "within", "loss", "added", "removed", "same")
#: what :func:`format_changes` writes
CHANGE_FORMATS = ("text", "markdown", "csv", "json")
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
    old_bits: float | None = None
    new_bits: float | None = None

    @property
    def bits_change(self) -> float | None:
        """``new_bits - old_bits`` (bits per token), or ``None`` when either is unknown."""
        if self.old_bits is None or self.new_bits is None:
            return None
        return self.new_bits - self.old_bits

    @property
    def cell(self) -> str:
        """The key ``dvc metrics diff`` shows, without the field: ``source.model.order``."""
        return f"{self.source}.{self.model}.{self.order}"


def _bits(table: Mapping[str, Any]) -> dict[tuple[str, str, str], float | None]:
    """Bits per token of every cell (``None`` where a table has none)."""
    return {
        (source, model, order): (
            float(leaf["bits_per_token"])
            if isinstance(leaf.get("bits_per_token"), (int, float))
            else None
        )
        for source, models in table.items()
        for model, orders in models.items()
        for order, leaf in orders.items()
    }


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
    old_bits, new_bits = _bits(old), _bits(new)
    changes = []
    for key in [*old_cells, *(k for k in new_cells if k not in old_cells)]:
        before, after = old_cells.get(key), new_cells.get(key)
        bits_before, bits_after = old_bits.get(key), new_bits.get(key)
        if before is None:
            status = "added"
        elif after is None:
            status = "removed"
        elif before == after:
            status = "same" if bits_before == bits_after else "loss"
        elif before[2] < after[1] or after[2] < before[1]:
            status = "changed"
        else:
            status = "within"
        changes.append(
            CellChange(*key, status, before, after, bits_before, bits_after)  # type: ignore[arg-type]
        )
    return changes


def _gap_text(values: tuple[float, float, float] | None) -> str:
    if values is None:
        return "–"
    gap, low, high = values
    return f"{gap:+.2f} [{low:+.2f}, {high:+.2f}]"


def _bits_text(value: float | None) -> str:
    return "–" if value is None else f"{value:.4f}"


def _change_text(change: CellChange) -> str:
    """``-0.6900 (-21.6%)``: the change of bits per token, absolute and relative."""
    delta = change.bits_change
    if delta is None:
        return "–"
    relative = f" ({100 * delta / change.old_bits:+.1f}%)" if change.old_bits else ""
    return f"{delta:+.4f}{relative}"


def _summary(changes: list[CellChange]) -> str:
    counts = {s: sum(c.status == s for c in changes) for s in STATUSES}
    return (
        f"{len(changes)} cells: {counts['changed']} changed beyond both intervals, "
        f"{counts['within']} moved within them, {counts['loss']} with the same gap but other "
        f"bits/token, {counts['added']} added, {counts['removed']} removed, "
        f"{counts['same']} identical"
    )


def _record(change: CellChange) -> dict[str, Any]:
    """One cell as flat JSON-able fields (``_a`` = first revision, ``_b`` = second)."""
    record: dict[str, Any] = {
        "source": change.source,
        "model": change.model,
        "order": change.order,
        "status": change.status,
    }
    for suffix, values, bits in (
        ("a", change.old, change.old_bits),
        ("b", change.new, change.new_bits),
    ):
        gap, low, high = values if values is not None else (None, None, None)
        record |= {
            f"gap_pct_{suffix}": gap,
            f"gap_pct_low_{suffix}": low,
            f"gap_pct_high_{suffix}": high,
            f"bits_per_token_{suffix}": bits,
        }
    delta = change.bits_change
    record["bits_per_token_change"] = None if delta is None else round(delta, 6)
    return record


def format_changes(
    changes: list[CellChange],
    *,
    old_label: str,
    new_label: str,
    show_all: bool = False,
    fmt: str = "text",
) -> str:
    """The cells that differ (all with ``show_all``) with gaps and bits per token at both
    revisions: aligned ``text`` with a summary line, a ``markdown`` table (e.g. for a
    pull-request comment), ``csv`` (one row per cell, ``_a``/``_b`` columns) or ``json``
    (``{"rev_a", "rev_b", "cells": [...], "counts": {status: n}}``)."""
    fmt = check_choice("compare 'format_changes'", "format", fmt, CHANGE_FORMATS)
    shown = [c for c in changes if show_all or c.status != "same"]
    if fmt == "json":
        document = {
            "rev_a": old_label,
            "rev_b": new_label,
            "cells": [_record(c) for c in shown],
            "counts": {s: sum(c.status == s for c in changes) for s in STATUSES},
        }
        return json.dumps(document, indent=2, allow_nan=False) + "\n"
    if fmt == "csv":
        buffer = io.StringIO()
        fields = list(_record(CellChange("", "", "", "same", None, None)))
        writer = csv.DictWriter(buffer, fields, lineterminator="\n")
        writer.writeheader()
        writer.writerows(_record(c) for c in shown)
        return buffer.getvalue()
    header = (
        "cell",
        f"gap % {old_label}",
        f"gap % {new_label}",
        f"bits/token {old_label}",
        f"bits/token {new_label}",
        "change bits/token",
        "status",
    )
    rows = [
        (
            c.cell,
            _gap_text(c.old),
            _gap_text(c.new),
            _bits_text(c.old_bits),
            _bits_text(c.new_bits),
            _change_text(c),
            c.status.upper() if c.status == "changed" else c.status,
        )
        for c in shown
    ]
    if not shown:
        lines = []
    elif fmt == "markdown":
        bold = [
            (f"`{r[0]}`", *r[1:-1], f"**{r[-1]}**" if r[-1] == "CHANGED" else r[-1]) for r in rows
        ]
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        lines += ["| " + " | ".join(row) + " |" for row in bold]
        lines.append("")
    else:
        widths = [max(len(row[i]) for row in [header, *rows]) for i in range(len(header))]
        lines = [
            "  ".join(text.ljust(w) for text, w in zip(row, widths, strict=True)).rstrip()
            for row in [header, *rows]
        ]
    return "\n".join([*lines, _summary(changes)]) + "\n"
