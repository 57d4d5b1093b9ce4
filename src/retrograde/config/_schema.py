"""Typed config: one dataclass per config group, the only place each default lives.

The same classes describe what a user writes in ``conf/retrograde/`` and what ``retrograde
run`` composes into ``params.yaml``: a few fields are *composed* (filled in by retrograde,
refused when a user writes them). The stages read ``params.yaml`` back into these classes
with :func:`from_dict` (plain YAML, no Hydra or OmegaConf), so every stage, check and report
works on typed objects.
"""

from __future__ import annotations

import copy
import dataclasses
import re
import types
import typing
from dataclasses import dataclass, field
from typing import Any, TypeVar

from ..data import DEFAULT_FRACTIONS, DEFAULT_SALT, DEFAULT_UNIT_MODE
from ..errors import ConfigError
from ..validation import did_you_mean

__all__ = [
    "NAME_PATTERN",
    "CalibrationConfig",
    "FitCell",
    "ModelConfig",
    "OrderConfig",
    "ProxyConfig",
    "RankConfig",
    "RetrogradeConfig",
    "ScreeningConfig",
    "SourceConfig",
    "SplitConfig",
    "StatsConfig",
    "StudyConfig",
    "SubsampleConfig",
    "SweepConfig",
    "TokenizerConfig",
    "TuneConfig",
    "UnitsConfig",
    "check_keys",
    "check_required",
    "from_dict",
    "normalize",
    "register_configs",
    "to_dict",
]

#: names of sources, orders, models and sweeps: they become folder and DVC stage name parts,
#: and DVC joins stage-name parts with "-", so "-" (and anything a shell could read) is refused.
NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")

T = TypeVar("T")


def _composed(default: Any = None) -> Any:
    """A field retrograde fills in when it composes; a user may not write it."""
    return field(default=default, metadata={"composed": True})


# ------------------------------------------------------------------------------- schemas
@dataclass
class TokenizerConfig:
    name: str = "chars"
    params: dict[str, Any] = field(default_factory=dict)
    #: a learned tokenizer's training library and its version (a new one reruns the units)
    library_version: str | None = _composed()


@dataclass
class UnitsConfig:
    mode: str = DEFAULT_UNIT_MODE  # line | document | window
    window: int | None = None  # tokens per window (mode=window only)
    remainder: str = "drop"  # what to do with a short last window


@dataclass
class SplitConfig:
    fractions: list[float] = field(default_factory=lambda: list(DEFAULT_FRACTIONS))
    salt: str = DEFAULT_SALT
    #: a file (relative to the host root) of unit ids, one a line: exactly their units are
    #: the test split; the others go to train / valid by the hash (file sources only)
    test_ids: str | None = None


@dataclass
class SubsampleConfig:
    #: keep at most this many units (a seeded uniform sample); null keeps all
    max_units: int | None = None
    seed: int = 0


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
    units: UnitsConfig | None = field(default_factory=UnitsConfig)
    split: SplitConfig = field(default_factory=SplitConfig)
    subsample: SubsampleConfig = field(default_factory=SubsampleConfig)
    calibration: CalibrationConfig | None = field(default_factory=CalibrationConfig)
    package_version: str | None = _composed()


@dataclass
class OrderConfig:
    name: str = "forward"
    params: dict[str, Any] = field(default_factory=dict)
    package_version: str | None = _composed()


@dataclass
class TuneConfig:
    """``study.models.M.tune``: the settings every order of model ``M`` is tried with.

    The settings are the grid of ``space`` when ``trials`` covers it, else a random sample
    of ``trials`` distinct settings drawn with ``seed`` (``config.tune_settings``).
    """

    trials: int = 0
    space: dict[str, list[Any]] = field(default_factory=dict)
    seed: int = 0
    #: the trial models it expanded into, name -> setting (``{param: value}``)
    models: dict[str, dict[str, Any]] | None = _composed()


@dataclass
class ModelConfig:
    #: a registered family or a dotted path; required (no family is assumed)
    family: str
    params: dict[str, Any] = field(default_factory=dict)
    #: a ``command`` model's trainer: a file or folder relative to the host root, a DVC
    #: dependency of its cells; found in the command when null (``python train.py``)
    code: str | None = None
    #: the seeds this model is fitted with; the study's ``seeds`` when null
    seeds: list[int] | None = None
    #: the sources this model is fitted on (names in ``study.sources``); all when null
    sources: list[str] | None = None
    #: which training units each seed trains on: auto | none | half | bootstrap
    #: (docs/config.md); composing resolves ``auto`` to what the fit stage will do
    train_sample: str = "auto"
    #: the share of the training units the fit uses: a nested subsample, seeded by the
    #: cell's seed, the same units for every order (``data.nested_subsample``); the seed's
    #: ``train_sample`` is then drawn from it
    train_fraction: float = 1.0
    #: a search space every order is tuned over (on validation loss); see TuneConfig
    tune: TuneConfig | None = None
    numerics_version: int | None = _composed()
    package_version: str | None = _composed()
    #: a trainer outside the repository: the sha256 of its program and files
    trainer_sha256: str | None = _composed()


