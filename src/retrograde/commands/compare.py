"""``retrograde compare REV_A [REV_B] [--dir HOST] [--path FILE] [--all]
[--format text|markdown|csv|json] [--fail-on-change]``.

Reads the gap table (``pipelines/retrograde/metrics.json``) at git revision ``REV_A`` and at
``REV_B`` (default: the working tree), and prints every cell whose gap moved with both
intervals and bits per token at both revisions: ``CHANGED`` when the two intervals do not
overlap, ``within`` when they do, ``loss`` when only bits per token moved, and cells
``added`` or ``removed``. Exit status 0, or 1 with ``--fail-on-change`` when any cell
changed beyond its intervals (a CI gate).
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..host import read_table_at
from ..report import CHANGE_FORMATS, compare_tables, format_changes
from . import add_metrics_arguments

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("rev_a", metavar="REV_A", help="the base git revision (e.g. main)")
    parser.add_argument(
        "rev_b", metavar="REV_B", nargs="?", default=None, help="default: the working tree"
    )
    add_metrics_arguments(parser)
    parser.add_argument("--all", action="store_true", help="also list identical cells")
    parser.add_argument(
        "--format",
        default="text",
        choices=CHANGE_FORMATS,
        help="aligned text (default), a Markdown table for a pull-request comment, csv or json",
    )
    parser.add_argument(
        "--fail-on-change",
        action="store_true",
        help="exit with status 1 when any gap changed beyond its intervals",
    )


def run(args: argparse.Namespace) -> int:
    old_label, new_label = args.rev_a, args.rev_b or "workspace"
    old = read_table_at(Path(args.dir), args.rev_a, args.path)
    new = read_table_at(Path(args.dir), args.rev_b, args.path)
    changes = compare_tables(old, new, old_label=old_label, new_label=new_label)
    text = format_changes(
        changes, old_label=old_label, new_label=new_label, show_all=args.all, fmt=args.format
    )
    print(text, end="")
    changed = any(change.status == "changed" for change in changes)
    return 1 if args.fail_on_change and changed else 0
