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

from . import __version__
from ._io import atomic_dir, atomic_write_json, atomic_write_text
from ._validation import check_choice
from .errors import ConfigError

__all__ = [
    "CAUTIONS",
    "FORMATS",
    "format_table",
    "is_reference_leaf",
    "table_rows",
    "table_warnings",
    "write_all",
]

Table = Mapping[str, Mapping[str, Mapping[str, Mapping[str, Any]]]]

FORMATS = ("markdown", "json", "csv")

#: shown in every report; each is a way a gap table is commonly over-read
CAUTIONS = (
    "A gap belongs to this model family, this amount of data and this training budget, "
    "not to the language or the data source as such.",
    "A gap whose interval contains 0 is not a finding; only the `significant` column "
    "(Holm-adjusted p below 0.05) marks gaps unlikely to be chance.",
    "Small or under-trained models can show a gap with the opposite sign to larger ones.",
    "With fewer than 3 seeds the interval resamples test units only and ignores training "
    "randomness.",
)

#: CSV and Markdown column order; later fields appear only when some leaf has them
LEAF_FIELDS = (
    "bits_per_token",
    "bits_per_byte",
    "floor_bits_per_token",
    "excess_bits_per_token",
    "gap_pct",
    "gap_pct_low",
    "gap_pct_high",
    "p_value",
    "p_value_sign_flip",
    "p_value_holm",
    "significant",
    "seed_spread_pct",
    "seeds",
    "units",
    "tokens",
    "groups",
    "documents",
)


def is_reference_leaf(leaf: Mapping[str, Any]) -> bool:
    """Whether ``leaf`` is a reference order's (gap and interval exactly 0, never tested)."""
    return (
        "p_value_holm" not in leaf
        and leaf.get("gap_pct") == 0
        and leaf.get("gap_pct_low") == 0
        and leaf.get("gap_pct_high") == 0
    )


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
                "the size of the gap, not only its significance"
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


def table_rows(table: Table) -> list[dict[str, Any]]:
    """One flat dict per cell: ``source``, ``model``, ``order`` and the leaf's fields."""
    return [
        {"source": source, "model": model, "order": order, **leaf}
        for source, models in table.items()
        for model, orders in models.items()
        for order, leaf in orders.items()
    ]


def _fields_present(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    present = {key for row in rows for key in row}
    extra = sorted(present - set(LEAF_FIELDS) - {"source", "model", "order"})
    return [f for f in LEAF_FIELDS if f in present] + extra


def _number(value: Any, spec: str) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else ""
    return format(value, spec)


def _p_text(value: Any) -> str:
    if value is None:
        return "–"
    return "<0.001" if value < 0.001 else f"{value:.3f}"


def _interval_title(level: float | None) -> str:
    return "interval" if level is None else f"{level:.0%} interval"


def _markdown_source(source: str, models: Mapping[str, Any], level: float | None) -> str:
    rows = table_rows({source: models})
    fields = set(_fields_present(rows))
    header = ["model", "order", "bits/token"]
    optional = [
        ("bits_per_byte", "bits/byte"),
        ("floor_bits_per_token", "floor bits/token"),
        ("excess_bits_per_token", "excess bits/token"),
    ]
    header += [title for key, title in optional if key in fields]
    header += [f"gap % [{_interval_title(level)}]", "seed spread %", "p (Holm)", "significant"]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for row in rows:
        reference = is_reference_leaf(row)
        cells = [f"`{row['model']}`", f"`{row['order']}`", _number(row["bits_per_token"], ".4f")]
        cells += [_number(row.get(key), ".4f") for key, _ in optional if key in fields]
        if reference:
            cells += ["reference", "", "", ""]
        else:
            interval = f"[{row['gap_pct_low']:+.2f}, {row['gap_pct_high']:+.2f}]"
            p_holm = row.get("p_value_holm", row.get("p_value"))
            cells += [
                f"{row['gap_pct']:+.2f} {interval}",
                _number(row.get("seed_spread_pct"), ".2f"),
                _p_text(p_holm),
                "**yes**" if row.get("significant") else "",
            ]
        lines.append("| " + " | ".join(cells) + " |")
    return f"### Source `{source}`\n\n" + "\n".join(lines) + "\n"


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
            buffer, ["source", "model", "order", *_fields_present(rows)], lineterminator="\n"
        )
        writer.writeheader()
        writer.writerows(rows)
        return buffer.getvalue()
    return "\n".join(_markdown_source(s, models, level) for s, models in table.items())


def _markdown_spans(spans: Mapping[str, Mapping[str, Any]]) -> str:
    lines = []
    for source, models in spans.items():
        lines += [
            f"### Spans of `{source}`",
            "",
            "| model | order | span | bits/token | perplexity | bits/unit |",
            "|---|---|---|---|---|---|",
        ]
        for model, by_order in models.items():
            for order, by_span in by_order.items():
                for span, value in by_span.items():
                    cells = [
                        f"`{model}`",
                        f"`{order}`",
                        f"`{span}`",
                        _number(value.get("bits_per_token"), ".4f"),
                        _number(value.get("perplexity"), ".3f"),
                        _number(value.get("bits_per_unit"), ".2f"),
                    ]
                    lines.append("| " + " | ".join(cells) + " |")
        lines.append("")
    return "\n".join(lines)


def render_report(
    table: Table,
    *,
    spans: Mapping[str, Mapping[str, Any]],
    provenance: Mapping[str, Any],
    warnings: Sequence[str],
    figures: Sequence[str],
    level: float | None = None,
) -> str:
    """The text of ``report.md`` (pure: no file access)."""
    parts = ["# Order-ablation gap table", ""]
    if warnings:
        parts += ["> **Warnings**", ">"] + [f"> - {w}" for w in warnings] + [""]
    parts += [
        "Each gap is `100 * (NLL(order) / NLL(reference) - 1)` on the same test units, with a "
        f"{_interval_title(level)} from a bootstrap over units and seeds, and a p-value from a "
        "paired sign-flip test on units (with 3 or more seeds, no smaller than the bootstrap's "
        "own p-value), Holm-adjusted over every gap in this table. Positive gaps mean the "
        "order is harder to learn than the reference.",
        "",
        format_table(table, "markdown", level=level),
    ]
    if spans:
        parts += ["## Loss per span", "", _markdown_spans(spans)]
    parts += ["## Cautions", ""] + [f"- {c}" for c in CAUTIONS] + [""]
    if figures:
        parts += ["## Figures", ""] + [f"![{Path(f).stem}]({f})" for f in figures] + [""]
    version = provenance.get("package_version", __version__)
    parts += [
        "## Provenance",
        "",
        f"retrograde {version}. Data hashes, configuration and versions of this run:",
        "",
        "```json",
        json.dumps(provenance, indent=2, sort_keys=True, default=str),
        "```",
        "",
    ]
    return "\n".join(parts)


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
