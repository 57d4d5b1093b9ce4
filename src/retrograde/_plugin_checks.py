"""Compose-time checks of a schema-checked config: values, plug-ins and source files.

Every order, family, source and tokenizer is built once with its configured parameters so
its own validation (``retrograde._validation``) runs before any DVC stage starts. File
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

import contextlib
import hashlib
import inspect
import os
import shutil
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from . import __version__
from ._train_sample import resolve_train_sample
from ._validation import check_choice, check_float, check_int, did_you_mean
from .errors import ConfigError, DataError, RetrogradeError
from .hostrepo import PIPELINE_DIR

__all__ = ["UNIT_MODES", "check_plugins", "covered", "working_directory"]

UNIT_MODES = ("line", "document", "window")
# Folders retrograde writes in the host (DESIGN.md invariant 7): a source may not read them.
_OWN_FOLDERS = ("conf/retrograde", "pipelines/retrograde")


@contextlib.contextmanager
def working_directory(folder: Path) -> Iterator[None]:
    """Run the body with ``folder`` as the working folder (sources resolve paths from it)."""
    previous = Path.cwd()
    os.chdir(folder)
    try:
        yield
    finally:
        os.chdir(previous)


def _prefixed(where: str, exc: RetrogradeError) -> RetrogradeError:
    """The same error class with the config key path in front of its message."""
    return type(exc)(f"{where}: {exc}")


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


def check_plugins(config: dict[str, Any], root: Path) -> dict[str, Any]:
    """Check values and plug-ins of ``config`` (schema-checked); add source ``kind``/``deps``."""
    study, stats = config["study"], config["stats"]
    for group in ("sources", "orders", "models"):
        if not study[group]:
            raise ConfigError(
                f"study.{group} is empty; allowed: at least one entry (see docs/config.md)"
            )
    seeds = study["seeds"]
    if not seeds or len(set(seeds)) != len(seeds):
        raise ConfigError(
            f"study: parameter seeds={seeds!r} is invalid; allowed: a non-empty list of "
            "distinct integers >= 0"
        )
    for seed in seeds:
        check_int("study", "seeds", seed, 0)
    reference = study["reference_order"]
    if reference not in study["orders"]:
        raise ConfigError(
            f"study.reference_order={reference!r} is not among study.orders"
            f"{did_you_mean(reference, study['orders'])}; allowed: one of "
            f"{', '.join(sorted(study['orders']))}"
        )
    check_float("stats", "level", stats["level"], 0.0, 1.0, low_open=True, high_open=True)
    check_int("stats", "n_boot", stats["n_boot"], 1)
    check_choice("stats", "interval", stats.get("interval", "t"), ("t", "bootstrap"))
    check_int("stats", "seed", stats["seed"], 0)
    check_int("stats", "position_buckets", stats["position_buckets"], 1)
    _check_orders(study["orders"])
    _check_models(study["models"], root)
    for name, source in study["sources"].items():
        study["sources"][name] = _check_source(name, source, root)
    return config


def _check_orders(orders_config: dict[str, Any]) -> None:
    from . import orders

    for name, entry in orders_config.items():
        try:
            factory = orders.registry.get(entry["name"])
            check_param_names(
                f"study.orders.{name}", f"order {entry['name']!r}", factory, entry["params"]
            )
            orders.make(entry["name"], **entry["params"])
        except RetrogradeError as exc:
            raise _prefixed(f"study.orders.{name}", exc) from exc
        entry["params"] = resolved_params(factory, entry["params"])
        entry["package_version"] = __version__


def _check_models(models_config: dict[str, Any], root: Path) -> None:
    from . import families

    for name, entry in models_config.items():
        where = f"study.models.{name}"
        try:
            factory = families.registry.get(entry["family"])
            check_param_names(where, f"family {entry['family']!r}", factory, entry["params"])
            model = families.make(entry["family"], **entry["params"])
            model._validate_params()  # families check their params in fit; do it now
        except RetrogradeError as exc:
            raise _prefixed(where, exc) from exc
        resolve_train_sample(entry.get("train_sample", "auto"), factory, where)
        entry["params"] = resolved_params(factory, entry["params"])
        entry["numerics_version"] = int(getattr(factory, "numerics_version", 1))
        entry["package_version"] = __version__
        command = entry["params"].get("command") if entry["family"] == "command" else None
        if entry.get("code") is not None:
            entry["code"] = _inside_root(f"{where}.code", Path(entry["code"]), root, exists=True)
        elif command is not None:
            wdir = root / PIPELINE_DIR  # where the fit stage runs the trainer from
            entry["code"] = _trainer_code(command, root, wdir)
            if entry["code"] is None:
                # Outside the repository (an installed program): its bytes go into the params.
                entry["trainer_sha256"] = _trainer_sha256(where, command, wdir)


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


def _check_split(where: str, split: dict[str, Any]) -> None:
    fractions = split["fractions"]
    ok = len(fractions) == 3 and all(f >= 0 for f in fractions)
    if not ok or abs(sum(fractions) - 1.0) > 1e-9 or fractions[0] <= 0 or fractions[2] <= 0:
        raise ConfigError(
            f"{where}.split: parameter fractions={fractions!r} is invalid; allowed: three "
            "numbers >= 0 (train, valid, test) summing to 1, train and test > 0"
        )


def _check_units(where: str, units: dict[str, Any]) -> None:
    check_choice(f"{where}.units", "mode", units["mode"], UNIT_MODES)
    if units["mode"] == "window":
        check_int(f"{where}.units", "window", units["window"], 1)
    elif units["window"] is not None:
        raise ConfigError(
            f"{where}.units: parameter window={units['window']!r} is invalid; allowed: null "
            f"unless mode is 'window' (mode is {units['mode']!r})"
        )


def _check_remainder(where: str, units: dict[str, Any]) -> None:
    check_choice(f"{where}.units", "remainder", units["remainder"], ("drop", "keep"))


def _check_source(name: str, source: dict[str, Any], root: Path) -> dict[str, Any]:
    from . import sources

    where = f"study.sources.{name}"
    _check_split(where, source["split"])
    try:
        factory = sources.registry.get(source["name"])
    except RetrogradeError as exc:
        raise _prefixed(where, exc) from exc
    check_param_names(where, f"source {source['name']!r}", factory, source["params"])
    out = dict(source)
    out["params"] = resolved_params(factory, source["params"])
    out["package_version"] = __version__
    if getattr(factory, "is_calibration", False):
        check_int(f"{where}.calibration", "n_units", source["calibration"]["n_units"], 3)
        check_int(f"{where}.calibration", "seed", source["calibration"]["seed"], 0)
        try:
            sources.make(source["name"], **source["params"])
        except RetrogradeError as exc:
            raise _prefixed(where, exc) from exc
        out.update(kind="calibration", deps=[], tokenizer=None, units=None)
        return out
    _check_units(where, source["units"])
    _check_remainder(where, source["units"])
    if source["tokenizer"] is not None:
        _check_tokenizer(where, source["tokenizer"])
    declared = source["deps"]
    with working_directory(root):
        try:
            built = sources.make(source["name"], **source["params"])
            found = [Path(p) for p in built.paths()]  # type: ignore[attr-defined]
        except DataError as exc:
            # A host stage may not have written the files yet: declared deps suffice then.
            if declared is None:
                raise DataError(
                    f"{where}: {exc}; if a host stage writes these files, list them under "
                    f"{where}.deps (paths relative to the repository root)"
                ) from exc
            found = []
        except RetrogradeError as exc:
            raise _prefixed(where, exc) from exc
    paths = [Path(p) for p in declared] if declared is not None else found
    deps = [_inside_root(where, p, root) for p in paths]
    for path in found:
        read = _inside_root(where, path, root)
        if not covered(read, deps):
            raise ConfigError(
                f"{where}: the source reads {read!r} but {where}.deps does not list it; "
                "add it (or its folder) so DVC reruns the units stage when it changes"
            )
    out.update(kind="file", deps=deps, calibration=None)  # calibration: unused here
    return out


def covered(path: str, deps: list[str]) -> bool:
    """Whether the POSIX path ``path`` is one of ``deps`` or lies in a folder among them."""
    return any(path == dep or path.startswith(dep.rstrip("/") + "/") for dep in deps)


def _check_tokenizer(where: str, tokenizer: dict[str, Any]) -> None:
    from . import tokenize

    try:
        factory = tokenize.registry.get(tokenizer["name"])
        kind = f"tokenizer {tokenizer['name']!r}"
        check_param_names(f"{where}.tokenizer", kind, factory, tokenizer["params"])
        tokenize.make(tokenizer["name"], **tokenizer["params"])
    except RetrogradeError as exc:
        raise _prefixed(f"{where}.tokenizer", exc) from exc
    tokenizer["params"] = resolved_params(factory, tokenizer["params"])


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
    return text
