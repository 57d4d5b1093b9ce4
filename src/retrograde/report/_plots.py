"""Figures and their CSV twins: gaps, learning curves, position profiles, sweeps.

Every figure function returns a :class:`matplotlib.figure.Figure` built without pyplot (no
global state, Agg rendering) so tests can read its axes. Series differ by marker and line
style as well as colour, so the figures stay readable when printed in grey-scale. The CSV
files hold the plotted numbers in long form for ``dvc plots``.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from ._markdown import is_reference_leaf
from ._plot_data import csv_text, curve_rows, gap_rows, profile_rows, scored, sweep_rows

__all__ = [
    "curve_rows",
    "gap_figure",
    "gap_rows",
    "learning_curve_figure",
    "profile_figure",
    "profile_rows",
    "sweep_figure",
    "sweep_rows",
    "write_plots",
]

_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*", "<", ">")
_LINESTYLES = ("-", "--", ":", "-.")
_COLOURS = ("black", "tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple", "tab:brown")
_DPI = 100
_PNG_METADATA = {"Software": None}  # keep PNG bytes free of the matplotlib version


def _style(index: int) -> dict[str, Any]:
    """Marker, line style and colour of series ``index``; the triple repeats after 140 series."""
    return {
        "marker": _MARKERS[index % len(_MARKERS)],
        "linestyle": _LINESTYLES[index % len(_LINESTYLES)],
        "color": _COLOURS[index % len(_COLOURS)],
    }


def _legend_on_top(figure: Any, handles: dict[str, Any], title: str) -> None:
    """One legend above the panels: an entry per name in ``handles`` (name -> artist)."""
    figure.legend(
        list(handles.values()),
        list(handles),
        title=title,
        loc="outside upper center",
        ncols=min(len(handles), 6),
        fontsize="small",
    )


def _caption(figure: Figure, text: str) -> None:
    """A note under the figure, wrapped to its width (about 14 small characters an inch)."""
    width = max(40, int(figure.get_figwidth() * 14))
    lines = [textwrap.fill(part, width) for part in text.split("\n")]
    figure.supxlabel("\n".join(lines), fontsize="small")


def _grid(n_panels: int, width: float = 5.0, height: float = 3.6) -> tuple[Figure, list[Any]]:
    columns = 2 if n_panels == 4 else min(n_panels, 3)  # 2 x 2 rather than 3 + 1
    rows = -(-n_panels // columns)
    figure = Figure(figsize=(width * columns, height * rows), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(figure)  # render with Agg without touching matplotlib's global backend
    axes = figure.subplots(rows, columns, squeeze=False).ravel().tolist()
    for unused in axes[n_panels:]:
        unused.set_visible(False)
    return figure, axes[:n_panels]


# ----------------------------------------------------------------------- gaps


def _reference_of(models: Mapping[str, Any]) -> str | None:
    """The reference order of one source's models (the order whose leaves are the reference)."""
    for leaves in models.values():
        for order, leaf in leaves.items():
            if is_reference_leaf(leaf):
                return str(order)
    return None


def _interval(leaf: Mapping[str, Any]) -> tuple[float, float]:
    """The interval the report shows: simultaneous when the leaf has it, else per cell."""
    if "gap_pct_simultaneous_low" in leaf:
        return leaf["gap_pct_simultaneous_low"], leaf["gap_pct_simultaneous_high"]
    return leaf["gap_pct_low"], leaf["gap_pct_high"]


def _interval_caption(table: Mapping[str, Any], level: float | None) -> str:
    leaves = [leaf for models in table.values() for m in models.values() for leaf in m.values()]
    if any("gap_pct_simultaneous_low" in leaf for leaf in leaves):
        return (
            "bars: simultaneous intervals, each at the level Holm's procedure judged "
            "its row (the report's 'level' column; 5% family-wise); filled marker: "
            "significant, hollow: not"
        )
    shown = "per-cell" if level is None else f"{level:.0%} per-cell"
    return f"bars: {shown} intervals; filled marker: significant (Holm), hollow: not"


