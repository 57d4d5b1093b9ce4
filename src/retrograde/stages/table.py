"""Stage ``table``: collect the cells the grid names into the gap table, report and plots.

``python -m retrograde.stages.table`` reads ``params.yaml`` and, for every cell the grid
names (never a glob, so cells left over from a larger grid are ignored), the test
log-probabilities; it writes ``metrics.json`` (``{source: {model: {order: leaf}}}``),
``report.md``, ``cells.csv`` (one row per fit cell: per-seed bits and gap, the cell's
``budget.json`` and validation score) and ``plots/`` through
:func:`retrograde.report.write_all`.

Fair comparisons: every leaf carries ``budget`` (each ``budget.json`` field, mean over
seeds), and ``budget_unequal`` names the counted budgets (``train_tokens``, ``steps``,
``n_params``) on which the model's orders differ by more than 5%. A tuned model's row
compares, per order, the trial with the lowest validation loss (never the test loss); its
leaves add ``tuned_params`` (the winning setting), ``tuned_model``,
``valid_bits_per_token``, ``shared_gap_pct`` (the gap of the shared setting) and
``tuning_gap_change_pct`` (tuned minus shared, in percentage points). Trial models are
not rows of their own; their cells are in ``cells.csv``.
"""

from __future__ import annotations

if __name__ == "__main__":  # a command of a run: the run's stage server may run it (server.py)
    from retrograde.stages.server import delegate

    delegate("table")

import argparse
import hashlib
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__, stats
from ..config import (
    TRAIN_FRACTION,
    ModelConfig,
    RetrogradeConfig,
    StudyConfig,
    cell_dir,
    check_stats,
    fitted_seed,
    load_params,
    order_dir,
    seeds_paired,
    units_dir,
)
from ..data import Ragged, SequenceSet, resolve_train_sample
from ..errors import DataError
from . import run_stage
from .fit import training_units
from .units import SPAN_IDS_FILE

__all__ = ["collect", "main"]


