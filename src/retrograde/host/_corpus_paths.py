"""The corpus paths ``init --source`` accepts, and the source files ``run`` accepts: inside
the host, and existing or declared as an output by the host's own DVC files (so DVC
connects the two pipelines).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path, PurePosixPath
from typing import Any

import yaml

from ..config import PIPELINE_DIR, RetrogradeConfig
from ..data import working_directory
from ..errors import DataError, MissingFileError
from ._repo import HostRepo, run_git

__all__ = [
    "check_source_files",
    "host_stage_outputs",
    "missing_file_hint",
    "resolve_sources",
    "stage_writing",
]


def host_stage_outputs(host: HostRepo) -> list[PurePosixPath]:
    """Host-relative outputs declared by the host's own DVC files (see :func:`_declared`)."""
    return [path for path, _ in _declared(host)]


def stage_writing(host: HostRepo, relative: PurePosixPath) -> str | None:
    """Which of the host's DVC files makes ``relative`` (an output or inside one): a text
    such as ``stage 'make_corpus' in dvc.yaml`` or ``data/raw.dvc``; ``None`` if none."""
    for out, writer in _declared(host):
        if relative == out or _is_below(relative, out):
            return writer
    return None


def missing_file_hint(host: HostRepo, path: Path) -> str | None:
    """For a file that does not exist: how to make it, when a host DVC file declares it.

    ``None`` when the path is outside the host or nothing declares it.
    """
    absolute = path.resolve()
    if not absolute.is_relative_to(host.root.resolve()):
        return None
    relative = PurePosixPath(absolute.relative_to(host.root.resolve()).as_posix())
    writer = stage_writing(host, relative)
    if writer is None:
        return None
    return (
        f"{relative} does not exist yet: {writer} of the host makes it; run `dvc repro` "
        f"(or `dvc pull {relative}` if a DVC remote holds it), then check again"
    )


def _declared(host: HostRepo) -> list[tuple[PurePosixPath, str]]:
    """Host-relative outputs declared by the host's own DVC files (not retrograde's).

    Reads every ``dvc.yaml`` (stage outputs and metrics) and every ``.dvc`` file (data
    tracked with ``dvc add``, possibly not pulled yet) that git knows about, tracked or
    untracked but not ignored, outside ``pipelines/retrograde/``. Templated outputs
    (``${...}``) are skipped: they cannot be matched to a path without DVC's interpolation.
    """
    listed = run_git(
        host.root,
        ["ls-files", "--cached", "--others", "--exclude-standard", "--", "*dvc.yaml", "*.dvc"],
    ).stdout.splitlines()
    outputs: list[tuple[PurePosixPath, str]] = []
    for name in sorted(set(listed)):
        dvc_file = PurePosixPath(name)
        is_dvc_file = dvc_file.name == "dvc.yaml" or dvc_file.suffix == ".dvc"
        if not is_dvc_file or _is_below(dvc_file, PIPELINE_DIR):
            continue
        try:
            data = yaml.safe_load((host.root / dvc_file).read_text(encoding="utf-8")) or {}
        except (OSError, yaml.YAMLError):
            continue  # DVC itself reports a broken host file; it is not ours to judge
        if not isinstance(data, dict):
            continue
        # A .dvc file is shaped like a single stage; a dvc.yaml holds named stages.
        stages = (
            {str(dvc_file): data}
            if dvc_file.suffix == ".dvc"
            else {f"stage {k!r} in {dvc_file}": v for k, v in (data.get("stages") or {}).items()}
        )
        for writer, stage in stages.items():
            if not isinstance(stage, dict):
                continue
            wdir = dvc_file.parent / str(stage.get("wdir", "."))
            for out in [*(stage.get("outs") or []), *(stage.get("metrics") or [])]:
                path = _out_path(out)
                if path is not None and "${" not in path:
                    outputs.append((_normalize(wdir / path), writer))
    return outputs


