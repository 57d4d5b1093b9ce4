"""One module per command: ``configure(parser)`` adds its options and ``run(args) -> int``
calls the library (:mod:`retrograde.host`, :mod:`retrograde.report`); nothing else.

To add a command, write its module here and list it in ``retrograde.cli.COMMANDS``.
"""

from __future__ import annotations

import argparse

from ..config import METRICS_FILE

__all__ = ["add_metrics_arguments"]


def add_metrics_arguments(parser: argparse.ArgumentParser) -> None:
    """``--dir`` and ``--path``: where the metrics file is (shared by ``table`` and ``compare``)."""
    parser.add_argument(
        "--dir", default=".", metavar="HOST", help="the host repository root (default: here)"
    )
    parser.add_argument(
        "--path",
        default=str(METRICS_FILE),
        metavar="FILE",
        help=f"metrics file relative to --dir (default: {METRICS_FILE})",
    )
