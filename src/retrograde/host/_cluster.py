"""Fit cells on a Dask cluster: ``retrograde run --cluster ADDRESS|local:N``.

Dask's ``distributed`` scheduler places the tasks; each task is what a parallel job does on
one machine: one ``dvc --wait-for-lock repro --single-item`` of one stale fit stage
(:func:`retrograde.host.run_stages_in_parallel` with the cluster as its executor). DVC
still decides what is stale and records every result, and the closing ``dvc repro`` on
this machine runs the ``table`` stage.

Two deployments:

``shared``
    Every worker sees the repository at the same path (or at ``--cluster-repo``) on a
    shared filesystem. The stages write their outputs and ``dvc.lock`` entries there,
    exactly as ``--jobs`` does on one machine (DVC's repository lock, which retrograde
    waits for, keeps the ``dvc.lock`` writes apart).
``clone``
    Every worker holds its own clone of the repository at ``--cluster-repo``, at the commit
    this machine is at, and all share a default DVC remote. This machine pushes the
    ``units``/``reorder`` results (``dvc push --run-cache``); each task writes the run's
    generated ``params.yaml`` and stage file into its clone, restores the cell's inputs
    (``dvc repro --pull`` of its ``reorder`` stage), fits, and pushes the result with
    ``dvc push --run-cache``; the closing ``dvc repro --pull`` here restores every cell
    from the run-cache, as a CI shard's results are gathered (``docs/ci.md``).

A task whose worker is lost is retried once (on ``local:N``; a scheduler of your own keeps
its ``distributed.scheduler.allowed-failures``); a task that raised is retried once too
(``retries=1``). Ctrl-C cancels the queued tasks and stops the running ones' DVC processes
(the tasks watch a Dask ``Event``). ``distributed`` is an optional extra: nothing here
imports it until a cluster is asked for.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import re
import signal
import subprocess
import sys
import tempfile
import threading
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Executor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..config import DVC_FILE, PARAMS_DIGEST_ENV, PARAMS_FILE, params_digest
from ..data import atomic_write_text
from ..errors import ConfigError, HostRepoError, MissingDependencyError
from ._parallel import StageRun, repro_argv, run_stages_in_parallel, stage_log
from ._progress import Progress
from ._repo import HostRepo, dvc_argv, run_dvc, run_git

__all__ = [
    "CLUSTER_MODES",
    "Cluster",
    "ClusterOptions",
    "WorkerJob",
    "check_workers",
    "open_cluster",
    "parse_cluster",
    "run_on_cluster",
]

CLUSTER_MODES = ("shared", "clone")
#: seconds between a running task's looks at the stop event
_STOP_POLL = 2.0
#: seconds a stopped DVC process gets between SIGTERM and SIGKILL
_STOP_GRACE = 10.0
_LOCAL = re.compile(r"^local:(\d+)$")
_ADDRESS = re.compile(r"^(?:(?:tcp|tls|ws|wss|ucx)://)?[A-Za-z0-9_.\-\[\]:]+:\d+$")
_INSTALL_HINT = (
    "install it with `pip install -e '.[cluster]'` in a checkout of retrograde "
    "(or `pip install 'retrograde[cluster]'`)"
)


def parse_cluster(text: str) -> str:
    """Check a ``--cluster`` value: a scheduler address or ``local:N`` (N >= 1).

    Examples
    --------
    >>> parse_cluster("tcp://10.0.0.5:8786"), parse_cluster("local:2")
    ('tcp://10.0.0.5:8786', 'local:2')
    >>> parse_cluster("local:0")
    Traceback (most recent call last):
    ...
    retrograde.errors.ConfigError: option --cluster: 'local:0' is invalid; allowed: a Dask scheduler address such as tcp://host:8786, or local:N with N >= 1 worker processes
    """
    value = text.strip()
    local = _LOCAL.match(value)
    if (local and int(local[1]) >= 1) or (not local and _ADDRESS.match(value)):
        return value
    raise ConfigError(
        f"option --cluster: {text!r} is invalid; allowed: a Dask scheduler address such as "
        "tcp://host:8786, or local:N with N >= 1 worker processes"
    )


@dataclass(frozen=True)
class ClusterOptions:
    """Where a run's fit cells go: ``address`` (or ``local:N``), the deployment ``mode``
    (``shared`` or ``clone``) and ``repo``, the repository's path on the workers (default:
    its path here)."""

    address: str
    mode: str = "shared"
    repo: str | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "address", parse_cluster(self.address))
        if self.mode not in CLUSTER_MODES:
            raise ConfigError(
                f"option --cluster-mode: {self.mode!r} is invalid; allowed: "
                f"{', '.join(CLUSTER_MODES)}"
            )
        if self.repo is not None and not Path(self.repo).is_absolute():
            raise ConfigError(
                f"option --cluster-repo: {self.repo!r} is invalid; allowed: an absolute path "
                "(the repository's folder on every worker)"
            )


def _distributed() -> Any:
    try:
        import distributed
    except ImportError as exc:
        raise MissingDependencyError(
            f"option --cluster needs Dask's distributed scheduler, which is not installed; "
            f"{_INSTALL_HINT}"
        ) from exc
    return distributed


@dataclass
class Cluster:
    """An open Dask client: the executor the stages go to and how many may run at once."""

    client: Any
    executor: Executor
    #: name of the Dask Event that tells running tasks to stop their DVC process
    stop_event: str
    address: str

    def capacity(self) -> int:
        """Worker threads the scheduler has now (asked again as stages end)."""
        return int(sum(self.client.nthreads().values()))


@contextlib.contextmanager
def open_cluster(options: ClusterOptions) -> Iterator[Cluster]:
    """Connect to the scheduler (or start ``local:N``); on leaving, stop what still runs.

    Raises
    ------
    MissingDependencyError
        ``distributed`` is not installed (the ``cluster`` extra).
    HostRepoError
        The scheduler cannot be reached.
    """
    distributed = _distributed()
    import dask

    local = _LOCAL.match(options.address)
    with contextlib.ExitStack() as stack:
        if local:
            # A lost worker's tasks are tried on one more worker, then fail (default 3).
            stack.enter_context(dask.config.set({"distributed.scheduler.allowed-failures": 1}))
            cluster = stack.enter_context(
                distributed.LocalCluster(
                    n_workers=int(local[1]),
                    threads_per_worker=1,
                    processes=True,
                    host="127.0.0.1",  # this machine only
                    dashboard_address=None,
                    # no dashboard, and its web server on a free port, not 8787
                    scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"},
                    # Ctrl-C is the coordinator's to handle (the tasks get told to stop);
                    # the scheduler's complaints about a client that left are noise then.
                    silence_logs=logging.CRITICAL + 1,
                    preload=[__name__],  # dask_setup below: workers ignore SIGINT
                )
            )
            client = stack.enter_context(distributed.Client(cluster))
        else:
            try:
                client = distributed.Client(options.address)
            except (OSError, TimeoutError, ValueError) as exc:
                reason = " ".join(str(exc).split()) or type(exc).__name__
                raise HostRepoError(
                    f"option --cluster: cannot reach the Dask scheduler at {options.address} "
                    f"({reason[:200]}); start one with `dask scheduler` and its workers with "
                    "`dask worker ADDRESS`, or use local:N"
                ) from exc
            stack.enter_context(client)
        stop = f"retrograde-stop-{uuid.uuid4().hex}"
        executor = client.get_executor(retries=1, pure=False)
        try:
            yield Cluster(client, executor, stop, options.address)
        finally:
            # Running tasks see the event and end their DVC process (Ctrl-C, a failure).
            with contextlib.suppress(Exception):
                distributed.Event(stop, client=client).set()
            executor.shutdown(wait=False)


def check_workers(cluster: Cluster, options: ClusterOptions, host: HostRepo) -> None:
    """Ask every worker, before anything is written, whether it can run this run's cells:
    the repository at its path there (in clone mode: a clone at this commit), and the
    same versions of retrograde and DVC as here. Workers that join later are checked by
    each task.

    Raises
    ------
    HostRepoError
        One line naming the first worker that cannot, and why; or (clone mode) this
        repository has no default DVC remote.
    """
    commit = None
    if options.mode == "clone":
        default = run_dvc(host.root, ["remote", "default"], check=False)
        if default.returncode != 0 or not default.stdout.strip():
            raise HostRepoError(
                f"--cluster-mode clone needs a default DVC remote in {host.root} that every "
                "worker can reach; run `dvc remote add -d NAME URL` and commit .dvc/config"
            )
        commit = run_git(host.git_root, ["rev-parse", "HEAD"]).stdout.strip()
    root = options.repo or str(host.root)
    try:
        answers: dict[str, str | None] = cluster.client.run(_probe, root, commit, _versions())
    except Exception as exc:  # a worker that cannot even answer (its retrograde is missing)
        reason = " ".join(str(exc).split())[:200] or type(exc).__name__
        raise HostRepoError(
            f"option --cluster: a worker of {cluster.address} could not be asked whether it "
            f"can run the cells ({type(exc).__name__}: {reason}); install retrograde there"
        ) from exc
    problems = sorted((address, text) for address, text in answers.items() if text)
    if problems:
        address, text = problems[0]
        raise HostRepoError(
            f"option --cluster: worker {address} cannot run the cells: {text} "
            f"({len(problems)} of {len(answers)} workers)"
        )


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    found = {}
    for package in ("retrograde", "dvc"):
        try:
            found[package] = version(package)
        except PackageNotFoundError:
            found[package] = "?"
    return found


def _probe(root: str, commit: str | None, versions: dict[str, str]) -> str | None:
    """On a worker: why it cannot run this run's cells, or ``None``."""
    for package, wanted in _versions().items():
        if wanted != versions.get(package):
            return (
                f"it has {package} {wanted}, this machine {versions.get(package)}; install "
                "the same packages on every worker"
            )
    return _repository_problem(Path(root), commit)


