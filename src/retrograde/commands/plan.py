"""``retrograde plan [--dir HOST] [--shard I/N] [--bare] [--run [--jobs N] [--pull]] [OVERRIDES]``.

Prints the DVC targets of the ``fit`` stages one CI shard should run, one per line, as
``pipelines/retrograde/dvc.yaml:fit@<source>-<model>-<order>-<seed>`` (what ``dvc repro``
accepts from the host root; ``--bare`` prints just the stage names); with ``--run`` also
reproduces them (:mod:`retrograde.host`; ``docs/ci.md``).
"""

from __future__ import annotations

import argparse
import sys

from ..host import plan_shard, reproduce_shard
from ..validation import check_int

__all__ = ["configure", "run"]


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
    jobs = check_int("option 'plan'", "jobs", args.jobs, low=1)
    shard = plan_shard(args.dir, args.overrides, args.shard)
    for name in shard.names:
        print(name if args.bare else shard.host.target(name))
    print(
        f"retrograde plan: shard {shard.index}/{shard.count}: {len(shard.names)} of "
        f"{shard.n_cells} fit stages",
        file=sys.stderr,
    )
    if args.run and shard.names:
        reproduce_shard(shard, jobs=jobs, pull=args.pull)
        print(f"retrograde plan: reproduced {len(shard.names)} fit stages", file=sys.stderr)
    return 0
