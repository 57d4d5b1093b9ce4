"""Markdown text of the gap table and of ``report.md`` (pure functions, no file access).

Re-exported by :mod:`retrograde.report`, which writes the files.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .. import __version__
from ._fairness import budget_vs_reference, markdown_tuning

__all__ = [
    "CAUTIONS",
    "CELL_FIELDS",
    "CONCLUSION",
    "LEAF_FIELDS",
    "WHICH_GAP",
    "markdown_budget",
    "fields_present",
    "is_reference_leaf",
    "markdown_table",
    "render_report",
    "table_rows",
]

Table = Mapping[str, Mapping[str, Mapping[str, Mapping[str, Any]]]]

#: shown in every report; each is a way a gap table is commonly over-read
CAUTIONS = (
    "A gap belongs to this model family, this amount of data and this training budget, "
    "not to the language or the data source as such.",
    "A gap whose interval contains 0 is not a finding, and not evidence that the order "
    "makes no difference either: only the `significant` column marks gaps unlikely to be "
    "chance, and its interval is the simultaneous one shown in the table, not the per-cell "
    "interval in metrics.json.",
    "Small or under-trained models can show a gap with the opposite sign to larger ones.",
    "With fewer than 3 seeds the interval resamples test units only and ignores training "
    "randomness.",
)

#: what a reader may conclude from a table with simultaneous intervals (one sentence)
CONCLUSION = (
    "Intervals are simultaneous: each row's interval is the gap's interval (Student-t, or "
    "with `stats.interval: bootstrap` the bootstrap percentile one) at the level (column "
    "*level*) at which Holm's procedure judged that row, so a row is "
    "significant exactly when its interval excludes 0, and you may conclude, with at most "
    "a 5% chance that any one of them is wrong, that every significant row's order "
    "changes the test loss in the direction of its sign; a row that is not significant "
    "shows no detectable gap, which is not evidence that there is none."
)

#: CSV and Markdown column order; later fields appear only when some leaf has them
LEAF_FIELDS = (
    "bits_per_token",
    "bits_per_byte",
    "floor_bits_per_token",
    "excess_bits_per_token",
    "end_bits_per_token",
    "content_excess_bits_per_token",
    "gap_pct",
    "gap_pct_low",
    "gap_pct_high",
    "content_gap_pct",
    "content_gap_pct_low",
    "content_gap_pct_high",
    "gap_pct_simultaneous_low",
    "gap_pct_simultaneous_high",
    "simultaneous_level",
    "gap_pct_simultaneous_extended",
    "p_value",
    "p_value_sign_flip",
    "p_value_holm",
    "significant",
    "seed_spread_pct",
    "seeds",
    "seeds_paired",
    "units",
    "tokens",
    "unit_length",
    "groups",
    "documents",
)

#: which gap a reader should quote; shown in every report (docs/statistics.md, "Which gap
#: to quote")
WHICH_GAP = (
    "Which gap to quote: where every test unit has the same length (calibration sources, "
    "window units), quote the **content gap** (content tokens only, end marker left out): "
    "the end marker then costs a model that cannot tell the position in a unit about "
    "`log2(L+1)/L + log2((L+1)/L)` bits per token in every order alike, which only dilutes "
    "the gap, and the exact floor charges it nothing. Where lengths vary (lines, "
    "documents), where a unit ends is part of what is modelled: quote the **gap**. The "
    "p-values and *significant* always test the gap (where the end marker costs every "
    "order the same, the gap has the content gap's sign and is only smaller); the content "
    "gap's interval is per cell."
)


def is_reference_leaf(leaf: Mapping[str, Any]) -> bool:
    """Whether ``leaf`` is a reference order's (gap and interval exactly 0, never tested)."""
    return (
        "p_value_holm" not in leaf
        and leaf.get("gap_pct") == 0
        and leaf.get("gap_pct_low") == 0
        and leaf.get("gap_pct_high") == 0
    )


def table_rows(table: Table) -> list[dict[str, Any]]:
    """One flat dict per cell: ``source``, ``model``, ``order`` and the leaf's fields.

    A mapping field is spread into ``field.key`` columns (``budget.train_tokens``), a list
    field joined with ``;`` (``budget_unequal``)."""
    return [
        {"source": source, "model": model, "order": order, **_flat(leaf)}
        for source, models in table.items()
        for model, orders in models.items()
        for order, leaf in orders.items()
    ]


