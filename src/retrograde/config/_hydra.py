"""Hydra composition of a config folder into a plain dict, with Hydra's errors as one line.

The only module that talks to Hydra; the rest of :mod:`retrograde.config` works on typed
objects and plain dicts.

Before Hydra reads anything, every ``.yaml`` file of the config folder is checked the way
Hydra will read it, so a broken file is one line naming the file, line and column rather
than a YAML traceback or a confusing key error later: UTF-8 text, a well-formed
``# @package`` header at the top, and plain YAML that OmegaConf loads (no duplicate keys,
no ``!!python/...`` or other tags).
"""

from __future__ import annotations

import io
import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import yaml

from ..errors import ConfigError
from ..validation import did_you_mean
from ._layout import CONF_DIR

__all__ = ["check_conf_files", "compose_raw", "first_line"]


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
    check_conf_files(conf_dir)
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
        except (yaml.YAMLError, UnicodeError, ValueError) as exc:  # a file changed meanwhile
            raise ConfigError(f"config in {conf_dir}: {' '.join(str(exc).split())}") from exc
    # Explained outside the `with`: the explanation may compose again (Hydra is global).
    if isinstance(failure, MissingConfigException):
        raise _missing_option_error(conf_dir, failure) from failure
    if failure is not None:
        raise _override_error(conf_dir, overrides, failure) from failure
    assert isinstance(container, dict)
    container.pop("hydra", None)
    return container  # type: ignore[return-value]


#: one component of a ``# @package`` path (``_global_``, ``_group_`` included)
_PACKAGE_PATH = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$")
_HEADER_LINE = re.compile(r"^\s*#\s*@")


def check_conf_files(conf_dir: Path) -> None:
    """Refuse, in one line naming file and line, a config file Hydra would misread.

    Every ``*.yaml`` below ``conf_dir`` is checked, used by the composition or not: it is
    UTF-8, its ``# @package`` header is at the top with one dotted key path, and it loads
    as plain YAML with OmegaConf's loader (which refuses duplicate keys and tags).
    """
    for path in sorted(conf_dir.rglob("*.yaml")):
        if any(part.startswith(".") for part in path.relative_to(conf_dir).parts):
            continue  # editor and tool files, as Hydra lists only what it is asked for
        shown = _shown(conf_dir, path)
        if not path.is_file():  # a FIFO would block the read (and Hydra's)
            raise ConfigError(f"{shown} is not a regular file; replace it with a YAML file")
        data = path.read_bytes()
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as exc:
            line = data.count(b"\n", 0, exc.start) + 1
            raise ConfigError(
                f"{shown}:{line}: not UTF-8 (byte 0x{data[exc.start]:02x} at offset "
                f"{exc.start}); save the file as UTF-8"
            ) from None
        _check_header(shown, text)
        _check_yaml(shown, text)


def _shown(conf_dir: Path, path: Path) -> str:
    """A config file as the user knows it: ``conf/retrograde/...`` in a host."""
    relative = path.relative_to(conf_dir).as_posix()
    layout = CONF_DIR.parts
    if conf_dir.parts[-len(layout) :] == layout:
        return f"{CONF_DIR}/{relative}"
    return str(path)


def _check_header(shown: str, text: str) -> None:
    """The header Hydra reads: ``# @KEY VALUE`` lines before any other non-blank line."""
    in_header = True
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        if not _HEADER_LINE.match(line):
            in_header = False
            continue
        words = line.lstrip("#").split()
        if not in_header:
            if words and words[0] == "@package":
                raise ConfigError(
                    f"{shown}:{number}: '{line}' comes after other lines, so Hydra ignores it "
                    "and places the file elsewhere; move it to the top of the file"
                )
            continue
        if words[0] != "@package":
            raise ConfigError(
                f"{shown}:{number}: unknown header '{line}'{did_you_mean(words[0], ['@package'])}"
                "; the only header is '# @package KEY.PATH'"
            )
        if len(words) != 2 or not _PACKAGE_PATH.match(words[1]):
            raise ConfigError(
                f"{shown}:{number}: bad header '{line}'; write '# @package KEY.PATH' with one "
                "dotted key path, e.g. '# @package study.sources.corpus'"
            )


def _check_yaml(shown: str, text: str) -> None:
    from omegaconf import OmegaConf

    try:
        OmegaConf.load(io.StringIO(text))
    except yaml.MarkedYAMLError as exc:
        raise ConfigError(_yaml_message(shown, exc)) from exc
    except yaml.YAMLError as exc:
        raise ConfigError(f"{shown}: invalid YAML ({' '.join(str(exc).split())})") from exc


def _yaml_message(shown: str, exc: yaml.MarkedYAMLError) -> str:
    mark = exc.problem_mark or exc.context_mark
    where = f"{shown}:{mark.line + 1}:{mark.column + 1}" if mark else shown
    problem = exc.problem or ""
    duplicate = re.match(r"found duplicate key (.+)$", problem)
    if duplicate:
        return (
            f"{where}: duplicate key {duplicate.group(1)!r} (a key may appear once per "
            "mapping); remove or rename one of them"
        )
    tag = re.search(r"constructor for the tag '([^']+)'", problem)
    if tag:
        name = tag.group(1).replace("tag:yaml.org,2002:", "!!")
        return (
            f"{where}: YAML tag {name!r} is not allowed; config files hold plain values "
            "(mappings, lists, strings, numbers, booleans, null): remove the tag"
        )
    context = f" ({exc.context})" if exc.context else ""
    return f"{where}: invalid YAML: {problem}{context}; fix the file (YAML indents with spaces)"


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
