"""CI shards: which fit stages shard ``I/N`` runs, and reproducing them (``retrograde plan``).

The list comes from the composed config (``conf/retrograde/`` plus the overrides, exactly
as ``retrograde run`` composes it), in stage order: source, model, order, seed. Shard
``I/N`` (1-based) takes every N-th name starting at the I-th (round-robin), so each shard
gets a mix of models and orders rather than one slow model's whole block; the N shards
together list every stage exactly once. Reproducing a shard brings the generated files up
to date as ``run`` does, runs the ``reorder`` stages it needs (DVC brings their ``units``
and host upstream stages along), then its fit stages as parallel ``dvc repro -s``
processes. A CI job then shares the results with ``dvc push --run-cache`` (``docs/ci.md``).
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TypeVar

from ..config import RetrogradeConfig, fit_stage_name, reorder_stage_name
from ..errors import ConfigError
from ..stages.server import stage_server
from ..validation import check_int
from ._driver import compose_for, stage_environment, warm_modules, write_pipeline_files
from ._lock import pipeline_lock
from ._parallel import run_stages_in_parallel
from ._repo import HostRepo, run_dvc

__all__ = ["Shard", "parse_shard", "plan_shard", "reproduce_shard", "shard_of"]

T = TypeVar("T")

_SHARD = re.compile(r"^\s*(\d+)\s*/\s*(\d+)\s*$")


def parse_shard(text: str) -> tuple[int, int]:
    """``"I/N"`` -> ``(I, N)`` with ``1 <= I <= N``.

    Examples
    --------
    >>> parse_shard("2/3")
    (2, 3)
    >>> parse_shard("0/2")
    Traceback (most recent call last):
    ...
    retrograde.errors.ConfigError: option --shard: '0/2' is invalid; allowed: I/N with 1 <= I <= N, e.g. 1/4
    """
    match = _SHARD.match(text)
    if match:
        index, count = int(match[1]), int(match[2])
        if 1 <= index <= count:
            return index, count
    raise ConfigError(
        f"option --shard: {text!r} is invalid; allowed: I/N with 1 <= I <= N, e.g. 1/4"
    )


def shard_of(names: Sequence[T], index: int, count: int) -> list[T]:
    """Round-robin shard ``index`` of ``count`` (1-based): names ``index-1``, ``index-1+count``, ...

    Examples
    --------
    >>> shard_of(["a", "b", "c", "d", "e"], 1, 2), shard_of(["a", "b", "c", "d", "e"], 2, 2)
    (['a', 'c', 'e'], ['b', 'd'])
    """
    return list(names[index - 1 :: count])


@dataclass
class Shard:
    """The fit stages of one shard and everything needed to reproduce them."""

    host: HostRepo
    config: RetrogradeConfig
    names: list[str]
    cells: list[tuple[str, str, str, int]]
    n_cells: int
    #: ``I/N`` as ``(I, N)``
    index: int = 1
    count: int = 1


def plan_shard(host_dir: str | os.PathLike[str], overrides: Sequence[str], shard: str) -> Shard:
    """Compose the config and take shard ``I/N`` of its fit stages (nothing is written)."""
    index, count = parse_shard(shard)
    host, config = compose_for(host_dir, overrides)
    cells = config.cells()
    mine = shard_of(cells, index, count)
    names = [fit_stage_name(*cell) for cell in mine]
    return Shard(host, config, names, mine, len(cells), index, count)


def reproduce_shard(shard: Shard, *, jobs: int = 1, pull: bool = False) -> None:
    """Bring the generated files up to date as ``run`` does, then reproduce the shard."""
    jobs = check_int("option 'plan'", "jobs", jobs, low=1)
    host = shard.host
    upstream = sorted({host.target(reorder_stage_name(s, o)) for s, _, o, _ in shard.cells})
    with pipeline_lock(host.root, "retrograde plan --run"):
        write_pipeline_files(host, shard.config)
        with stage_environment(host), stage_server(warm_modules(shard.config)):
            run_dvc(
                host.root,
                ["repro", *(["--pull"] if pull else []), *upstream],
                log_path=host.pipeline_dir / "logs" / "plan-upstream.log",
            )
            run_stages_in_parallel(host.root, shard.names, jobs, pull=pull)