def _out_path(out: Any) -> str | None:
    """The path of one ``outs`` entry: ``"p"``, ``{"p": {...}}`` (dvc.yaml) or
    ``{"path": "p", "md5": ...}`` (.dvc files and dvc.lock style)."""
    if isinstance(out, str):
        return out
    if isinstance(out, dict):
        if isinstance(out.get("path"), str):
            return str(out["path"])
        if len(out) == 1:
            key = next(iter(out))
            return key if isinstance(key, str) else None
    return None


def resolve_sources(host: HostRepo, paths: Sequence[str], *, cwd: Path) -> list[str]:
    """Check ``--source`` paths and return them host-relative, POSIX, in the given order.

    A path must lie inside the host repository and either exist or be (inside) an output
    of one of the host's own DVC stages, so a corpus that the host's pipeline produces later
    is accepted and DVC connects the two pipelines.

    Raises
    ------
    DataError
        One line naming the first bad path and what to do.
    """
    root = host.root.resolve()
    resolved: list[str] = []
    outputs: list[PurePosixPath] | None = None
    for given in paths:
        absolute = (cwd / given).resolve()
        if not absolute.is_relative_to(root):
            raise DataError(
                f"source {given!r} is outside the host repository {root}; copy or track "
                "the corpus inside the repository and pass that path"
            )
        relative = PurePosixPath(absolute.relative_to(root).as_posix())
        if absolute.is_dir():
            raise DataError(
                f"source {given!r} is a folder; pass the corpus files (a shell glob such as "
                f"{given.rstrip('/')}/*.txt expands to them)"
            )
        if not absolute.exists():
            outputs = host_stage_outputs(host) if outputs is None else outputs
            if not any(relative == out or _is_below(relative, out) for out in outputs):
                raise DataError(
                    f"source {given!r} does not exist in {root} and no stage or .dvc file "
                    "of the host declares it; check the path, or add the stage that "
                    "produces it first"
                )
        resolved.append(relative.as_posix())
    return list(dict.fromkeys(resolved))


def check_source_files(host: HostRepo, config: RetrogradeConfig) -> None:
    """Refuse a file source whose files are missing unless a host stage writes them.

    Composition accepts a file source that finds no file when its ``deps`` are declared (a
    host stage may write the corpus later). Here, with the host's own DVC files at hand,
    that is allowed only when a stage or ``.dvc`` file of the host declares an output that
    is, holds or lies inside one of the source's ``deps``; otherwise the files can never
    appear and ``run --dry``, ``check`` and ``run`` say so before any work.

    Raises
    ------
    MissingFileError
        One line naming the source, the file the source looked for and what to do.
    """
    from .. import sources

    outputs: list[PurePosixPath] | None = None
    for name, spec in config.study.sources.items():
        if getattr(sources.registry.get(spec.name), "is_calibration", False):
            continue
        try:
            with working_directory(host.root):
                sources.make(spec.name, **spec.params)
        except MissingFileError as exc:
            outputs = host_stage_outputs(host) if outputs is None else outputs
            deps = [PurePosixPath(dep) for dep in spec.deps or []]
            written = any(
                out == dep or _is_below(out, dep) or _is_below(dep, out)
                for out in outputs
                for dep in deps
            )
            if not written:
                raise MissingFileError(
                    f"study.sources.{name}: {exc}; no stage or .dvc file of the host writes "
                    f"its deps ({', '.join(map(str, deps)) or 'none'}); fix the path, add the "
                    "file, or add the stage that writes it"
                ) from exc


def _is_below(path: PurePosixPath, folder: PurePosixPath) -> bool:
    return path != folder and path.is_relative_to(folder)


def _normalize(path: PurePosixPath) -> PurePosixPath:
    """Collapse ``.`` and ``..`` without touching the file system."""
    parts: list[str] = []
    for part in path.parts:
        if part == "..":
            if parts:
                parts.pop()
        elif part != ".":
            parts.append(part)
    return PurePosixPath(*parts) if parts else PurePosixPath(".")
