"""Compose-time checks of a schema-checked config: values, plug-ins and source files.

Every order, family, source and tokenizer is built once with its configured parameters so
its own validation (``retrograde.validation``) runs before any DVC stage starts. File
sources also get ``deps``: the files they read, relative to the host root, which become the
``units`` stage's DVC dependencies (so a host stage that writes the corpus runs first).

Results follow code (DESIGN.md section 10): every order, source, tokenizer and model entry
gets its **full** parameters (defaults filled in from the plug-in's signature) and the
package version, and every model its family's ``numerics_version``. A stage reruns when
the params it reads change, so a changed default, a raised numerics version or a new
package version reruns exactly the cells it can change. A ``command`` model also gets
``code``: the trainer's file or folder inside the repository, a DVC dependency of its cells.
"""

from __future__ import annotations

import hashlib
import inspect
import os
import shutil
import stat
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .. import __version__
from ..data import resolve_train_sample, tokenizers, working_directory
from ..errors import ConfigError, DataError, MissingFileError, PluginError, RetrogradeError
from ..validation import did_you_mean
from ._checks import check_source_values
from ._layout import CONF_DIR, PIPELINE_DIR
from ._schema import (
    CalibrationConfig,
    ModelConfig,
    OrderConfig,
    SourceConfig,
    StudyConfig,
    TokenizerConfig,
    UnitsConfig,
)
from ._tuning import model_where

__all__ = [
    "check_file_types",
    "check_repo_path",
    "covered",
    "resolve_plugins",
    "resolved_params",
]

# Folders retrograde writes in the host (DESIGN.md invariant 7): a source may not read them.
_OWN_FOLDERS = (CONF_DIR.as_posix(), PIPELINE_DIR.as_posix())


def _prefixed(where: str, exc: RetrogradeError) -> RetrogradeError:
    """The same error class with the config key path in front of its message (once)."""
    return exc.prefixed(where)


def check_param_names(where: str, kind: str, factory: Any, params: dict[str, Any]) -> None:
    """Refuse a parameter the plug-in's ``__init__`` does not take, with a did-you-mean."""
    try:
        signature = inspect.signature(factory)
    except (TypeError, ValueError):  # a builtin or C callable: let the call decide
        return
    accepted = signature.parameters.values()
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in accepted):
        return
    names = [p.name for p in accepted if p.kind is not inspect.Parameter.VAR_POSITIONAL]
    for key in params:
        if key not in names:
            raise ConfigError(
                f"{where}: {kind} has no parameter {key!r}{did_you_mean(key, names)}; "
                f"allowed: {', '.join(names) or 'no parameters'}"
            )


def resolved_params(factory: Any, params: dict[str, Any]) -> dict[str, Any]:
    """``params`` with every other keyword parameter of ``factory`` at its default.

    Defaults that are not plain YAML values (numbers, strings, booleans, None, lists and
    dicts of them) are written as their ``repr``, so a changed default still shows.

    >>> def family(*, order=5, discount=None): ...
    >>> resolved_params(family, {"order": 3})
    {'order': 3, 'discount': None}
    """
    try:
        signature = inspect.signature(factory)
    except (TypeError, ValueError):
        return dict(params)
    keywords = (inspect.Parameter.KEYWORD_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD)
    full = {
        name: _plain(parameter.default)
        for name, parameter in signature.parameters.items()
        if parameter.kind in keywords and parameter.default is not inspect.Parameter.empty
    }
    full.update(params)
    return full


def _plain(value: Any) -> Any:
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    return repr(value)


def resolve_plugins(study: StudyConfig, root: Path) -> None:
    """Build every order, model and source once and fill in what composition adds.

    Each plug-in's own parameter checks run now, before any work; its entry then holds its
    full parameters and the versions of the code that computes with it (module docstring).
    """
    for name, order in study.orders.items():
        _resolve_order(f"study.orders.{name}", order)
    for name, model in study.models.items():
        _resolve_model(model_where(study, name), model, root)
    for name, source in study.sources.items():
        _resolve_source(name, source, root)
    _check_text_parameters(study)
    _check_orders_fit_sources(study, root)


