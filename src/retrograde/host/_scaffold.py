"""``retrograde init``: install the config groups and the stage file into a host repository.

The package ships default config groups (``retrograde/conf/``) and the stage template
(``retrograde/templates/dvc.yaml``). :func:`planned_files` maps them to their places in the
host (``conf/retrograde/...`` and ``pipelines/retrograde/dvc.yaml``) as bytes, a pure
function of the package data and the ``--source`` paths; :func:`install` then writes them.

``install`` is all-or-nothing and never damages the host (DESIGN.md, invariant 7):

- it writes only below ``conf/retrograde/`` and ``pipelines/retrograde/``;
- an existing file with identical content is left alone, so running ``init`` twice is a
  no-op; an existing file with other content stops everything, before anything is written,
  unless ``force`` is given;
- even with ``force`` a changed config file (``conf/retrograde/``) is never overwritten:
  it is the user's, so it is kept and reported (delete it to get the packaged one back);
  ``force`` replaces a changed stage file only when git has its content committed, so
  edits git does not hold stop everything instead of being lost;
- ignore rules are *added* to ``pipelines/retrograde/.gitignore`` and ``.dvcignore``
  (DVC appends its own entries to the first, a user may add to either, so they are merged
  line by line, never compared whole).

The region of the stage file between ``# >>>`` and ``# <<<`` marker lines belongs to
``retrograde run`` (it writes one ``units`` stage per source there), so a stage file that
differs from the template only inside that region counts as unchanged.
"""

from __future__ import annotations

import re
from collections.abc import Collection, Iterable, Sequence
from dataclasses import dataclass, field
from importlib import resources
from importlib.resources.abc import Traversable
from pathlib import Path, PurePosixPath
from typing import Any

import yaml

from ..config import CONF_DIR, DVC_FILE, PIPELINE_DIR
from ..data import atomic_write_bytes
from ..errors import HostRepoError
from ._repo import HostRepo, run_git

__all__ = [
    "DVCIGNORE",
    "DVCIGNORE_RULES",
    "GITIGNORE",
    "IGNORE_RULES",
    "SOURCE_CONFIG",
    "InstallResult",
    "install",
    "planned_files",
    "source_config",
]

#: The ignore file init merges its rules into, relative to the host root.
GITIGNORE = PIPELINE_DIR / ".gitignore"
#: Lines init makes sure are in :data:`GITIGNORE`: per-stage logs of ``run --jobs`` and
#: leftovers of interrupted atomic writes (``.name.XXXX.tmp``, ``.name.old``).
IGNORE_RULES = ("/logs/", ".*.tmp", ".*.old")
#: DVC's ignore file for the pipeline folder, relative to the host root.
DVCIGNORE = PIPELINE_DIR / ".dvcignore"
#: Lines init makes sure are in :data:`DVCIGNORE`. DVC writes a ``.gitignore`` next to each
#: output, one line per output in the order stages finish; the ``table`` stage hashes the
#: whole ``data/`` and ``cells/`` folders, so without this rule its recorded inputs (and
#: ``dvc.lock``) would depend on ``run --jobs`` timing (measured with DVC 3.67.1).
DVCIGNORE_RULES = (".gitignore",)

#: (file, rules, comment) for every file init merges lines into rather than replaces.
_MERGED = (
    (
        GITIGNORE,
        IGNORE_RULES,
        "# retrograde: logs of `run --jobs` and leftovers of interrupted writes",
    ),
    (DVCIGNORE, DVCIGNORE_RULES, "# retrograde: keep DVC's .gitignore files out of folder hashes"),
)

#: The packaged source config that ``--source`` paths are written into (the default source).
SOURCE_CONFIG = CONF_DIR / "source" / "corpus.yaml"

_MANAGED_BLOCK = re.compile(rb"^[ \t]*# >>>[^\n]*\n.*?^[ \t]*# <<<[^\n]*$", re.M | re.S)


@dataclass
class InstallResult:
    """What :func:`install` did, as host-relative paths.

    ``kept`` lists changed config files that ``force`` left as they are.
    """

    written: list[PurePosixPath] = field(default_factory=list)
    unchanged: list[PurePosixPath] = field(default_factory=list)
    kept: list[PurePosixPath] = field(default_factory=list)