def _repository_problem(root: Path, commit: str | None) -> str | None:
    if not (root / ".dvc").is_dir():
        return (
            f"no DVC repository at {root} there; every worker needs the repository at that "
            "path (a shared filesystem, or a clone with --cluster-mode clone)"
        )
    if commit is None:
        return None
    result = subprocess.run(
        ["git", "rev-parse", "HEAD"], cwd=root, capture_output=True, text=True, check=False
    )
    head = result.stdout.strip()
    if head != commit:
        return (
            f"the clone at {root} is at commit {head[:12] or '?'}, this run at "
            f"{commit[:12]}; check out the same commit on every worker"
        )
    return None


@dataclass(frozen=True)
class WorkerJob:
    """What a task needs to run one fit stage on a worker (pickled to it).

    ``root`` is the repository on the worker; ``env`` the variables the stage checks
    (the digest of ``params.yaml``). In clone mode ``commit`` is the commit the clone must
    be at, ``files`` the generated files (path in the repository -> text) and ``upstream``
    each stage's ``reorder`` target.
    """

    root: str
    pull: bool
    env: dict[str, str]
    stop_event: str | None = None
    commit: str | None = None
    files: dict[str, str] = field(default_factory=dict)
    upstream: dict[str, str] = field(default_factory=dict)

    def __call__(self, name: str) -> StageRun:
        return _run_on_worker(self, name)


