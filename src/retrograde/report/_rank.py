"""``retrograde rank``'s outputs: the ranked table, its JSON list, the recommendation, a figure.

Input is the confirmation table of one (source, model) — the leaves the ``table`` stage's
statistics give every order (``gap_pct``, the Holm-adjusted ``significant`` and the
simultaneous interval that agrees with it) — plus the screening rounds. Rows are ranked
best first: the lowest gap (fewest bits relative to the reference order) first.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..data import atomic_write_bytes

if TYPE_CHECKING:  # matplotlib loads only when a figure is drawn
    from matplotlib.figure import Figure

__all__ = [
    "RANK_FIELDS",
    "format_rank",
    "rank_figure",
    "rank_rows",
    "recommendation",
    "write_rank_figure",
]

#: the fields of each entry of ``retrograde rank --format json``, in order
RANK_FIELDS = ("order", "gap_pct", "gap_pct_low", "gap_pct_high", "significant")


def rank_rows(leaves: Mapping[str, Mapping[str, Any]], reference: str) -> list[dict[str, Any]]:
    """One row per confirmed candidate, best (lowest gap) first.

    ``gap_pct_low`` / ``gap_pct_high`` are the simultaneous interval (the level at which
    Holm judged the row), so a row's interval excludes 0 exactly when it is significant.

    >>> leaves = {"forward": {"gap_pct": 0.0},
    ...           "a": {"gap_pct": 2.0, "gap_pct_simultaneous_low": 1.0,
    ...                 "gap_pct_simultaneous_high": 3.0, "significant": True},
    ...           "b": {"gap_pct": -1.0, "gap_pct_simultaneous_low": -3.0,
    ...                 "gap_pct_simultaneous_high": 0.5, "significant": False}}
    >>> [row["order"] for row in rank_rows(leaves, "forward")]
    ['b', 'a']
    """
    rows = []
    for order, leaf in leaves.items():
        if order == reference:
            continue
        low = leaf.get("gap_pct_simultaneous_low", leaf.get("gap_pct_low"))
        high = leaf.get("gap_pct_simultaneous_high", leaf.get("gap_pct_high"))
        rows.append(
            {
                "order": order,
                "gap_pct": leaf["gap_pct"],
                "gap_pct_low": low,
                "gap_pct_high": high,
                "significant": bool(leaf.get("significant", False)),
            }
        )
    return sorted(rows, key=lambda row: (row["gap_pct"], row["order"]))


def _interval(row: Mapping[str, Any]) -> str:
    return f"{row['gap_pct']:+.2f}% [{row['gap_pct_low']:+.2f}, {row['gap_pct_high']:+.2f}]"


def _names(rows: Sequence[Mapping[str, Any]]) -> str:
    return ", ".join(f"`{row['order']}`" for row in rows)


def recommendation(
    rows: Sequence[Mapping[str, Any]],
    reference: str,
    *,
    level: float,
    n_candidates: int,
) -> str:
    """The sentence a reader acts on, saying how sure it is.

    ``level`` is the family-wise confidence of the Holm-adjusted verdicts (0.95 for the
    table stage's alpha of 0.05).

    - a candidate significantly better than the reference: train in the best of those; it
      says whether the runners-up are distinguishable from it (their intervals overlap);
    - none better, some worse: keep the reference and name the worse ones;
    - none significant: "no order is distinguishable from the reference".
    """
    confirmed = len(rows)
    kind = (
        f"simultaneous intervals over the {confirmed} confirmed "
        f"candidate{'s' if confirmed != 1 else ''}, Holm-adjusted, family-wise level "
        f"{100 * level:g}%"
    )
    scope = (
        f"Only the best {confirmed} of {n_candidates} candidates by the proxy on the "
        "validation split were confirmed on the test split; a gap belongs to this model, "
        "data size and budget."
    )
    better = [row for row in rows if row["significant"] and row["gap_pct"] < 0]
    worse = [row for row in rows if row["significant"] and row["gap_pct"] > 0]
    if better:
        best = better[0]
        close = [
            row for row in rows if row is not best and row["gap_pct_low"] <= best["gap_pct_high"]
        ]
        head = (
            f"Train in order `{best['order']}`: it costs {-best['gap_pct']:.2f}% fewer bits "
            f"than the reference `{reference}` (gap {_interval(best)}), a difference the "
            f"test distinguishes ({kind})."
        )
        tied = [row for row in close if row in better]
        untested = [row for row in close if row not in better]
        if tied:
            sure = (
                f" It is not clearly better than {_names(tied)}, also better than the "
                "reference, whose intervals overlap its own: either serves on this evidence."
            )
        elif untested:
            sure = (
                f" It is the only candidate the test separates from the reference; the "
                f"intervals of {_names(untested)} overlap its own, so its lead over them is "
                "not established."
            )
        else:
            sure = " Its interval overlaps no other candidate's: it is the clear best."
        return f"{head}{sure} {scope}"
    if worse:
        return (
            f"Keep the reference order `{reference}`: no candidate is distinguishably better, "
            f"and {_names(worse)} {'is' if len(worse) == 1 else 'are'} distinguishably worse "
            f"({kind}). {scope}"
        )
    best_text = (
        f"; the best candidate, `{rows[0]['order']}`, has gap {_interval(rows[0])}" if rows else ""
    )
    return (
        f"Keep the reference order `{reference}`: no order is distinguishable from the "
        f"reference ({kind}{best_text}). {scope}"
    )


def format_rank(result: Mapping[str, Any], fmt: str = "markdown") -> str:
    """``json``: the ranked list (:data:`RANK_FIELDS`), best first; ``markdown``: the table,
    the screening summary and the recommendation."""
    import json

    rows = result["ranking"]
    if fmt == "json":
        return json.dumps([{k: row[k] for k in RANK_FIELDS} for row in rows], indent=2) + "\n"
    reference = result["reference_order"]
    leaves = result["leaves"]
    last_round = result["screening"]["rounds"][-1]["bits_per_token"]
    lines = [
        f"## Order ranking: source `{result['source']}`, model `{result['model']}`",
        "",
        f"Gaps against the reference order `{reference}` on the test split; intervals are "
        "simultaneous (Holm-adjusted), so a row is significant exactly when its interval "
        "excludes 0.",
        "",
        "| rank | order | bits/token | gap % | interval % | Holm p | significant | proxy bits/token |",
        "|---:|---|---:|---:|---|---:|---|---:|",
    ]
    ref_leaf = leaves[reference]
    lines.append(
        f"| — | `{reference}` (reference) | {ref_leaf['bits_per_token']:.4f} | 0 | — | — | — "
        f"| {last_round.get(reference, float('nan')):.4f} |"
    )
    for rank, row in enumerate(rows, start=1):
        leaf = leaves[row["order"]]
        lines.append(
            f"| {rank} | `{row['order']}` | {leaf['bits_per_token']:.4f} | "
            f"{row['gap_pct']:+.2f} | [{row['gap_pct_low']:+.2f}, {row['gap_pct_high']:+.2f}] "
            f"| {leaf.get('p_value_holm', float('nan')):.3g} | "
            f"{'yes' if row['significant'] else 'no'} | "
            f"{last_round.get(row['order'], float('nan')):.4f} |"
        )
    screening = result["screening"]
    lines += ["", f"Screening with `{screening['proxy']['family']}` on the validation split:"]
    for number, round_ in enumerate(screening["rounds"], start=1):
        n_scored = len(round_["bits_per_token"]) - 1
        lines.append(
            f"- round {number}: {round_['train_units']} training units, {n_scored} "
            f"candidates scored, kept {len(round_['kept'])}"
        )
    lines += ["", f"**Recommendation.** {result['recommendation']}"]
    for warning in result.get("warnings", []):
        lines.append(f"\n> Caution: {warning}")
    return "\n".join(lines) + "\n"


def rank_figure(result: Mapping[str, Any]) -> Figure:
    """Left: confirmed gaps with simultaneous intervals, best at the top (filled marker =
    significant). Right: the screening, proxy bits per validation token against training
    units, one line per candidate (grey once eliminated, coloured for the top k)."""
    from matplotlib.figure import Figure

    rows = result["ranking"]
    reference = result["reference_order"]
    figure = Figure(figsize=(11.0, max(3.2, 0.45 * len(rows) + 2.0)), dpi=100)
    left, right = figure.subplots(1, 2, gridspec_kw={"width_ratios": [1.1, 1.0]})
    for position, row in enumerate(reversed(rows)):
        low, high = row["gap_pct_low"], row["gap_pct_high"]
        colour = (
            "0.55" if not row["significant"] else "tab:blue" if row["gap_pct"] < 0 else "tab:red"
        )
        left.plot([low, high], [position, position], color=colour, linewidth=2)
        left.plot(
            [row["gap_pct"]],
            [position],
            marker="o",
            markersize=8,
            color=colour,
            markerfacecolor=colour if row["significant"] else "white",
        )
    left.axvline(0.0, color="black", linewidth=1, linestyle="--")
    left.annotate(
        f"reference\n'{reference}'",
        (0.0, 1.0),
        xycoords=("data", "axes fraction"),
        xytext=(3, -3),
        textcoords="offset points",
        fontsize=8,
        va="top",
    )
    left.set_yticks(range(len(rows)), [row["order"] for row in reversed(rows)])
    left.set_ylim(-0.7, len(rows) - 0.3)
    low_end = min([0.0, *(row["gap_pct_low"] for row in rows)])
    high_end = max([0.0, *(row["gap_pct_high"] for row in rows)])
    pad = 0.08 * max(high_end - low_end, 1e-6)
    left.set_xlim(low_end - pad, high_end + 3 * pad)  # room for the reference label
    left.set_xlabel(f"gap % vs reference '{reference}' (negative = fewer bits)")
    left.set_title(f"{result['source']} / {result['model']}: confirmed on test")
    left.grid(axis="x", alpha=0.3)
    rounds = result["screening"]["rounds"]
    top = set(result["screening"]["top"])
    names = list(rounds[0]["bits_per_token"])
    palette = ("tab:blue", "tab:orange", "tab:green", "tab:purple", "tab:brown", "tab:cyan")
    colours: dict[str, str] = {}
    for name in names:
        xs = [r["train_units"] for r in rounds if name in r["bits_per_token"]]
        ys = [r["bits_per_token"][name] for r in rounds if name in r["bits_per_token"]]
        if name == reference:
            style: dict[str, Any] = {"color": "black", "linestyle": "--", "marker": "s"}
        elif name in top:
            colours[name] = palette[len(colours) % len(palette)]
            style = {"color": colours[name], "marker": "o"}
        else:
            style = {"color": "0.7", "marker": ".", "linewidth": 0.8}
        label = f"{name} (reference)" if name == reference else name if name in top else None
        right.plot(xs, ys, **style, label=label)
    right.set_xlabel("training units (screening round)")
    right.set_ylabel("proxy bits per validation token")
    right.set_title(f"screening: {result['screening']['proxy']['family']}, grey = eliminated")
    right.legend(fontsize=8, loc="best")
    right.grid(alpha=0.3)
    figure.text(
        0.01,
        0.01,
        "filled marker: Holm-significant (blue better, red worse than the reference; grey "
        "not distinguishable); bars: simultaneous intervals",
        fontsize=8,
    )
    figure.tight_layout(rect=(0, 0.04, 1, 1))
    return figure


def write_rank_figure(result: Mapping[str, Any], path: Path) -> None:
    """Render :func:`rank_figure` to a PNG (atomically; no matplotlib version in the bytes)."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    figure = rank_figure(result)
    FigureCanvasAgg(figure)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", metadata={"Software": None})
    atomic_write_bytes(path, buffer.getvalue())
