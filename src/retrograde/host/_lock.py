"""One writer at a time: an exclusive lock on the pipeline folder, taken before the first write.

Two commands that write under ``pipelines/retrograde/`` at once mix results: a ``check``
with other overrides rewrites ``params.yaml`` while a ``run`` fits, and the running fits
read the new params. So every command that writes there takes this lock first, and a
second one is refused in one line naming the holder. The lock is an advisory
``flock`` on ``pipelines/retrograde/logs/.lock`` (a git-ignored folder): the operating
system releases it when its process ends, however it ends, so a killed command never
leaves a stale lock behind. The file holds who took it (command, process id, time), for
the refusal message.

A command killed while DVC ran leaves DVC's own record of the paths its processes were
using (``.dvc/tmp/rwlock``). DVC forgets an entry whose process is gone, but not one
whose process is a zombie - a killed process that nothing has reaped, as happens in a
container whose first process does not reap orphans (many CI runners) - and then refuses
every later run ("is busy"). Holding the pipeline lock, no other retrograde command can be
using them, so :func:`pipeline_lock` drops the entries of dead and zombie processes, through
DVC's own guarded edit of that file; entries of live processes are never touched.

The stage processes DVC starts run under the lock of the command that started ``dvc
repro``; they check in turn that ``params.yaml`` is still the file that command composed
(``retrograde.config.params_digest``, passed in the environment).
"""

from __future__ import annotations

import contextlib
import json
import os
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

from ..config import LOG_DIR
from ..errors import HostRepoError

__all__ = ["LOCK_NAME", "pipeline_lock", "release_dead_dvc_locks"]

LOCK_NAME = ".lock"


def _try_lock(handle: IO[str]) -> bool:
    if sys.platform == "win32":  # pragma: no cover - the CI and users run POSIX
        import msvcrt

        try:
            msvcrt.locking(handle.fileno(), msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    import fcntl

    try:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def _holder(path: Path) -> str:
    try:
        info: dict[str, Any] = json.loads(path.read_text(encoding="utf-8") or "{}")
    except (OSError, ValueError):
        info = {}
    if not info:
        return "another retrograde command"
    started = time.strftime("%H:%M:%S", time.localtime(float(info.get("started", 0))))
    return (
        f"`{info.get('command', 'retrograde')}` (process {info.get('pid', '?')}, started {started})"
    )


def _gone(pid: int) -> bool:
    """Whether process ``pid`` no longer runs (absent, or a zombie nothing has reaped)."""
    import psutil  # a dependency of DVC

    try:
        return bool(psutil.Process(pid).status() == psutil.STATUS_ZOMBIE)
    except psutil.NoSuchProcess:
        return True
    except psutil.Error:  # pragma: no cover - access denied: treat it as alive
        return False


def release_dead_dvc_locks(root: str | os.PathLike[str]) -> list[int]:
    """Drop the entries of dead or zombie processes from DVC's ``rwlock``; their pids."""
    path = Path(root) / ".dvc" / "tmp" / "rwlock"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        infos = [*data.get("write", {}).values()]
        infos += [info for entries in data.get("read", {}).values() for info in entries]
        pids = {int(info["pid"]) for info in infos}
    except (OSError, ValueError, TypeError, KeyError, AttributeError):
        return []  # no file, or one DVC itself will complain about
    dead = sorted(pid for pid in pids if _gone(pid))
    if not dead:
        return []
    from dvc.fs import localfs
    from dvc.rwlock import _edit_rwlock

    with _edit_rwlock(str(path.parent), localfs, False) as lock:
        for key, info in list(lock["write"].items()):
            if info["pid"] in dead:
                del lock["write"][key]
        for key, entries in list(lock["read"].items()):
            kept = [info for info in entries if info["pid"] not in dead]
            if kept:
                lock["read"][key] = kept
            else:
                del lock["read"][key]
    return dead


@contextlib.contextmanager
def pipeline_lock(root: str | os.PathLike[str], command: str) -> Iterator[None]:
    """Hold the pipeline folder's exclusive lock for the body, or refuse at once.

    Raises
    ------
    HostRepoError
        Another command holds the lock; the message names it.
    """
    path = Path(root) / LOG_DIR / LOCK_NAME
    path.parent.mkdir(parents=True, exist_ok=True)
    # O_NOFOLLOW: a symbolic link planted here must not redirect the write.
    flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0)
    try:
        descriptor = os.open(path, flags, 0o644)
    except OSError as exc:
        raise HostRepoError(f"{path}: cannot open the pipeline lock ({exc.strerror})") from exc
    with os.fdopen(descriptor, "r+", encoding="utf-8") as handle:
        if not _try_lock(handle):
            raise HostRepoError(
                f"{path.parents[1]} is in use by {_holder(path)}; wait for it to finish "
                "(or stop it), then run this command again"
            )
        handle.seek(0)
        handle.truncate()
        info = {"command": command, "pid": os.getpid(), "started": time.time()}
        handle.write(json.dumps(info))
        handle.flush()
        release_dead_dvc_locks(root)
        try:
            yield
        finally:
            handle.seek(0)
            handle.truncate()  # the lock itself goes with the file handle
