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
from pathlib import Path, PurePosixPath
from typing import NamedTuple

from ..config import (
    DVC_FILE,
    PARAMS_DIGEST_ENV,
    RetrogradeConfig,
    compose,
    fit_stage_name,
    params_digest,
    params_text,
    reorder_stage_name,
)
from ..data import atomic_write_text
from ..errors import FitError, HostRepoError, RetrogradeError
from ..report import recover_report
from ..stages.server import stage_server
from ..validation import check_int
from ._cluster import Cluster, ClusterOptions, check_workers, open_cluster, run_on_cluster
from ._corpus_paths import check_source_files
from ._lock import pipeline_lock
from ._lockfile import normalize_lock_order
from ._parallel import run_stage_batches, stale_stages
from ._progress import Progress
from ._repo import HostRepo, dvc_argv, find_host, last_error_line, require_installed
from ._scaffold import SOURCE_CONFIG, InstallResult, install, planned_files
from ._stagefile import render_dvc_yaml

__all__ = [
    "RunResult",
    "StageLine",
    "compose_for",
    "initialize",
    "parse_repro_line",
    "run_pipeline",
    "stage_environment",
    "stream_repro",
    "warm_modules",
    "write_pipeline_files",
]

_STAGE = r"'(?P<name>[^']+)'"
_EVENTS = (
    ("ran", re.compile(rf"^Running stage {_STAGE}")),
    ("unchanged", re.compile(rf"^Stage {_STAGE} didn't change")),
    ("restored", re.compile(rf"^Stage {_STAGE} is cached")),
    ("failed", re.compile(rf"^ERROR: failed to reproduce {_STAGE}")),
)


class StageLine(NamedTuple):
    """A ``dvc repro`` line about a stage: what happened, the stage, and whose it is."""

    event: str
    stage: str
    ours: bool


def parse_repro_line(line: str) -> StageLine | None:
    """The stage event a ``dvc repro`` output line reports, else ``None``.

    ``stage`` is the name inside the pipeline's stage file for retrograde's own stages
    (``ours``), and the name DVC printed for the host's.

    Examples
    --------
    >>> parse_repro_line("Running stage 'pipelines/retrograde/dvc.yaml:fit@a-m-reverse-0':")
    StageLine(event='ran', stage='fit@a-m-reverse-0', ours=True)
    >>> parse_repro_line("Stage 'prepare' didn't change, skipping")
    StageLine(event='unchanged', stage='prepare', ours=False)
    >>> parse_repro_line("Updating lock file 'dvc.lock'") is None
    True
    """
    for event, pattern in _EVENTS:
        match = pattern.match(line.strip())
        if match:
            name = match["name"]
            prefix = f"{DVC_FILE.as_posix()}:"
            ours = name.startswith(prefix)
            return StageLine(event, name.removeprefix(prefix), ours)
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


def warm_modules(config: RetrogradeConfig) -> list[str]:
    """What the run's stage server imports before its first fit: the families and the
    heavy modules of the families the config names (``Family.warm_imports``)."""
    from .. import families

    names = ["retrograde.families"]
    for spec in config.study.models.values():
        names += getattr(families.registry.get(spec.family), "warm_imports", ())
    return list(dict.fromkeys(names))