def _offsets(n_series: int, span: float = 0.3) -> list[float]:
    """Side-by-side offsets inside one category: at most ``span`` wide, centred on the tick."""
    if n_series == 1:
        return [0.0]
    return [-span / 2 + span * i / (n_series - 1) for i in range(n_series)]


def gap_figure(table: Mapping[str, Any], level: float | None = None) -> Figure:
    """One panel per source: gap (%) per tested order with the interval the report shows.

    The reference order is not a category (its gap is 0 by definition); the y label names
    it. Models sit side by side within 0.3 of their order's tick, categories are separated
    by faint lines, and significant gaps have filled markers, others hollow.
    """
    figure, axes = _grid(len(table), height=3.8)
    handles: dict[str, Any] = {}
    for ax, (source, models) in zip(axes, table.items(), strict=True):
        reference = _reference_of(models)
        orders = [
            o
            for o in dict.fromkeys(o for model in models.values() for o in model)
            if o != reference
        ]
        offsets = _offsets(len(models))
        for index, (model, leaves) in enumerate(models.items()):
            tested = [(o, leaf) for o, leaf in leaves.items() if o != reference]
            if not tested:
                continue
            xs = [orders.index(o) + offsets[index] for o, _ in tested]
            gaps = [leaf["gap_pct"] for _, leaf in tested]
            bounds = [_interval(leaf) for _, leaf in tested]
            style = _style(index)
            container = ax.errorbar(
                xs,
                gaps,
                yerr=[
                    [g - lo for g, (lo, _) in zip(gaps, bounds, strict=True)],
                    [hi - g for g, (_, hi) in zip(gaps, bounds, strict=True)],
                ],
                capsize=3,
                label=model,
                marker=style["marker"],
                color=style["color"],
                linestyle="none",
            )
            handles.setdefault(model, container)
            # Hollow markers for tested gaps that are not significant after Holm.
            hollow = [
                (x, leaf["gap_pct"])
                for x, (_, leaf) in zip(xs, tested, strict=True)
                if leaf.get("significant") is False
            ]
            if hollow:
                ax.plot(
                    *zip(*hollow, strict=True),
                    marker=style["marker"],
                    color=style["color"],
                    markerfacecolor="white",
                    linestyle="none",
                    label="_not significant",
                    zorder=3,  # above the errorbar's own filled marker
                )
        for boundary in range(1, len(orders)):
            ax.axvline(boundary - 0.5, color="0.85", linewidth=0.8, zorder=0)
        ax.axhline(0.0, color="grey", linewidth=0.8)
        ax.set_xlim(-0.5, max(len(orders), 1) - 0.5)
        crowded = len(orders) > 4 or any(len(o) > 12 for o in orders)
        ax.set_xticks(
            range(len(orders)),
            orders,
            rotation=30 if crowded else 0,
            ha="right" if crowded else "center",
            rotation_mode="anchor",
        )
        ax.set_xlabel("order")
        ax.set_ylabel(f"gap to {reference or 'reference order'} (%)")
        ax.set_title(f"source: {source}")
    if handles:
        _legend_on_top(figure, handles, "model")
    _caption(
        figure,
        "gap = 100 × (NLL of the order / NLL of the reference order − 1) on the same test "
        "units\n" + _interval_caption(table, level),
    )
    return figure


# ------------------------------------------------------------ learning curves

#: per seed: the line style that tells seeds apart (colour and marker tell orders apart)
_SEED_LINESTYLES: tuple[Any, ...] = ("-", "--", ":", "-.")
#: a panel's y range is at least this many bits, or this share of its values' mean
_MIN_SPAN_BITS, _MIN_SPAN_SHARE = 0.05, 0.02


