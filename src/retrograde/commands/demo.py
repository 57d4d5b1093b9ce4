"""``retrograde demo [--dir DIR] [--jobs N]``: a real study in a throwaway host.

Creates ``DIR`` (default ``demo-host``) with an INVENTED corpus written by the host's own
stage and a demo study (:func:`retrograde.host.prepare_demo`), runs it, commits the result,
and says where the report and plots are and what to try next. Run again on the same folder
it only reruns what changed (nothing, unless you edited something).
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..host import commit_demo_results, next_steps, prepare_demo, run_pipeline
from ..validation import check_int
from .run import print_summary

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default="demo-host", help="folder to create (default: demo-host)")
    parser.add_argument(
        "--jobs", type=int, default=2, help="fit stages run in parallel (default 2)"
    )


def run(args: argparse.Namespace) -> int:
    jobs = check_int("option 'demo'", "jobs", args.jobs, low=1)
    folder = Path(args.dir).resolve()
    if not folder.exists() or not any(folder.iterdir()):
        print(f"retrograde demo: creating a throwaway host repository in {folder}")
    prepare_demo(folder)
    print_summary(run_pipeline(folder, jobs=jobs))
    commit_demo_results(folder)
    print(next_steps(folder))
    return 0
