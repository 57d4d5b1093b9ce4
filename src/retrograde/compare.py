"""Diff two gap tables, e.g. ``metrics.json`` at two git revisions.

A cell ``(source, model, order)`` present in both tables is

- ``changed`` when its two intervals ``[gap_pct_low, gap_pct_high]`` do not overlap: the
  change is larger than the uncertainty either run reports (a conservative rule; two
  overlapping 95% intervals can still hide a real difference);
- ``within`` when the gap or its interval moved but the intervals overlap;
- ``same`` when gap and interval are identical.

Cells in only one table are ``added`` or ``removed``. Reading files at revisions is done at
the edge (:func:`read_table_at`); :func:`compare_tables` is pure.
"""

from __future__ import annotations

import argparse
import json
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._validation import check_choice
from .errors import ConfigError, DataError
from .hostrepo import PIPELINE_DIR, git_toplevel, run_git

__all__ = [
    "METRICS_PATH",
    "STATUSES",
    "CellChange",
    "add_metrics_arguments",
    "compare_tables",
    "format_changes",
    "read_table_at",
]

METRICS_PATH = PIPELINE_DIR / "metrics.json"
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


def _parse(text: str, where: str) -> dict[str, Any]:
    try:
        table = json.loads(text)
    except json.JSONDecodeError as exc:
        raise DataError(f"{where}: invalid JSON ({exc.msg}, line {exc.lineno})") from exc
    if not isinstance(table, dict):
        raise DataError(f"{where}: expected a {{source: {{model: {{order: ...}}}}}} object")
    return table


def read_table_at(
    repo_dir: str | os.PathLike[str], revision: str | None, path: str | os.PathLike[str]
) -> dict[str, Any]:
    """The gap table at ``path`` (relative to ``repo_dir``) in ``revision``, or the work tree.

    Raises
    ------
    ConfigError
        ``revision`` is not a commit of the repository.
    DataError
        There is no such file at that revision, or it is not a table.
    """
    repo_dir = Path(repo_dir)
    file_path = repo_dir / path
    if revision is None:
        if not file_path.is_file():
            raise DataError(
                f"{file_path}: no metrics in the working tree; run `retrograde run` first "
                "(or pass --dir/--path)"
            )
        return _parse(file_path.read_text(encoding="utf-8"), str(file_path))
    root = git_toplevel(repo_dir)
    try:
        inside = file_path.resolve().relative_to(root).as_posix()
    except ValueError:
        raise ConfigError(
            f"option --path: {file_path} is outside the git repository {root}; give a path "
            "inside it (relative to --dir)"
        ) from None
    verify = run_git(
        root, ["rev-parse", "--verify", "--quiet", f"{revision}^{{commit}}"], check=False
    )
    if verify.returncode != 0:
        raise ConfigError(
            f"revision {revision!r} is not a commit in {root}; list commits with "
            "`git log --oneline` (branches, tags and HEAD~N work too)"
        )
    shown = run_git(root, ["show", f"{verify.stdout.strip()}:{inside}"], check=False)
    if shown.returncode != 0:
        raise DataError(
            f"{inside} does not exist at revision {revision!r}; run `retrograde run` and "
            "commit metrics.json at that revision, or compare other revisions"
        )
    return _parse(shown.stdout, f"{inside} at {revision}")


def add_metrics_arguments(parser: argparse.ArgumentParser) -> None:
    """``--dir`` and ``--path``: where the metrics file is (shared by ``table`` and ``compare``)."""
    parser.add_argument(
        "--dir", default=".", metavar="HOST", help="the host repository root (default: here)"
    )
    parser.add_argument(
        "--path",
        default=str(METRICS_PATH),
        metavar="FILE",
        help=f"metrics file relative to --dir (default: {METRICS_PATH})",
    )