def _drawn_curves(curves: Mapping[str, Any]) -> tuple[list[tuple[str, str, Any]], list[str]]:
    """(panels with a curve of 2+ scored epochs, 'source / model' of those left out)."""
    panels, left_out = [], []
    for source, models in curves.items():
        for model, orders in models.items():
            longest = max(
                (len(scored(c)) for per_seed in orders.values() for c in per_seed), default=0
            )
            if longest >= 2:
                panels.append((source, model, orders))
            elif longest == 1:
                left_out.append(f"{source} / {model}")
    return panels, left_out


def _pad_span(ax: Any, values: list[float]) -> None:
    """Keep a panel's y range from magnifying noise: at least 0.05 bits or 2% of the mean."""
    if not values:
        return
    low, high = min(values), max(values)
    centre = (low + high) / 2
    span = max(high - low, _MIN_SPAN_BITS, _MIN_SPAN_SHARE * abs(centre))
    margin = 0.08 * span
    ax.set_ylim(centre - span / 2 - margin, centre + span / 2 + margin)


def learning_curve_figure(curves: Mapping[str, Any]) -> Figure:
    """One panel per (source, model) with epochs: validation bits per token per epoch.

    Colour and marker tell orders apart, line style seeds; a star marks the epoch whose
    weights were kept (the lowest validation loss; later epochs were discarded). Families
    with one validation score per fit (``ngram``) get no panel; the caption names them.
    """
    panels, left_out = _drawn_curves(curves)
    figure, axes = _grid(max(len(panels), 1), height=3.6)
    orders_seen: dict[str, dict[str, Any]] = {}
    n_seeds = 0
    for ax, (source, model, orders) in zip(axes, panels, strict=False):
        values: list[float] = []
        for index, (order, per_seed) in enumerate(orders.items()):
            style = _style(index)
            orders_seen.setdefault(order, style)
            n_seeds = max(n_seeds, len(per_seed))
            for seed_index, all_epochs in enumerate(per_seed):
                curve = scored(all_epochs)
                if not curve:
                    continue
                epochs = [p["epoch"] for p in curve]
                bits = [float(p["valid_bits_per_token"]) for p in curve]
                values += bits
                ax.plot(
                    epochs,
                    bits,
                    label=order if seed_index == 0 else None,
                    marker=style["marker"],
                    color=style["color"],
                    linestyle=_SEED_LINESTYLES[seed_index % len(_SEED_LINESTYLES)],
                    markersize=3,
                    linewidth=1,
                )
                best = min(range(len(bits)), key=bits.__getitem__)
                ax.plot(
                    [epochs[best]],
                    [bits[best]],
                    marker="*",
                    markersize=11,
                    color=style["color"],
                    markeredgecolor="black",
                    markeredgewidth=0.6,
                    linestyle="none",
                    label="_kept",
                    zorder=4,
                )
        _pad_span(ax, values)
        ax.set_title(f"{source} / {model}")
        ax.set_xlabel("epoch")
        ax.set_ylabel("validation loss (bits per token)")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # epochs are whole numbers
        ax.ticklabel_format(axis="y", useOffset=False)  # show bits, not "+1.507" offsets
    if orders_seen:
        order_handles = [
            Line2D([], [], marker=s["marker"], color=s["color"], linestyle="-")
            for s in orders_seen.values()
        ]
        seed_handles = [
            Line2D([], [], color="0.3", linestyle=_SEED_LINESTYLES[i % len(_SEED_LINESTYLES)])
            for i in range(n_seeds)
        ]
        kept = Line2D(
            [],
            [],
            marker="*",
            color="0.3",
            markeredgecolor="black",
            linestyle="none",
            markersize=11,
        )
        figure.legend(
            [*order_handles, *seed_handles, kept],
            [*orders_seen, *(f"seed #{i + 1}" for i in range(n_seeds)), "epoch kept"],
            loc="outside upper center",
            ncols=min(len(orders_seen) + n_seeds + 1, 8),
            fontsize="small",
        )
    caption = (
        "★ the epoch whose weights were kept (lowest validation loss); epochs after it ran "
        "but were discarded (early stopping)"
    )
    if left_out:
        caption += "\nnot drawn (one validation score per fit, no epochs): " + ", ".join(left_out)
    _caption(figure, caption)
    return figure


