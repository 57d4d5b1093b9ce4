"""The numbers behind each figure, as long-form rows (one dict per plotted point) and CSV text.

The CSV files in ``plots/`` are what ``dvc plots`` reads; :mod:`retrograde.plots` draws the
same rows. Re-exported by :mod:`retrograde.plots`.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["csv_text", "curve_rows", "gap_rows", "profile_rows", "scored", "sweep_rows"]


def gap_rows(table: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Long-form rows: source, model, order, gap_pct, gap_pct_low, gap_pct_high, bits."""
    return [
        {
            "source": source,
            "model": model,
            "order": order,
            "gap_pct": leaf["gap_pct"],
            "gap_pct_low": leaf["gap_pct_low"],
            "gap_pct_high": leaf["gap_pct_high"],
            "gap_pct_simultaneous_low": leaf.get("gap_pct_simultaneous_low"),
            "gap_pct_simultaneous_high": leaf.get("gap_pct_simultaneous_high"),
            "simultaneous_level": leaf.get("simultaneous_level"),
            "significant": leaf.get("significant"),
            "bits_per_token": leaf["bits_per_token"],
        }
        for source, models in table.items()
        for model, orders in models.items()
        for order, leaf in orders.items()
    ]


def curve_rows(curves: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Long-form rows: source, model, order, seed (index), epoch, valid_bits_per_token."""
    return [
        {
            "source": source,
            "model": model,
            "order": order,
            "seed": seed_index,
            "epoch": point["epoch"],
            "valid_bits_per_token": point["valid_bits_per_token"],
        }
        for source, models in curves.items()
        for model, orders in models.items()
        for order, per_seed in orders.items()
        for seed_index, curve in enumerate(per_seed)
        for point in scored(curve)
    ]


def scored(curve: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """The epochs of a learning curve that have a validation score (fits without a validation
    split, or epochs that skipped it, have none)."""
    return [
        p for p in curve if p.get("epoch") is not None and p.get("valid_bits_per_token") is not None
    ]


def profile_rows(profiles: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Long-form rows: source, model, order, position, bits, diff_bits (None if empty)."""
    return [
        {
            "source": source,
            "model": model,
            "order": order,
            "position": x,
            "bits": bits,
            "diff_bits": diff,
            "diff_se": se,
            "units": units,
        }
        for source, models in profiles.items()
        for model, profile in models.items()
        for order in profile["bits"]
        for x, bits, diff, se, units in zip(
            profile["x"],
            profile["bits"][order],
            profile["diff_bits"][order],
            profile.get("diff_se", {}).get(order, [None] * len(profile["x"])),
            profile.get("units", [None] * len(profile["x"])),
            strict=True,
        )
    ]


def sweep_rows(sweep: Mapping[str, Any], table: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Long-form rows of one sweep: parameter, value, model, order, gap_pct, low, high.

    The swept parameter's name goes in its own column: it may itself be called ``order``
    (an n-gram order), which must not collide with the order column. ``x`` is what the
    figure draws against: the sweep's ``x`` for the model (training tokens for a data-size
    sweep) or else the value; ``group`` the value of the sweep it lies within, if any.
    """
    models = table[sweep["source"]]
    xs, groups = sweep.get("x") or {}, sweep.get("groups") or {}
    return [
        {
            "parameter": sweep["parameter"],
            "value": value,
            "x": xs.get(model, value),
            "group": groups.get(model),
            "model": model,
            "order": order,
            "gap_pct": leaf["gap_pct"],
            "gap_pct_low": leaf["gap_pct_low"],
            "gap_pct_high": leaf["gap_pct_high"],
        }
        for model, value in sorted(sweep["models"].items(), key=lambda kv: (kv[1], kv[0]))
        if model in models
        for order, leaf in models[model].items()
    ]


def csv_text(rows: Sequence[Mapping[str, Any]], fields: Sequence[str]) -> str:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, list(fields), lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buffer.getvalue()
