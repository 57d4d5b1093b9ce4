"""DVC stage entry points: ``python -m retrograde.stages.<name>`` (``units``, ``reorder``,
``fit``, ``table``).

Each stage runs with the pipeline folder (``pipelines/retrograde/``, the DVC wdir) as its
working folder and reads its values from ``params.yaml`` there as a typed config
(:func:`retrograde.config.load_params`); its command line carries only names (source,
model, order, seed), so config values never reach a shell. Each module has a pure core
function and a short ``main``; the folder layout is :mod:`retrograde.config` 's.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from ..errors import RetrogradeError

__all__ = ["run_stage"]


def run_stage(
    name: str,
    configure: Callable[[argparse.ArgumentParser], None],
    body: Callable[[argparse.Namespace], None],
    argv: Sequence[str] | None,
) -> int:
    """Parse ``argv``, run ``body``; a user-facing error becomes one stderr line, status 2."""
    parser = argparse.ArgumentParser(prog=f"python -m retrograde.stages.{name}")
    parser.add_argument("--params", default=".", help="folder holding params.yaml (the wdir)")
    configure(parser)
    args = parser.parse_args(argv)
    try:
        body(args)
    except RetrogradeError as exc:
        print(f"retrograde {name}: error: {exc}", file=sys.stderr)
        return exc.exit_status
    return 0
