"""The pipeline driver: compose the config, write the generated files, ``dvc repro``, tidy.

``retrograde run`` is :func:`run_pipeline`: it composes ``conf/retrograde/`` with the
overrides, writes ``pipelines/retrograde/params.yaml`` and the stage file's units block
(each only when its content changes, so DVC sees nothing new on a no-op run), runs ``dvc
repro pipelines/retrograde/dvc.yaml`` (the host's stages upstream of the corpus included)
and puts ``dvc.lock`` in stage-file order. With ``jobs > 1`` the stale fit stages run as
parallel ``dvc repro -s`` processes (:mod:`retrograde.host._parallel`) after units and
reorder are done. ``plan --run`` and ``check`` use the same pieces.
"""

from __future__ import annotations

import contextlib
import os
import re
import subprocess
import sys
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from ..config import RetrogradeConfig, compose, fit_stage_name, params_text
from ..data import atomic_write_text
from ..errors import FitError, HostRepoError
from ..validation import check_int
from ._corpus_paths import check_source_files
from ._lockfile import normalize_lock_order
from ._parallel import run_stages_in_parallel, stale_stages
from ._repo import HostRepo, dvc_argv, find_host, last_error_line, require_installed
from ._stagefile import render_dvc_yaml

__all__ = [
    "RunResult",
    "compose_for",
    "parse_repro_line",
    "run_pipeline",
    "stage_python_first",
    "write_pipeline_files",
]

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


@dataclass
class RunResult:
    """What a run did: the host, the composed config, the stages DVC reported by event."""

    host: HostRepo
    config: RetrogradeConfig
    events: dict[str, list[str]] = field(default_factory=dict)


def compose_for(
    host_dir: str | os.PathLike[str], overrides: Sequence[str]
) -> tuple[HostRepo, RetrogradeConfig]:
    """The host (checked for ``init``) and its composed config; nothing is written."""
    host = find_host(host_dir)
    require_installed(host)
    config = compose(host.root, overrides)
    check_source_files(host, config)  # missing files only if a host stage writes them
    render_dvc_yaml(host.dvc_file.read_text(encoding="utf-8"), config)  # markers present?
    return host, config


@contextlib.contextmanager
def stage_python_first() -> Iterator[None]:
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


def write_pipeline_files(host: HostRepo, config: RetrogradeConfig) -> list[Path]:
    """Write ``params.yaml`` and the units block of the stage file; return what changed.

    A file whose content would not change is left alone (its timestamp too), so a no-op
    ``run`` gives DVC nothing new to look at.
    """
    dvc_text = render_dvc_yaml(host.dvc_file.read_text(encoding="utf-8"), config)
    written = []
    for path, text in ((host.params_file, params_text(config)), (host.dvc_file, dvc_text)):
        if _write_if_changed(path, text):
            written.append(path)
    return written


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
    atomic_write_text(log_path, "".join(lines))  # a symbolic link is replaced, not followed
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


def _run_jobs(
    host: HostRepo,
    target: str,
    cells: list[tuple[str, str, str, int]],
    jobs: int,
    *,
    pull: bool,
    total: int,
) -> dict[str, list[str]]:
    """``dvc repro`` the pipeline; with ``jobs > 1`` the stale fit stages run in parallel."""
    if jobs == 1:
        return _repro(host, target, pull=pull, total=total)
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


def run_pipeline(
    host_dir: str | os.PathLike[str],
    overrides: Sequence[str] = (),
    *,
    jobs: int = 1,
    pull: bool = False,
) -> RunResult:
    """Compose, write the generated files, reproduce the pipeline, order ``dvc.lock``."""
    jobs = check_int("option 'run'", "jobs", jobs, low=1)
    host, config = compose_for(host_dir, overrides)
    write_pipeline_files(host, config)
    study = config.study
    cells = config.cells()
    total = len(study.sources) * (1 + len(study.orders)) + len(cells) + 1
    target = host.dvc_file.relative_to(host.root).as_posix()
    with stage_python_first():
        events = _run_jobs(host, target, cells, jobs, pull=pull, total=total)
    normalize_lock_order(host.root)  # dvc.lock in stage-file order, whatever jobs was
    return RunResult(host, config, events)
