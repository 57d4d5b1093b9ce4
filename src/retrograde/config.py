"""Experiment config: typed schemas, Hydra composition, validation and sweep expansion.

``retrograde run`` composes the host's ``conf/retrograde/`` config groups (``source/``,
``tokenizer/``, ``study/``, ``stats/``) with the user's Hydra overrides, then :func:`compose`
turns the result into the plain dict written to ``pipelines/retrograde/params.yaml``:

1. ``_target_`` entries become ``{name: dotted.path, params: {...}}`` (:func:`normalize`);
2. every key is checked against the dataclass schemas below; an unknown key fails with the
   key path, the allowed keys and a did-you-mean (:func:`check_schema`);
3. context-length and capacity sweeps expand into named models (:func:`expand_sweeps`);
4. every order, family, source and tokenizer is built once so its own parameter checks run
   before any work, and file sources get their DVC dependencies (:mod:`retrograde._plugin_checks`).

The composed shape is documented in ``docs/config.md``.
"""

from __future__ import annotations

import copy
import dataclasses
import os
import re
import types
import typing
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ._hydra_compose import compose_raw, first_line
from ._validation import did_you_mean
from .errors import ConfigError

__all__ = [
    "NAME_PATTERN",
    "CalibrationConfig",
    "ModelConfig",
    "OrderConfig",
    "RetrogradeConfig",
    "SourceConfig",
    "SplitConfig",
    "StatsConfig",
    "StudyConfig",
    "SweepConfig",
    "TokenizerConfig",
    "UnitsConfig",
    "check_schema",
    "compose",
    "compose_raw",
    "expand_sweeps",
    "normalize",
    "register_configs",
]

#: names of sources, orders, models and sweeps: they become folder and DVC stage name parts,
#: and DVC joins matrix values with "-", so "-" (and anything a shell could read) is refused.
NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


# ------------------------------------------------------------------------------- schemas
@dataclass
class TokenizerConfig:
    name: str = "chars"
    params: dict[str, Any] = field(default_factory=dict)


@dataclass
class UnitsConfig:
    mode: str = "document"  # line | document | window
    window: int | None = None  # tokens per window (mode=window only)
    remainder: str = "drop"  # what to do with a short last window


@dataclass
class SplitConfig:
    fractions: list[float] = field(default_factory=lambda: [0.8, 0.1, 0.1])
    salt: str = "retrograde"


@dataclass
class CalibrationConfig:
    n_units: int = 1000  # units generated before the hash split
    seed: int = 0


@dataclass
class SourceConfig:
    name: str = "text"
    params: dict[str, Any] = field(default_factory=dict)
    #: files the source reads, relative to the host root; derived from the source when None
    deps: list[str] | None = None
    #: null for sources whose documents are already token ids (the ``tokens`` source)
    tokenizer: TokenizerConfig | None = field(default_factory=TokenizerConfig)
    units: UnitsConfig = field(default_factory=UnitsConfig)
    split: SplitConfig = field(default_factory=SplitConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)


@dataclass
class OrderConfig:
    name: str = "forward"
    params: dict[str, Any] = field(default_factory=dict)


@dataclass
class ModelConfig:
    family: str = "ngram"
    params: dict[str, Any] = field(default_factory=dict)
    #: a ``command`` model's trainer: a file or folder relative to the host root, a DVC
    #: dependency of its cells; found in the command when null (``python train.py``)
    code: str | None = None
    #: which training units each seed trains on: auto | none | half | bootstrap (docs/config.md)
    train_sample: str = "auto"


@dataclass
class SweepConfig:
    model: str = ""  # the base model (a key of study.models)
    parameter: str = ""  # a key of that model's params
    values: list[Any] = field(default_factory=list)


@dataclass
class StudyConfig:
    sources: dict[str, SourceConfig] = field(default_factory=dict)
    orders: dict[str, OrderConfig] = field(default_factory=dict)
    models: dict[str, ModelConfig] = field(default_factory=dict)
    seeds: list[int] = field(default_factory=lambda: [0, 1, 2])
    reference_order: str = "forward"
    sweeps: dict[str, SweepConfig] = field(default_factory=dict)


