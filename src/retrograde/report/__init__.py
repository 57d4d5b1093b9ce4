"""The report: the gap table as ``metrics.json``, ``report.md``, CSV and figures, and diffs.

``table`` is ``{source: {model: {order: leaf}}}`` with the leaves of
:func:`retrograde.stats.summarize_model`, so ``dvc metrics diff`` keys read
``SOURCE.MODEL.ORDER.gap_pct``. Everything here is a deterministic function of its inputs:
the same table gives byte-identical files. matplotlib is imported only when figures are
drawn (:func:`write_all`).

- :func:`write_all` — ``metrics.json``, ``report.md`` and ``plots/`` in one folder;
- :func:`format_table` — the table as ``markdown``, ``json`` or ``csv`` text;
- :func:`check_table` — a table read from a file, refused in one line unless printable;
- :func:`table_warnings` — cautions that follow from the table itself;
- :func:`rank_rows`, :func:`recommendation`, :func:`format_rank`, :func:`write_rank_figure`
  — ``retrograde rank``'s ranked table, its sentence and its figure;
- :func:`compare_tables`, :func:`format_changes` — what changed between two tables.
"""

from __future__ import annotations

from ._compare import CHANGE_FORMATS, STATUSES, CellChange, compare_tables, format_changes
from ._markdown import (
    CAUTIONS,
    CONCLUSION,
    LEAF_FIELDS,
    is_reference_leaf,
    render_report,
    table_rows,
)
from ._rank import (
    RANK_FIELDS,
    format_rank,
    rank_figure,
    rank_rows,
    recommendation,
    write_rank_figure,
)
from ._write import (
    FORMATS,
    REQUIRED_FIELDS,
    STAGING,
    check_table,
    format_table,
    recover_report,
    table_warnings,
    write_all,
)

__all__ = [
    "CAUTIONS",
    "CHANGE_FORMATS",
    "CONCLUSION",
    "FORMATS",
    "LEAF_FIELDS",
    "RANK_FIELDS",
    "REQUIRED_FIELDS",
    "STAGING",
    "STATUSES",
    "CellChange",
    "check_table",
    "compare_tables",
    "format_changes",
    "format_table",
    "format_rank",
    "is_reference_leaf",
    "rank_figure",
    "rank_rows",
    "recommendation",
    "recover_report",
    "render_report",
    "table_rows",
    "table_warnings",
    "write_all",
    "write_rank_figure",
]
