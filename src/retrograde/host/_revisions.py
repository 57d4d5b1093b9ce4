"""The gap table at a git revision (or in the working tree), for ``compare`` and ``table``."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from ..errors import ConfigError, DataError
from ..report import check_table
from ._repo import git_toplevel, run_git

__all__ = ["read_table_at"]


def _parse(text: str, where: str) -> dict[str, Any]:
    try:
        table = json.loads(text)
    except json.JSONDecodeError as exc:
        raise DataError(f"{where}: invalid JSON ({exc.msg}, line {exc.lineno})") from exc
    return dict(check_table(table, where))  # every leaf printable: numbers, no NaN


def read_table_at(
    repo_dir: str | os.PathLike[str], revision: str | None, path: str | os.PathLike[str]
) -> dict[str, Any]:
    """The gap table at ``path`` (relative to ``repo_dir``) in ``revision``, or the work tree.

    Raises
    ------
    ConfigError
        ``revision`` is not a commit of the repository.
    DataError
        There is no such file at that revision, or it is not a table.
    """
    repo_dir = Path(repo_dir)
    file_path = repo_dir / path
    if revision is None:
        if not file_path.is_file():
            raise DataError(
                f"{file_path}: no metrics in the working tree; run `retrograde run` first "
                "(or pass --dir/--path)"
            )
        try:
            text = file_path.read_bytes().decode("utf-8")
        except UnicodeDecodeError as exc:
            raise DataError(
                f"{file_path}: not UTF-8 (byte offset {exc.start}); metrics.json is written "
                "as UTF-8 JSON by `retrograde run`: regenerate it"
            ) from None
        return _parse(text, str(file_path))
    root = git_toplevel(repo_dir)
    try:
        inside = file_path.resolve().relative_to(root).as_posix()
    except ValueError:
        raise ConfigError(
            f"option --path: {file_path} is outside the git repository {root}; give a path "
            "inside it (relative to --dir)"
        ) from None
    verify = run_git(
        root, ["rev-parse", "--verify", "--quiet", f"{revision}^{{commit}}"], check=False
    )
    if verify.returncode != 0:
        raise ConfigError(
            f"revision {revision!r} is not a commit in {root}; list commits with "
            "`git log --oneline` (branches, tags and HEAD~N work too)"
        )
    shown = run_git(root, ["show", f"{verify.stdout.strip()}:{inside}"], check=False)
    if shown.returncode != 0:
        raise DataError(
            f"{inside} does not exist at revision {revision!r}; run `retrograde run` and "
            "commit metrics.json at that revision, or compare other revisions"
        )
    return _parse(shown.stdout, f"{inside} at {revision}")
