"""``retrograde rank``: screen a space of orders with a proxy, confirm the top k as DVC cells.

1. Compose the host's config with the overrides (as ``run`` does) and expand the ``rank``
   block's space into candidates (:func:`retrograde.config.rank_candidates`); every bad
   value is refused before any work.
2. Bring the source's ``units`` stage up to date through DVC (a grid of that source alone).
3. Screen: successive halving with the proxy on the validation split
   (:mod:`retrograde.host._screening`; cached by content hash under ``screen/``).
4. Confirm: the top ``k`` and the reference order become the orders of a grid of one
   source and one model (:func:`retrograde.config.rank_grid`), reproduced with ``dvc
   repro`` as ordinary ``reorder`` and ``fit`` cells. A cell fitted before (by an earlier
   rank or a ``run`` with the same model and order) is not fitted again, so widening the
   space fits only new candidates.
5. The table stage's statistics (:func:`retrograde.stages.table.collect`: paired gaps,
   bootstrap over units and seeds, Holm, simultaneous intervals) on those cells give the
   ranking, written to ``pipelines/retrograde/rank/`` (``rank.json``, ``rank.md``,
   ``rank.png``).

The study's own published results (``metrics.json``, ``report.md``, ``plots/``) are not
touched: the ``table`` stage is not run, and ``params.yaml`` and the stage file's units
block are put back to the study's own composition before the command returns.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .. import __version__, report
from ..config import (
    OrderConfig,
    RetrogradeConfig,
    fit_stage_name,
    rank_candidates,
    rank_grid,
    rank_proxy,
    rank_reference,
    reorder_stage_name,
    to_dict,
    units_dir,
    units_stage_name,
)
from ..data import SPLITS, SequenceSet, atomic_dir, atomic_write_json, atomic_write_text
from ..validation import check_int
from ._driver import compose_for, parse_repro_line, stage_environment, write_pipeline_files
from ._lock import pipeline_lock
from ._lockfile import normalize_lock_order
from ._parallel import run_stages_in_parallel, stale_stages
from ._progress import Progress
from ._repo import HostRepo, run_dvc
from ._screening import screen

__all__ = ["RANK_DIR", "SCREEN_DIR", "RankResult", "plan_rank", "rank_orders"]

#: the family-wise level of the Holm verdicts: ``collect`` adjusts at stats.adjust_holm's
#: default alpha of 0.05
FAMILY_LEVEL = 0.95

#: where the ranking is written (replaced whole), relative to the pipeline folder
RANK_DIR = "rank"
#: the screening cache, relative to the pipeline folder
SCREEN_DIR = "screen"


@dataclass
class RankResult:
    """What ``retrograde rank`` found: the JSON-able result and where it was written."""

    host: HostRepo
    result: dict[str, Any]
    written: list[Path] = field(default_factory=list)
    #: DVC's events for the confirmation cells: ran / restored / unchanged stage names
    events: dict[str, list[str]] = field(default_factory=dict)


def _dvc_repro(host: HostRepo, targets: list[str], log_name: str) -> dict[str, list[str]]:
    """``dvc repro TARGETS``; what DVC reported per stage of ours."""
    completed = run_dvc(
        host.root, ["repro", *targets], log_path=host.pipeline_dir / "logs" / log_name
    )
    events: dict[str, list[str]] = {"ran": [], "restored": [], "unchanged": [], "failed": []}
    for line in (completed.stdout or "").splitlines():
        parsed = parse_repro_line(line)
        if parsed is not None and parsed.ours:
            events[parsed.event].append(parsed.stage)
    return events


def _confirm(host: HostRepo, grid: RetrogradeConfig, jobs: int) -> dict[str, list[str]]:
    """Reproduce the grid's reorder stages (units upstream), then its fit cells, ``jobs`` at
    a time, each reported as it starts and ends (as ``run`` reports them)."""
    source = next(iter(grid.study.sources))
    reorders = [host.target(reorder_stage_name(source, order)) for order in grid.study.orders]
    events = _dvc_repro(host, reorders, "rank-confirm.log")
    fits = [fit_stage_name(*cell) for cell in grid.cells()]
    stale = stale_stages(host.root, fits)  # one `dvc status`, not a DVC process per cell
    events.setdefault("unchanged", []).extend(name for name in fits if name not in stale)
    if stale:
        with Progress(len(stale)) as progress:
            run_stages_in_parallel(host.root, stale, jobs, progress=progress)
        for event, stages in progress.counts().items():
            events.setdefault(event, []).extend(stages)
    return events


def plan_rank(
    host_dir: str | os.PathLike[str], overrides: Sequence[str] = ()
) -> tuple[RetrogradeConfig, dict[str, OrderConfig]]:
    """The composed config and the checked candidates of its space; nothing is written."""
    host, config = compose_for(host_dir, overrides)
    candidates = rank_candidates(config)
    rank_proxy(config, host.root)
    return config, candidates


def rank_orders(
    host_dir: str | os.PathLike[str],
    overrides: Sequence[str] = (),
    *,
    jobs: int = 1,
    note: Callable[[str], None] | None = None,
) -> RankResult:
    """Screen the rank block's space, confirm the top k as fit cells, rank them (module doc).

    ``note`` receives one line per step (the command prints them to stderr)."""
    from ..stages.table import collect

    say = note or (lambda line: None)
    jobs = check_int("option 'rank'", "jobs", jobs, low=1)
    host, config = compose_for(host_dir, overrides)
    candidates = rank_candidates(config)
    proxy = rank_proxy(config, host.root)
    rank = config.rank
    assert rank is not None
    reference = rank_reference(config)
    with pipeline_lock(host.root, "retrograde rank"):
        try:
            base = rank_grid(config, {})
            write_pipeline_files(host, base)
            with stage_environment(host):
                _dvc_repro(host, [host.target(units_stage_name(rank.source))], "rank-units.log")
            folder = host.pipeline_dir / str(units_dir(rank.source))
            splits = {name: SequenceSet.load(folder / name) for name in SPLITS if name != "test"}
            screening = rank.screening
            say(f"screening {len(candidates)} candidates with {proxy.family} on validation")
            rounds = screen(
                candidates,
                (reference, config.study.orders[reference]),
                proxy,
                splits,
                top_k=rank.top_k,
                eta=screening.eta,
                min_fraction=screening.min_fraction,
                seed=screening.seed,
                cache_dir=host.pipeline_dir / SCREEN_DIR,
            )
            top = rounds[-1].kept
            for number, done in enumerate(rounds, start=1):
                say(
                    f"round {number}: {done.train_units} training units, "
                    f"{len(done.bits_per_token) - 1} scored, kept {', '.join(done.kept)}"
                )
            grid = rank_grid(config, {name: candidates[name] for name in top})
            write_pipeline_files(host, grid)
            with stage_environment(host):
                events = _confirm(host, grid, jobs)
            collected = collect(host.pipeline_dir, grid)
        finally:
            write_pipeline_files(host, config)  # the study's own params and units block
        normalize_lock_order(host.root)  # dvc.lock in stage-file order, as `run` leaves it
        result = _result(config, grid, candidates, proxy, rounds, collected, reference)
        written = _write(host.pipeline_dir / RANK_DIR, result)
    return RankResult(host, result, written, events)


def _result(
    config: RetrogradeConfig,
    grid: RetrogradeConfig,
    candidates: dict[str, OrderConfig],
    proxy: Any,
    rounds: list[Any],
    collected: dict[str, Any],
    reference: str,
) -> dict[str, Any]:
    rank = config.rank
    assert rank is not None
    leaves = collected["table"][rank.source][rank.model]
    rows = report.rank_rows(leaves, reference)
    return {
        "source": rank.source,
        "model": rank.model,
        "reference_order": reference,
        "level": config.stats.level,
        "family_level": FAMILY_LEVEL,
        "ranking": rows,
        "recommendation": report.recommendation(
            rows, reference, level=FAMILY_LEVEL, n_candidates=len(candidates)
        ),
        "leaves": leaves,
        "candidates": {name: to_dict(entry) for name, entry in candidates.items()},
        "screening": {
            "proxy": to_dict(proxy),
            "eta": rank.screening.eta,
            "min_fraction": rank.screening.min_fraction,
            "seed": rank.screening.seed,
            "rounds": [r.to_dict() for r in rounds],
            "top": rounds[-1].kept,
        },
        "warnings": collected["warnings"],
        "provenance": {
            "package_version": __version__,
            "rank": to_dict(rank),
            "test_units_sha256": collected["provenance"]["test_units_sha256"],
            "params": grid.to_dict(),
        },
    }


def _write(out_dir: Path, result: dict[str, Any]) -> list[Path]:
    """``rank.json``, ``rank.md`` and ``rank.png``, published together: the folder is
    written aside and replaces the previous ranking whole (never a mix of two runs)."""
    names = ["rank.json", "rank.md", "rank.png"]
    with atomic_dir(out_dir) as tmp:
        atomic_write_json(tmp / names[0], result)
        atomic_write_text(tmp / names[1], report.format_rank(result, "markdown"))
        report.write_rank_figure(result, tmp / names[2])
    return [out_dir / name for name in names]