@dataclass
class StatsConfig:
    level: float = 0.95
    interval: str = "t"  # t | bootstrap (docs/statistics.md)
    n_boot: int = 2000
    seed: int = 0
    position_buckets: int = 50


@dataclass
class RetrogradeConfig:
    study: StudyConfig = field(default_factory=StudyConfig)
    stats: StatsConfig = field(default_factory=StatsConfig)


def register_configs() -> None:
    """Register the schemas with Hydra's ConfigStore (explicit: importing registers nothing).

    A host config may then extend ``retrograde_schema`` in its defaults list.
    """
    from hydra.core.config_store import ConfigStore

    store = ConfigStore.instance()
    store.store(name="retrograde_schema", node=RetrogradeConfig)
    for group, node in (("source", SourceConfig), ("study", StudyConfig), ("stats", StatsConfig)):
        store.store(group=group, name=f"{group}_schema", node=node)


# ----------------------------------------------------------------------------- normalize
#: keys of a source entry that are retrograde's own; everything else beside _target_ is a param
_SOURCE_KEYS = {f.name for f in dataclasses.fields(SourceConfig)} - {"name", "params"}


def normalize(raw: dict[str, Any]) -> dict[str, Any]:
    """Rewrite Hydra ``_target_`` entries into ``{name|family: path, params: {...}}``.

    Examples
    --------
    >>> raw = {"study": {"orders": {"mine": {"_target_": "pkg.Mine", "size": 3}}}}
    >>> normalize(raw)["study"]["orders"]["mine"]
    {'name': 'pkg.Mine', 'params': {'size': 3}}
    """
    out = copy.deepcopy(raw)
    study = out.get("study")
    if not isinstance(study, dict):
        return out
    for group, name_key, keep in (
        ("orders", "name", set()),
        ("models", "family", {"code", "train_sample"}),
        ("sources", "name", _SOURCE_KEYS),
    ):
        entries = study.get(group)
        if not isinstance(entries, dict):
            continue
        for entry_name, entry in entries.items():
            if isinstance(entry, dict) and "_target_" in entry:
                params = dict(entry.get("params") or {})
                params.update(
                    {k: v for k, v in entry.items() if k not in keep | {"_target_", "params"}}
                )
                rebuilt = {k: v for k, v in entry.items() if k in keep}
                rebuilt.update({name_key: entry["_target_"], "params": params})
                entries[entry_name] = rebuilt
    return out


# -------------------------------------------------------------------------------- schema
def _allowed_keys(schema: type) -> list[str]:
    return [f.name for f in dataclasses.fields(schema)]


def _check_keys(node: Any, schema: Any, path: str) -> None:
    """Refuse keys the schema does not declare (``params`` dicts are free-form)."""
    if typing.get_origin(schema) in (typing.Union, types.UnionType):  # X | None
        schema = next(arg for arg in typing.get_args(schema) if arg is not type(None))
    if dataclasses.is_dataclass(schema) and isinstance(node, dict):
        hints = typing.get_type_hints(schema)
        allowed = _allowed_keys(schema)  # type: ignore[arg-type]
        for key, value in node.items():
            where = f"{path}.{key}" if path else str(key)
            if key not in allowed:
                raise ConfigError(
                    f"unknown config key {where!r}{did_you_mean(str(key), allowed)}; "
                    f"allowed keys{' under ' + repr(path) if path else ''}: {', '.join(allowed)}"
                )
            _check_keys(value, hints[key], where)
    elif typing.get_origin(schema) is dict and isinstance(node, dict):
        value_type = typing.get_args(schema)[1]
        for key, value in node.items():
            if dataclasses.is_dataclass(value_type) and not NAME_PATTERN.match(str(key)):
                raise ConfigError(
                    f"config key '{path}.{key}': the name {key!r} is invalid; allowed: a letter "
                    "then letters, digits or _ (it becomes a folder and DVC stage name)"
                )
            _check_keys(value, value_type, f"{path}.{key}")