@dataclass
class SweepConfig:
    model: str = ""  # the base model (a key of study.models)
    parameter: str = ""  # a key of that model's params
    values: list[Any] = field(default_factory=list)
    #: what every value trains with equally: ``steps`` (optimizer steps, the default of a
    #: context sweep), ``tokens`` (the model's token budget), or null (nothing is held)
    hold: str | None = None
    #: another sweep's name: this sweep then expands every model of that one (context x
    #: data size), and each of its models remembers the other sweep's value
    within: str | None = None
    #: the models the sweep expanded into, name -> value
    models: dict[str, Any] | None = _composed()
    #: with ``within``: model name -> the value of the other sweep it was made from
    groups: dict[str, Any] | None = _composed()


@dataclass
class StudyConfig:
    sources: dict[str, SourceConfig] = field(default_factory=dict)
    orders: dict[str, OrderConfig] = field(default_factory=dict)
    models: dict[str, ModelConfig] = field(default_factory=dict)
    seeds: list[int] = field(default_factory=lambda: [0, 1, 2])
    reference_order: str = "forward"
    sweeps: dict[str, SweepConfig] = field(default_factory=dict)
    #: hold one budget equal across orders: ``epochs`` (no early stopping) or
    #: ``train_tokens`` (torch families need params.token_budget); null holds nothing
    equal_budget: str | None = None
    #: tuned models: name -> its TuneConfig with the trial models it expanded into
    tuning: dict[str, TuneConfig] | None = _composed()

    def trial_models(self) -> set[str]:
        """The models that exist only as tuning trials (not rows of the table)."""
        return {t for tune in (self.tuning or {}).values() for t in (tune.models or {})}

    def seeds_of(self, model: str) -> list[int]:
        """The seeds ``model`` is fitted with (its own, else the study's)."""
        own = self.models[model].seeds
        return [int(s) for s in (self.seeds if own is None else own)]

    def sources_of(self, model: str) -> list[str]:
        """The sources ``model`` is fitted on, in the order of ``sources``."""
        own = self.models[model].sources
        return [s for s in self.sources if own is None or s in own]

    def models_on(self, source: str) -> list[str]:
        """The models fitted on ``source``, in the order of ``models``."""
        return [m for m in self.models if source in self.sources_of(m)]


@dataclass
class StatsConfig:
    level: float = 0.95
    interval: str = "t"  # t | bootstrap (docs/statistics.md)
    n_boot: int = 2000
    seed: int = 0
    position_buckets: int = 50


@dataclass
class FitCell:
    """One fit stage: (source, model, order, seed) and its code dependency (from the wdir)."""

    source: str
    model: str
    order: str
    seed: int
    code: str


@dataclass
class ProxyConfig:
    """The cheap family ``retrograde rank`` screens candidates with (on the validation split)."""

    family: str = "ngram"
    params: dict[str, Any] = field(default_factory=dict)


@dataclass
class ScreeningConfig:
    """Successive halving: round 1 trains the proxy on ``min_fraction`` of the training
    units; each later round keeps the best ``1/eta`` (never fewer than ``top_k``) and
    multiplies the fraction by ``eta``, up to all training units."""

    eta: int = 2
    min_fraction: float = 0.25
    seed: int = 0


@dataclass
class RankConfig:
    """``retrograde rank``: which order of ``source`` should ``model`` be trained in?

    ``space`` maps a registered order name to lists of parameter values (every combination
    is one candidate, e.g. ``{block_reverse: {size: [2, 4]}}``); ``orders`` adds entries of
    ``study.orders`` (custom orders) as they are.
    """

    source: str = ""
    model: str = ""
    proxy: ProxyConfig = field(default_factory=ProxyConfig)
    #: the order gaps are measured against; ``study.reference_order`` when null
    reference_order: str | None = None
    space: dict[str, dict[str, Any]] = field(default_factory=dict)
    orders: list[str] = field(default_factory=list)
    top_k: int = 3
    screening: ScreeningConfig = field(default_factory=ScreeningConfig)


@dataclass
class RetrogradeConfig:
    study: StudyConfig = field(default_factory=StudyConfig)
    stats: StatsConfig = field(default_factory=StatsConfig)
    #: what ``retrograde rank`` searches; a command setting, never written to params.yaml
    rank: RankConfig | None = None
    #: every fit stage, keyed by what DVC appends to ``fit@`` (``source-model-order-seed``)
    fits: dict[str, FitCell] | None = _composed()

    def cells(self) -> list[tuple[str, str, str, int]]:
        """Every fit cell, in stage order: ``(source, model, order, seed)``."""
        return [(c.source, c.model, c.order, c.seed) for c in (self.fits or {}).values()]

    def to_dict(self) -> dict[str, Any]:
        """The plain dict written to ``params.yaml`` (field order kept; no ``rank`` block,
        which only ``retrograde rank`` reads and no stage depends on)."""
        out = to_dict(self)
        out.pop("rank", None)
        return out


