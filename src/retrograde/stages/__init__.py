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
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from ..errors import HostRepoError, RetrogradeError

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
        _check_params_unchanged(args.params)
        body(args)
        # DVC records the params it reads after the command: they must still be ours.
        _check_params_unchanged(args.params)
    except RetrogradeError as exc:
        print(f"retrograde {name}: error: {exc}", file=sys.stderr)
        return exc.exit_status
    return 0


def _check_params_unchanged(folder: str) -> None:
    """Refuse to run (or to be recorded) on a params.yaml other than the one composed.

    The command that starts ``dvc repro`` passes the digest of the params it wrote; a
    params file rewritten since (by another command, or by hand) would make this stage
    compute with parameters its run did not ask for, and DVC record the wrong ones.
    """
    from ..config import PARAMS_DIGEST_ENV, params_digest  # not at the top: see server.py

    expected = os.environ.get(PARAMS_DIGEST_ENV)
    if expected and params_digest(Path(folder) / "params.yaml") != expected:
        raise HostRepoError(
            "pipelines/retrograde/params.yaml changed while this run was working (another "
            "command or an edit rewrote it), so this stage's result is not recorded; run "
            "`retrograde run` again"
        )
