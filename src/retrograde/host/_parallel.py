"""Run independent DVC stages as parallel ``dvc repro -s`` processes.

This is not a scheduler: DVC decides what is stale and records every result, and this module
only starts at most ``jobs`` DVC processes at a time, one stage each. The caller passes
stages that do not depend on each other (the ``fit`` cells) after their inputs are up to
date (``-s`` reproduces a single stage and does not look upstream), and runs the remaining
stages with one ordinary ``dvc repro`` afterwards.

Facts measured with DVC 3.67.1 (twelve one-second stages started at once): without
``--wait-for-lock`` two of twelve processes failed with "Unable to acquire lock", because
DVC holds its repository lock while it checks and records a stage (its retries give up
after about 3 s); with ``--wait-for-lock`` all twelve succeeded and ``dvc.lock`` held all
twelve entries. DVC releases that lock while the stage command runs, so the commands
themselves overlap.

DVC appends each stage's ``dvc.lock`` entry when the stage finishes, so parallel stages land
in completion order; :mod:`retrograde.host._lockfile` puts them back in stage-file order.
"""

from __future__ import annotations

import functools
import json
import re
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, Executor, Future, ThreadPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path

from ..config import DVC_FILE, LOG_DIR
from ..data import atomic_write_text
from ..errors import FitError
from ..validation import check_int
from ._lockfile import order_lock_entries
from ._progress import Progress
from ._repo import HostRepo, dvc_argv, last_error_line, run_dvc, run_tool

__all__ = [
    "StageRun",
    "batch_pattern",
    "batches",
    "log_path_for",
    "repro_argv",
    "run_stage_batches",
    "run_stages_in_parallel",
    "stage_log",
    "stale_stages",
]

#: seconds between two looks at a capacity that can change (a cluster's worker threads)
_REPOLL_SECONDS = 10.0
_UNSAFE_FILE_CHARS = re.compile(r"[^A-Za-z0-9@._=+-]")
_STAGE_ERROR = re.compile(r"^retrograde \w+: error: (.*)$", re.M)


def log_path_for(host: Path, stage_name: str) -> Path:
    """The log file of one stage: ``pipelines/retrograde/logs/<stage>.log``.

    Examples
    --------
    >>> log_path_for(Path("/repo"), "fit@demo-ngram-forward-0").as_posix()
    '/repo/pipelines/retrograde/logs/fit@demo-ngram-forward-0.log'
    >>> log_path_for(Path("/repo"), "other/dvc.yaml:train").name
    'other_dvc.yaml_train.log'
    """
    return Path(host) / LOG_DIR / f"{_UNSAFE_FILE_CHARS.sub('_', stage_name)}.log"


def repro_argv(target: str, *, pull: bool = False) -> list[str]:
    """DVC arguments that reproduce one stage alone, waiting for DVC's repository lock.

    Examples
    --------
    >>> repro_argv("pipelines/retrograde/dvc.yaml:fit@a", pull=True)
    ['--wait-for-lock', 'repro', '--single-item', '--pull', 'pipelines/retrograde/dvc.yaml:fit@a']
    """
    return ["--wait-for-lock", "repro", "--single-item", *(["--pull"] if pull else []), target]


def stale_stages(
    host: Path, stage_names: Sequence[str] | None, *, with_deps: bool = False
) -> list[str]:
    """The stages among ``stage_names`` that ``dvc status`` reports as changed, in order
    (every changed stage of the pipeline when ``stage_names`` is None; ``with_deps`` also
    checks the host's stages upstream of it).

    One ``dvc status`` (about as long as one ``dvc repro -s``) instead of starting a DVC
    process per unchanged stage: on a no-op run of a 72-cell grid that is seconds, not a
    minute. A stage with missing outputs counts as changed, so ``--pull`` still restores it.
    """
    deps = ["--with-deps"] if with_deps else []
    result = run_dvc(host, ["status", "--json", *deps, DVC_FILE.as_posix()])
    changed = json.loads(result.stdout or "{}")
    if stage_names is None:
        return list(changed)
    names = {key.rpartition(":")[2] for key in changed}
    return [name for name in stage_names if name.rpartition(":")[2] in names]