def _package_tree(node: Traversable, prefix: PurePosixPath) -> dict[PurePosixPath, bytes]:
    files: dict[PurePosixPath, bytes] = {}
    for child in sorted(node.iterdir(), key=lambda c: c.name):
        if child.name.startswith((".", "__")):
            continue  # editor files, __pycache__
        if child.is_dir():
            files.update(_package_tree(child, prefix / child.name))
        elif child.name.endswith(".yaml"):
            files[prefix / child.name] = child.read_bytes()
    return files


def planned_files(*, sources: Sequence[str] = ()) -> dict[PurePosixPath, bytes]:
    """Every file ``init`` installs, host-relative path -> bytes (ignore rules excluded).

    Parameters
    ----------
    sources : sequence of str
        Host-relative POSIX paths of the corpus files (already checked by
        :func:`resolve_sources`); when given they replace the files of the default
        ``corpus`` source config.

    Examples
    --------
    >>> files = planned_files()
    >>> str(DVC_FILE) in {str(p) for p in files}, str(SOURCE_CONFIG) in {str(p) for p in files}
    (True, True)
    """
    package = resources.files("retrograde")
    files = _package_tree(package / "conf", CONF_DIR)
    files[DVC_FILE] = (package / "templates" / "dvc.yaml").read_bytes()
    if sources:
        files[SOURCE_CONFIG] = source_config(files[SOURCE_CONFIG], sources)
    return files


def source_config(template: bytes, paths: Sequence[str]) -> bytes:
    """The ``corpus`` source config with its files (and DVC deps) set to ``paths``.

    The leading comment block is kept verbatim (its ``# @package`` line tells Hydra where
    the group goes); the rest is re-emitted from the parsed YAML in its original key order.

    Examples
    --------
    >>> template = b"# @package study.sources.corpus\\nname: text\\nparams:\\n  files: [a]\\ndeps: [a]\\n"
    >>> print(source_config(template, ["data/x.txt"]).decode(), end="")
    # @package study.sources.corpus
    # Files set by `retrograde init --source`.
    name: text
    params:
      files:
      - data/x.txt
    deps:
    - data/x.txt
    """
    text = template.decode("utf-8")
    lines = text.splitlines(keepends=True)
    header = "".join(line for line in _leading_comments(lines))
    body: dict[str, Any] = yaml.safe_load(text) or {}
    body.setdefault("params", {})["files"] = list(paths)
    body["deps"] = list(paths)
    note = "# Files set by `retrograde init --source`.\n"
    dumped = yaml.safe_dump(body, sort_keys=False, default_flow_style=False, allow_unicode=True)
    return (header + note + dumped).encode("utf-8")


def _leading_comments(lines: Iterable[str]) -> Iterable[str]:
    for line in lines:
        if not line.startswith("#"):
            return
        yield line