# ----------------------------------------------------------- position profile


def _profile_panels(profiles: Mapping[str, Any], mode: str) -> list[tuple[str, str, Any]]:
    return [
        (s, m, p)
        for s, models in profiles.items()
        for m, p in models.items()
        if p and p.get("position") == mode
    ]


def _count_text(profile: Mapping[str, Any]) -> str:
    units = [u for u in profile.get("units", []) if u]
    tokens = [t for t in profile.get("tokens", []) if t]
    if not tokens:
        return ""
    if units and min(units) == max(units) and min(tokens) == max(tokens):
        return f"{units[0]} units, {tokens[0]} tokens per point"
    unit_text = f"{min(units)}–{max(units)} units, " if units else ""
    return f"{unit_text}{min(tokens)}–{max(tokens)} tokens per point"


def profile_figure(profiles: Mapping[str, Any], mode: str = "absolute") -> Figure:
    """One panel per (source, model) whose profile has positions of kind ``mode``:
    loss difference to the reference per natural-order position, with a band of ±1.96
    standard errors (units as independent draws) and the counts behind each point.

    ``absolute`` panels share a token axis, ``relative`` ones a fraction-of-unit axis;
    :func:`write_plots` draws each kind in its own figure.
    """
    panels = _profile_panels(profiles, mode)
    figure, axes = _grid(max(len(panels), 1), height=3.6)
    for ax, (source, model, profile) in zip(axes, panels, strict=False):
        reference = profile["reference_order"]
        others = [o for o in profile["diff_bits"] if o != reference]
        x = profile["x"]
        width = profile.get("bucket_width") or 1
        if mode == "absolute" and width > 1:
            x = [value + (width - 1) / 2 for value in x]  # the middle of each bucket
        for index, order in enumerate(others):
            style = _style(index + 1)
            values = [float("nan") if v is None else v for v in profile["diff_bits"][order]]
            ax.plot(x, values, label=order, markersize=3, linewidth=1, **style)
            errors = profile.get("diff_se", {}).get(order)
            if errors:
                half = [float("nan") if e is None else 1.96 * e for e in errors]
                ax.fill_between(
                    x,
                    [v - h for v, h in zip(values, half, strict=True)],
                    [v + h for v, h in zip(values, half, strict=True)],
                    color=style["color"],
                    alpha=0.15,
                    linewidth=0,
                    label="_band",
                )
        ax.axhline(0.0, color="grey", linewidth=0.8)
        if mode == "relative":
            ax.set_xlabel("position in unit, natural order (fraction of the unit)")
        elif width > 1:
            ax.set_xlabel(f"position in unit, natural order (tokens; {width} per point)")
        else:
            ax.set_xlabel("position in unit, natural order (tokens)")
        ax.set_ylabel(f"loss minus {reference} (bits per token)")
        counts = _count_text(profile)
        ax.set_title(f"{source} / {model}" + (f"\n{counts}" if counts else ""), fontsize="medium")
        if others:
            ax.legend(title="order", fontsize="small")
    _caption(
        figure,
        "line: mean loss difference to the reference order at each natural-order position; "
        "band: ±1.96 standard errors, test units as independent draws",
    )
    return figure


# --------------------------------------------------------------------- sweeps


