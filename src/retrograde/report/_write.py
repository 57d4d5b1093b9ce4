"""Writing the gap table as ``metrics.json``, ``report.md`` and ``plots/`` (CSV + PNG).

``table`` is ``{source: {model: {order: leaf}}}`` with the leaves of
:func:`retrograde.stats.summarize_model` (after :func:`retrograde.stats.adjust_holm`), so
``dvc metrics diff`` keys read ``SOURCE.MODEL.ORDER.gap_pct``. Everything written here is a
deterministic function of the inputs: the same table gives byte-identical files.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import shutil
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..data import atomic_write_json, atomic_write_text
from ..errors import ConfigError, DataError
from ..validation import check_choice
from ._markdown import (
    CELL_FIELDS,
    Table,
    fields_present,
    is_reference_leaf,
    markdown_table,
    render_report,
    table_rows,
)

__all__ = [
    "FORMATS",
    "REQUIRED_FIELDS",
    "STAGING",
    "check_table",
    "format_table",
    "recover_report",
    "table_warnings",
    "write_all",
]

FORMATS = ("markdown", "json", "csv")
#: where a new set of results is written before it replaces the published one (the name
#: matches the ``.*.tmp`` rule ``init`` puts in the pipeline's .gitignore)
STAGING = ".table.tmp"
_COMPLETE = "COMPLETE"


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


#: fields every leaf of a gap table holds (the reference order's too, as zeros)
REQUIRED_FIELDS = ("bits_per_token", "gap_pct", "gap_pct_low", "gap_pct_high")


def check_table(table: Any, where: str) -> Table:
    """``table`` if it is a gap table every command can print; else one-line DataError.

    A table is ``{source: {model: {order: leaf}}}``; every leaf holds the numbers of
    :data:`REQUIRED_FIELDS`, and no number anywhere in a leaf is NaN or infinite (JSON has
    neither; ``metrics.json`` is written without them).
    """

    def refuse(what: str) -> DataError:
        return DataError(
            f"{where}: {what}; it is not a gap table written by `retrograde run` (regenerate "
            "it with `retrograde run`, or fix the file)"
        )

    shape = "{source: {model: {order: {field: number}}}}"
    if not isinstance(table, Mapping):
        raise refuse(f"expected {shape}, got {type(table).__name__}")
    for source, models in table.items():
        if not isinstance(models, Mapping):
            raise refuse(f"source {source!r} holds {type(models).__name__}, expected {shape}")
        for model, orders in models.items():
            if not isinstance(orders, Mapping):
                raise refuse(f"{source}.{model} holds {type(orders).__name__}, expected {shape}")
            for order, leaf in orders.items():
                cell = f"cell {source}.{model}.{order}"
                if not isinstance(leaf, Mapping):
                    raise refuse(f"{cell} holds {type(leaf).__name__}, expected a mapping")
                for key in REQUIRED_FIELDS:
                    value = leaf.get(key)
                    if isinstance(value, bool) or not isinstance(value, (int, float)):
                        raise refuse(f"{cell} has no numeric {key} (found {value!r})")
                for key, value in leaf.items():
                    if isinstance(value, float) and not math.isfinite(value):
                        raise refuse(f"{cell} has {key}={value!r}")
    return table  # type: ignore[return-value]


def table_warnings(table: Table) -> list[str]:
    """Cautions that follow from the table itself: deterministic fits, too few documents."""
    from ..stats import grouping_warning

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
    cells: Sequence[Mapping[str, Any]] = (),
) -> None:
    """Write ``metrics.json``, ``report.md``, ``cells.csv`` and ``plots/`` into ``out_dir``.

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
    cells : list of dict, optional
        One row per fit cell (``CELL_FIELDS``): written to ``cells.csv`` and summarized in
        the report's "Data and budget" section.
    """
    from . import _plots  # matplotlib is imported only when a report is written

    out_dir = Path(out_dir)
    warnings = [*warnings, *(w for w in table_warnings(table) if w not in warnings)]
    for name, sweep in sweeps.items():
        if sweep.get("source") not in table:
            raise ConfigError(
                f"sweep {name!r}: source {sweep.get('source')!r} is not in the table "
                f"(sources: {sorted(table)}); check study.sweeps.{name}.source"
            )
    recover_report(out_dir)  # a set a killed writer left complete goes in first
    staging = out_dir / STAGING
    shutil.rmtree(staging, ignore_errors=True)
    (staging / "plots").mkdir(parents=True)
    figures = _plots.write_plots(
        staging / "plots",
        table=table,
        profiles=profiles,
        curves=curves,
        sweeps=sweeps,
        level=level,
        spans=spans,
    )
    atomic_write_json(staging / "metrics.json", table)
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, list(CELL_FIELDS), lineterminator="\n")
    writer.writeheader()
    writer.writerows({key: row.get(key) for key in CELL_FIELDS} for row in cells)
    atomic_write_text(staging / "cells.csv", buffer.getvalue())
    report = render_report(
        table,
        spans=spans,
        provenance=provenance,
        warnings=warnings,
        figures=[f"plots/{name}" for name in figures],
        level=level,
        cells=cells,
    )
    atomic_write_text(staging / "report.md", report)
    atomic_write_text(
        staging / _COMPLETE, "the new metrics.json, report.md, cells.csv and plots/\n"
    )
    recover_report(out_dir)


def recover_report(out_dir: str | os.PathLike[str]) -> None:
    """Put a complete staged set in place, or drop an incomplete one.

    :func:`write_all` writes the new ``metrics.json``, ``report.md``, ``cells.csv`` and
    ``plots/`` into
    :data:`STAGING` first and marks the set complete; only then do they replace the
    published ones, each by a rename. A writer killed before the mark leaves the published
    set untouched (its staging is dropped here); one killed during the renames leaves a
    complete staging that this call finishes putting in place. Either way a reader sees
    the old set or the new one, never a mix, once this has run (every writer runs it
    first).
    """
    out_dir = Path(out_dir)
    staging = out_dir / STAGING
    shutil.rmtree(out_dir / ".plots.old", ignore_errors=True)  # an earlier swap's leftover
    if not staging.is_dir():
        return
    if not (staging / _COMPLETE).is_file():
        shutil.rmtree(staging, ignore_errors=True)
        return
    if (staging / "plots").is_dir():
        old = out_dir / ".plots.old"
        shutil.rmtree(old, ignore_errors=True)
        if (out_dir / "plots").exists():
            os.replace(out_dir / "plots", old)
        os.replace(staging / "plots", out_dir / "plots")
        shutil.rmtree(old, ignore_errors=True)
    for name in (
        "cells.csv",
        "report.md",
        "metrics.json",
    ):  # metrics last: what diffs and gates read
        if (staging / name).is_file():
            os.replace(staging / name, out_dir / name)
    shutil.rmtree(staging, ignore_errors=True)
