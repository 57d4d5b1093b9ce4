"""Compose-time checks of a schema-checked config: values, plug-ins and source files.

Every order, family, source and tokenizer is built once with its configured parameters so
its own validation (``retrograde._validation``) runs before any DVC stage starts. File
sources also get ``deps``: the files they read, relative to the host root, which become the
``units`` stage's DVC dependencies (so a host stage that writes the corpus runs first).
"""

from __future__ import annotations

import contextlib
import inspect
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ._validation import check_choice, check_float, check_int, did_you_mean
from .errors import ConfigError, DataError, RetrogradeError

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
    check_int("stats", "seed", stats["seed"], 0)
    check_int("stats", "position_buckets", stats["position_buckets"], 1)
    _check_orders(study["orders"])
    _check_models(study["models"])
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


def _check_models(models_config: dict[str, Any]) -> None:
    from . import families

    for name, entry in models_config.items():
        try:
            factory = families.registry.get(entry["family"])
            check_param_names(
                f"study.models.{name}", f"family {entry['family']!r}", factory, entry["params"]
            )
            model = families.make(entry["family"], **entry["params"])
            model._validate_params()  # families check their params in fit; do it now
        except RetrogradeError as exc:
            raise _prefixed(f"study.models.{name}", exc) from exc


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


def _inside_root(where: str, path: Path, root: Path) -> str:
    """``path`` (relative to ``root`` or absolute) as a POSIX path relative to ``root``."""
    resolved = (root / path).resolve()
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