def sweep_figure(
    name: str, sweep: Mapping[str, Any], table: Mapping[str, Any], level: float | None = None
) -> Figure:
    """Gap (%) with the interval the report shows against the swept value, one series per
    tested order (the reference order's gap is 0 by definition and is not drawn); series
    are dodged sideways by 2% of the axis so their bars do not hide each other, and gaps
    that are not significant have hollow markers."""
    rows = sweep_rows(sweep, table)
    parameter = sweep["parameter"]
    figure, (ax,) = _grid(1, width=6.0, height=4.4)
    models = table[sweep["source"]]
    reference = _reference_of(models)
    orders = [o for o in dict.fromkeys(row["order"] for row in rows) if o != reference]
    groups = list(dict.fromkeys(row["group"] for row in rows))
    series = [(group, order) for group in groups for order in orders]
    values = [row["x"] for row in rows]
    logarithmic = bool(sweep.get("x_label")) and bool(values) and min(values) > 0
    span = (max(values) - min(values)) if values else 0
    dodge = 0.02 * (span or 1)
    for index, (group, order) in enumerate(series):
        mine = [row for row in rows if row["order"] == order and row["group"] == group]
        leaves = [models[row["model"]][order] for row in mine]
        bounds = [_interval(leaf) for leaf in leaves]
        position = index - (len(series) - 1) / 2
        # dodged sideways: by a share of the axis, or by a factor on a logarithmic axis
        if logarithmic:
            xs = [row["x"] * 2 ** (0.04 * position) for row in mine]
        else:
            xs = [row["x"] + dodge * position for row in mine]
        style = _style(index + 1)
        label = order if group is None else f"{order} ({sweep.get('group_parameter')} {group})"
        ax.errorbar(
            xs,
            [row["gap_pct"] for row in mine],
            yerr=[
                [r["gap_pct"] - lo for r, (lo, _) in zip(mine, bounds, strict=True)],
                [hi - r["gap_pct"] for r, (_, hi) in zip(mine, bounds, strict=True)],
            ],
            capsize=3,
            label=label,
            **style,
        )
        hollow = [
            (x, r["gap_pct"])
            for x, r, leaf in zip(xs, mine, leaves, strict=True)
            if leaf.get("significant") is False
        ]
        if hollow:
            ax.plot(
                *zip(*hollow, strict=True),
                marker=style["marker"],
                color=style["color"],
                markerfacecolor="white",
                linestyle="none",
                label="_not significant",
                zorder=3,
            )
    if logarithmic:
        ax.set_xscale("log", base=2)
    ax.axhline(0.0, color="grey", linewidth=0.8)
    if values and not logarithmic and all(float(v).is_integer() for v in values):
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(sweep.get("x_label") or f"{parameter} (swept value)")
    ax.set_ylabel(f"gap to {reference or 'reference order'} (%)")
    held = sweep.get("held")
    ax.set_title(
        f"sweep {name} on {sweep['source']}" + (f"\nequal for every value: {held}" if held else ""),
        fontsize="medium",
    )
    if orders:
        within = sweep.get("group_parameter")
        title = "order" if within is None else f"order ({within}: the other sweep's value)"
        ax.legend(title=title, fontsize="small")
    caption = _interval_caption(table, level)
    if sweep.get("x_label"):
        caption = f"{parameter} swept; x = training tokens of the subsample. " + caption
    _caption(figure, caption)
    return figure


# ---------------------------------------------------------------------- spans


def _span_panels(spans: Mapping[str, Any]) -> list[tuple[str, str, Any]]:
    """(source, model, breakdown) of every breakdown with differences to the reference."""
    return [
        (source, model, breakdown)
        for source, models in spans.items()
        for model, breakdown in models.items()
        if any("diff_bits_per_unit" in v for by in breakdown.values() for v in by.values())
    ]


