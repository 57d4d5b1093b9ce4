"""``retrograde run [--dir HOST] [--jobs N] [--pull] [--dry] [OVERRIDES ...]``.

Composes ``conf/retrograde/`` with Hydra overrides into ``pipelines/retrograde/params.yaml``
(written only when its content changes, so DVC sees nothing new on a no-op run), rewrites
the per-source ``units`` stages of ``pipelines/retrograde/dvc.yaml``, runs
``dvc repro pipelines/retrograde/dvc.yaml`` (host stages upstream of the corpus included)
and prints the gap table. With ``--jobs N > 1`` the fit stages run as N parallel
``dvc repro -s`` processes (:mod:`retrograde.parallel`) after units and reorder are done.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import re
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from .._io import atomic_write_text
from .._validation import check_int
from ..errors import FitError, HostRepoError
from ..hostrepo import HostRepo, dvc_argv, find_host, last_error_line

__all__ = ["configure", "parse_repro_line", "run", "stage_python_first", "write_pipeline_files"]

_STAGE = r"'(?:[^']*dvc\.yaml:)?(?P<stage>[^']+)'"
_EVENTS = (
    ("ran", re.compile(rf"^Running stage {_STAGE}")),
    ("unchanged", re.compile(rf"^Stage {_STAGE} didn't change")),
    ("restored", re.compile(rf"^Stage {_STAGE} is cached")),
    ("failed", re.compile(rf"^ERROR: failed to reproduce {_STAGE}")),
)


def parse_repro_line(line: str) -> tuple[str, str] | None:
    """``(event, stage)`` for a ``dvc repro`` output line about a stage, else ``None``.

    Examples
    --------
    >>> parse_repro_line("Running stage 'pipelines/retrograde/dvc.yaml:fit@a-m-reverse-0':")
    ('ran', 'fit@a-m-reverse-0')
    >>> parse_repro_line("Stage 'prepare' didn't change, skipping")
    ('unchanged', 'prepare')
    >>> parse_repro_line("Updating lock file 'dvc.lock'") is None
    True
    """
    for event, pattern in _EVENTS:
        match = pattern.match(line.strip())
        if match:
            return event, match["stage"]
    return None


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default=".", help="the host repository (default: here)")
    parser.add_argument("--jobs", type=int, default=1, help="fit stages run in parallel")
    parser.add_argument(
        "--pull", action="store_true", help="fetch cached results from the DVC remote"
    )
    parser.add_argument(
        "--dry", action="store_true", help="compose and check the config; run nothing"
    )
    parser.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. study.seeds=[0,1]")


@contextlib.contextmanager
def _stage_python_first() -> Iterator[None]:
    """Stage commands start with ``python``: make it this interpreter for DVC's children."""
    previous = os.environ.get("PATH", "")
    os.environ["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), previous])
    try:
        yield
    finally:
        os.environ["PATH"] = previous


def _write_if_changed(path: Path, text: str) -> bool:
    if path.is_file() and path.read_text(encoding="utf-8") == text:
        return False
    atomic_write_text(path, text)
    return True


def _repro(host: HostRepo, target: str, *, pull: bool, total: int) -> dict[str, list[str]]:
    """Run ``dvc repro target``; show ``[k/total]`` per stage started or restored.

    ``total`` counts retrograde's own stages (the host's upstream stages come on top).
    On failure raise one line naming the stage (and, for a fit, the cell and its log).
    """
    argv = [*dvc_argv(), "repro", *(["--pull"] if pull else []), target]
    log_path = host.pipeline_dir / "logs" / "run.log"
    log_path.parent.mkdir(parents=True, exist_ok=True)
    events: dict[str, list[str]] = {"ran": [], "unchanged": [], "restored": [], "failed": []}
    lines: list[str] = []
    with subprocess.Popen(
        argv,
        cwd=host.root,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        stdin=subprocess.DEVNULL,
    ) as process:
        assert process.stdout is not None
        for line in process.stdout:
            lines.append(line)
            parsed = parse_repro_line(line)
            if parsed:
                events[parsed[0]].append(parsed[1])
                seen = sum(len(v) for k, v in events.items() if k != "failed")
                if parsed[0] in ("ran", "restored"):
                    shown = "running" if parsed[0] == "ran" else "restored"
                    progress = f"[{seen:>{len(str(total))}}/{total}]"
                    print(f"  {progress} {shown:<8} {parsed[1]}", file=sys.stderr, flush=True)
    log_path.write_text("".join(lines), encoding="utf-8")
    if process.returncode != 0:
        _raise_failure(host, "".join(lines), events["failed"], log_path)
    return events


def _raise_failure(host: HostRepo, output: str, failed: list[str], log_path: Path) -> None:
    # Our stages print one "retrograde <stage>: error: ..." line naming the cell and its log.
    ours = [line for line in output.splitlines() if re.match(r"^retrograde \w+: error: ", line)]
    if ours:
        message = ours[-1].split(": error: ", 1)[1]
        if failed and failed[0].startswith("fit@"):
            raise FitError(message)  # already names the cell and its fit.log
        raise HostRepoError(f"stage {failed[0] if failed else '?'!r}: {message}")
    stage = f"stage {failed[0]!r}" if failed else "dvc repro"
    raise HostRepoError(f"{stage} failed in {host.root}: {last_error_line(output)}; see {log_path}")


def _print_table(host: HostRepo, level: float) -> None:
    from .. import report

    metrics = host.pipeline_dir / "metrics.json"
    if metrics.is_file():
        table = json.loads(metrics.read_text(encoding="utf-8"))
        print(report.format_table(table, "markdown", level=level))


def write_pipeline_files(host: HostRepo, params: dict[str, Any]) -> list[Path]:
    """Write ``params.yaml`` and the units block of the stage file; return what changed.

    A file whose content would not change is left alone (its timestamp too), so a no-op
    ``run`` gives DVC nothing new to look at.
    """
    from ..stages import render_dvc_yaml

    dvc_text = render_dvc_yaml(host.dvc_file.read_text(encoding="utf-8"), params)
    written = []
    for path, text in ((host.params_file, _params_text(params)), (host.dvc_file, dvc_text)):
        if _write_if_changed(path, text):
            written.append(path)
    return written


#: public name of the PATH guard for other commands that start DVC stages
stage_python_first = _stage_python_first


def _params_text(params: dict[str, Any]) -> str:
    import yaml

    header = "# Composed by `retrograde run` from conf/retrograde/; edit the config, not this.\n"
    return header + yaml.safe_dump(params, sort_keys=False, default_flow_style=False)


def _run_jobs(
    host: HostRepo, target: str, cells: list[Any], jobs: int, *, pull: bool, total: int
) -> dict[str, list[str]]:
    """``dvc repro`` the pipeline; with ``jobs > 1`` the stale fit stages run in parallel."""
    from ..stages import fit_stage_name

    if jobs == 1:
        return _repro(host, target, pull=pull, total=total)
    from ..parallel import run_stages_in_parallel, stale_stages

    # One `dvc status` (host stages upstream included) decides whether anything is stale:
    # a no-op run then costs seconds, not a DVC process per stage.
    if not pull and not stale_stages(host.root, None, with_deps=True):
        return {"ran": [], "unchanged": [], "restored": [], "failed": []}
    _repro(host, f"{target}:reorder", pull=pull, total=total)  # units, reorder, host upstream
    names = stale_stages(host.root, [fit_stage_name(*cell) for cell in cells])
    run_stages_in_parallel(host.root, names, jobs, pull=pull)
    events = _repro(host, target, pull=pull, total=total)
    events["ran"] = names + events["ran"]  # the parallel fits (ran or restored)
    return events


def run(args: argparse.Namespace) -> int:
    from ..config import compose
    from ..stages import fit_stage_name, grid_cells, render_dvc_yaml

    jobs = check_int("option 'run'", "jobs", args.jobs, low=1)
    host = find_host(args.dir)
    for path, what in ((host.conf_dir, "config folder"), (host.dvc_file, "stage file")):
        if not path.exists():
            raise HostRepoError(
                f"{path} (the retrograde {what}) is missing; run `retrograde init --dir "
                f"{host.root}` first"
            )
    params = compose(host.root, args.overrides)
    render_dvc_yaml(host.dvc_file.read_text(encoding="utf-8"), params)  # markers present?
    cells = grid_cells(params)
    if args.dry:
        print(f"{len(cells)} fit cells; stage names:")
        for cell in cells:
            print(f"  {fit_stage_name(*cell)}")
        return 0
    write_pipeline_files(host, params)
    study = params["study"]
    total = len(study["sources"]) * (1 + len(study["orders"])) + len(cells) + 1
    target = host.dvc_file.relative_to(host.root).as_posix()
    with _stage_python_first():
        events = _run_jobs(host, target, cells, jobs, pull=args.pull, total=total)
    from ..parallel import normalize_lock_order

    normalize_lock_order(host.root)  # dvc.lock in stage-file order, whatever --jobs was
    print(
        f"retrograde: {len(events['ran'])} stages ran, {len(events['restored'])} restored "
        f"from the run-cache, {len(events['unchanged'])} unchanged",
        file=sys.stderr,
    )
    _print_table(host, params["stats"]["level"])
    return 0