def check_schema(raw: dict[str, Any]) -> dict[str, Any]:
    """Check keys and value types against :class:`RetrogradeConfig`; fill in defaults."""
    from omegaconf import OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    _check_keys(raw, RetrogradeConfig, "")
    try:
        merged = OmegaConf.merge(OmegaConf.structured(RetrogradeConfig), raw)
        container = OmegaConf.to_container(merged, resolve=True)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", "") or "?"
        raise ConfigError(
            f"config key {key!r}: {first_line(exc)}; fix it in conf/retrograde or the override"
        ) from exc
    assert isinstance(container, dict)
    return container  # type: ignore[return-value]


# -------------------------------------------------------------------------------- sweeps
def _value_label(value: Any) -> str:
    """A name-safe rendering of a sweep value: 3 -> '3', 0.5 -> '0p5', 'a-b' -> 'a_b'."""
    return re.sub(r"[^A-Za-z0-9_]", "_", str(value).replace(".", "p"))


def expand_sweeps(study: dict[str, Any]) -> dict[str, Any]:
    """Add one model per sweep value, named ``<base>_<parameter><value>`` (e.g. ``ngram_n3``).

    ``study.sweeps[name]`` gains ``models: {model_name: value}`` (what the report plots).

    Examples
    --------
    >>> study = {"models": {"ngram": {"family": "ngram", "params": {"n": 2}}},
    ...          "sweeps": {"context": {"model": "ngram", "parameter": "n", "values": [1, 3]}}}
    >>> out = expand_sweeps(study)
    >>> sorted(out["models"]), out["models"]["ngram_n3"]["params"]
    (['ngram', 'ngram_n1', 'ngram_n3'], {'n': 3})
    """
    out = copy.deepcopy(study)
    models = out.setdefault("models", {})
    for sweep_name, sweep in sorted(out.get("sweeps", {}).items()):
        base = sweep["model"]
        where = f"study.sweeps.{sweep_name}"
        if base not in study.get("models", {}):
            raise ConfigError(
                f"{where}.model={base!r} is not a model{did_you_mean(base, models)}; "
                f"allowed: one of {', '.join(sorted(study.get('models', {})))}"
            )
        if not sweep["values"]:
            raise ConfigError(f"{where}.values is empty; allowed: a non-empty list of values")
        if not NAME_PATTERN.match(str(sweep["parameter"])):
            raise ConfigError(f"{where}.parameter={sweep['parameter']!r} is not a parameter name")
        expanded: dict[str, Any] = {}
        for value in sweep["values"]:
            name = f"{base}_{sweep['parameter']}{_value_label(value)}"
            if name in models or name in expanded:
                raise ConfigError(
                    f"{where}: model name {name!r} (value {value!r}) is already taken; "
                    "rename the model or drop the duplicate value"
                )
            params = {**study["models"][base]["params"], sweep["parameter"]: value}
            models[name] = {**copy.deepcopy(study["models"][base]), "params": params}
            expanded[name] = value
        sweep["models"] = expanded
    return out


def compose(
    root: str | os.PathLike[str], overrides: Sequence[str] = (), *, conf_dir: Path | None = None
) -> dict[str, Any]:
    """The validated, normalized params for the host at ``root`` (nothing is written).

    Raises :class:`~retrograde.errors.ConfigError` (one line) on any bad key or value.
    """
    from ._plugin_checks import check_plugins
    from .stages import fit_entries

    root = Path(root).resolve()
    raw = compose_raw(conf_dir or root / "conf" / "retrograde", overrides)
    checked = check_schema(normalize(raw))
    checked["study"] = expand_sweeps(checked["study"])
    composed = check_plugins(checked, root)
    composed["fits"] = fit_entries(composed["study"])
    return composed