def span_figure(spans: Mapping[str, Any], level: float | None = None) -> Figure:
    """One panel per (source, model): each span's loss difference to the reference order,
    in bits per unit, with its bootstrap interval; one series per order."""
    panels = _span_panels(spans)
    figure, axes = _grid(len(panels), height=3.8)
    handles: dict[str, Any] = {}
    for ax, (source, model, breakdown) in zip(axes, panels, strict=True):
        tested = {
            order: by_span
            for order, by_span in breakdown.items()
            if any("diff_bits_per_unit" in v for v in by_span.values())
        }
        reference = next((o for o in breakdown if o not in tested), "reference order")
        names = list(dict.fromkeys(name for by_span in tested.values() for name in by_span))
        offsets = _offsets(len(tested))
        for index, (order, by_span) in enumerate(tested.items()):
            rows = [(names.index(n), v) for n, v in by_span.items() if "diff_bits_per_unit" in v]
            xs = [x + offsets[index] for x, _ in rows]
            ys = [v["diff_bits_per_unit"] for _, v in rows]
            style = _style(index)
            container = ax.errorbar(
                xs,
                ys,
                yerr=[
                    [y - v["diff_bits_per_unit_low"] for y, (_, v) in zip(ys, rows, strict=True)],
                    [v["diff_bits_per_unit_high"] - y for y, (_, v) in zip(ys, rows, strict=True)],
                ],
                capsize=3,
                marker=style["marker"],
                color=style["color"],
                linestyle="none",
            )
            handles.setdefault(order, container)
        for boundary in range(1, len(names)):
            ax.axvline(boundary - 0.5, color="0.85", linewidth=0.8, zorder=0)
        ax.axhline(0.0, color="grey", linewidth=0.8)
        ax.set_xlim(-0.5, max(len(names), 1) - 0.5)
        ax.set_xticks(range(len(names)), names)
        ax.set_xlabel("span (natural-order positions)")
        ax.set_ylabel(f"bits per unit minus {reference}")
        ax.set_title(f"{source} / {model}")
    if handles:
        _legend_on_top(figure, handles, "order")
    shown = "95%" if level is None else f"{level:.0%}"
    _caption(
        figure,
        "mean over test units of the span's loss in this order minus in the reference order; "
        f"bars: {shown} bootstrap intervals over test units (seed-averaged losses: training "
        "randomness not included; not adjusted for the many spans)",
    )
    return figure


# ---------------------------------------------------------------------- files


def _save(figure: Figure, folder: Path, name: str, written: list[str]) -> None:
    figure.savefig(folder / name, format="png", metadata=_PNG_METADATA)
    written.append(name)


def write_plots(
    folder: Path,
    *,
    table: Mapping[str, Any],
    profiles: Mapping[str, Any],
    curves: Mapping[str, Any],
    sweeps: Mapping[str, Mapping[str, Any]],
    level: float | None = None,
    spans: Mapping[str, Any] | None = None,
) -> list[str]:
    """Write the CSV and PNG files into ``folder``; return the PNG file names, in order."""
    written: list[str] = []
    fields = [
        "source",
        "model",
        "order",
        "gap_pct",
        "gap_pct_low",
        "gap_pct_high",
        "gap_pct_simultaneous_low",
        "gap_pct_simultaneous_high",
        "simultaneous_level",
        "significant",
        "bits_per_token",
    ]
    (folder / "gaps.csv").write_text(csv_text(gap_rows(table), fields))
    _save(gap_figure(table, level), folder, "gaps.png", written)
    if _drawn_curves(curves)[0]:  # counting families have one point a fit: nothing to draw
        fields = ["source", "model", "order", "seed", "epoch", "valid_bits_per_token"]
        (folder / "learning_curves.csv").write_text(csv_text(curve_rows(curves), fields))
        _save(learning_curve_figure(curves), folder, "learning_curves.png", written)
    if any(profiles.values()):
        fields = ["source", "model", "order", "position", "bits", "diff_bits", "diff_se", "units"]
        (folder / "position_profile.csv").write_text(csv_text(profile_rows(profiles), fields))
        for mode, name in (
            ("absolute", "position_profile.png"),
            ("relative", "position_profile_relative.png"),
        ):
            if _profile_panels(profiles, mode):
                _save(profile_figure(profiles, mode), folder, name, written)
    if spans and _span_panels(spans):
        _save(span_figure(spans, level), folder, "spans.png", written)
    for name, sweep in sweeps.items():
        fields = [
            "parameter",
            "value",
            "x",
            "group",
            "model",
            "order",
            "gap_pct",
            "gap_pct_low",
            "gap_pct_high",
        ]
        (folder / f"sweep_{name}.csv").write_text(csv_text(sweep_rows(sweep, table), fields))
        _save(sweep_figure(name, sweep, table, level), folder, f"sweep_{name}.png", written)
    return written
