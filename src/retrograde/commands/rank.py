"""``retrograde rank [--dir HOST] [--jobs N] [--format markdown|json] [OVERRIDES ...]``.

Screens the orders of the config's ``rank`` block with its proxy family on the validation
split (successive halving), fits the top k with the chosen model as ordinary DVC fit cells
and ranks them against the reference order on the test split with Holm-adjusted intervals
(:func:`retrograde.host.rank_orders`). Prints the ranked table and the recommendation
(``markdown``), or a JSON list, best first, of ``{order, gap_pct, gap_pct_low,
gap_pct_high, significant}`` (the recommendation then goes to stderr). Writes
``pipelines/retrograde/rank/rank.{json,md,png}``. ``--dry`` checks the rank block and
lists the candidates, writing nothing.
"""

from __future__ import annotations

import argparse
import sys

from ..host import plan_rank, rank_orders
from ..report import format_rank
from ..validation import check_int

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default=".", help="the host repository (default: here)")
    parser.add_argument("--jobs", type=int, default=1, help="confirmation fits run in parallel")
    parser.add_argument(
        "--format",
        default="markdown",
        choices=("markdown", "json"),
        help="markdown: table and recommendation; json: the ranked list (default: markdown)",
    )
    parser.add_argument(
        "--dry", action="store_true", help="check the rank block and list the candidates"
    )
    parser.add_argument(
        "overrides", nargs="*", help="Hydra overrides, e.g. +rank=search rank.top_k=2"
    )


def run(args: argparse.Namespace) -> int:
    jobs = check_int("option 'rank'", "jobs", args.jobs, low=1)
    if args.dry:
        config, candidates = plan_rank(args.dir, args.overrides)
        rank = config.rank
        assert rank is not None
        print(
            f"{len(candidates)} candidates for source {rank.source!r}; the best {rank.top_k} "
            f"by {rank.proxy.family} on validation are confirmed with model {rank.model!r}:"
        )
        for name, entry in candidates.items():
            print(f"  {name}: {entry.name} {entry.params}")
        return 0
    found = rank_orders(
        args.dir,
        args.overrides,
        jobs=jobs,
        note=lambda line: print(f"retrograde rank: {line}", file=sys.stderr, flush=True),
    )
    result = found.result
    events = found.events
    print(
        f"retrograde rank: {len(result['candidates'])} candidates screened in "
        f"{len(result['screening']['rounds'])} rounds; {len(events.get('ran', []))} stages "
        f"ran, {len(events.get('restored', []))} restored from the run-cache, "
        f"{len(events.get('unchanged', []))} unchanged; wrote "
        + ", ".join(p.relative_to(found.host.root).as_posix() for p in found.written),
        file=sys.stderr,
    )
    print(format_rank(result, args.format), end="")
    if args.format == "json":
        print(f"retrograde rank: {result['recommendation']}", file=sys.stderr)
    return 0