def run_on_cluster(
    host: HostRepo,
    names: list[str],
    cluster: Cluster,
    options: ClusterOptions,
    *,
    upstream: dict[str, str],
    pull: bool = False,
    progress: Progress | None = None,
) -> None:
    """Run the fit stages ``names`` as tasks on ``cluster`` (see the module's text).

    Raises
    ------
    FitError
        As :func:`run_stages_in_parallel`: one line naming the first failed stage, the
        worker and the stage's log here.
    """
    if not names:
        return
    clone = options.mode == "clone"
    root = options.repo or str(host.root)
    job = WorkerJob(
        root=root,
        pull=pull or clone,
        env={PARAMS_DIGEST_ENV: params_digest(host.params_file)},
        stop_event=cluster.stop_event,
    )
    if clone:
        # The workers restore units and reorder results from the remote, not recompute them.
        run_dvc(
            host.root, ["push", "--run-cache"], log_path=host.pipeline_dir / "logs" / "push.log"
        )
        commit = run_git(host.git_root, ["rev-parse", "HEAD"]).stdout.strip()
        files = {
            path.as_posix(): (host.root / path).read_text(encoding="utf-8")
            for path in (PARAMS_FILE, DVC_FILE)
        }
        job = dataclasses.replace(job, commit=commit, files=files, upstream=upstream)
    capacity: Callable[[], int] = lambda: max(1, cluster.capacity())  # noqa: E731
    run_stages_in_parallel(
        host.root,
        names,
        capacity,
        pull=pull,
        progress=progress,
        executor=cluster.executor,
        run_one=job,
    )