def _flat(leaf: Mapping[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in leaf.items():
        if isinstance(value, Mapping):
            out.update({f"{key}.{sub}": item for sub, item in value.items()})
        elif isinstance(value, list):
            out[key] = ";".join(str(item) for item in value)
        else:
            out[key] = value
    return out


def fields_present(rows: Sequence[Mapping[str, Any]]) -> list[str]:
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
    fields = set(fields_present(rows))
    header = ["model", "order", "bits/token"]
    optional = [
        ("bits_per_byte", "bits/byte"),
        ("floor_bits_per_token", "floor bits/token"),
        ("excess_bits_per_token", "excess bits/token"),
        ("end_bits_per_token", "end bits/token"),
        ("content_excess_bits_per_token", "content excess bits/token"),
    ]
    header += [title for key, title in optional if key in fields]
    simultaneous = "gap_pct_simultaneous_low" in fields
    if simultaneous:
        header += ["gap % [simultaneous interval]", "level"]
    else:
        header += [f"gap % [{_interval_title(level)}]"]
    with_content = "content_gap_pct" in fields
    if with_content:
        header.append(f"content gap % [{_interval_title(level)}, per cell]")
    header += ["seed spread %", "p (Holm)", "significant"]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    stretched = False
    for row in rows:
        reference = is_reference_leaf(row)
        cells = [f"`{row['model']}`", f"`{row['order']}`", _number(row["bits_per_token"], ".4f")]
        cells += [_number(row.get(key), ".4f") for key, _ in optional if key in fields]
        if reference:
            cells += ["reference", *([""] * (len(header) - len(cells) - 1))]
        else:
            p_holm = row.get("p_value_holm", row.get("p_value"))
            gap_cells, mark = _gap_cells(row, simultaneous, level)
            stretched = stretched or bool(mark)
            cells += gap_cells
            if with_content:
                cells.append(_gap_text(row, "content_gap_pct"))
            cells += [
                _number(row.get("seed_spread_pct"), ".2f"),
                _p_text(p_holm),
                "**yes**" if row.get("significant") else "",
            ]
        lines.append("| " + " | ".join(cells) + " |")
    if stretched:
        lines += [
            "",
            "† interval stretched to 0: the interval alone excludes 0 at this level, but the "
            "test that decided the row (sign flips over units) does not.",
        ]
    return f"### Source `{source}`\n\n" + _quote_line(rows) + "\n".join(lines) + "\n"


def _gap_cells(
    row: Mapping[str, Any], simultaneous: bool, level: float | None
) -> tuple[list[str], str]:
    """The gap cell (and the level cell when the table has simultaneous intervals) of a
    tested row, and its mark (``†`` when the interval was stretched to 0, else ``""``)."""
    if simultaneous and "gap_pct_simultaneous_low" in row:
        low, high = row["gap_pct_simultaneous_low"], row["gap_pct_simultaneous_high"]
        mark = "†" if row.get("gap_pct_simultaneous_extended") else ""
        text = f"{row['gap_pct']:+.2f} [{low:+.2f}, {high:+.2f}]{mark}"
        return [text, _level_text(row.get("simultaneous_level"))], mark
    cells = [_gap_text(row, "gap_pct")]
    return cells + ([_level_text(level)] if simultaneous else []), ""


def _gap_text(row: Mapping[str, Any], key: str) -> str:
    """``+10.00 [+8.00, +12.50]`` for ``key`` and its ``_low``/``_high``; ``–`` if absent."""
    if row.get(key) is None:
        return "–"
    return f"{row[key]:+.2f} [{row[key + '_low']:+.2f}, {row[key + '_high']:+.2f}]"


def _quote_line(rows: Sequence[Mapping[str, Any]]) -> str:
    """The sentence under a source's heading saying which gap column to read, or ``""``."""
    if not rows or any("content_gap_pct" not in row for row in rows):
        return ""
    lengths = {row.get("unit_length") for row in rows}
    if len(lengths) == 1 and None not in lengths:
        return (
            f"Every test unit has {lengths.pop()} tokens: quote the **content gap** for the "
            "size of an effect (the end marker's cost measures whether a model can count "
            "positions, not the order); *p* and *significant* test the whole gap.\n\n"
        )
    return "Test units differ in length: quote the **gap** (end marker included).\n\n"


def _level_text(level: float | None) -> str:
    """``0.996875`` -> ``99.69%``: enough digits to tell Holm's steps apart."""
    return "–" if level is None else f"{100 * level:.2f}%"


def _has_simultaneous(table: Table) -> bool:
    return any("gap_pct_simultaneous_low" in row for row in table_rows(table))


def markdown_table(table: Table, level: float | None = None) -> str:
    """One Markdown table per source, each under a ``### Source`` heading."""
    return "\n".join(_markdown_source(s, models, level) for s, models in table.items())


def _signed(value: Any) -> str:
    return "–" if value is None else format(value, "+.3f")


def _markdown_spans(spans: Mapping[str, Mapping[str, Any]], level: float | None = None) -> str:
    lines = []
    interval = f"{round(100 * (level or 0.95))}% interval"
    for source, models in spans.items():
        lines += [
            f"### Spans of `{source}`",
            "",
            f"| model | order | span | bits/unit | Δ bits/unit vs reference ({interval}) "
            "| bits/token | perplexity |",
            "|---|---|---|---|---|---|---|",
        ]
        for model, by_order in models.items():
            for order, by_span in by_order.items():
                for span, value in by_span.items():
                    difference = _signed(value.get("diff_bits_per_unit"))
                    if "diff_bits_per_unit" not in value:
                        difference = "reference"
                    elif value.get("diff_bits_per_unit_low") is not None:
                        difference += (
                            f" [{_signed(value['diff_bits_per_unit_low'])}, "
                            f"{_signed(value['diff_bits_per_unit_high'])}]"
                        )
                    cells = [
                        f"`{model}`",
                        f"`{order}`",
                        f"`{span}`",
                        _number(value.get("bits_per_unit"), ".3f"),
                        difference,
                        _number(value.get("bits_per_token"), ".4f"),
                        _number(value.get("perplexity"), ".3f"),
                    ]
                    lines.append("| " + " | ".join(cells) + " |")
        lines.append("")
    return "\n".join(lines)


SPANS_TEXT = (
    "Each span's loss in bits per test unit (natural-order positions, whatever order the "
    "model read them in; seed-averaged), its difference to the same span in the reference "
    "order, and a bootstrap interval of that difference over test units (test-set sampling "
    "only, not training randomness). A span whose difference interval lies above 0 became "
    "harder in that order."
)


#: ``cells.csv`` columns: one row per fit cell (source, model, order, seed)
CELL_FIELDS = (
    "source",
    "model",
    "order",
    "seed",
    "bits_per_token",
    "gap_pct",
    "epochs",
    "last_valid_bits_per_token",
    "valid_bits_per_token",
    "test_units",
    "test_tokens",
    "train_tokens",
    "steps",
    "n_params",
    "cpu_s",
    "wall_s",
)


def _mean(values: Sequence[Any]) -> float | None:
    known = [float(v) for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
    return sum(known) / len(known) if known else None


def _count_text(value: float | None) -> str:
    return "–" if value is None else f"{round(value):,}"


def _seconds_text(value: float | None) -> str:
    return "–" if value is None else f"{value:.1f}"


def markdown_budget(table: Table, cells: Sequence[Mapping[str, Any]]) -> str:
    """The report's test-set sizes per source and, per cell averaged over seeds, the fit's
    parameters, training tokens, steps and times (from each cell's ``budget.json``)."""
    lines: list[str] = []
    for source, models in table.items():
        leaf = next((leaf for orders in models.values() for leaf in orders.values()), {})
        documents = f", {leaf['documents']:,} documents" if "documents" in leaf else ""
        lines += [
            f"### Source `{source}`",
            "",
            f"Test set: {leaf.get('units', 0):,} units, {leaf.get('tokens', 0):,} tokens"
            f"{documents}.",
            "",
        ]
        mine = [c for c in cells if c["source"] == source]
        if not mine:
            continue
        lines += [
            "| model | order | seeds | parameters | train tokens per fit | steps | "
            "fit wall s (mean) | fit CPU s (mean) | budget vs reference order |",
            "|---|---|---|---|---|---|---|---|---|",
        ]
        for model, orders in models.items():
            for order in orders:
                # a tuned row's cells are its winning trial's in this order
                fitted = orders[order].get("tuned_model", model)
                group = [c for c in mine if c["model"] == fitted and c["order"] == order]
                cells_text = [
                    f"`{model}`",
                    f"`{order}`",
                    str(len(group)),
                    _count_text(_mean([c.get("n_params") for c in group])),
                    _count_text(_mean([c.get("train_tokens") for c in group])),
                    _count_text(_mean([c.get("steps") for c in group])),
                    _seconds_text(_mean([c.get("wall_s") for c in group])),
                    _seconds_text(_mean([c.get("cpu_s") for c in group])),
                    budget_vs_reference(orders, order),
                ]
                lines.append("| " + " | ".join(cells_text) + " |")
        lines.append("")
    return "\n".join(lines)


def _pairing_note(table: Table) -> str:
    """How each model's seeds entered the intervals, when some were not paired ('' if all
    were, or the table does not say)."""
    unpaired = sorted(
        {
            model
            for models in table.values()
            for model, orders in models.items()
            if any(leaf.get("seeds_paired") is False for leaf in orders.values())
        }
    )
    if not unpaired:
        return ""
    names = ", ".join(f"`{model}`" for model in unpaired)
    return (
        f"Seeds of {names} are not paired across orders: each order's fits draw random "
        "numbers of their own and share no training sample, so the interval estimates each "
        "order's variation between seeds apart (Welch's form). Seeds of every other model "
        "are paired: seed *s* of each order is one pair (the `seeds_paired` field of "
        "`metrics.json`; docs/statistics.md)."
    )


def render_report(
    table: Table,
    *,
    spans: Mapping[str, Mapping[str, Any]],
    provenance: Mapping[str, Any],
    warnings: Sequence[str],
    figures: Sequence[str],
    level: float | None = None,
    cells: Sequence[Mapping[str, Any]] = (),
) -> str:
    """The text of ``report.md`` (pure: no file access)."""
    parts = ["# Order-ablation gap table", ""]
    if warnings:
        parts += ["> **Warnings**", ">"] + [f"> - {w}" for w in warnings] + [""]
    parts += [
        "Each gap is `100 * (NLL(order) / NLL(reference) - 1)` on the same test units, with a "
        f"{_interval_title(level) if not _has_simultaneous(table) else 'simultaneous interval'}"
        " that accounts for both the test units drawn and the training runs (seeds; from 3 of "
        "them), and a p-value from a paired sign-flip test on units, no smaller than the "
        "interval's own, Holm-adjusted over every gap in this table. Positive gaps mean the "
        "order is harder to learn than the reference. " + WHICH_GAP,
        "",
        *([CONCLUSION, ""] if _has_simultaneous(table) else []),
        *([_pairing_note(table), ""] if _pairing_note(table) else []),
        markdown_table(table, level),
    ]
    if spans:
        parts += ["## Loss per span", "", SPANS_TEXT, "", _markdown_spans(spans, level)]
    parts += [
        "## Data and budget",
        "",
        "Test units and tokens per source; per cell, averaged over its seeds: numbers the "
        "model learned, target positions trained on (end markers included), optimizer or "
        "minibatch steps, the time to fit and score, and how the counted budgets compare "
        "with the reference order's (beyond 5% the gap mixes the order with the budget). "
        "Per-seed values are in `cells.csv`; each leaf of `metrics.json` holds the means "
        "under `budget` (its times are measured, so they change when a cell is fitted "
        "again).",
        "",
        markdown_budget(table, cells),
    ]
    tuning = markdown_tuning(table)
    if tuning:
        parts += [
            "## Tuning",
            "",
            "Each order of a tuned model was fitted with the same trials (settings of its "
            "search space); each order's row uses the trial with the lowest validation loss "
            "(mean over seeds; test units never choose). The gap of the shared setting is the "
            "untuned model's, and the change is tuned minus shared, in percentage points.",
            "",
            tuning,
        ]
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