def _read_cell(wdir: Path, source: str, model: str, order: str, seed: int) -> tuple[Any, Any]:
    """(flat test log-probs, learning curve) of one cell; a missing file names the cell."""
    folder = wdir / str(cell_dir(source, model, order, seed))
    try:
        values = np.load(folder / "test_logprobs.npy", allow_pickle=False)
        curve = json.loads((folder / "curve.json").read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise DataError(
            f"cell {source}/{model}/{order}/seed{seed} has no results ({exc.filename}); "
            "fit it with `retrograde run`"
        ) from exc
    return values, curve


def _read_budget(wdir: Path, source: str, model: str, order: str, seed: int) -> dict[str, Any]:
    """The cell's ``budget.json`` (``None`` for every field when an older fit wrote none)."""
    path = wdir / str(cell_dir(source, model, order, seed)) / "budget.json"
    found = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
    return {key: found.get(key) for key in stats.BUDGET_FIELDS}


def _read_valid(wdir: Path, source: str, model: str, order: str, seed: int) -> float | None:
    """The cell's validation bits per token (``valid.json``); None when it has none."""
    path = wdir / str(cell_dir(source, model, order, seed)) / "valid.json"
    found = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
    value = found.get("bits_per_token")
    return float(value) if isinstance(value, (int, float)) else None


def _seed_rows(
    wdir: Path,
    source: str,
    model: str,
    unit_nll: dict[str, np.ndarray],
    curves: dict[str, Any],
    seeds: list[int],
    reference: str,
    test: SequenceSet,
    cell_seeds: list[int],
) -> list[dict[str, Any]]:
    """One row per seed of one model and order: per-seed bits and gap, last validation
    score, and the budget of the cell that holds the seed's results (``cell_seeds``)."""
    n_tokens = max(int(len(test.tokens)), 1)
    rows = []
    for order, losses in unit_nll.items():
        for row, seed in enumerate(seeds):
            total, reference_total = float(losses[row].sum()), float(unit_nll[reference][row].sum())
            scored = [p for p in curves[order][row] if p.get("valid_bits_per_token") is not None]
            rows.append(
                {
                    "source": source,
                    "model": model,
                    "order": order,
                    "seed": seed,
                    "bits_per_token": stats.rounded(total / np.log(2) / n_tokens),
                    "gap_pct": stats.rounded(100.0 * (total / reference_total - 1.0)),
                    "epochs": len(curves[order][row]),
                    "last_valid_bits_per_token": (
                        stats.rounded(scored[-1]["valid_bits_per_token"]) if scored else None
                    ),
                    "test_units": len(test),
                    "test_tokens": int(len(test.tokens)),
                    "valid_bits_per_token": _rounded_or_none(
                        _read_valid(wdir, source, model, order, cell_seeds[row])
                    ),
                    **_read_budget(wdir, source, model, order, cell_seeds[row]),
                }
            )
    return rows


def _rounded_or_none(value: float | None) -> float | None:
    return None if value is None else stats.rounded(value)


def _baseline_bits(
    wdir: Path, source: str, reference: str, spec: ModelConfig, seeds: list[int]
) -> float:
    """Bits per token of a bigram (``ngram``, order ``stats.BASELINE_NGRAM_ORDER``) fitted on
    the reference order's training units and scored on its test units: a floor of effort
    that any model worth reading should beat. When the model's seeds train on samples of
    the units (``train_sample``), the bigram is fitted on each seed's sample and its losses
    averaged over the seeds, so both saw the same units."""
    from .. import families

    folder = wdir / str(order_dir(source, reference))
    train, test = SequenceSet.load(folder / "train"), SequenceSet.load(folder / "test")
    family = families.registry.get(spec.family)
    samples = {seed: training_units(spec, family, train, seed) for seed in seeds}
    if all(sample is train for sample in samples.values()):
        samples = {0: train}  # every seed saw every unit: one fit
    nats = 0.0
    for seed, units in samples.items():
        model = families.make("ngram", order=stats.BASELINE_NGRAM_ORDER).fit(units, seed=seed)
        nats -= float(model.logprobs(test).values.sum())
    return nats / len(samples) / float(np.log(2)) / max(int(len(test.tokens)), 1)


def _training_flags(
    source: str,
    models: dict[str, dict[str, dict[str, Any]]],
    curves: dict[str, dict[str, list[Any]]],
    reference: str,
    baselines: dict[str, float],
) -> list[str]:
    """Mark under-trained cells in their leaves; return the report's warning lines.

    ``baselines`` holds each model's :func:`_baseline_bits`."""
    lines = []
    name = f"a bigram (ngram order {stats.BASELINE_NGRAM_ORDER}) fitted on the same training units"
    for model, leaves in models.items():
        baseline = baselines[model]
        falling: list[str] = []
        n_fits = 0
        for order, leaf in leaves.items():
            leaf["baseline_bits_per_token"] = stats.rounded(baseline)
            leaf["worse_than_baseline"] = stats.worse_than_baseline(
                leaf["bits_per_token"], baseline
            )
            per_seed = [stats.still_falling(curve) for curve in curves[model][order]]
            n_fits += len(per_seed)
            leaf["still_improving"] = any(per_seed)
            falling += [order] * sum(per_seed)
        if leaves[reference]["worse_than_baseline"]:
            lines.append(
                f"source {source!r}: model {model!r} scores "
                f"{leaves[reference]['bits_per_token']:.4f} bits/token in the reference order, "
                f"worse than {name} ({baseline:.4f}); it has not learned what a simple model "
                "learns, so its gaps may reflect its training, not the order"
            )
        if falling:
            orders = ", ".join(dict.fromkeys(falling))
            lines.append(
                f"source {source!r}: model {model!r}: {len(falling)} of {n_fits} fits "
                f"(orders {orders}) ended with the validation loss still falling by more than "
                f"{stats.STEEP_FALL:.0%} per epoch; train longer (more epochs, or a token "
                "budget) before reading its gaps"
            )
    return lines


def _baselines(wdir: Path, source: str, config: RetrogradeConfig) -> dict[str, float]:
    """:func:`_baseline_bits` of every model fitted on ``source`` (fitted once per sample)."""
    from .. import families

    study, found, out = config.study, {}, {}
    for model in study.models_on(source):
        spec, seeds = study.models[model], study.seeds_of(model)
        scheme = resolve_train_sample(spec.train_sample, families.registry.get(spec.family))
        key = (scheme, tuple(seeds) if scheme != "none" else ())
        if key not in found:
            found[key] = _baseline_bits(wdir, source, study.reference_order, spec, seeds)
        out[model] = found[key]
    return out


def _data_hash(units: SequenceSet) -> str:
    digest = hashlib.sha256()
    digest.update(np.ascontiguousarray(units.tokens, dtype="<i4").tobytes())
    digest.update(np.ascontiguousarray(units.offsets, dtype="<i8").tobytes())
    return digest.hexdigest()


def _order_losses(
    wdir: Path, where: tuple[str, str, str], cell_seeds: list[int], test: SequenceSet
) -> tuple[np.ndarray, np.ndarray, Ragged | None, list[Any]]:
    """One (source, model, order) over its seeds; ``cell_seeds[k]`` is the seed of the cell
    holding seed ``k``'s results (:func:`retrograde.config.fitted_seed`).

    Returns ``(unit_nll, end_nll, natural, curves)``: (n_seeds, n_units) nats per test unit,
    the end marker's share of them, the seed-averaged per-position losses in natural order
    (end marker last; None when the order acted on characters before a learned tokenizer),
    one curve a seed.
    """
    source, model, order = where
    folder = wdir / str(order_dir(source, order))
    positions_path = folder / "positions_test.npy"
    positions = None
    if (folder / "tokenizer.json").is_file():
        # Orders acted on characters before tokenizing: the order's own test tokens, which
        # do not map to natural positions one to one.
        test = SequenceSet.load(folder / "test")
    elif positions_path.is_file():
        positions = np.load(positions_path, allow_pickle=False)
    else:
        raise DataError(
            f"order {order!r} of source {source!r} was never written "
            f"({positions_path.name} missing); run `retrograde run`"
        )
    # Each unit has len + 1 scores (end marker last): offsets of the flat score arrays.
    score_offsets = np.concatenate([[0], np.cumsum(test.lengths + 1)]).astype(np.int64)
    unit_nll, end_nll, losses, curves = [], [], [], []
    for seed in cell_seeds:
        values, curve = _read_cell(wdir, source, model, order, seed)
        logprobs = Ragged(values, score_offsets)
        unit_nll.append(stats.unit_nll(logprobs))
        end_nll.append(-values[score_offsets[1:] - 1])  # the last score of each unit
        if positions is not None:
            losses.append(stats.natural_order_losses(logprobs, positions, test).values)
        curves.append(curve)
    natural = Ragged(np.mean(losses, axis=0), score_offsets) if positions is not None else None
    return np.stack(unit_nll), np.stack(end_nll), natural, curves


def _check_floor(
    unit_nll: np.ndarray,
    floors: np.ndarray,
    where: tuple[str, str, str],
    seeds: list[int],
    test: SequenceSet,
) -> None:
    """Refuse a cell that scores below the exact floor by more than noise."""
    n_tokens = max(int(len(test.tokens)), 1)
    for row, seed in enumerate(seeds):
        excess = stats.below_floor(unit_nll[row], floors)
        if excess is not None:
            bits = float(unit_nll[row].sum()) / np.log(2) / n_tokens
            floor_bits = float(floors.sum()) / np.log(2) / n_tokens
            raise DataError(
                f"cell {'/'.join(where)}/seed{seed} scores {bits:.4f} bits/token, below the "
                f"exact floor {floor_bits:.4f} by more than noise (mean {excess:+.4g} nats per "
                f"unit, over {stats.FLOOR_Z:g} standard errors); no model beats the true distribution: "
                "test units leaked into training, or the probabilities do not sum to 1"
            )


def _model_results(
    wdir: Path,
    source: str,
    model: str,
    config: RetrogradeConfig,
    test: SequenceSet,
    floors: Any,
    replicates: dict[str, Any] | None = None,
    seed_rows: list[dict[str, Any]] | None = None,
    chosen: dict[str, str] | None = None,
) -> tuple[dict[str, Any], dict[str, Ragged | None], dict[str, Any]]:
    """One model on one source: (its table leaves, natural-order losses, curves) per order.

    ``replicates``, when given, receives what each order's interval was drawn from (for the
    simultaneous intervals); ``seed_rows`` one row per fit cell (:func:`_seed_rows`);
    ``chosen`` names, per order, the (trial) model whose cells stand for ``model`` in that
    order."""
    study, stats_config = config.study, config.stats
    seeds = study.seeds_of(model)
    cell_model = {order: (chosen or {}).get(order, model) for order in study.orders}
    # a model that ignores the seed was fitted once: every seed reads that cell
    cell_seeds = {
        order: [fitted_seed(study, cell_model[order], seed) for seed in seeds]
        for order in study.orders
    }
    unit_nll: dict[str, np.ndarray] = {}
    end_nll: dict[str, np.ndarray] = {}
    natural: dict[str, Ragged | None] = {}
    curves: dict[str, Any] = {}
    for order in study.orders:
        where = (source, cell_model[order], order)
        unit_nll[order], end_nll[order], natural[order], curves[order] = _order_losses(
            wdir, where, cell_seeds[order], test
        )
        if floors is not None:
            _check_floor(unit_nll[order], floors, where, cell_seeds[order], test)
    # Seeds are paired across orders unless no two fits of this model (of any trial that
    # stands for it) share a training sample or random numbers (config.seeds_paired).
    paired = any(seeds_paired(study.models[name]) for name in set(cell_model.values()))
    leaves = stats.summarize_model(
        unit_nll,
        reference_order=study.reference_order,
        n_tokens=test.lengths,
        n_bytes=test.n_bytes,
        doc_ids=test.doc_ids,
        floors=floors,
        end_nll=end_nll,
        level=stats_config.level,
        interval=stats_config.interval,
        n_boot=stats_config.n_boot,
        seed=stats_config.seed,
        paired_seeds=paired,
        gap_distributions=replicates,
    )
    for order, leaf in leaves.items():
        leaf["seeds_paired"] = paired
        budgets = [
            _read_budget(wdir, source, cell_model[order], order, s) for s in cell_seeds[order]
        ]
        leaf["budget"] = stats.mean_budget(budgets)
    if seed_rows is not None:
        # (no trial stands for the model here: every order's cells are the model's own)
        fitted = cell_seeds[study.reference_order]
        seed_rows += _seed_rows(
            wdir, source, model, unit_nll, curves, seeds, study.reference_order, test, fitted
        )
    if any(losses is None for losses in natural.values()):
        _per_character(wdir, source, leaves)
    return leaves, natural, curves


def _per_character(wdir: Path, source: str, leaves: dict[str, dict[str, Any]]) -> None:
    """Leaves of a source whose orders act on characters before a learned tokenizer.

    Its units are characters, so :func:`stats.summarize_model` gave bits per character;
    each order's own tokens give its ``bits_per_token`` (not comparable across orders).
    """
    for order, leaf in leaves.items():
        own = SequenceSet.load(wdir / str(order_dir(source, order)) / "test")
        bits = leaf["bits_per_token"] * leaf["tokens"]  # total bits, over characters
        leaf["bits_per_character"] = leaf["bits_per_token"]
        leaf["characters"] = leaf["tokens"]
        n_tokens = max(int(len(own.tokens)), 1)
        leaf["tokens"] = int(len(own.tokens))
        leaf["bits_per_token"] = stats.rounded(bits / n_tokens)
        if "floor_bits_per_token" in leaf:  # the same floor, spread over this order's tokens
            floor_bits = leaf["floor_bits_per_token"] * leaf["characters"] / n_tokens
            leaf["floor_bits_per_token"] = stats.rounded(floor_bits)
            leaf["excess_bits_per_token"] = stats.rounded(bits / n_tokens - floor_bits)


def _point_gap(unit_nll: dict[str, np.ndarray], order: str, reference: str) -> float:
    """The point gap (%) from seed-averaged totals, as :func:`stats.summarize_model` has it."""
    total = float(unit_nll[order].sum(axis=1).mean())
    reference_total = float(unit_nll[reference].sum(axis=1).mean())
    return 100.0 * (total / reference_total - 1.0)


def _tuned_trials(
    wdir: Path,
    source: str,
    model: str,
    config: RetrogradeConfig,
    test: SequenceSet,
    floors: Any,
    seed_rows: list[dict[str, Any]],
) -> tuple[dict[str, str], dict[str, dict[str, Any]]]:
    """Pick each order's trial of tuned ``model`` by validation loss (never test).

    Returns ``(chosen, extra)``: ``{order: trial model}`` and, per order, the leaf fields
    a tuned row adds. Appends the rows of the shared cells and of every trial's cells to
    ``seed_rows``.
    """
    study = config.study
    tune = (study.tuning or {})[model]
    settings = tune.models or {}
    seeds, orders, reference = study.seeds_of(model), list(study.orders), study.reference_order
    valid_bits: dict[str, dict[str, float]] = {}
    for trial in settings:
        valid_bits[trial] = {}
        for order in orders:
            scores = [
                _read_valid(wdir, source, trial, order, fitted_seed(study, trial, seed))
                for seed in seeds
            ]
            missing = [seed for seed, score in zip(seeds, scores, strict=True) if score is None]
            if missing:
                raise DataError(
                    f"cell {source}/{trial}/{order}/seed{missing[0]} has no validation score "
                    "(valid.json), which tuning picks by; give the source validation units "
                    "(split fractions) and fit it again with `retrograde run`"
                )
            valid_bits[trial][order] = float(np.mean([float(v or 0.0) for v in scores]))
    chosen = stats.best_trials(valid_bits, orders)
    shared: dict[str, np.ndarray] = {}
    for name in [model, *settings]:
        cell_seeds = [fitted_seed(study, name, seed) for seed in seeds]
        unit_nll, curves = {}, {}
        for order in orders:
            unit_nll[order], _, _, curves[order] = _order_losses(
                wdir, (source, name, order), cell_seeds, test
            )
            if floors is not None:
                _check_floor(unit_nll[order], floors, (source, name, order), cell_seeds, test)
        seed_rows += _seed_rows(
            wdir, source, name, unit_nll, curves, seeds, reference, test, cell_seeds
        )
        if name == model:
            shared = unit_nll
    extra = {
        order: {
            "tuned_model": chosen[order],
            "tuned_params": dict(settings[chosen[order]]),
            "valid_bits_per_token": stats.rounded(valid_bits[chosen[order]][order]),
            "shared_gap_pct": stats.rounded(_point_gap(shared, order, reference)),
        }
        for order in orders
    }
    return chosen, extra


def collect(wdir: Path, config: RetrogradeConfig) -> dict[str, Any]:
    """The keyword arguments of :func:`retrograde.report.write_all` for this grid."""
    check_stats(config.stats)  # the rule composition applied, again on what was read
    study, stats_config = config.study, config.stats
    reference = study.reference_order
    table: dict[str, Any] = {}
    profiles: dict[str, Any] = {}
    spans: dict[str, Any] = {}
    curves: dict[str, Any] = {}
    replicates: dict[str, dict[str, dict[str, Any]]] = {}
    cells: list[dict[str, Any]] = []
    data_hashes: dict[str, str] = {}
    for source in study.sources:
        folder = wdir / str(units_dir(source))
        info = json.loads((folder / "info.json").read_text(encoding="utf-8"))
        test = SequenceSet.load(folder / "test")
        data_hashes[source] = _data_hash(test)
        floors = np.load(folder / "floors.npy") if (folder / "floors.npy").is_file() else None
        table[source], profiles[source], curves[source] = {}, {}, {}
        trials = study.trial_models()
        for model in [m for m in study.models_on(source) if m not in trials]:
            draws = replicates.setdefault(source, {}).setdefault(model, {})
            chosen: dict[str, str] | None = None
            extra: dict[str, dict[str, Any]] = {}
            if model in (study.tuning or {}):
                chosen, extra = _tuned_trials(wdir, source, model, config, test, floors, cells)
            leaves, natural, model_curves = _model_results(
                wdir, source, model, config, test, floors, draws, None if chosen else cells, chosen
            )
            for order, fields in extra.items():
                leaves[order].update(fields)
                change = leaves[order]["gap_pct"] - fields["shared_gap_pct"]
                leaves[order]["tuning_gap_change_pct"] = stats.rounded(change)
            table[source][model], curves[source][model] = leaves, model_curves
            if info.get("reorder") == "characters":
                continue  # no natural positions: no profile, no spans
            mapped = {order: losses for order, losses in natural.items() if losses is not None}
            profiles[source][model] = stats.position_profile(
                mapped, reference_order=reference, n_buckets=stats_config.position_buckets
            )
            named = _spans_of(folder, info)
            if named:
                spans.setdefault(source, {})[model] = stats.span_breakdown(
                    mapped,
                    named,
                    reference_order=reference,
                    doc_ids=test.doc_ids,
                    level=stats_config.level,
                    n_boot=stats_config.n_boot,
                    seed=stats_config.seed,
                )
    stats.adjust_holm(table, reference_order=reference)
    stats.simultaneous_intervals(table, replicates, reference_order=reference)
    flags = _budget_flags(table, reference, study) + [
        line
        for source in study.sources
        for line in _training_flags(
            source, table[source], curves[source], reference, _baselines(wdir, source, config)
        )
    ]
    return {
        "table": table,
        "profiles": profiles,
        "spans": spans,
        "curves": curves,
        "sweeps": _sweeps(study, wdir),
        "provenance": {
            "package_version": __version__,
            "test_units_sha256": data_hashes,
            "params": config.to_dict(),
        },
        "warnings": _seed_warnings(study) + flags + _sweep_notes(study) + _unit_notes(wdir, study),
        "level": stats_config.level,
        "cells": cells,
    }


def _unit_notes(wdir: Path, study: StudyConfig) -> list[str]:
    """Which unit to compare, for sources whose orders act on characters before tokenizing."""
    notes = []
    for source in study.sources:
        info = json.loads((wdir / str(units_dir(source)) / "info.json").read_text("utf-8"))
        if info.get("reorder") == "characters":
            fitted = (
                "a tokenizer fitted on each order's own text"
                if info.get("fit") == "per_order"
                else "one tokenizer fitted on the natural text"
            )
            notes.append(
                f"source {source!r}: orders act on characters, then {fitted} tokenizes, so "
                "token counts differ between orders; compare bits per byte (or "
                "bits_per_character in metrics.json) of the natural text, not bits per "
                "token; gaps are ratios of total NLL and need no unit"
            )
    return notes


def _spans_of(folder: Path, info: dict[str, Any]) -> dict[str, Any]:
    """The named spans of a source's test units: per-unit masks from ``span_ids.npy``
    (records sources), else the fixed ranges of ``info.json`` (calibration sources)."""
    labels = folder / "test" / SPAN_IDS_FILE
    if info.get("span_names") and labels.is_file():
        return stats.span_masks(np.load(labels, allow_pickle=False), list(info["span_names"]))
    return {k: (int(v[0]), int(v[1])) for k, v in (info.get("spans") or {}).items()}


def _seed_warnings(study: StudyConfig) -> list[str]:
    """The report's caution about too few seeds, naming the models when not all share it."""
    few: dict[int, list[str]] = {}
    rows = [m for m in study.models if m not in study.trial_models()]
    for model in rows:
        n_seeds = len(study.seeds_of(model))
        if stats.seed_warning(n_seeds):
            few.setdefault(n_seeds, []).append(model)
    warnings = []
    for n_seeds, models in few.items():
        text = str(stats.seed_warning(n_seeds))
        if len(models) < len(rows):
            names = ", ".join(repr(m) for m in models)
            text = f"model{'s' if len(models) > 1 else ''} {names}: {text}"
        warnings.append(text)
    return warnings


def _budget_flags(table: dict[str, Any], reference: str, study: StudyConfig) -> list[str]:
    """Mark, in every leaf, the counted budgets its model's orders differ on by more than
    5% (``budget_unequal``); return the report's warning lines.

    A family whose parameter count follows the data (``Family.parameters_follow_data``:
    an n-gram stores the types each order's data holds) is not compared on ``n_params``:
    no setting could hold it equal."""
    from .. import families

    lines = []
    for source, models in table.items():
        for model, leaves in models.items():
            family = families.registry.get(study.models[model].family)
            fields = [
                field
                for field in stats.COMPARED_BUDGETS
                if field != "n_params" or not getattr(family, "parameters_follow_data", False)
            ]
            budgets = {o: leaf["budget"] for o, leaf in leaves.items()}
            unequal = stats.unequal_budgets(budgets, fields)
            for leaf in leaves.values():
                leaf["budget_unequal"] = sorted(unequal)
            if not unequal:
                continue
            differing = ", ".join(
                f"{field} by {spread:.0%} ("
                + ", ".join(f"{o} {leaf['budget'][field]:,.0f}" for o, leaf in leaves.items())
                + ")"
                for field, spread in unequal.items()
            )
            lines.append(
                f"source {source!r}: model {model!r}: its orders consumed budgets differing by "
                f"more than {stats.BUDGET_TOLERANCE:.0%}, {differing} (means per fit); the gap "
                "mixes the order with the budget (hold one equal with study.equal_budget)"
            )
    return lines


def _train_tokens(wdir: Path, source: str, spec: ModelConfig, seeds: list[int]) -> float:
    """Tokens in the training units model ``spec`` trains on (its ``train_fraction``, then
    its seed's ``train_sample``), mean over ``seeds``: what the fit stage trains on."""
    from .. import families

    train = SequenceSet.load(wdir / str(units_dir(source)) / "train")
    family = families.registry.get(spec.family)
    sizes = [len(training_units(spec, family, train, seed).tokens) for seed in seeds]
    return float(np.mean(sizes))


def _sweeps(study: StudyConfig, wdir: Path) -> dict[str, Any]:
    """One report sweep per (sweep, source): ``{source, parameter, models: {name: value}}``.

    A data-size sweep (parameter ``train_fraction``) adds ``x: {name: training tokens}``
    and ``x_label``, so it is drawn against training tokens; a sweep within another adds
    ``groups: {name: the other sweep's value}`` and ``group_parameter``.
    """
    out = {}
    for name, sweep in study.sweeps.items():
        sources = study.sources_of(sweep.model)
        for source in sources:
            key = name if len(sources) == 1 else f"{name}-{source}"
            entry: dict[str, Any] = {
                "source": source,
                "parameter": sweep.parameter,
                "models": sweep.models or {},
                "held": _held(study, sweep),
            }
            if sweep.parameter == TRAIN_FRACTION:
                entry["x"] = {
                    model: _train_tokens(wdir, source, study.models[model], study.seeds_of(model))
                    for model in (sweep.models or {})
                }
                entry["x_label"] = "training tokens (mean over seeds)"
            if sweep.within is not None:
                entry["groups"] = sweep.groups or {}
                entry["group_parameter"] = study.sweeps[sweep.within].parameter
            out[key] = entry
    return out


#: how the report names what a sweep held equal
_HELD_WORDS = {"steps": "optimizer steps", "tokens": "training tokens"}


def _held(study: StudyConfig, sweep: Any) -> str | None:
    """What every value of ``sweep`` trained with equally, e.g. ``optimizer steps (step_budget=500)``."""
    if sweep.hold is None:
        return None
    from .. import families

    family = families.registry.get(study.models[sweep.model].family)
    parameter = dict(getattr(family, "budget_parameters", {})).get(sweep.hold, sweep.hold)
    value = study.models[sweep.model].params.get(parameter)
    return f"{_HELD_WORDS.get(sweep.hold, sweep.hold)} ({parameter}={value})"


def _sweep_notes(study: StudyConfig) -> list[str]:
    """One report line per sweep of a budgeted family: what its values held equal."""
    notes = []
    for name, sweep in study.sweeps.items():
        held = _held(study, sweep)
        if held is not None:
            notes.append(
                f"sweep {name!r} ({sweep.parameter} of {sweep.model!r}): every value trained "
                f"with the same {held}; the budget section shows what else differs"
            )
    return notes


def _body(args: argparse.Namespace) -> None:
    from .. import report

    wdir = Path(args.params).resolve()
    report.write_all(wdir, **collect(wdir, load_params(wdir)))


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.table``."""
    return run_stage("table", lambda parser: None, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