@contextlib.contextmanager
def stage_environment(host: HostRepo) -> Iterator[None]:
    """The environment DVC's stage processes inherit while the body runs.

    Stage commands start with ``python``: this interpreter's folder goes first on ``PATH``.
    The digest of the ``params.yaml`` just written lets every stage check that it still
    reads the file this command composed (:mod:`retrograde.host._lock`).
    """
    saved = {key: os.environ.get(key) for key in ("PATH", PARAMS_DIGEST_ENV)}
    os.environ["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), saved["PATH"] or ""])
    os.environ[PARAMS_DIGEST_ENV] = params_digest(host.params_file)
    try:
        yield
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


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


def stream_repro(
    host: HostRepo, argv: list[str], progress: Progress, *, split_logs: bool = False
) -> tuple[int, str, list[str]]:
    """Run one ``dvc repro`` (``argv``), reporting each stage's start and end to
    ``progress``; returns ``(exit status, output, failed stages)``.

    DVC runs the stages of one ``repro`` one after another, so a stage has finished when
    the next one is announced. The whole output is added to ``logs/run.log``; with
    ``split_logs`` each stage's part of it also goes to its own log
    (:func:`~retrograde.host.log_path_for`).
    """
    from ._parallel import log_path_for

    log_path = host.pipeline_dir / "logs" / "run.log"
    log_path.parent.mkdir(parents=True, exist_ok=True)
    failed: list[str] = []
    lines: list[str] = []
    segments: dict[str, list[str]] = {}
    segment: list[str] = []
    current: StageLine | None = None
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
            if parsed is not None and parsed.event != "failed":
                segment = segments.setdefault(parsed.stage, [])
            segment.append(line)
            if parsed is None:
                continue
            if current is not None and parsed.event != "failed":
                progress.finished(current.stage, "ran", host=not current.ours)
                current = None
            if parsed.event == "ran":
                progress.started(parsed.stage, host=not parsed.ours)
                current = parsed
            else:
                progress.finished(parsed.stage, parsed.event, host=not parsed.ours)
                current = None
                if parsed.event == "failed":
                    failed.append(parsed.stage)
    if current is not None:
        event = "ran" if process.returncode == 0 else "failed"
        progress.finished(current.stage, event, host=not current.ours)
    output = "".join(lines)
    _append_log(log_path, output)
    if split_logs:
        command = " ".join(["dvc", *argv[len(dvc_argv()) :]])
        for stage, text in segments.items():
            path = log_path_for(host.root, stage)
            atomic_write_text(path, f"$ {command}\n" + "".join(text))  # replaces a link
    return process.returncode, output, failed


def _repro(
    host: HostRepo, target: str, *, pull: bool, progress: Progress, single: bool = False
) -> None:
    """Run ``dvc repro target`` (:func:`stream_repro`). On failure raise one line naming
    the stage (and, for a fit, the cell and its log); DVC's whole output is in
    ``logs/run.log``."""
    argv = [*dvc_argv(), "repro", *(["--single-item"] if single else [])]
    argv += [*(["--pull"] if pull else []), target]
    status, output, failed = stream_repro(host, argv, progress)
    if status != 0:
        _raise_failure(host, output, failed, host.pipeline_dir / "logs" / "run.log")


def _append_log(path: Path, text: str) -> None:
    """Add one ``dvc repro``'s output to the run's log (a run may start several).

    Never through a symbolic link: one in its place is removed, and ``O_NOFOLLOW`` refuses
    one put there meanwhile.
    """
    if path.is_symlink():
        path.unlink()
    flags = os.O_WRONLY | os.O_CREAT | os.O_APPEND | os.O_NOFOLLOW | os.O_CLOEXEC
    with os.fdopen(os.open(path, flags, 0o666), "a", encoding="utf-8") as handle:
        handle.write(text)


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
    progress: Progress,
    cluster: tuple[Cluster, ClusterOptions] | None = None,
) -> None:
    """``dvc repro`` the pipeline; with ``jobs > 1`` the stale fit stages run in parallel,
    with a ``cluster`` they run as its tasks.

    With ``jobs > 1`` or a cluster: one ``dvc status`` (host stages upstream included)
    first; when nothing is stale the run ends there. Then ``repro ...:reorder`` (units,
    reorder, the host's stages upstream) when one of those is stale, then the stale fits:
    here in batches of one DVC process each, ``jobs`` at a time
    (:func:`~retrograde.host.run_stage_batches`), followed by ``repro --single-item
    ...:table``; or as the cluster's tasks, followed by a whole ``repro`` (which also
    restores a clone's results from the remote).
    """
    if jobs == 1 and cluster is None:
        _repro(host, target, pull=pull, progress=progress)
        return
    stale = None if pull else stale_stages(host.root, None, with_deps=True)
    if stale == []:
        return
    fit_names = [fit_stage_name(*cell) for cell in cells]
    stale_names = None if stale is None else {key.rpartition(":")[2] for key in stale}
    upstream = stale_names is None or any(
        not name.startswith("fit@") and name != "table" for name in stale_names
    )
    if upstream:
        _repro(host, f"{target}:reorder", pull=pull, progress=progress)  # units, reorder, host
    if stale_names is None or (upstream and not stale_names.issuperset(fit_names)):
        names = stale_stages(host.root, fit_names)  # fits made stale by what just ran
    else:
        names = [name for name in fit_names if name in stale_names]
    if cluster is None:
        run_stage_batches(host.root, names, jobs, pull=pull, progress=progress)
        _repro(host, f"{target}:table", pull=pull, progress=progress, single=True)
        return
    handle, options = cluster
    reorders = {
        fit_stage_name(*cell): host.target(reorder_stage_name(cell[0], cell[2])) for cell in cells
    }
    run_on_cluster(host, names, handle, options, upstream=reorders, pull=pull, progress=progress)
    # Clones sent their results to the remote: the closing repro restores them.
    _repro(host, target, pull=pull or options.mode == "clone", progress=progress)


