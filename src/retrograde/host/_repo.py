"""The host repository: finding it, checking git and DVC, running their commands.

retrograde lives inside a team's own git + DVC repository (the *host*). This module is the
one place that locates the host, checks that git and DVC are set up, and runs ``git`` and
``dvc`` as subprocesses. Commands are always argument lists (never a shell string), so no
config value can reach a shell, and a failed command becomes one
:class:`~retrograde.errors.HostRepoError` line that says what failed, where, and how to
look closer.

Everything retrograde writes in a host lies under two folders, :data:`CONF_DIR` and
:data:`PIPELINE_DIR` (DESIGN.md, invariant 7).
"""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from ..config import CONF_DIR, DVC_FILE, PARAMS_FILE, PIPELINE_DIR
from ..data import atomic_write_text
from ..errors import HostRepoError

__all__ = [
    "HostRepo",
    "dvc_argv",
    "failure_message",
    "find_host",
    "git_toplevel",
    "last_error_line",
    "require_installed",
    "run_dvc",
    "run_git",
    "run_tool",
]

# Longest tool message quoted in an error line; the full text goes to a log or the terminal.
_MAX_QUOTE = 300


@dataclass(frozen=True)
class HostRepo:
    """A located host repository.

    Parameters
    ----------
    root : Path
        Absolute folder holding ``.dvc/`` (usually the git top level).
    git_root : Path
        Absolute git top level (equal to ``root`` unless DVC was set up with ``--subdir``).

    Examples
    --------
    >>> host = HostRepo(root=Path("/repo"), git_root=Path("/repo"))
    >>> host.target("fit@demo-ngram-forward-0")
    'pipelines/retrograde/dvc.yaml:fit@demo-ngram-forward-0'
    >>> host.pipeline_dir.as_posix()
    '/repo/pipelines/retrograde'
    """

    root: Path
    git_root: Path

    @property
    def conf_dir(self) -> Path:
        return self.root / CONF_DIR

    @property
    def pipeline_dir(self) -> Path:
        return self.root / PIPELINE_DIR

    @property
    def dvc_file(self) -> Path:
        return self.root / DVC_FILE

    @property
    def params_file(self) -> Path:
        return self.root / PARAMS_FILE

    def target(self, stage_name: str) -> str:
        """The ``dvc repro`` target for a pipeline stage, as run from the host root.

        A name that already names its file (``path/dvc.yaml:stage``) is returned unchanged.
        """
        if ":" in stage_name:
            return stage_name
        return f"{DVC_FILE.as_posix()}:{stage_name}"


def git_toplevel(start: str | os.PathLike[str]) -> Path:
    """The top level of the git work tree containing ``start``.

    Raises
    ------
    HostRepoError
        When ``start`` does not exist, git is missing, or ``start`` is not inside a git work
        tree; the message says which command to run.
    """
    start = Path(start).resolve()
    if not start.is_dir():
        raise HostRepoError(
            f"folder {start} does not exist; pass --dir with the path of your git repository"
        )
    result = run_tool(["git", "rev-parse", "--show-toplevel"], cwd=start, check=False)
    if result.returncode != 0:
        raise HostRepoError(
            f"{start} is not inside a git repository; run `git init {start}` first "
            "(or pass --dir with the path of your repository)"
        )
    return Path(result.stdout.strip()).resolve()


def find_host(start: str | os.PathLike[str] | None = None, *, require_dvc: bool = True) -> HostRepo:
    """Locate the host repository containing ``start`` (default: the current folder).

    The host root is the nearest folder at or above ``start``, and inside the git work tree,
    that holds ``.dvc/``. Without one the root is the git top level, and ``require_dvc``
    decides whether that is an error.

    Raises
    ------
    HostRepoError
        Not a git repository, or (with ``require_dvc``) DVC is not initialised; the message
        gives the exact commands to run.
    """
    start_dir = Path.cwd() if start is None else Path(start)
    git_root = git_toplevel(start_dir)
    folder = start_dir.resolve()
    while True:
        if (folder / ".dvc").is_dir():
            return HostRepo(root=folder, git_root=git_root)
        if folder == git_root or folder.parent == folder:
            break
        folder = folder.parent
    if require_dvc:
        raise HostRepoError(
            f"DVC is not initialised in {git_root}; run `cd {git_root} && dvc init && "
            "git commit -m 'Initialise DVC'` first"
        )
    return HostRepo(root=git_root, git_root=git_root)


def require_installed(host: HostRepo) -> None:
    """Refuse a host where ``retrograde init`` has not installed the config and stage file."""
    for path, what in ((host.conf_dir, "config folder"), (host.dvc_file, "stage file")):
        if not path.exists():
            raise HostRepoError(
                f"{path} (the retrograde {what}) is missing; run `retrograde init --dir "
                f"{host.root}` first"
            )