def _check_text_parameters(study: StudyConfig) -> None:
    """An order naming tokens by text needs a text tokenizer on every source it reorders.

    Every order reorders every source; a source of token ids (no tokenizer: calibration
    sources, ``tokens``) has no text to look up, so say so now rather than in its stage.
    """
    from .. import orders

    for order_name, order in study.orders.items():
        if not orders.make(order.name, **order.params).needs_tokenizer:
            continue
        for source_name, source in study.sources.items():
            if source.tokenizer is None:
                raise ConfigError(
                    f"study.orders.{order_name} on source {source_name!r}: its separators "
                    f"are text ({order.params.get('separators')!r}), but the source has no "
                    "text tokenizer (its units are token ids); give the separators as ids, or "
                    "study the order on text sources only"
                )


def _check_orders_fit_sources(study: StudyConfig, root: Path) -> None:
    """An order that needs a source's facts (the ``fields`` order: field names) is checked
    against every source now, not when its reorder stage runs."""
    from .. import orders, sources

    for order_name, entry in study.orders.items():
        order = orders.make(entry.name, **entry.params)
        method = getattr(type(order), "for_source", None)
        if method is None or method is orders.Order.for_source:
            continue  # needs nothing from the source
        for source_name, source_entry in study.sources.items():
            facts: dict[str, Any] = {"source": source_name}
            factory = sources.registry.get(source_entry.name)
            if callable(getattr(factory, "span_names", None)):
                try:
                    with working_directory(root):
                        built = sources.make(source_entry.name, **source_entry.params)
                except RetrogradeError:
                    continue  # files not written yet: the reorder stage checks it
                names = list(built.span_names())  # type: ignore[attr-defined]
                facts["records"] = {"fields": names[:-1], "separator_id": 0}
            try:
                order.for_source(facts)
            except RetrogradeError as exc:
                raise _prefixed(
                    f"study.orders.{order_name} on source {source_name!r}", exc
                ) from exc


def _resolve_order(where: str, entry: OrderConfig) -> None:
    from .. import orders  # the plug-in packages load only when a config is composed

    try:
        factory = orders.registry.get(entry.name)
        check_param_names(where, f"order {entry.name!r}", factory, entry.params)
        orders.make(entry.name, **entry.params)
    except RetrogradeError as exc:
        raise _prefixed(where, exc) from exc
    entry.params = resolved_params(factory, entry.params)
    entry.package_version = __version__


def _resolve_model(where: str, entry: ModelConfig, root: Path) -> None:
    from .. import families

    try:
        factory = families.registry.get(entry.family)
        check_param_names(where, f"family {entry.family!r}", factory, entry.params)
        model = families.make(entry.family, **entry.params)
        model._validate_params()  # families check their params in fit; do it now
        # What each seed trains on, resolved: a changed resolution (a family that gained or
        # lost randomness of its own) changes the composed params, so its cells rerun.
        entry.train_sample = resolve_train_sample(entry.train_sample, factory, where)
    except RetrogradeError as exc:
        raise _prefixed(where, exc) from exc
    entry.params = resolved_params(factory, entry.params)
    entry.numerics_version = int(getattr(factory, "numerics_version", 1))
    entry.package_version = __version__
    command = entry.params.get("command") if entry.family == "command" else None
    if entry.code is not None:
        entry.code = _inside_root(f"{where}.code", Path(entry.code), root, exists=True)
    elif command is not None:
        wdir = root / PIPELINE_DIR  # where the fit stage runs the trainer from
        entry.code = _trainer_code(command, root, wdir)
        if entry.code is None:
            # Outside the repository (an installed program): its bytes go into the params.
            entry.trainer_sha256 = _trainer_sha256(where, command, wdir)


def _trainer_code(command: Sequence[str], root: Path, wdir: Path) -> str | None:
    """The repository file or folder a trainer command runs, if any (host-relative, POSIX).

    The first argument naming an existing file inside the repository, seen from the stage
    folder ``wdir`` (``../../train.py`` in ``python ../../train.py``, or the program itself),
    or for ``python -m pkg.mod`` the top package folder ``pkg/`` at the repository root.
    """
    arguments = list(command)
    for index, argument in enumerate(arguments):
        if "{" in argument:
            continue  # a placeholder: a folder retrograde makes
        if argument == "-m" and index + 1 < len(arguments):
            package = root / arguments[index + 1].split(".")[0]
            if package.is_dir():
                return package.relative_to(root).as_posix()
            continue
        candidate = (wdir / argument).resolve()
        if candidate.is_file() and candidate.is_relative_to(root):
            return candidate.relative_to(root).as_posix()
    return None