@dataclass(frozen=True)
class StageRun:
    """How one stage's ``dvc repro -s`` process ended, and where it ran.

    ``returncode`` is ``None`` when the stage could not be run at all (a cluster lost its
    worker twice, or a worker could not reach the repository); ``output`` is what the
    stage's log holds; ``worker`` names the cluster worker (``None`` on this machine).
    """

    returncode: int | None
    output: str
    worker: str | None = None


def run_stages_in_parallel(
    host: Path,
    stage_names: list[str],
    jobs: int | Callable[[], int],
    *,
    pull: bool = False,
    progress: Progress | None = None,
    executor: Executor | None = None,
    run_one: Callable[[str], StageRun] | None = None,
) -> None:
    """Reproduce each stage with its own ``dvc repro -s`` process, at most ``jobs`` at once.

    Parameters
    ----------
    host : Path
        Host repository root (the folder holding ``.dvc/``).
    stage_names : list of str
        Stages of ``pipelines/retrograde/dvc.yaml`` (``fit@...``) or qualified targets
        (``path/dvc.yaml:name``). They must not depend on each other, and their inputs must
        be up to date. Duplicates are run once.
    jobs : int or callable
        Most DVC processes running at the same time (>= 1), or a function returning that
        number, asked again whenever a stage ends (a cluster's worker threads).
    pull : bool
        Pass ``--pull`` so DVC fetches missing inputs and run-cache entries from the remote.
    progress : Progress, optional
        Told when each stage starts and ends (the run's counters and lines).
    executor : concurrent.futures.Executor, optional
        Where the stages run (default: threads of this process, each starting one DVC
        process here). A Dask cluster's executor sends them to its workers.
    run_one : callable, optional
        ``run_one(stage_name) -> StageRun``, what each task does (default: ``dvc repro -s``
        in ``host``). It must be picklable for an executor of other processes.

    Raises
    ------
    FitError
        When any stage fails. After the first failure no new stage starts; those already
        running finish (and are recorded by DVC). The one-line message names the first
        failed stage in the given order and its log file under ``pipelines/retrograde/logs/``.
    ConfigError
        When ``jobs`` is not a positive integer.
    """
    capacity = jobs if callable(jobs) else _fixed(check_int("option 'run'", "jobs", jobs, low=1))
    host = Path(host)
    repo = HostRepo(root=host, git_root=host)
    names = list(dict.fromkeys(stage_names))  # drop duplicates, keep the order
    if not names:
        return
    task = run_one if run_one is not None else functools.partial(_repro_one, repo, pull=pull)
    results: dict[str, StageRun] = {}
    progress = progress if progress is not None else Progress(len(names))
    owned = executor is None
    pool = executor if executor is not None else ThreadPoolExecutor(max_workers=capacity())
    pending: dict[Future[StageRun], str] = {}
    try:
        queue = iter(names)
        failed = False
        while True:
            # Keep `jobs` processes busy until the queue is empty or something failed.
            limit = max(1, capacity())
            while not failed and len(pending) < limit:
                name = next(queue, None)
                if name is None:
                    break
                progress.started(name)
                pending[pool.submit(task, name)] = name
            if not pending:
                break
            # A capacity that can grow (workers joining a cluster) is asked again now and then.
            timeout = _REPOLL_SECONDS if callable(jobs) else None
            done, _ = wait(pending, timeout=timeout, return_when=FIRST_COMPLETED)
            for future in done:
                name = pending.pop(future)
                results[name] = _outcome(future)
                atomic_write_text(log_path_for(host, name), results[name].output)
                failed = failed or results[name].returncode != 0
                progress.finished(name, _event(results[name]), worker=results[name].worker)
    except BaseException:
        # Ctrl-C (or a broken executor): queued stages never start; a cluster also stops
        # the running ones (its executor's owner does that when it closes).
        for future in pending:
            future.cancel()
        raise
    finally:
        if owned:
            pool.shutdown(wait=True)
    order_lock_entries(repo.dvc_file.with_name("dvc.lock"), [n for n in names if ":" not in n])
    failures = [name for name in names if name in results and results[name].returncode != 0]
    if failures:
        first = failures[0]
        result = results[first]
        reason = _failure_reason(result.output)
        not_started = len(names) - len(results)
        how = (
            "could not be run"
            if result.returncode is None
            else f"failed with exit status {result.returncode}"
        )
        where = f" on {result.worker}" if result.worker is not None else ""
        raise FitError(
            f"stage {first!r} {how}{where} "
            f"({len(failures)} of {len(results)} finished stages failed, "
            f"{not_started} not started): {reason}; see {log_path_for(host, first)}"
        )