def dvc_argv() -> list[str]:
    """The command that starts the DVC installed next to retrograde (same interpreter).

    ``python -m dvc`` rather than a bare ``dvc`` so that an un-activated virtual environment
    still runs the DVC version retrograde was installed and tested with.
    """
    return [sys.executable, "-m", "dvc"]


def run_git(
    root: str | os.PathLike[str], args: Sequence[str], *, check: bool = True
) -> subprocess.CompletedProcess[str]:
    """Run ``git ARGS`` in ``root`` with captured output; see :func:`run_tool`."""
    return run_tool(["git", *args], cwd=root, check=check)


def run_dvc(
    root: str | os.PathLike[str],
    args: Sequence[str],
    *,
    check: bool = True,
    capture: bool = True,
    log_path: str | os.PathLike[str] | None = None,
    env: Mapping[str, str] | None = None,
) -> subprocess.CompletedProcess[str]:
    """Run ``dvc ARGS`` in ``root``; see :func:`run_tool`."""
    return run_tool(
        [*dvc_argv(), *args],
        cwd=root,
        check=check,
        capture=capture,
        log_path=log_path,
        display=["dvc", *args],
        env=env,
    )


def run_tool(
    argv: Sequence[str],
    *,
    cwd: str | os.PathLike[str],
    check: bool = True,
    capture: bool = True,
    log_path: str | os.PathLike[str] | None = None,
    display: Sequence[str] | None = None,
    env: Mapping[str, str] | None = None,
) -> subprocess.CompletedProcess[str]:
    """Run one external command (an argument list, never through a shell).

    Parameters
    ----------
    argv : sequence of str
        The program and its arguments.
    cwd : path
        Folder to run in.
    check : bool
        Raise :class:`HostRepoError` on a non-zero exit status.
    capture : bool
        Capture stdout and stderr as text (otherwise they go to the terminal).
    log_path : path, optional
        With ``capture``, also write stdout and stderr to this file (the error names it).
    display : sequence of str, optional
        How to name the command in messages (default: ``argv``).
    env : mapping, optional
        Extra environment variables on top of the current environment.

    Raises
    ------
    HostRepoError
        The program is not installed, or (with ``check``) it exited non-zero. The message is
        one line: the command, the folder, the exit status and the tool's last error line.

    Examples
    --------
    >>> run_tool([sys.executable, "-c", "print('hi')"], cwd=".").stdout
    'hi\\n'
    """
    shown = " ".join(display if display is not None else argv)
    full_env = None if env is None else {**os.environ, **env}
    try:
        result = subprocess.run(
            list(argv),
            cwd=cwd,
            capture_output=capture,
            text=True,
            env=full_env,
            check=False,
            stdin=subprocess.DEVNULL,
        )
    except FileNotFoundError as exc:
        raise HostRepoError(
            f"`{argv[0]}` is not installed or not on PATH (needed for `{shown}`); "
            "install it and retry"
        ) from exc
    if log_path is not None and capture:
        log_text = f"$ {shown}\n{result.stdout or ''}{result.stderr or ''}"
        atomic_write_text(log_path, log_text)  # replaces a symbolic link, never follows it
    if check and result.returncode != 0:
        raise HostRepoError(failure_message(shown, cwd, result, log_path))
    return result


def failure_message(
    shown: str,
    cwd: str | os.PathLike[str],
    result: subprocess.CompletedProcess[str],
    log_path: str | os.PathLike[str] | None = None,
) -> str:
    """One line describing a failed command: what, where, why, and where to look."""
    reason = last_error_line(f"{result.stdout or ''}\n{result.stderr or ''}")
    where = f"see {log_path}" if log_path is not None else f"rerun it in {cwd} to see everything"
    because = f": {reason}" if reason else ""
    return f"`{shown}` failed with exit status {result.returncode} in {cwd}{because}; {where}"


def last_error_line(output: str) -> str:
    """The most telling line of a tool's output, shortened to one readable line.

    That is its last line starting with ``ERROR``/``error``/``fatal`` (how git and DVC
    report), else its last non-empty line (a Python traceback ends with the exception).

    Examples
    --------
    >>> last_error_line("Running stage 'x':\\nERROR: failed to reproduce 'x': boom\\n\\nbye\\n")
    "ERROR: failed to reproduce 'x': boom"
    >>> last_error_line("")
    ''
    """
    lines = [line.strip() for line in output.splitlines() if line.strip()]
    flagged = [line for line in lines if line.lower().startswith(("error", "fatal"))]
    chosen = flagged[-1] if flagged else (lines[-1] if lines else "")
    return chosen if len(chosen) <= _MAX_QUOTE else chosen[: _MAX_QUOTE - 3] + "..."
