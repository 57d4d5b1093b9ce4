"""Stage ``table``: collect the cells the grid names into the gap table, report and plots.

``python -m retrograde.stages.table`` reads ``params.yaml`` and, for every cell the grid
names (never a glob, so cells left over from a larger grid are ignored), the test
log-probabilities; it writes ``metrics.json`` (``{source: {model: {order: leaf}}}``),
``report.md`` and ``plots/`` through :func:`retrograde.report.write_all`.
"""

from __future__ import annotations

import argparse
import hashlib
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__
from ..errors import DataError
from ..sequences import Ragged, SequenceSet
from . import cell_dir, order_dir, read_params, run_stage, units_dir

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


def _data_hash(units: SequenceSet) -> str:
    digest = hashlib.sha256()
    digest.update(np.ascontiguousarray(units.tokens, dtype="<i4").tobytes())
    digest.update(np.ascontiguousarray(units.offsets, dtype="<i8").tobytes())
    return digest.hexdigest()


def _order_losses(
    wdir: Path, where: tuple[str, str, str], seeds: list[int], test: SequenceSet
) -> tuple[np.ndarray, np.ndarray, Ragged, list[Any]]:
    """One (source, model, order) over its seeds.

    Returns ``(unit_nll, end_nll, natural, curves)``: (n_seeds, n_units) nats per test unit,
    the end marker's share of them, the seed-averaged per-position losses in natural order
    (end marker last), one curve a seed.
    """
    from .. import scoring

    source, model, order = where
    positions_path = wdir / str(order_dir(source, order)) / "positions_test.npy"
    if not positions_path.is_file():
        raise DataError(
            f"order {order!r} of source {source!r} was never written "
            f"({positions_path.name} missing); run `retrograde run`"
        )
    positions = np.load(positions_path, allow_pickle=False)
    # Each unit has len + 1 scores (end marker last): offsets of the flat score arrays.
    score_offsets = np.concatenate([[0], np.cumsum(test.lengths + 1)]).astype(np.int64)
    unit_nll, end_nll, losses, curves = [], [], [], []
    for seed in seeds:
        values, curve = _read_cell(wdir, source, model, order, seed)
        logprobs = Ragged(values, score_offsets)
        unit_nll.append(scoring.unit_nll(logprobs))
        end_nll.append(-values[score_offsets[1:] - 1])  # the last score of each unit
        losses.append(scoring.natural_order_losses(logprobs, positions, test).values)
        curves.append(curve)
    natural = Ragged(np.mean(losses, axis=0), score_offsets)
    return np.stack(unit_nll), np.stack(end_nll), natural, curves


def _check_floor(
    unit_nll: np.ndarray,
    floors: np.ndarray,
    where: tuple[str, str, str],
    seeds: list[int],
    test: SequenceSet,
) -> None:
    """Refuse a cell that scores below the exact floor by more than noise."""
    from ..stats import FLOOR_Z, below_floor

    n_tokens = max(int(len(test.tokens)), 1)
    for row, seed in enumerate(seeds):
        excess = below_floor(unit_nll[row], floors)
        if excess is not None:
            bits = float(unit_nll[row].sum()) / np.log(2) / n_tokens
            floor_bits = float(floors.sum()) / np.log(2) / n_tokens
            raise DataError(
                f"cell {'/'.join(where)}/seed{seed} scores {bits:.4f} bits/token, below the "
                f"exact floor {floor_bits:.4f} by more than noise (mean {excess:+.4g} nats per "
                f"unit, over {FLOOR_Z:g} standard errors); no model beats the true distribution: "
                "test units leaked into training, or the probabilities do not sum to 1"
            )


def collect(wdir: Path, params: dict[str, Any]) -> dict[str, Any]:
    """The keyword arguments of :func:`retrograde.report.write_all` for this grid."""
    from .. import stats

    study, stats_config = params["study"], params["stats"]
    reference, seeds = study["reference_order"], [int(s) for s in study["seeds"]]
    table: dict[str, Any] = {}
    profiles: dict[str, Any] = {}
    spans: dict[str, Any] = {}
    curves: dict[str, Any] = {}
    data_hashes: dict[str, str] = {}
    for source in study["sources"]:
        folder = wdir / str(units_dir(source))
        info = json.loads((folder / "info.json").read_text(encoding="utf-8"))
        test = SequenceSet.load(folder / "test")
        data_hashes[source] = _data_hash(test)
        floors = np.load(folder / "floors.npy") if (folder / "floors.npy").is_file() else None
        table[source], profiles[source], curves[source] = {}, {}, {}
        for model in study["models"]:
            unit_nll: dict[str, np.ndarray] = {}
            end_nll: dict[str, np.ndarray] = {}
            natural: dict[str, Ragged] = {}
            curves[source][model] = {}
            for order in study["orders"]:
                unit_nll[order], end_nll[order], natural[order], curves[source][model][order] = (
                    _order_losses(wdir, (source, model, order), seeds, test)
                )
                if floors is not None:
                    _check_floor(unit_nll[order], floors, (source, model, order), seeds, test)
            table[source][model] = stats.summarize_model(
                unit_nll,
                reference_order=reference,
                n_tokens=test.lengths,
                n_bytes=test.n_bytes,
                doc_ids=test.doc_ids,
                floors=floors,
                end_nll=end_nll,
                level=stats_config["level"],
                interval=stats_config.get("interval", "t"),
                n_boot=stats_config["n_boot"],
                seed=stats_config["seed"],
            )
            profiles[source][model] = stats.position_profile(
                natural, reference_order=reference, n_buckets=stats_config["position_buckets"]
            )
            if info.get("spans"):
                named = {k: (int(v[0]), int(v[1])) for k, v in info["spans"].items()}
                spans.setdefault(source, {})[model] = stats.span_breakdown(natural, named)
    stats.adjust_holm(table, reference_order=reference)
    warning = stats.seed_warning(len(seeds))
    return {
        "table": table,
        "profiles": profiles,
        "spans": spans,
        "curves": curves,
        "sweeps": _sweeps(study),
        "provenance": {
            "package_version": __version__,
            "test_units_sha256": data_hashes,
            "params": params,
        },
        "warnings": [warning] if warning else [],
        "level": stats_config["level"],
    }


def _sweeps(study: dict[str, Any]) -> dict[str, Any]:
    """One report sweep per (sweep, source): ``{source, parameter, models: {name: value}}``."""
    out = {}
    for name, sweep in study.get("sweeps", {}).items():
        for source in study["sources"]:
            key = name if len(study["sources"]) == 1 else f"{name}-{source}"
            models = sweep.get("models", {})
            out[key] = {"source": source, "parameter": sweep["parameter"], "models": models}
    return out


def _body(args: argparse.Namespace) -> None:
    from .. import report

    wdir = Path(args.params).resolve()
    report.write_all(wdir, **collect(wdir, read_params(wdir)))


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.table``."""
    return run_stage("table", lambda parser: None, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
