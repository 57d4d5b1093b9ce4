"""Figures and their CSV twins: gaps, learning curves, position profiles, sweeps.

Every figure function returns a :class:`matplotlib.figure.Figure` built without pyplot (no
global state, Agg rendering) so tests can read its axes. Series differ by marker and line
style as well as colour, so the figures stay readable when printed in grey-scale. The CSV
files hold the plotted numbers in long form for ``dvc plots``.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

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


def _grid(n_panels: int, width: float = 5.0, height: float = 3.6) -> tuple[Figure, list[Any]]:
    columns = min(n_panels, 3)
    rows = -(-n_panels // columns)
    figure = Figure(figsize=(width * columns, height * rows), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(figure)  # render with Agg without touching matplotlib's global backend
    axes = figure.subplots(rows, columns, squeeze=False).ravel().tolist()
    for unused in axes[n_panels:]:
        unused.set_visible(False)
    return figure, axes[:n_panels]


# ----------------------------------------------------------------------- gaps


def gap_figure(table: Mapping[str, Any]) -> Figure:
    """One panel per source: gap (%) per order with its interval, one marker per model."""
    figure, axes = _grid(len(table))
    for ax, (source, models) in zip(axes, table.items(), strict=True):
        orders = list(dict.fromkeys(o for model in models.values() for o in model))
        offsets = (
            [0.0]
            if len(models) == 1
            else [-0.3 + 0.6 * i / (len(models) - 1) for i in range(len(models))]
        )
        for index, (model, leaves) in enumerate(models.items()):
            xs = [orders.index(o) + offsets[index] for o in leaves]
            gaps = [leaf["gap_pct"] for leaf in leaves.values()]
            below = [leaf["gap_pct"] - leaf["gap_pct_low"] for leaf in leaves.values()]
            above = [leaf["gap_pct_high"] - leaf["gap_pct"] for leaf in leaves.values()]
            style = _style(index)
            ax.errorbar(
                xs,
                gaps,
                yerr=[below, above],
                capsize=3,
                label=model,
                marker=style["marker"],
                color=style["color"],
                linestyle="none",
            )
            # Hollow markers for tested gaps that are not significant after Holm.
            hollow = [
                (x, leaf["gap_pct"])
                for x, leaf in zip(xs, leaves.values(), strict=True)
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
        ax.axhline(0.0, color="grey", linewidth=0.8)
        ax.set_xticks(range(len(orders)), orders, rotation=30, ha="right")
        ax.set_xlabel("order")
        ax.set_ylabel("gap to reference order (%)")
        ax.set_title(f"source: {source}")
        ax.legend(title="model (hollow: not significant)", fontsize="small")
    return figure


# ------------------------------------------------------------ learning curves


def learning_curve_figure(curves: Mapping[str, Any]) -> Figure:
    """One panel per (source, model): validation bits per token per epoch, a style per order."""
    panels = [(s, m, orders) for s, models in curves.items() for m, orders in models.items()]
    figure, axes = _grid(max(len(panels), 1))
    for ax, (source, model, orders) in zip(axes, panels, strict=False):
        for index, (order, per_seed) in enumerate(orders.items()):
            style = _style(index)
            for seed_index, all_epochs in enumerate(per_seed):
                curve = scored(all_epochs)
                ax.plot(
                    [p["epoch"] for p in curve],
                    [p["valid_bits_per_token"] for p in curve],
                    label=order if seed_index == 0 else None,
                    markersize=4,
                    linewidth=1,
                    **style,
                )
        ax.set_title(f"{source} / {model}")
        ax.legend(title="order", fontsize="small")
    for ax in axes:
        ax.set_xlabel("epoch")
        ax.set_ylabel("validation loss (bits per token)")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # epochs are whole numbers
        ax.ticklabel_format(axis="y", useOffset=False)  # show bits, not "+1.507" offsets
    return figure


# ----------------------------------------------------------- position profile


def profile_figure(profiles: Mapping[str, Any]) -> Figure:
    """One panel per (source, model): loss difference to the reference per natural position."""
    panels = [(s, m, p) for s, models in profiles.items() for m, p in models.items()]
    figure, axes = _grid(max(len(panels), 1))
    for ax, (source, model, profile) in zip(axes, panels, strict=False):
        reference = profile["reference_order"]
        others = [o for o in profile["diff_bits"] if o != reference]
        for index, order in enumerate(others):
            values = [float("nan") if v is None else v for v in profile["diff_bits"][order]]
            ax.plot(
                profile["x"], values, label=order, markersize=3, linewidth=1, **_style(index + 1)
            )
        ax.axhline(0.0, color="grey", linewidth=0.8)
        relative = profile["position"] == "relative"
        ax.set_xlabel(
            "relative position in unit, natural order (fraction)"
            if relative
            else "position in unit, natural order (tokens)"
        )
        ax.set_ylabel(f"loss minus {reference} (bits per token)")
        ax.set_title(f"{source} / {model}")
        if others:
            ax.legend(title="order", fontsize="small")
    return figure


# --------------------------------------------------------------------- sweeps


def sweep_figure(name: str, sweep: Mapping[str, Any], table: Mapping[str, Any]) -> Figure:
    """Gap (%) with interval against the swept value (context length, width, ...), per order."""
    rows = sweep_rows(sweep, table)
    parameter = sweep["parameter"]
    figure, (ax,) = _grid(1, width=6.0, height=4.0)
    orders = list(dict.fromkeys(row["order"] for row in rows))
    for index, order in enumerate(orders):
        mine = [row for row in rows if row["order"] == order]
        ax.errorbar(
            [row["value"] for row in mine],
            [row["gap_pct"] for row in mine],
            yerr=[
                [r["gap_pct"] - r["gap_pct_low"] for r in mine],
                [r["gap_pct_high"] - r["gap_pct"] for r in mine],
            ],
            capsize=3,
            label=order,
            **_style(index),
        )
    ax.axhline(0.0, color="grey", linewidth=0.8)
    ax.set_xlabel(f"{parameter} (swept value)")
    ax.set_ylabel("gap to reference order (%)")
    ax.set_title(f"sweep {name} on {sweep['source']}")
    ax.legend(title="order", fontsize="small")
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
        "bits_per_token",
    ]
    (folder / "gaps.csv").write_text(csv_text(gap_rows(table), fields))
    _save(gap_figure(table), folder, "gaps.png", written)
    if curve_rows(curves):  # families without a validation split have no curve to draw
        fields = ["source", "model", "order", "seed", "epoch", "valid_bits_per_token"]
        (folder / "learning_curves.csv").write_text(csv_text(curve_rows(curves), fields))
        _save(learning_curve_figure(curves), folder, "learning_curves.png", written)
    if any(profiles.values()):
        fields = ["source", "model", "order", "position", "bits", "diff_bits"]
        (folder / "position_profile.csv").write_text(csv_text(profile_rows(profiles), fields))
        _save(profile_figure(profiles), folder, "position_profile.png", written)
    for name, sweep in sweeps.items():
        fields = ["parameter", "value", "model", "order", "gap_pct", "gap_pct_low", "gap_pct_high"]
        (folder / f"sweep_{name}.csv").write_text(csv_text(sweep_rows(sweep, table), fields))
        _save(sweep_figure(name, sweep, table), folder, f"sweep_{name}.png", written)
    return written
