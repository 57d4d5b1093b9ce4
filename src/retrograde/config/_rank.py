"""``retrograde rank``'s config: the candidate orders of the space and the confirmation grid.

The ``rank`` block (:class:`~retrograde.config.RankConfig`) names one source, one model of
``study.models`` and a *space* of orders. Every candidate is an ordinary registered order
with parameters (``space: {block_reverse: {size: [2, 4]}}`` gives ``block_reverse_size2``
and ``block_reverse_size4``), so any order a plug-in registers, with any parameters, can
join a space; ``orders`` adds entries of ``study.orders`` (custom ``_target_`` orders) as
they are. :func:`rank_candidates` expands and checks the space; :func:`rank_grid` is the
study that confirms the screened top ``k``: one source, one model, the reference order and
the candidates, composed like any other grid, so each confirmation fit is an ordinary DVC
fit cell.
"""

from __future__ import annotations

import copy
import itertools
import re
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..validation import check_float, check_int, did_you_mean
from ._grid import fit_cells
from ._plugins import _resolve_model, _resolve_order
from ._schema import (
    NAME_PATTERN,
    ModelConfig,
    OrderConfig,
    RankConfig,
    RetrogradeConfig,
    StudyConfig,
)

__all__ = [
    "candidate_name",
    "check_rank",
    "rank_candidates",
    "rank_grid",
    "rank_proxy",
    "rank_reference",
]

_WHERE = "rank"


def _label(value: Any) -> str:
    """A name-safe rendering of a parameter value: 3 -> '3', 0.5 -> '0p5', [1, 2] -> '1_2'."""
    if isinstance(value, (list, tuple)):
        return "_".join(_label(v) for v in value)
    return re.sub(r"[^A-Za-z0-9]", "_", str(value).replace(".", "p").replace("-", "m"))


def candidate_name(order: str, params: dict[str, Any]) -> str:
    """``<order>_<param><value>...`` (``block_reverse_size4``), or the order alone.

    >>> candidate_name("stride", {"step": 2}), candidate_name("reverse", {})
    ('stride_step2', 'reverse')
    """
    base = re.sub(r"[^A-Za-z0-9_]", "_", order.rsplit(".", 1)[-1])
    return "_".join([base, *(f"{key}{_label(value)}" for key, value in params.items())])


def rank_reference(config: RetrogradeConfig) -> str:
    """The order the ranking measures gaps against (the study's when the block names none)."""
    assert config.rank is not None
    return config.rank.reference_order or config.study.reference_order


def check_rank(config: RetrogradeConfig) -> RankConfig:
    """The ``rank`` block's own values, against the composed study; returns the block."""
    rank = config.rank
    study = config.study
    if rank is None:
        raise ConfigError(
            "no rank block in the config; write one in conf/retrograde/rank/NAME.yaml "
            "(first line '# @package rank') and pass +rank=NAME (see docs/guide.md)"
        )
    _known(f"{_WHERE}.source", rank.source, list(study.sources), "study.sources")
    _known(f"{_WHERE}.model", rank.model, list(study.models), "study.models")
    if rank.source not in study.sources_of(rank.model):
        raise ConfigError(
            f"{_WHERE}.model={rank.model!r} is not fitted on source {rank.source!r} (its "
            "sources leave it out); choose another model or add the source to its sources"
        )
    _known(f"{_WHERE}.reference_order", rank_reference(config), list(study.orders), "study.orders")
    for name in rank.orders:
        _known(f"{_WHERE}.orders", name, list(study.orders), "study.orders")
    check_int(_WHERE, "top_k", rank.top_k, 1)
    screening = rank.screening
    check_int(f"{_WHERE}.screening", "eta", screening.eta, 2)
    check_float(
        f"{_WHERE}.screening", "min_fraction", screening.min_fraction, 0.0, 1.0, low_open=True
    )
    check_int(f"{_WHERE}.screening", "seed", screening.seed, 0)
    return rank


def _known(where: str, name: Any, allowed: list[str], group: str) -> None:
    if not isinstance(name, str) or name not in allowed:
        raise ConfigError(
            f"{where}={name!r} is not among {group}{did_you_mean(str(name), allowed)}; "
            f"allowed: one of {', '.join(allowed) or 'none'}"
        )