def _fixed(jobs: int) -> Callable[[], int]:
    return lambda: jobs


def _outcome(future: Future[StageRun]) -> StageRun:
    """The task's result; an executor that could not run it (a cluster that lost the task's
    worker twice) becomes a failed stage with the reason as its output."""
    try:
        return future.result()
    except Exception as exc:
        return StageRun(None, f"ERROR: {type(exc).__name__}: {exc}\n")


def _event(result: StageRun) -> str:
    """How one ``dvc repro -s`` ended: ``failed``, ``restored`` (from the run-cache), ``ran``."""
    if result.returncode != 0:
        return "failed"
    return "restored" if " is cached" in result.output else "ran"


def _failure_reason(output: str) -> str:
    """The stage's own one-line error (retrograde stages print ``retrograde <stage>: error:
    ...``) when there is one, else DVC's last error line.

    Examples
    --------
    >>> _failure_reason("retrograde fit: error: cell x diverged; see fit.log\\nERROR: failed")
    'cell x diverged; see fit.log'
    >>> _failure_reason("ERROR: failed to reproduce 'x': exited with 3")
    "ERROR: failed to reproduce 'x': exited with 3"
    """
    ours = _STAGE_ERROR.findall(output)
    return ours[-1].strip() if ours else last_error_line(output)


def _repro_one(repo: HostRepo, name: str, *, pull: bool) -> StageRun:
    """One ``dvc repro -s`` process here; its output becomes the stage's log."""
    argv = repro_argv(repo.target(name), pull=pull)
    result = run_tool([*dvc_argv(), *argv], cwd=repo.root, check=False)
    return StageRun(result.returncode, stage_log(argv, result.stdout, result.stderr))


def stage_log(argv: Sequence[str], stdout: str | None, stderr: str | None) -> str:
    """A stage log's text: the ``dvc`` command, then its output.

    >>> stage_log(["repro", "x"], "Running stage 'x'\\n", "")
    "$ dvc repro x\\nRunning stage 'x'\\n"
    """
    return f"$ {' '.join(['dvc', *argv])}\n{stdout or ''}{stderr or ''}"


# ------------------------------------------------------------------------------------
# Batches: one DVC process reproduces many stages (``repro -s --glob``), a few at once.

#: batches handed out per job: more balance the processes better and stop sooner after a
#: failure; each costs one DVC start and pipeline load (about a CPU-second at 100 stages)
BATCHES_PER_JOB = 2


def batches(names: Sequence[str], jobs: int, per_job: int = BATCHES_PER_JOB) -> list[list[str]]:
    """Stage names grouped by a common name prefix, one group per DVC process: the
    coarsest of (source), (source, model), (source, model, order), (stage) that gives at
    least ``jobs * per_job`` groups; largest groups first (they would finish last).

    Each group is reproduced with ONE glob target (:func:`batch_pattern`): DVC parses the
    stage file, the lock file and the params once per target, so a list of N targets costs
    N pipeline loads where one glob costs one.

    Examples
    --------
    >>> names = [f"fit@s-{m}-{o}-{k}" for m in "ab" for o in "xy" for k in "01"]
    >>> [len(b) for b in batches(names, 2, 1)]
    [4, 4]
    >>> batches(names, 2, 2)[0]
    ['fit@s-a-x-0', 'fit@s-a-x-1']
    >>> batches(["fit@s-a-x-0"], 2)
    [['fit@s-a-x-0']]
    """
    names = list(dict.fromkeys(names))
    groups: dict[str, list[str]] = {}
    for level in (1, 2, 3, 4):
        groups = {}
        for name in names:
            stage, _, item = name.partition("@")
            key = stage + "@" + "-".join(item.split("-")[:level])
            groups.setdefault(key, []).append(name)
        if len(groups) >= jobs * per_job:
            break
    return sorted(groups.values(), key=len, reverse=True)


