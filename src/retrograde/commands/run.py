"""``retrograde run [--dir HOST] [--jobs N | --cluster ADDRESS|local:N] [--pull] [--dry] [OVERRIDES ...]``.

Composes ``conf/retrograde/`` with Hydra overrides, reproduces the pipeline
(:func:`retrograde.host.run_pipeline`) and prints the gap table. ``--cluster`` sends the
stale fit stages to a Dask scheduler (the optional ``cluster`` extra; ``docs/ci.md``).
"""

from __future__ import annotations

import argparse
import json
import sys

from .. import report
from ..config import grid_size
from ..errors import ConfigError
from ..host import ClusterOptions, RunResult, compose_for, run_pipeline
from ..validation import check_int

__all__ = ["configure", "print_summary", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default=".", help="the host repository (default: here)")
    parser.add_argument(
        "--jobs", type=int, default=None, help="fit stages run in parallel here (default 1)"
    )
    parser.add_argument(
        "--cluster",
        metavar="ADDRESS",
        help="run the fit stages on a Dask scheduler (tcp://host:8786), or local:N for N "
        "worker processes here; needs the 'cluster' extra",
    )
    parser.add_argument(
        "--cluster-mode",
        choices=["shared", "clone"],
        default="shared",
        help="shared: workers see this repository on a shared filesystem (default); "
        "clone: each worker holds a clone at this commit and results go through the "
        "DVC remote's run-cache",
    )
    parser.add_argument(
        "--cluster-repo",
        metavar="PATH",
        help="the repository's path on the workers (default: its path here)",
    )
    parser.add_argument(
        "--pull", action="store_true", help="fetch cached results from the DVC remote"
    )
    parser.add_argument(
        "--dry", action="store_true", help="compose and check the config; run nothing"
    )
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. study.seeds=[0,1]")


def run(args: argparse.Namespace) -> int:
    jobs = check_int("option 'run'", "jobs", 1 if args.jobs is None else args.jobs, low=1)
    cluster = None
    if args.cluster is not None:
        if args.jobs is not None:
            raise ConfigError(
                "options --jobs and --cluster do not go together: with --cluster the "
                "workers' threads decide how many fit stages run at once"
            )
        cluster = ClusterOptions(args.cluster, args.cluster_mode, args.cluster_repo)
    elif args.cluster_repo is not None or args.cluster_mode != "shared":
        raise ConfigError("options --cluster-mode and --cluster-repo need --cluster ADDRESS")
    if args.dry:
        _, config = compose_for(args.dir, args.overrides)
        cells = config.fits or {}
        print(f"{grid_size(config.study)} fit cells in {len(cells)} fit stages; stage names:")
        for key in cells:
            print(f"  fit@{key}")
        return 0
    result = run_pipeline(args.dir, args.overrides, jobs=jobs, pull=args.pull, cluster=cluster)
    print_summary(result)
    return 0


def print_summary(result: RunResult) -> None:
    """The run's one-line account (stderr) and the gap table (stdout)."""
    events = result.events
    print(
        f"retrograde: {len(events['ran'])} stages ran, {len(events['restored'])} restored "
        f"from the run-cache, {len(events['unchanged'])} unchanged",
        file=sys.stderr,
    )
    metrics = result.host.pipeline_dir / "metrics.json"
    if metrics.is_file():
        table = json.loads(metrics.read_text(encoding="utf-8"))
        print(report.format_table(table, "markdown", level=result.config.stats.level))