def install(
    host: HostRepo,
    files: dict[PurePosixPath, bytes],
    *,
    force: bool = False,
    must_write: Collection[PurePosixPath] = (),
) -> InstallResult:
    """Write ``files`` into the host, plus the ignore rules; all-or-nothing.

    Parameters
    ----------
    force : bool
        Install around changed files: a changed config file is kept (see ``kept`` of the
        result), a changed stage file is replaced if git has its content committed.
    must_write : collection of paths
        Config files whose planned content was asked for (``init --source`` rewrites the
        corpus source config): a changed one is refused rather than kept.

    Raises
    ------
    HostRepoError
        A planned path exists with other content (without ``force``; or with it, a config
        file in ``must_write``, or a stage file with edits git has not committed), is a
        folder, or leads outside ``conf/retrograde/`` or ``pipelines/retrograde/`` (for
        example through a symbolic link). Nothing has been written when this is raised.
    """
    root = host.root.resolve()
    result = InstallResult()
    to_write: dict[PurePosixPath, bytes] = {}
    changed: list[PurePosixPath] = []
    for relative, content in sorted(files.items()):
        target = _checked_target(root, relative)
        if target.is_dir():
            raise HostRepoError(f"{relative} is a folder where init installs a file; move it away")
        if not target.exists():
            to_write[relative] = content
        elif _same(relative, target.read_bytes(), content):
            result.unchanged.append(relative)
        else:
            changed.append(relative)
    asked = [path for path in changed if path in must_write and path.is_relative_to(CONF_DIR)]
    if asked:
        raise HostRepoError(
            f"{asked[0]} already exists in {root} with other content; init never overwrites "
            "your config (not even with --force), so nothing was written; set its files and "
            "deps there, or delete it and rerun init --source"
        )
    if changed and not force:
        others = f" (and {len(changed) - 1} other file(s))" if len(changed) > 1 else ""
        raise HostRepoError(
            f"{changed[0]} already exists in {root} with other content{others}; nothing was "
            f"written; rerun with --force to install the rest: it keeps your changed files in "
            f"{CONF_DIR}/ and replaces a changed {DVC_FILE} only if git has it committed"
        )
    for relative in changed:
        if relative.is_relative_to(CONF_DIR):
            result.kept.append(relative)
        elif _committed(host, relative):
            to_write[relative] = files[relative]
        else:
            raise HostRepoError(
                f"{relative} has edits git has not committed and --force would replace them; "
                f"nothing was written; commit the file (or move it away) and rerun "
                "`retrograde init --force`"
            )
    for relative, rules, comment in _MERGED:
        target = _checked_target(root, relative)
        existing = target.read_bytes() if target.is_file() else None
        merged = _merge_lines(existing, rules, comment)
        if merged != existing:
            to_write[relative] = merged
        else:
            result.unchanged.append(relative)
    for relative, content in to_write.items():
        atomic_write_bytes(root / relative, content)
        result.written.append(relative)
    return result


def _merge_lines(existing: bytes | None, rules: Sequence[str], comment: str) -> bytes:
    """``existing`` with every line of ``rules`` it lacks appended under ``comment``.

    Examples
    --------
    >>> _merge_lines(b"/plots", ("/logs/", "/plots"), "# ours").decode()
    '/plots\\n# ours\\n/logs/\\n'
    """
    text = "" if existing is None else existing.decode("utf-8")
    have = {line.strip() for line in text.splitlines()}
    missing = [rule for rule in rules if rule not in have]
    if not missing:
        return text.encode("utf-8")
    if text and not text.endswith("\n"):
        text += "\n"
    return (text + comment + "\n" + "".join(f"{rule}\n" for rule in missing)).encode("utf-8")


def _committed(host: HostRepo, relative: PurePosixPath) -> bool:
    """Whether git holds the file's current content (tracked, unmodified, not ignored)."""
    status = run_git(
        host.root, ["status", "--porcelain", "--ignored", "--", relative.as_posix()], check=False
    )
    tracked = run_git(
        host.root, ["ls-files", "--error-unmatch", "--", relative.as_posix()], check=False
    )
    return status.returncode == 0 and not status.stdout.strip() and tracked.returncode == 0


def _same(relative: PurePosixPath, existing: bytes, planned: bytes) -> bool:
    if relative == DVC_FILE:
        # `retrograde run` owns the marked region; compare everything else.
        existing = _MANAGED_BLOCK.sub(b"# >>>\n# <<<", existing)
        planned = _MANAGED_BLOCK.sub(b"# >>>\n# <<<", planned)
    return existing == planned


def _checked_target(root: Path, relative: PurePosixPath) -> Path:
    """``root / relative``, refused unless it really lies in retrograde's two folders.

    ``root`` is resolved, so resolving the target exposes any symbolic link that leads
    elsewhere (inside or outside the repository).
    """
    target = (root / relative).resolve()
    if not any(target.is_relative_to(root / folder) for folder in (CONF_DIR, PIPELINE_DIR)):
        raise HostRepoError(
            f"{relative} would be written outside {CONF_DIR}/ and {PIPELINE_DIR}/ "
            f"(it resolves to {target}); remove the symbolic link that leads there"
        )
    return target