def batch_pattern(batch: Sequence[str]) -> str:
    """The glob naming the stages of ``batch``'s group. Config names hold no ``-`` and no
    glob character (``NAME_PATTERN``), so ``fit@s-m-*`` names exactly source ``s`` and model
    ``m``; stages of the group that are not in the batch are up to date and DVC skips them.

    Examples
    --------
    >>> batch_pattern(["fit@s-a-x-0", "fit@s-a-y-1"])
    'fit@s-a-*'
    >>> batch_pattern(["fit@s-a-x-0"])
    'fit@s-a-x-0'
    """
    stage = batch[0].partition("@")[0]
    split = [name.partition("@")[2].split("-") for name in batch]
    common = []
    for column in zip(*split, strict=True):
        if len(set(column)) != 1:
            break
        common.append(column[0])
    if len(common) == len(split[0]):
        return batch[0]
    return f"{stage}@" + "-".join(common) + "-*"


def run_stage_batches(
    host: Path,
    stage_names: list[str],
    jobs: int,
    *,
    pull: bool = False,
    progress: Progress | None = None,
    per_job: int = BATCHES_PER_JOB,
) -> None:
    """Reproduce independent stages with at most ``jobs`` DVC processes at once, each
    given a batch of them (:func:`batches`) as one glob target.

    DVC holds its repository lock while it checks and records a stage and releases it while
    the stage command runs, so with ``--wait-for-lock`` the processes take turns for the
    bookkeeping and overlap the commands. Each stage's part of its process's output goes to
    its own log (:func:`log_path_for`). After a failure no new batch starts; a running batch
    stops at its own first failure. Raises :class:`FitError` naming the first failed stage
    (in ``stage_names`` order) and its log.
    """
    from ._driver import stream_repro

    jobs = check_int("option 'run'", "jobs", jobs, low=1)
    host = Path(host)
    repo = HostRepo(root=host, git_root=host)
    work = batches(stage_names, jobs, per_job)
    if not work:
        return
    progress = progress if progress is not None else Progress(len(stage_names))

    def one(batch: list[str]) -> tuple[int, str, list[str]]:
        argv = [*dvc_argv(), "--wait-for-lock", "repro", "--single-item"]
        argv += [*(["--pull"] if pull else []), "--glob", repo.target(batch_pattern(batch))]
        return stream_repro(repo, argv, progress, split_logs=True)

    results: list[tuple[list[str], tuple[int, str, list[str]]]] = []
    with ThreadPoolExecutor(max_workers=jobs) as pool:
        pending: dict[Future[tuple[int, str, list[str]]], list[str]] = {}
        queue = iter(work)
        failed = False
        while True:
            while not failed and len(pending) < jobs:
                batch = next(queue, None)
                if batch is None:
                    break
                pending[pool.submit(one, batch)] = batch
            if not pending:
                break
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for future in done:
                batch = pending.pop(future)
                results.append((batch, future.result()))
                failed = failed or results[-1][1][0] != 0
    failures = [(batch, result) for batch, result in results if result[0] != 0]
    if failures:
        order = {name: i for i, name in enumerate(stage_names)}
        failed_names = sorted(
            (name for _, result in failures for name in result[2]), key=lambda n: order.get(n, 0)
        )
        first = failed_names[0] if failed_names else failures[0][0][0]
        output = next((r[1] for b, r in failures if first in r[2] or first in b), failures[0][1][1])
        not_started = sum(len(b) for b in work) - sum(len(b) for b, _ in results)
        raise FitError(
            f"stage {first!r} failed ({len(failed_names) or 1} failed, {not_started} not "
            f"started): {_failure_reason(output)}; see {log_path_for(host, first)}"
        )
