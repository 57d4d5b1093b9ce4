"""``retrograde check [--dir HOST] [OVERRIDES]``: what ``retrograde run`` would do, without fitting.

Three checks, in the order a user needs them:

1. the config composes and validates (``conf/retrograde/`` plus Hydra overrides, exactly as
   ``run`` composes it; any bad key or value is one line, exit status 2);
2. every order round-trips every unit of every source, on the real data, cut and split as
   the ``units`` stage cuts it (a failure names the order and the unit, exit status 1);
3. which fit cells DVC would run and which are already up to date. DVC can only answer
   for the composed config, so ``params.yaml`` and the stage file are first brought up to
   date exactly as ``run`` does (written only when their content changes); then
   ``dvc status --with-deps`` on the fit stages says which cells, or the ``units`` and
   ``reorder`` stages they hang from, changed.

A cell counted "to run" may still be restored from the run-cache by ``run --pull``.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .. import orders
from ..config import RetrogradeConfig, fit_stage_name, reorder_stage_name, units_stage_name
from ..data import SPLITS
from ..errors import DataError
from ._corpus_paths import missing_file_hint
from ._driver import compose_for, write_pipeline_files
from ._repo import HostRepo, run_dvc

__all__ = ["cell_status", "check_host", "format_host_check", "round_trip_orders"]


def round_trip_orders(root: Path, config: RetrogradeConfig) -> dict[str, dict[str, Any]]:
    """Cut every source into units as the ``units`` stage does and round-trip every order.

    Returns ``{source: {"units": n_units, "tokens": n_tokens, "orders": [order, ...]}}``.

    Raises
    ------
    BijectionError
        The first order that fails on a unit, naming the order, the unit and an excerpt.
    """
    from ..stages.units import configured_units

    study = config.study
    built = {name: orders.make(spec.name, **spec.params) for name, spec in study.orders.items()}
    checked: dict[str, dict[str, Any]] = {}
    for source_name, spec in study.sources.items():
        splits = configured_units(source_name, spec, root).splits
        for order_name, order in built.items():
            for split in SPLITS:
                orders.verify_bijection(order, splits[split], order_name=order_name)
        checked[source_name] = {
            "units": int(sum(len(splits[s]) for s in SPLITS)),
            "tokens": int(sum(len(splits[s].tokens) for s in SPLITS)),
            "orders": list(built),
        }
    return checked


def cell_status(host: HostRepo, config: RetrogradeConfig) -> dict[str, list[str]]:
    """Fit stage names split into ``to_run`` and ``up_to_date``, as DVC sees them.

    Brings ``params.yaml`` and the stage file up to date first (as ``run`` does).
    """
    write_pipeline_files(host, config)
    cells = config.cells()
    targets = [host.target(fit_stage_name(*cell)) for cell in cells]
    changed: set[str] = set()
    if targets:
        result = run_dvc(host.root, ["status", "--json", "--with-deps", *targets])
        changed = {name.rpartition(":")[2] for name in json.loads(result.stdout or "{}")}
    report: dict[str, list[str]] = {"to_run": [], "up_to_date": []}
    for source, model, order, seed in cells:
        name = fit_stage_name(source, model, order, seed)
        upstream = {name, reorder_stage_name(source, order), units_stage_name(source)}
        report["to_run" if upstream & changed else "up_to_date"].append(name)
    return report


def _check_source_files(host: HostRepo, config: RetrogradeConfig) -> None:
    """A source file that a host DVC stage makes but that is not there yet: say so (one line)."""
    for name, spec in config.study.sources.items():
        files = spec.params.get("files")
        listed = spec.deps or ([files] if isinstance(files, str) else list(files or []))
        for given in listed:
            if not isinstance(given, str) or any(c in given for c in "*?["):
                continue
            hint = (
                None if (host.root / given).exists() else missing_file_hint(host, host.root / given)
            )
            if hint:
                raise DataError(f"source {name!r}: {hint}")


def check_host(host_dir: str, overrides: Sequence[str] = ()) -> dict[str, Any]:
    """Compose, round-trip every order on the data, count cells; a JSON-able dict.

    Raises ``ConfigError``/``DataError`` (one line) for a bad config or input,
    ``HostRepoError`` when ``init`` was not run, and ``BijectionError`` when an order fails
    to round-trip a unit.
    """
    host, config = compose_for(host_dir, overrides)
    study = config.study
    _check_source_files(host, config)
    sources = round_trip_orders(host.root, config)
    cells = cell_status(host, config)
    return {
        "grid": {
            "sources": list(study.sources),
            "models": list(study.models),
            "orders": list(study.orders),
            "seeds": [int(s) for s in study.seeds],
            "cells": len(config.cells()),
        },
        "round_trip": sources,
        "cells": cells,
    }


def format_host_check(report: dict[str, Any]) -> str:
    """The check report as a few readable lines.

    Examples
    --------
    >>> print(format_host_check({
    ...     "grid": {"sources": ["s"], "models": ["m"], "orders": ["forward", "reverse"],
    ...              "seeds": [0], "cells": 2},
    ...     "round_trip": {"s": {"units": 10, "tokens": 99, "orders": ["forward", "reverse"]}},
    ...     "cells": {"to_run": ["fit@s-m-reverse-0"], "up_to_date": ["fit@s-m-forward-0"]}}))
    config: 1 source(s) x 1 model(s) x 2 order(s) x 1 seed(s) = 2 fit cells
    round trip: source 's': 2 order(s) on 10 units (99 tokens): ok
    cells: 1 up to date, 1 to run
      to run: fit@s-m-reverse-0
    """
    grid = report["grid"]
    lines = [
        f"config: {len(grid['sources'])} source(s) x {len(grid['models'])} model(s) x "
        f"{len(grid['orders'])} order(s) x {len(grid['seeds'])} seed(s) = {grid['cells']} fit cells"
    ]
    for source, info in report["round_trip"].items():
        lines.append(
            f"round trip: source {source!r}: {len(info['orders'])} order(s) on "
            f"{info['units']} units ({info['tokens']} tokens): ok"
        )
    cells = report["cells"]
    lines.append(f"cells: {len(cells['up_to_date'])} up to date, {len(cells['to_run'])} to run")
    lines += [f"  to run: {name}" for name in cells["to_run"]]
    return "\n".join(lines)
