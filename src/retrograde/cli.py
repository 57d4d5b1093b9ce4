"""Command line: ``retrograde <command> ...``.

Each command lives in its own module exposing ``configure(parser)`` and ``run(args) -> int``;
this file only dispatches and turns user-facing errors into one line and exit status 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from . import __version__
from .errors import RetrogradeError

__all__ = ["main"]

#: command name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "check": ("retrograde.commands.check", "cut, split and tokenize a file; round-trip orders"),
    "init": ("retrograde.commands.init", "install the config and stage file into a git + DVC repo"),
    "plan": ("retrograde.commands.plan", "print (or run) the fit stages of one CI shard"),
    "run": (
        "retrograde.commands.run",
        "compose the config, reproduce the pipeline, print the table",
    ),
    "rank": (
        "retrograde.commands.rank",
        "screen a space of orders with a cheap proxy, confirm the best against the reference",
    ),
    "table": ("retrograde.commands.table", "print the gap table of the last run"),
    "compare": ("retrograde.commands.compare", "diff the gap table between two git revisions"),
    "demo": ("retrograde.commands.demo", "run a demo study in a throwaway host repository"),
}


class _Parser(argparse.ArgumentParser):
    """argparse that exits with status 2 and one line on usage errors (as argparse does)."""


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="retrograde", description="Order-ablation experiments as DVC + Hydra stages."
    )
    parser.add_argument("--version", action="version", version=f"retrograde {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks for errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, help_text) in COMMANDS.items():
        module = importlib.import_module(module_name)
        command_parser = sub.add_parser(name, help=help_text, description=help_text)
        module.configure(command_parser)
        command_parser.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; returns the exit status (0 ok, 1 a requested failure such as a gate, 2 user error)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args))
    except RetrogradeError as exc:
        if args.debug:
            raise
        print(f"retrograde: error: {exc}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        print("retrograde: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
