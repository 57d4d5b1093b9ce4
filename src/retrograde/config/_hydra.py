"""Hydra composition of a config folder into a plain dict, with Hydra's errors as one line.

The only module that talks to Hydra; the rest of :mod:`retrograde.config` works on typed
objects and plain dicts.
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..validation import did_you_mean

__all__ = ["compose_raw", "first_line"]


def compose_raw(conf_dir: str | os.PathLike[str], overrides: Sequence[str] = ()) -> dict[str, Any]:
    """Compose ``conf_dir/config.yaml`` with Hydra overrides into a plain dict (no checks)."""
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from hydra.errors import HydraException, MissingConfigException
    from omegaconf import OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    conf_dir = Path(conf_dir).resolve()
    if not (conf_dir / "config.yaml").is_file():
        raise ConfigError(
            f"{conf_dir / 'config.yaml'} not found; run `retrograde init` to write the defaults"
        )
    for word in overrides:
        _check_override_word(word)
    _check_source_packages(conf_dir)
    failure: Exception | None = None
    with initialize_config_dir(config_dir=str(conf_dir), version_base="1.3"):
        try:
            cfg = hydra_compose(config_name="config", overrides=list(overrides))
            container = OmegaConf.to_container(cfg, resolve=True)
        except (HydraException, OmegaConfBaseException) as exc:
            failure = exc
    # Explained outside the `with`: the explanation may compose again (Hydra is global).
    if isinstance(failure, MissingConfigException):
        raise _missing_option_error(conf_dir, failure) from failure
    if failure is not None:
        raise _override_error(conf_dir, overrides, failure) from failure
    assert isinstance(container, dict)
    container.pop("hydra", None)
    return container  # type: ignore[return-value]


def first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _missing_option_error(conf_dir: Path, exc: Exception) -> ConfigError:
    match = re.search(r"Could not (?:load|find) '([^']+)/([^']+)'", str(exc))
    if not match:
        return ConfigError(f"{conf_dir}: {first_line(exc)}")
    group, option = match.groups()
    options = sorted(p.stem for p in (conf_dir / group).glob("*.yaml"))
    return ConfigError(
        f"unknown {group} config {option!r}{did_you_mean(option, options)}; "
        f"available in {conf_dir / group}: {', '.join(options) or 'none'}"
    )


#: a Hydra override: ``key=value``, ``+key=value``, ``++key=value``, ``~key`` or ``~key=value``
_OVERRIDE = re.compile(r"^(\+\+|\+|~)?[A-Za-z_][\w.@/-]*(=|$)")
_PACKAGE_LINE = re.compile(r"^#\s*@package\s+(\S+)\s*$")


def _check_override_word(word: str) -> None:
    """Refuse, in one line, a command-line word that is not a Hydra override."""
    if _OVERRIDE.match(word) and ("=" in word or word.startswith("~")):
        return
    looks_like_file = "/" in word or Path(word).suffix != "" or Path(word).exists()
    hint = (
        f"to study a file, list it in the source config (conf/retrograde/source/corpus.yaml, "
        f"params.files) or run `retrograde init --source {word}`"
        if looks_like_file
        else "write KEY=VALUE, e.g. study.seeds='[0,1,2]'"
    )
    raise ConfigError(
        f"{word!r} is not a config override: the words after the command are Hydra overrides "
        f"(KEY=VALUE); {hint}"
    )


def _check_source_packages(conf_dir: Path) -> None:
    """Each ``source/NAME.yaml`` must say ``# @package study.sources.NAME`` (a copied file
    that keeps its original's line would silently replace that source, or clash with it)."""
    for path in sorted((conf_dir / "source").glob("*.yaml")):
        try:
            head = path.read_text(encoding="utf-8").splitlines()[:5]
        except (OSError, UnicodeDecodeError):
            continue  # Hydra reports an unreadable file itself
        for line in head:
            match = _PACKAGE_LINE.match(line.strip())
            if match is None:
                continue
            package, expected = match.group(1), f"study.sources.{path.stem}"
            if package.startswith("study.sources.") and package != expected:
                raise ConfigError(
                    f"{path}: its first line says '# @package {package}', which names another "
                    f"source (copied from {package.rpartition('.')[2]}.yaml?); change it to "
                    f"'# @package {expected}'"
                )
            break


def _override_error(conf_dir: Path, overrides: Sequence[str], exc: Exception) -> ConfigError:
    ambiguous = re.search(r"Ambiguous value for argument '([^'=]+)=([^']*)'", str(exc))
    if ambiguous:
        key, value = ambiguous.groups()
        return ConfigError(
            f"override {key}={value}: a comma list without brackets is a Hydra sweep, which "
            f"retrograde does not run; write a list in brackets and quotes: {key}='[{value}]'"
        )
    match = re.search(r"Could not override '([^']+)'", str(exc))
    if not match:
        return ConfigError(f"bad override or config in {conf_dir}: {first_line(exc)}")
    key = match.group(1)
    parent, _, leaf = key.rpartition(".")
    # The keys that do exist next to the unknown one, from the config without overrides.
    base = compose_raw(conf_dir) if overrides else {}
    node: Any = base
    for part in parent.split(".") if parent else []:
        node = node.get(part, {}) if isinstance(node, dict) else {}
    siblings = sorted(node) if isinstance(node, dict) else []
    # Only plug-in params are free-form; anywhere else a new key is a typo.
    hint = f"; to add a parameter write +{key}=..." if parent.endswith(".params") else ""
    return ConfigError(
        f"unknown config key {key!r} in the overrides{did_you_mean(leaf, siblings)}; "
        f"keys under {parent or 'the top level'!r}: {', '.join(siblings) or 'none'}{hint}"
    )
