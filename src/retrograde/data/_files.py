"""Atomic file writing: write to a temporary sibling, then rename.

Nothing half-written is ever left at the destination path, and a symbolic link there is
replaced, never written through (the rename swaps the link itself).
"""

from __future__ import annotations

import contextlib
import errno
import io
import json
import os
import shutil
import tempfile
import zipfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "open_for_writing",
    "working_directory",
    "atomic_dir",
    "atomic_write_bytes",
    "atomic_write_json",
    "atomic_write_text",
    "write_npz",
]


def _umask() -> int:
    mask = os.umask(0)  # reading the umask means setting it; put it back at once
    os.umask(mask)
    return mask


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file in the same folder and a rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp makes the file private (0600); give it the mode a plain open() would.
        os.chmod(tmp, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def open_for_writing(path: str | os.PathLike[str]) -> io.TextIOWrapper:
    """``path`` opened for writing UTF-8 text from the start, never through a symbolic link.

    For files written as work goes on (a log that must survive a crash), where a temporary
    file and a rename would not do. A symbolic link at ``path`` is removed (its target is
    left alone) and a regular file takes its place; ``O_NOFOLLOW`` makes sure a link put
    there meanwhile is not followed either.
    """
    path = Path(path)
    flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW | os.O_CLOEXEC
    for _ in range(2):
        if path.is_symlink():
            path.unlink()
        try:
            fd = os.open(path, flags, 0o666)
        except OSError as exc:
            if exc.errno == errno.ELOOP:
                continue  # a link appeared between the check and the open: remove it again
            raise
        return io.TextIOWrapper(io.FileIO(fd, "w"), encoding="utf-8")
    raise OSError(errno.ELOOP, "a symbolic link keeps reappearing", str(path))


def atomic_write_text(path: str | os.PathLike[str], text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | os.PathLike[str], obj: Any) -> None:
    """Deterministic JSON: sorted keys, two-space indent, trailing newline."""
    atomic_write_text(path, json.dumps(obj, indent=2, sort_keys=True, allow_nan=False) + "\n")


@contextlib.contextmanager
def atomic_dir(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary folder; on success it replaces ``path`` whole, on failure it is removed."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes it private (0700)
    try:
        yield tmp
        if path.exists():
            old = path.with_name(f".{path.name}.old")
            shutil.rmtree(old, ignore_errors=True)
            os.replace(path, old)
            os.replace(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_npz(path: str | os.PathLike[str], arrays: dict[str, np.ndarray]) -> None:
    """Like ``np.savez`` but byte-identical for identical arrays (sorted names, fixed
    timestamps), so DVC sees an unchanged output when a fit is repeated; readable with
    ``np.load(path, allow_pickle=False)``."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_STORED) as archive:
        for name in sorted(arrays):
            member = io.BytesIO()
            np.save(member, np.asarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            archive.writestr(info, member.getvalue())
    atomic_write_bytes(path, buffer.getvalue())


@contextlib.contextmanager
def working_directory(folder: str | os.PathLike[str]) -> Iterator[None]:
    """Run the body with ``folder`` as the working folder (sources resolve paths from it)."""
    previous = Path.cwd()
    os.chdir(folder)
    try:
        yield
    finally:
        os.chdir(previous)
