"""``retrograde init [--dir HOST] [--source PATH ...] [--force]``.

Installs ``conf/retrograde/`` (config groups) and ``pipelines/retrograde/dvc.yaml`` (the
stage file) into an existing git + DVC repository, adds ignore rules to
``pipelines/retrograde/.gitignore``, and prints the next command. Idempotent; stops at a
changed file without ``--force``; with it, keeps changed config files and replaces a
changed stage file only when git has it committed; never touches the host's root
``dvc.yaml`` or ``params.yaml``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..config import CONF_DIR, PIPELINE_DIR
from ..host import SOURCE_CONFIG, find_host, initialize, resolve_sources

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--dir", default=".", metavar="HOST", help="the host repository (default: here)"
    )
    parser.add_argument(
        "--source",
        action="extend",
        nargs="+",
        default=[],
        metavar="PATH",
        help="corpus file(s) inside the repository, existing or written by a host stage; "
        "they become the files of the default 'corpus' source",
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="install around changed files: keep changed config files, replace a changed "
        "stage file that git has committed",
    )


def run(args: argparse.Namespace) -> int:
    host = find_host(args.dir)
    sources = resolve_sources(host, args.source, cwd=Path.cwd())
    result = initialize(host, sources, force=args.force)
    if result.written:
        print(f"retrograde init: wrote {len(result.written)} file(s) in {host.root}:")
        for path in result.written:
            print(f"  {path}")
    else:
        print(f"retrograde init: {host.root} already has every file (nothing written)")
    if result.kept:
        print(
            f"kept {len(result.kept)} changed config file(s) as they are (delete one and rerun "
            "init to get the packaged version):"
        )
        for path in result.kept:
            print(f"  {path}")
    if not sources:
        print(f"check the corpus files in {SOURCE_CONFIG} (or rerun init with --source PATH)")
    print("next:")
    print(f"  cd {host.root} && git add {CONF_DIR} {PIPELINE_DIR} && retrograde run")
    return 0