def rank_candidates(config: RetrogradeConfig) -> dict[str, OrderConfig]:
    """Every candidate of the space, by name, each built once and fully resolved.

    Refuses (one line naming the ``rank.space`` key) an unknown order, a parameter value
    that is not a non-empty list, a parameter the order refuses, two candidates with one
    name, and a space that is empty or holds only the reference order.
    """
    rank = check_rank(config)
    study = config.study
    reference = rank_reference(config)
    found: dict[str, OrderConfig] = {}
    for order, grid in rank.space.items():
        where = f"{_WHERE}.space.{order}"
        if not isinstance(grid, dict):
            raise ConfigError(
                f"{where}={grid!r} is invalid; allowed: a mapping of parameter -> list of "
                "values, or {} for an order without parameters"
            )
        keys = list(grid)
        for key in keys:
            if not isinstance(grid[key], list) or not grid[key]:
                raise ConfigError(
                    f"{where}.{key}={grid[key]!r} is invalid; allowed: a non-empty list of "
                    f"values, e.g. {key}: [{grid[key]!r}]"
                )
        for values in itertools.product(*(grid[key] for key in keys)):
            params = dict(zip(keys, values, strict=True))
            entry = OrderConfig(name=order, params=copy.deepcopy(params))
            _resolve_order(where, entry)
            _add(found, candidate_name(order, params), entry, where)
    for name in rank.orders:
        _add(found, name, copy.deepcopy(study.orders[name]), f"{_WHERE}.orders")
    reference_entry = study.orders[reference]
    same = [
        n
        for n, e in found.items()
        if (e.name, e.params) == (reference_entry.name, reference_entry.params)
    ]
    for name in same:  # the reference is always fitted; as a candidate it would be its own gap
        del found[name]
    for name, entry in found.items():
        other = study.orders.get(name)
        if other is not None and (other.name, other.params) != (entry.name, entry.params):
            raise ConfigError(
                f"{_WHERE}.space: candidate {name!r} is also the name of study.orders.{name}, "
                f"a different order ({other.name} {other.params}); rename that study order "
                "(the two would share one DVC stage and folder)"
            )
    if not found:
        raise ConfigError(
            f"{_WHERE}.space and {_WHERE}.orders hold no candidate besides the reference order "
            f"{reference!r}; add orders, e.g. space: {{reverse: {{}}, stride: {{step: [2, 3]}}}}"
        )
    if rank.top_k > len(found):
        raise ConfigError(
            f"{_WHERE}.top_k={rank.top_k} is more than the {len(found)} candidates of the "
            f"space; allowed: 1..{len(found)}"
        )
    return found


def _add(found: dict[str, OrderConfig], name: str, entry: OrderConfig, where: str) -> None:
    if not NAME_PATTERN.match(name):
        raise ConfigError(f"{where}: candidate name {name!r} is invalid; rename the order")
    if name in found:
        raise ConfigError(
            f"{where}: candidate {name!r} appears twice in the space; drop the duplicate"
        )
    found[name] = entry


def rank_grid(config: RetrogradeConfig, candidates: dict[str, OrderConfig]) -> RetrogradeConfig:
    """The study that confirms ``candidates``: the rank's source and model, the reference
    order first, then the candidates; its fit cells are the pipeline's ordinary ones."""
    rank = check_rank(config)
    study = config.study
    reference = rank_reference(config)
    # The model's entry unchanged (its seeds and sources included): DVC compares a fit
    # cell's params, so a cell fitted by `run` is the same cell here and is not refitted.
    model = copy.deepcopy(study.models[rank.model])
    orders = {reference: copy.deepcopy(study.orders[reference])}
    for name, entry in candidates.items():
        if name in orders:
            raise ConfigError(f"{_WHERE}: candidate {name!r} has the reference order's name")
        orders[name] = copy.deepcopy(entry)
    grid = RetrogradeConfig(
        study=StudyConfig(
            sources={rank.source: copy.deepcopy(study.sources[rank.source])},
            orders=orders,
            models={rank.model: model},
            seeds=list(study.seeds),
            reference_order=reference,
        ),
        stats=copy.deepcopy(config.stats),
    )
    grid.fits = fit_cells(grid.study)
    return grid


def rank_proxy(config: RetrogradeConfig, root: Path) -> ModelConfig:
    """The screening family as a resolved model entry (full params, numerics version)."""
    rank = check_rank(config)
    entry = ModelConfig(family=rank.proxy.family, params=copy.deepcopy(rank.proxy.params))
    if entry.family == "command":
        raise ConfigError(
            f"{_WHERE}.proxy.family='command' is not allowed; the proxy is a cheap built-in "
            "family (ngram or mlp) fitted inside this process"
        )
    _resolve_model(f"{_WHERE}.proxy", entry, root)
    return entry