def _trainer_sha256(where: str, command: Sequence[str], wdir: Path) -> str:
    """sha256 over the trainer program and every other argument that names a file."""
    program = shutil.which(command[0]) or (
        str(wdir / command[0]) if (wdir / command[0]).is_file() else None
    )
    if program is None:
        raise ConfigError(
            f"{where}: the trainer program {command[0]!r} was not found (searched PATH and "
            f"{wdir}); give an existing program or a path relative to {PIPELINE_DIR}/"
        )
    digest = hashlib.sha256()
    files = [Path(program)] + [
        wdir / a for a in command[1:] if "{" not in a and (wdir / a).is_file()
    ]
    for path in files:
        digest.update(path.resolve().as_posix().encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()


def _resolve_source(name: str, entry: SourceConfig, root: Path) -> None:
    from .. import sources

    where = f"study.sources.{name}"
    try:
        factory = sources.registry.get(entry.name)
    except RetrogradeError as exc:
        raise _prefixed(where, exc) from exc
    check_param_names(where, f"source {entry.name!r}", factory, entry.params)
    calibration = bool(getattr(factory, "is_calibration", False))
    # A group written as null takes its defaults (the schema has one place for them).
    if calibration and entry.calibration is None:
        entry.calibration = CalibrationConfig()
    if not calibration and entry.units is None:
        entry.units = UnitsConfig()
    check_source_values(name, entry, calibration=calibration)
    entry.package_version = __version__
    if calibration:
        try:
            sources.make(entry.name, **entry.params)
        except RetrogradeError as exc:
            raise _prefixed(where, exc) from exc
        entry.params = resolved_params(factory, entry.params)
        entry.deps, entry.tokenizer, entry.units = [], None, None
        return
    if entry.tokenizer is not None:
        _resolve_tokenizer(f"{where}.tokenizer", entry.tokenizer)
    entry.deps = _source_deps(where, entry, root)
    if entry.split.test_ids is not None:
        # The file of test ids decides the split: a change to it reruns the units stage.
        listed = _inside_root(f"{where}.split.test_ids", Path(entry.split.test_ids), root)
        entry.split.test_ids = listed
        if not covered(listed, entry.deps):
            entry.deps.append(listed)
    entry.params = resolved_params(factory, entry.params)
    entry.calibration = None  # unused by file sources


def _source_deps(where: str, entry: SourceConfig, root: Path) -> list[str]:
    """The files DVC tracks for a file source: its ``deps``, or the files it finds."""
    from .. import sources

    with working_directory(root):
        try:
            built = sources.make(entry.name, **entry.params)
            found = [Path(p) for p in built.paths()]  # type: ignore[attr-defined]
        except MissingFileError as exc:
            # A host stage may not have written the files yet: declared deps suffice then.
            if entry.deps is None:
                raise DataError(
                    f"{where}: {exc}; if a host stage writes these files, list them under "
                    f"{where}.deps (paths relative to the repository root)"
                ) from exc
            found = []
        except RetrogradeError as exc:
            raise _prefixed(where, exc) from exc
        except Exception as exc:
            if str(getattr(sources.registry.get(entry.name), "__module__", "")).startswith(
                "retrograde."
            ):
                raise  # a bug of ours: keep the traceback
            raise PluginError(
                f"{where}: source {entry.name!r} raised {type(exc).__name__} listing its "
                f"files: {exc}; fix the source's code (--debug shows the traceback)"
            ) from exc
    paths = [Path(p) for p in entry.deps] if entry.deps is not None else found
    deps = [_inside_root(where, p, root) for p in paths]
    for path in found:
        read = _inside_root(where, path, root)
        if not covered(read, deps):
            raise ConfigError(
                f"{where}: the source reads {read!r} but {where}.deps does not list it; "
                "add it (or its folder) so DVC reruns the units stage when it changes"
            )
    return deps


def covered(path: str, deps: list[str]) -> bool:
    """Whether the POSIX path ``path`` is one of ``deps`` or lies in a folder among them."""
    return any(path == dep or path.startswith(dep.rstrip("/") + "/") for dep in deps)


def _resolve_tokenizer(where: str, entry: TokenizerConfig) -> None:
    try:
        factory = tokenizers.registry.get(entry.name)
        check_param_names(where, f"tokenizer {entry.name!r}", factory, entry.params)
        tokenizers.make(entry.name, **entry.params)
    except RetrogradeError as exc:
        raise _prefixed(where, exc) from exc
    entry.params = resolved_params(factory, entry.params)
    library_version = getattr(factory, "library_version", None)
    entry.library_version = library_version() if callable(library_version) else None


def _inside_root(where: str, path: Path, root: Path, *, exists: bool = False) -> str:
    """``path`` (relative to ``root`` or absolute) as a POSIX path relative to ``root``."""
    resolved = (root / path).resolve()
    if exists and not resolved.exists():
        raise ConfigError(
            f"{where}: {str(path)!r} does not exist in {root}; give a file or folder of the "
            "repository (relative to its root)"
        )
    try:
        relative = resolved.relative_to(root)
    except ValueError:
        raise ConfigError(
            f"{where}: file {str(path)!r} lies outside the host repository {root}; copy or "
            "link it into the repository (DVC tracks only files inside it)"
        ) from None
    text = relative.as_posix()
    if any(text == own or text.startswith(own + "/") for own in _OWN_FOLDERS):
        raise ConfigError(
            f"{where}: file {text!r} lies inside retrograde's own folders "
            f"({', '.join(_OWN_FOLDERS)}); point the source at your data instead"
        )
    check_repo_path(where, text)
    check_file_types(where, resolved, text)
    return text


#: folders of the tools themselves: their files are no one's data
_TOOL_FOLDERS = (".git", ".dvc")


def check_repo_path(where: str, text: str) -> None:
    """Refuse a host-relative POSIX path that git, DVC or YAML would misread.

    The path goes into ``params.yaml`` and, as a dependency, into ``dvc.yaml``: a line
    break or other control character breaks both, ``${`` is a DVC variable there, and
    ``*?[]`` make it a glob pattern (``a[1].txt`` matches ``a1.txt``). Bytes that are not
    UTF-8 cannot be written to either file. Files inside ``.git/`` or ``.dvc/`` belong to
    the tools (and change on every commit or run).
    """
    if any("\ud800" <= char <= "\udfff" for char in text):  # undecodable bytes, escaped
        raise ConfigError(
            f"{where}: file name {text!r} is not valid UTF-8; rename the file (params.yaml "
            "and dvc.yaml hold UTF-8 text)"
        )
    control = next((char for char in text if ord(char) < 0x20 or ord(char) == 0x7F), None)
    if control is not None:
        raise ConfigError(
            f"{where}: file name {text!r} holds the control character {control!r} (a line "
            "break breaks params.yaml and dvc.yaml); rename the file"
        )
    if "${" in text:
        raise ConfigError(
            f"{where}: file name {text!r} holds '${{', which DVC reads as a variable in "
            "dvc.yaml; rename the file"
        )
    glob = next((char for char in text if char in "*?[]"), None)
    if glob is not None:
        raise ConfigError(
            f"{where}: file name {text!r} holds {glob!r}, a glob character, so it would be "
            "read as a pattern (e.g. 'a[1].txt' matches 'a1.txt'); rename the file"
        )
    tool = next((part for part in text.split("/") if part in _TOOL_FOLDERS), None)
    if tool is not None:
        raise ConfigError(
            f"{where}: file {text!r} lies inside {tool}/, the tool's own files (they change "
            "with every commit or run); point the source at your data"
        )


def check_file_types(where: str, path: Path, shown: str) -> None:
    """Refuse a FIFO, socket or device at ``path`` or anywhere in the folder ``path``.

    DVC hashes every dependency before it runs a stage, and reading a FIFO blocks until a
    writer comes (``dvc repro`` hangs). A missing path passes (a host stage may write it).
    """
    if not path.exists():
        return
    if path.is_dir():
        for folder, _, names in os.walk(path):
            for name in sorted(names):
                inner = Path(folder) / name
                _check_one_type(where, inner, f"{shown}/{inner.relative_to(path).as_posix()}")
        return
    _check_one_type(where, path, shown)


def _check_one_type(where: str, path: Path, shown: str) -> None:
    try:
        mode = path.stat().st_mode
    except OSError:
        return  # a dangling link: DVC reports it
    if not stat.S_ISREG(mode):
        raise DataError(
            f"{where}: {shown!r} is not a regular file (a FIFO, socket or device); reading "
            "it would block the units stage and DVC; point the source at regular files"
        )