# ----------------------------------------------------------------------- on the worker
def dask_setup(worker: object) -> None:
    """Dask's preload hook, run in each ``local:N`` worker process as it starts.

    A terminal's Ctrl-C reaches every process of its group, workers included: they ignore
    it, and the coordinator stops their tasks instead (:func:`open_cluster`).
    """
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, signal.SIG_IGN)


def _worker_name() -> str:
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):
        return "this process"
    name = worker.name
    return f"worker {name}" if isinstance(name, (int, str)) else str(worker.address)


def _stop_requested(event_name: str | None) -> Callable[[], bool]:
    if event_name is None:
        return lambda: False
    event = _distributed().Event(event_name)

    def requested() -> bool:
        try:
            return bool(event.is_set())
        except Exception:  # the scheduler is gone: nobody is left to take the result
            return True

    return requested


def _run_on_worker(job: WorkerJob, name: str) -> StageRun:
    worker = _worker_name()
    root = Path(job.root)
    problem = _repository_problem(root, job.commit)
    if problem is not None:
        return StageRun(None, f"ERROR: {worker}: {problem}\n", worker)
    env = {
        **os.environ,
        "PATH": os.pathsep.join([str(Path(sys.executable).parent), os.environ.get("PATH", "")]),
        **job.env,
    }
    stop = _stop_requested(job.stop_event)
    target = f"{DVC_FILE.as_posix()}:{name}"
    log = ""
    if job.commit is not None:
        failed, log = _prepare_clone(job, root, name, env, stop)
        if failed is not None:
            return StageRun(failed, log, worker)
    argv = repro_argv(target, pull=job.pull)
    status, output = _watched([*dvc_argv(), *argv], root, env, stop)
    log += stage_log(argv, output, "")
    if job.commit is not None and status == 0:
        push = ["push", "--run-cache", target]
        status, output = _watched([*dvc_argv(), *push], root, env, stop)
        log += stage_log(push, output, "")
    return StageRun(status, log, worker)


def _prepare_clone(
    job: WorkerJob, root: Path, name: str, env: dict[str, str], stop: Callable[[], bool]
) -> tuple[int | None, str]:
    """Write the run's generated files into the clone and restore the cell's inputs.

    One task per clone at a time (a file lock), so two tasks never restore the same
    ``reorder`` outputs at once. Returns ``(exit status or None, log)``; status ``None``
    means all is ready.
    """
    import fcntl

    lock_path = root / ".dvc" / "tmp" / "retrograde-cluster.lock"
    lock_path.parent.mkdir(parents=True, exist_ok=True)
    with open(lock_path, "a+", encoding="utf-8") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        for relative, text in job.files.items():
            path = root / relative
            if not path.is_file() or path.read_text(encoding="utf-8") != text:
                atomic_write_text(path, text)
        upstream = job.upstream.get(name)
        if upstream is None:
            return None, ""
        argv = ["--wait-for-lock", "repro", "--pull", upstream]
        status, output = _watched([*dvc_argv(), *argv], root, env, stop)
    log = stage_log(argv, output, "")
    return (None if status == 0 else status), log


def _watched(
    argv: Sequence[str], cwd: Path, env: dict[str, str], stop: Callable[[], bool]
) -> tuple[int, str]:
    """Run a command in its own process group; end the group when ``stop()`` turns true.

    Returns the exit status and the command's output (stdout and stderr together).
    """
    with tempfile.TemporaryFile(mode="w+", encoding="utf-8") as output:
        process = subprocess.Popen(
            list(argv),
            cwd=cwd,
            env=env,
            stdin=subprocess.DEVNULL,
            stdout=output,
            stderr=subprocess.STDOUT,
            text=True,
            start_new_session=True,  # its own group: stopping it stops the stage command too
        )
        while True:
            try:
                status = process.wait(timeout=_STOP_POLL)
                break
            except subprocess.TimeoutExpired:
                if stop():
                    _end_group(process)
                    status = process.wait()
                    output.seek(0, os.SEEK_END)
                    output.write("\nERROR: stopped: the run was cancelled (Ctrl-C)\n")
                    break
        output.seek(0)
        return status, output.read()


def _end_group(process: subprocess.Popen[str]) -> None:
    with contextlib.suppress(ProcessLookupError):
        os.killpg(process.pid, signal.SIGTERM)
    try:
        process.wait(timeout=_STOP_GRACE)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGKILL)
