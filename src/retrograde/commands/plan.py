"""``retrograde plan [--dir HOST] [--shard I/N] [--bare] [--run [--jobs N] [--pull]] [OVERRIDES]``.

Prints the DVC targets of the ``fit`` stages one CI shard should run, one per line, as
``pipelines/retrograde/dvc.yaml:fit@<source>-<model>-<order>-<seed>`` (what ``dvc repro``
accepts from the host root; ``--bare`` prints just the stage names).

The list comes from the composed config (``conf/retrograde/`` plus the overrides, exactly
as ``retrograde run`` composes it), in the matrix order DVC expands the ``fit`` stage:
source, model, order, seed. Shard ``I/N`` (1-based) takes every N-th name starting at the
I-th (round-robin), so each shard gets a mix of models and orders rather than one slow
model's whole block; the N shards together list every stage exactly once.

With ``--run`` the shard is also reproduced: ``params.yaml`` and the stage file are
brought up to date as ``run`` does, the ``reorder`` stages the shard needs run first (DVC
brings their ``units`` and host upstream stages along), then the shard's fit stages run as
``--jobs`` parallel ``dvc repro -s`` processes (:mod:`retrograde.parallel`). A CI job then
shares the results with ``dvc push --run-cache``; see ``docs/ci.md``.
"""

from __future__ import annotations

import argparse
import re
import sys
from collections.abc import Sequence
from typing import Any, TypeVar

from .._validation import check_int
from ..errors import ConfigError, HostRepoError
from ..hostrepo import HostRepo, find_host, run_dvc

__all__ = ["configure", "parse_shard", "run", "shard_of"]

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


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--dir", default=".", metavar="HOST", help="the host repository (default: here)"
    )
    parser.add_argument(
        "--shard", default="1/1", metavar="I/N", help="print shard I of N (1-based; default 1/1)"
    )
    parser.add_argument(
        "--bare", action="store_true", help="print stage names without the stage file path"
    )
    parser.add_argument("--run", action="store_true", help="also reproduce this shard's stages")
    parser.add_argument("--jobs", type=int, default=1, help="with --run: fits run in parallel")
    parser.add_argument(
        "--pull", action="store_true", help="with --run: fetch cached results from the DVC remote"
    )
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, as for `retrograde run`")


def run(args: argparse.Namespace) -> int:
    from ..config import compose
    from ..stages import fit_stage_name, grid_cells

    index, count = parse_shard(args.shard)
    jobs = check_int("option 'plan'", "jobs", args.jobs, low=1)
    host = find_host(args.dir)
    if not host.conf_dir.is_dir():
        raise HostRepoError(
            f"{host.conf_dir} (the retrograde config folder) is missing; run "
            f"`retrograde init --dir {host.root}` first"
        )
    params = compose(host.root, args.overrides)
    cells = grid_cells(params)
    mine = shard_of(cells, index, count)
    names = [fit_stage_name(*cell) for cell in mine]
    for name in names:
        print(name if args.bare else host.target(name))
    print(
        f"retrograde plan: shard {index}/{count}: {len(names)} of {len(cells)} fit stages",
        file=sys.stderr,
    )
    if args.run and names:
        _reproduce(host, params, names, mine, jobs=jobs, pull=args.pull)
    return 0


def _reproduce(
    host: HostRepo,
    params: dict[str, Any],
    names: list[str],
    cells: list[tuple[str, str, str, int]],
    *,
    jobs: int,
    pull: bool,
) -> None:
    """Bring the generated files up to date as ``run`` does, then reproduce the shard."""
    from ..parallel import run_stages_in_parallel
    from ..stages import reorder_stage_name
    from .run import stage_python_first, write_pipeline_files

    write_pipeline_files(host, params)
    upstream = sorted({host.target(reorder_stage_name(s, o)) for s, _, o, _ in cells})
    with stage_python_first():
        run_dvc(
            host.root,
            ["repro", *(["--pull"] if pull else []), *upstream],
            log_path=host.pipeline_dir / "logs" / "plan-upstream.log",
        )
        run_stages_in_parallel(host.root, names, jobs, pull=pull)
    print(f"retrograde plan: reproduced {len(names)} fit stages", file=sys.stderr)