def register_configs() -> None:
    """Register the schemas with Hydra's ConfigStore (explicit: importing registers nothing).

    A host config may then extend ``retrograde_schema`` in its defaults list.
    """
    from hydra.core.config_store import ConfigStore

    store = ConfigStore.instance()
    store.store(name="retrograde_schema", node=RetrogradeConfig)
    for group, node in (("source", SourceConfig), ("study", StudyConfig), ("stats", StatsConfig)):
        store.store(group=group, name=f"{group}_schema", node=node)


# ---------------------------------------------------------------------- dicts <-> objects
def _optional_inner(hint: Any) -> Any:
    """``X`` for ``X | None``; the hint itself otherwise."""
    if typing.get_origin(hint) in (typing.Union, types.UnionType):
        inner = [arg for arg in typing.get_args(hint) if arg is not type(None)]
        return inner[0] if len(inner) == 1 else hint
    return hint


def _build(hint: Any, value: Any) -> Any:
    hint = _optional_inner(hint)
    if value is None:
        return None
    if dataclasses.is_dataclass(hint) and isinstance(hint, type):
        return from_dict(hint, value)
    if typing.get_origin(hint) is dict:
        value_type = typing.get_args(hint)[1]
        return {key: _build(value_type, item) for key, item in value.items()}
    return value


def from_dict(cls: type[T], data: dict[str, Any]) -> T:
    """``cls`` (a schema dataclass) built from a plain dict, nested groups included.

    Missing keys take the field defaults; keys the class does not declare are refused.

    >>> from_dict(StatsConfig, {"n_boot": 100}).n_boot
    100
    """
    if not isinstance(data, dict):
        raise ConfigError(f"expected a mapping for {cls.__name__}, got {type(data).__name__}")
    hints = typing.get_type_hints(cls)
    names = {f.name for f in dataclasses.fields(cls)}  # type: ignore[arg-type]
    unknown = sorted(set(data) - names)
    if unknown:
        raise ConfigError(
            f"unknown key {unknown[0]!r} for {cls.__name__}{did_you_mean(unknown[0], names)}"
        )
    return cls(**{key: _build(hints[key], value) for key, value in data.items()})


def to_dict(obj: Any) -> Any:
    """The plain (YAML-ready) form of a schema object: dicts, lists and scalars."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: to_dict(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {key: to_dict(value) for key, value in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_dict(value) for value in obj]
    return copy.deepcopy(obj)


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
        (
            "models",
            "family",
            {"code", "seeds", "sources", "train_sample", "train_fraction", "tune"},
        ),
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


def check_required(raw: dict[str, Any]) -> None:
    """Refuse a model entry without ``family`` (normalized ``_target_`` entries have one).

    No family is assumed: a model written without one is a mistake, not an n-gram.
    """
    study = raw.get("study")
    models = study.get("models") if isinstance(study, dict) else None
    if not isinstance(models, dict):
        return
    for name, entry in models.items():
        if isinstance(entry, dict) and entry.get("family") is None:
            from .. import families

            raise ConfigError(
                f"study.models.{name} has no family; add family: NAME (one of "
                f"{', '.join(families.names())}) or _target_: package.Class to its entry"
            )


def check_keys(node: Any, schema: Any = RetrogradeConfig, path: str = "") -> None:
    """Refuse keys the schema does not declare, and composed keys (``params`` are free-form)."""
    schema = _optional_inner(schema)
    if dataclasses.is_dataclass(schema) and isinstance(node, dict):
        hints = typing.get_type_hints(schema)
        fields = dataclasses.fields(schema)
        allowed = [f.name for f in fields if not f.metadata.get("composed")]
        for key, value in node.items():
            where = f"{path}.{key}" if path else str(key)
            if key not in allowed:
                if key in {f.name for f in fields}:
                    raise ConfigError(
                        f"config key {where!r} is filled in by retrograde when it composes the "
                        "config; remove it from conf/retrograde or the override"
                    )
                raise ConfigError(
                    f"unknown config key {where!r}{did_you_mean(str(key), allowed)}; "
                    f"allowed keys{' under ' + repr(path) if path else ''}: {', '.join(allowed)}"
                )
            check_keys(value, hints[key], where)
    elif typing.get_origin(schema) is dict and isinstance(node, dict):
        value_type = typing.get_args(schema)[1]
        for key, value in node.items():
            if dataclasses.is_dataclass(value_type) and not NAME_PATTERN.match(str(key)):
                raise ConfigError(
                    f"config key '{path}.{key}': the name {key!r} is invalid; allowed: a letter "
                    "then letters, digits or _ (it becomes a folder and DVC stage name)"
                )
            check_keys(value, value_type, f"{path}.{key}")
