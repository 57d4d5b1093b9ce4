"""``retrograde check [--dir HOST] [OVERRIDES]``: what ``retrograde run`` would do, without fitting.

Three checks, in the order a user needs them:

1. the config composes and validates (``conf/retrograde/`` plus Hydra overrides, exactly as
   ``run`` composes it; any bad key or value is one line, exit status 2);
2. every order round-trips every unit of every source, on the real data, cut and split as
   the ``units`` stage cuts it (a failure names the order and the unit, exit status 1);
3. which fit cells DVC would run and which are already up to date. DVC can only answer
   for the composed config, so ``params.yaml`` and the stage file are first brought up to
   date exactly as ``run`` does (written only when their content changes, and the report
   names every file written); then
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
from ..config import (
    DVC_FILE,
    RetrogradeConfig,
    fit_stage_name,
    grid_size,
    reorder_stage_name,
    units_stage_name,
)
from ..data import SPLITS, tokenizers
from ..errors import DataError, PluginError
from ._corpus_paths import missing_file_hint
from ._driver import compose_for, write_pipeline_files
from ._lock import pipeline_lock
from ._repo import HostRepo, run_dvc

__all__ = [
    "VOCABULARY_SHOWN",
    "cell_status",
    "check_host",
    "format_host_check",
    "format_vocabulary",
    "round_trip_orders",
    "vocabulary_listing",
]

#: vocabulary entries the text report shows per source (``--vocab`` and ``--json``: all)
VOCABULARY_SHOWN = 40


def vocabulary_listing(tokenizer: Any, vocab_size: int) -> dict[str, Any]:
    """``{"size", "tokenizer", "tokens"}``: ``tokens[i]`` is what id ``i`` stands for.

    ``tokens`` is None for a source without a text tokenizer (its units are ids already).
    """
    return {
        "size": int(vocab_size),
        "tokenizer": None if tokenizer is None else tokenizer.name,
        "tokens": None if tokenizer is None else tokenizers.token_texts(tokenizer),
    }


def format_vocabulary(source: str, vocabulary: dict[str, Any], limit: int | None) -> list[str]:
    """Lines listing ``id token`` pairs of a :func:`vocabulary_listing` (``limit``: at most)."""
    size, tokens = vocabulary["size"], vocabulary["tokens"]
    if tokens is None:
        return [f"vocabulary of {source!r}: ids 0..{size - 1} (token ids, no text tokenizer)"]
    shown = tokens if limit is None else tokens[:limit]
    head = f"vocabulary of {source!r} ({vocabulary['tokenizer']}, {size} ids, id token):"
    if len(shown) < len(tokens):
        head += f" first {len(shown)}; `check --vocab` or `--json` lists all"
    lines, line = [head], "   "
    for token_id, text in enumerate(shown):
        entry = f" {token_id} {text}"
        if len(line) + len(entry) > 88:
            lines.append(line)
            line = "   "
        line += entry
    return [*lines, line]


def round_trip_orders(root: Path, config: RetrogradeConfig) -> dict[str, dict[str, Any]]:
    """Cut every source into units as the ``units`` stage does and round-trip every order.

    Returns ``{source: {"units": n_units, "tokens": n_tokens, "orders": [order, ...]}}``.

    Raises
    ------
    BijectionError
        The first order that fails on a unit, naming the order, the unit and an excerpt.
    """
    from ..stages.reorder import bind_order
    from ..stages.units import configured_units

    study = config.study
    built = {name: orders.make(spec.name, **spec.params) for name, spec in study.orders.items()}
    checked: dict[str, dict[str, Any]] = {}
    for source_name, spec in study.sources.items():
        made = configured_units(source_name, spec, root)
        splits = made.splits
        for order_name, unbound in built.items():
            where = f"study.orders.{order_name} on source {source_name!r}"
            order = bind_order(unbound, {"source": source_name, **made.info}, order_name)
            order = order.with_tokenizer(made.tokenizer, where=where)
            for split in SPLITS:
                try:
                    orders.verify_bijection(order, splits[split], order_name=order_name)
                except PluginError as exc:  # the order's code failed: name its config key
                    raise exc.prefixed(f"study.orders.{order_name}") from exc
        checked[source_name] = {
            "units": int(sum(len(splits[s]) for s in SPLITS)),
            "tokens": int(sum(len(splits[s].tokens) for s in SPLITS)),
            "orders": list(built),
            "vocabulary": vocabulary_listing(made.tokenizer, int(made.info["vocab_size"])),
            "test_units": len(splits["test"]),
            "test_ids": spec.split.test_ids,
            "max_units": spec.subsample.max_units,
            "units_before_cap": made.info.get("summary", {}).get("units_before_cap"),
        }
    return checked


def _changed(host: HostRepo, targets: list[str]) -> set[str]:
    """The stages ``dvc status --with-deps`` reports as changed, as full DVC names."""
    if not targets:
        return set()
    result = run_dvc(host.root, ["status", "--json", "--with-deps", *targets])
    return set(json.loads(result.stdout or "{}"))


def cell_status(host: HostRepo, config: RetrogradeConfig) -> dict[str, Any]:
    """Fit stage names split into ``to_run`` and ``up_to_date``, as DVC sees them.

    DVC answers for the composed config, the stage file and the host's own stages
    upstream of each source (a changed preparation script reruns everything built on its
    output), so ``params.yaml`` and the stage file are brought up to date first, as ``run``
    does, holding the pipeline folder's lock; ``written`` lists the files that rewrote
    (host-relative). ``stale_inputs`` lists, per source, the host's stages that must run
    before its files are current.
    """
    cells = config.cells()
    ours = f"{DVC_FILE.as_posix()}:"
    with pipeline_lock(host.root, "retrograde check"):
        written = [
            path.relative_to(host.root).as_posix() for path in write_pipeline_files(host, config)
        ]
        changed = _changed(host, [host.target(fit_stage_name(*cell)) for cell in cells])
        stale_inputs: dict[str, list[str]] = {}
        if any(not name.startswith(ours) for name in changed):
            for source in config.study.sources:  # which sources the host stages feed
                upstream = _changed(host, [host.target(units_stage_name(source))])
                host_stages = sorted(n for n in upstream if not n.startswith(ours))
                if host_stages:
                    stale_inputs[source] = host_stages
    changed = {name.rpartition(":")[2] for name in changed}
    report: dict[str, Any] = {
        "to_run": [],
        "up_to_date": [],
        "stale_inputs": stale_inputs,
        "written": written,
    }
    for source, model, order, seed in cells:
        name = fit_stage_name(source, model, order, seed)
        upstream = {name, reorder_stage_name(source, order), units_stage_name(source)}
        stale = bool(upstream & changed) or source in stale_inputs
        report["to_run" if stale else "up_to_date"].append(name)
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
    rank = _check_rank(config, host.root)  # before anything is written, as rank --dry
    _check_source_files(host, config)
    sources = round_trip_orders(host.root, config)
    cells = cell_status(host, config)
    written = cells.pop("written")
    return {
        **({"rank": rank} if rank is not None else {}),
        "written": written,
        "grid": {
            "sources": list(study.sources),
            "models": list(study.models),
            "orders": list(study.orders),
            "seeds": [int(s) for s in study.seeds],
            # (source, model, order, seed) cells; a model that ignores the seed has one fit
            # stage per (source, model, order), so there may be fewer fit stages
            "cells": grid_size(study),
            "fit_stages": len(config.cells()),
        },
        "round_trip": sources,
        "cells": cells,
    }


def _check_rank(config: Any, root: Path) -> dict[str, Any] | None:
    """The config's ``rank`` block checked as ``retrograde rank --dry`` checks it (values,
    the space of candidates, the proxy family); None without one. Raises ``ConfigError``."""
    if config.rank is None:
        return None
    from ..config import rank_candidates, rank_proxy

    candidates = rank_candidates(config)
    rank_proxy(config, root)
    rank = config.rank
    return {
        "source": rank.source,
        "model": rank.model,
        "proxy": rank.proxy.family,
        "top_k": int(rank.top_k),
        "candidates": list(candidates),
    }


def format_host_check(
    report: dict[str, Any], *, vocabulary_limit: int | None = VOCABULARY_SHOWN
) -> str:
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
    stages = grid.get("fit_stages", grid["cells"])
    if stages != grid["cells"]:
        lines[0] += f" in {stages} fit stages (a model that ignores the seed is fitted once)"
    for source, info in report["round_trip"].items():
        lines.append(
            f"round trip: source {source!r}: {len(info['orders'])} order(s) on "
            f"{info['units']} units ({info['tokens']} tokens): ok"
        )
        if info.get("test_ids"):
            lines.append(
                f"  test split: the {info['test_units']} units {info['test_ids']} lists "
                "(the others split train/valid by the hash)"
            )
        cap, before = info.get("max_units"), info.get("units_before_cap")
        if cap is not None and before is not None and before > cap:
            lines.append(f"  subsample: {cap} of {before} units kept (subsample.max_units)")
        if "vocabulary" in info:
            lines += format_vocabulary(source, info["vocabulary"], vocabulary_limit)
    rank = report.get("rank")
    if rank:
        lines.append(
            f"rank: {len(rank['candidates'])} candidate orders for source {rank['source']!r}; "
            f"the best {rank['top_k']} by {rank['proxy']} on validation would be confirmed "
            f"with model {rank['model']!r} (`retrograde rank`): ok"
        )
    cells = report["cells"]
    for source, stages in cells.get("stale_inputs", {}).items():
        lines.append(
            f"note: source {source!r} reads files your stage(s) {', '.join(stages)} must "
            "remake first (they changed); the round trip above used the files as they are "
            "now; `retrograde run` (or `dvc repro`) remakes them"
        )
    lines.append(f"cells: {len(cells['up_to_date'])} up to date, {len(cells['to_run'])} to run")
    lines += [f"  to run: {name}" for name in cells["to_run"]]
    if report.get("written"):
        lines.append(
            f"wrote {', '.join(report['written'])}: brought up to date from the config as "
            "`retrograde run` would, so DVC could answer (commit them with your config)"
        )
    return "\n".join(lines)
