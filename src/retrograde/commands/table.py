"""``retrograde table [--dir HOST] [--path FILE] [--format markdown|json|csv]``.

Prints the gap table of the last run (``pipelines/retrograde/metrics.json`` under ``--dir``)
as a Markdown table per source, the exact JSON, or CSV with one row per cell. Cautions that
follow from the table itself (deterministic fits, too few test documents) go to stderr.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..host import read_table_at
from ..report import FORMATS, format_table, table_warnings
from . import add_metrics_arguments

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    add_metrics_arguments(parser)
    parser.add_argument(
        "--format", default="markdown", choices=FORMATS, help="output format (default: markdown)"
    )


def run(args: argparse.Namespace) -> int:
    table = read_table_at(Path(args.dir), None, args.path)
    print(format_table(table, args.format), end="")
    for warning in table_warnings(table):  # stderr, so json/csv output stays machine-readable
        print(f"retrograde: warning: {warning}", file=sys.stderr)
    return 0