def initialize(
    host: HostRepo, sources: Sequence[str] = (), *, force: bool = False
) -> InstallResult:
    """``retrograde init``: install the config and stage file, and a first ``params.yaml``.

    The params and the stage file's units block are those ``run`` would write for the
    default config, so every ``dvc`` command (``status``, ``dag``, the host's own
    ``repro``) works at the commit that adopts retrograde, before any run. When the default
    config does not compose yet (a corpus the host has not declared), the grid is empty.
    """
    with pipeline_lock(host.root, "retrograde init"):
        result = install(
            host,
            planned_files(sources=sources),
            force=force,
            must_write=[SOURCE_CONFIG] if sources else [],
        )
        try:
            config = compose(host.root)
        except RetrogradeError:
            config = RetrogradeConfig()
            config.fits = {}
        for path in write_pipeline_files(host, config):
            result.written.append(PurePosixPath(path.relative_to(host.root).as_posix()))
    return result


def run_pipeline(
    host_dir: str | os.PathLike[str],
    overrides: Sequence[str] = (),
    *,
    jobs: int = 1,
    pull: bool = False,
    cluster: ClusterOptions | None = None,
) -> RunResult:
    """Compose, write the generated files, reproduce the pipeline, order ``dvc.lock``.

    With ``cluster`` the stale fit stages run as tasks of a Dask cluster
    (:mod:`retrograde.host._cluster`), which is reached before anything is written.
    """
    jobs = check_int("option 'run'", "jobs", jobs, low=1)
    host, config = compose_for(host_dir, overrides)
    with contextlib.ExitStack() as stack:
        on: tuple[Cluster, ClusterOptions] | None = None
        if cluster is not None:
            on = (stack.enter_context(open_cluster(cluster)), cluster)
            check_workers(on[0], cluster, host)
        events = _run_locked(host, config, jobs, pull, on)
    return RunResult(host, config, events)


def _run_locked(
    host: HostRepo,
    config: RetrogradeConfig,
    jobs: int,
    pull: bool,
    cluster: tuple[Cluster, ClusterOptions] | None,
) -> dict[str, list[str]]:
    with pipeline_lock(host.root, "retrograde run"):  # before the first write
        recover_report(host.pipeline_dir)
        write_pipeline_files(host, config)
        study = config.study
        cells = config.cells()
        total = len(study.sources) * (1 + len(study.orders)) + len(cells) + 1
        target = host.dvc_file.relative_to(host.root).as_posix()
        # The log of this run's DVC output starts empty (each `dvc repro` appends).
        (host.pipeline_dir / "logs").mkdir(parents=True, exist_ok=True)
        atomic_write_text(host.pipeline_dir / "logs" / "run.log", "")  # replaces a link
        with (
            stage_environment(host),
            stage_server(warm_modules(config)),
            Progress(total) as progress,
        ):
            _run_jobs(host, target, cells, jobs, pull=pull, progress=progress, cluster=cluster)
        normalize_lock_order(host.root, config)  # stage-file order, whatever jobs was
    return progress.counts()
