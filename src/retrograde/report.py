"""The gap table as ``metrics.json``, ``report.md`` and ``plots/`` (CSV for ``dvc plots`` + PNG).

``table`` is ``{source: {model: {order: leaf}}}`` with the leaves of
:func:`retrograde.stats.summarize_model` (after :func:`retrograde.stats.adjust_holm`), so
``dvc metrics diff`` keys read ``SOURCE.MODEL.ORDER.gap_pct``. Everything written here is a
deterministic function of the inputs: the same table gives byte-identical files.
"""

from __future__ import annotations

import csv
import io
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ._io import atomic_dir, atomic_write_json, atomic_write_text
from ._markdown import (
    CAUTIONS,
    Table,
    fields_present,
    is_reference_leaf,
    markdown_table,
    render_report,
    table_rows,
)
from ._validation import check_choice
from .errors import ConfigError

__all__ = [
    "CAUTIONS",
    "FORMATS",
    "format_table",
    "is_reference_leaf",
    "render_report",
    "table_rows",
    "table_warnings",
    "write_all",
]

FORMATS = ("markdown", "json", "csv")


def _deterministic_models(models: Mapping[str, Mapping[str, Mapping[str, Any]]]) -> list[str]:
    """Models fitted with several seeds whose every gap had zero spread over seeds."""
    found = []
    for model, orders in models.items():
        spreads = [
            leaf.get("seed_spread_pct")
            for leaf in orders.values()
            if not is_reference_leaf(leaf) and leaf.get("seeds", 0) > 1
        ]
        if spreads and all(spread == 0 for spread in spreads):
            found.append(model)
    return found


def table_warnings(table: Table) -> list[str]:
    """Cautions that follow from the table itself: deterministic fits, too few documents."""
    from .stats import grouping_warning

    found = []
    for source, models in table.items():
        deterministic = _deterministic_models(models)
        if deterministic:
            names = ", ".join(repr(m) for m in deterministic)
            found.append(
                f"source {source!r}: model{'s' if len(deterministic) > 1 else ''} {names} gave "
                "identical losses for every seed (a deterministic fit), so the interval leaves "
                "out training randomness, including which training units were drawn; judge "
                "the size of the gap, not only its significance (with train_sample: auto or "
                "half in the model's config each seed trains on its own sample of units)"
            )
        documents = [
            leaf["documents"]
            for orders in models.values()
            for leaf in orders.values()
            if "documents" in leaf
        ]
        warning = grouping_warning(source, min(documents)) if documents else None
        if warning:
            found.append(warning)
    return found


def format_table(table: Table, fmt: str = "markdown", *, level: float | None = None) -> str:
    """The gap table as ``markdown`` (one table per source), ``json`` or ``csv`` text.

    ``json`` is byte-for-byte what :func:`write_all` puts in ``metrics.json``. ``level`` (the
    intervals' confidence level, not stored in the table) only labels the Markdown header.

    Examples
    --------
    >>> leaf = {"bits_per_token": 2.5, "gap_pct": 4.0, "gap_pct_low": 1.0,
    ...         "gap_pct_high": 7.0, "p_value": 0.01, "seeds": 3}
    >>> print(format_table({"demo": {"ngram": {"reverse": leaf}}}, "csv"), end="")
    source,model,order,bits_per_token,gap_pct,gap_pct_low,gap_pct_high,p_value,seeds
    demo,ngram,reverse,2.5,4.0,1.0,7.0,0.01,3
    """
    fmt = check_choice("report 'format_table'", "format", fmt, FORMATS)
    if fmt == "json":
        return json.dumps(table, indent=2, sort_keys=True, allow_nan=False) + "\n"
    if fmt == "csv":
        rows = table_rows(table)
        buffer = io.StringIO()
        writer = csv.DictWriter(
            buffer, ["source", "model", "order", *fields_present(rows)], lineterminator="\n"
        )
        writer.writeheader()
        writer.writerows(rows)
        return buffer.getvalue()
    return markdown_table(table, level)


def write_all(
    out_dir: str | os.PathLike[str],
    *,
    table: Table,
    profiles: Mapping[str, Mapping[str, Mapping[str, Any]]],
    spans: Mapping[str, Mapping[str, Any]],
    curves: Mapping[str, Mapping[str, Mapping[str, Sequence[Sequence[Mapping[str, Any]]]]]],
    sweeps: Mapping[str, Mapping[str, Any]],
    provenance: Mapping[str, Any],
    warnings: Sequence[str],
    level: float | None = None,
) -> None:
    """Write ``metrics.json``, ``report.md`` and ``plots/`` into ``out_dir``.

    Parameters
    ----------
    table : ``{source: {model: {order: leaf}}}``
        Written to ``metrics.json`` exactly (sorted keys, two-space indent).
    profiles : ``{source: {model: profile}}``
        :func:`retrograde.stats.position_profile` results.
    spans : ``{source: {model: breakdown}}``
        :func:`retrograde.stats.span_breakdown` results (sources without spans left out).
    curves : ``{source: {model: {order: [curve per seed]}}}``
        A curve is the family's ``learning_curve_`` (dicts with ``epoch`` and
        ``valid_bits_per_token``).
    sweeps : ``{name: {"source": s, "parameter": p, "models": {model: value}}}``
        Each sweep gets ``plots/sweep_<name>.png`` and ``.csv``.
    provenance : dict
        JSON-able facts of the run (data hashes, config, package version).
    warnings : list of str
        Lines shown at the top of ``report.md``.
    level : float, optional
        Confidence level of the intervals in ``table`` (``stats.level``); labels the report.
    """
    from . import plots  # matplotlib is imported only when a report is written

    out_dir = Path(out_dir)
    warnings = [*warnings, *(w for w in table_warnings(table) if w not in warnings)]
    for name, sweep in sweeps.items():
        if sweep.get("source") not in table:
            raise ConfigError(
                f"sweep {name!r}: source {sweep.get('source')!r} is not in the table "
                f"(sources: {sorted(table)}); check study.sweeps.{name}.source"
            )
    with atomic_dir(out_dir / "plots") as plot_dir:
        figures = plots.write_plots(
            plot_dir, table=table, profiles=profiles, curves=curves, sweeps=sweeps
        )
    atomic_write_json(out_dir / "metrics.json", table)
    report = render_report(
        table,
        spans=spans,
        provenance=provenance,
        warnings=warnings,
        figures=[f"plots/{name}" for name in figures],
        level=level,
    )
    atomic_write_text(out_dir / "report.md", report)
