"""The grid: sweeps expanded into named models, and one fit cell per (source, model, order, seed)."""

from __future__ import annotations

import copy
import re
from typing import Any

from ..errors import ConfigError
from ..validation import did_you_mean
from ._layout import WDIR_TO_ROOT, units_dir
from ._schema import NAME_PATTERN, FitCell, StudyConfig, SweepConfig
from ._tuning import set_model_value

__all__ = ["expand_sweeps", "fit_cells"]


def _value_label(value: Any) -> str:
    """A name-safe rendering of a sweep value: 3 -> '3', 0.5 -> '0p5', 'a-b' -> 'a_b'."""
    return re.sub(r"[^A-Za-z0-9_]", "_", str(value).replace(".", "p"))


def expand_sweeps(study: StudyConfig) -> None:
    """Add one model per sweep value, named ``<base>_<parameter><value>`` (e.g. ``ngram_n3``).

    Each sweep records ``models: {model_name: value}`` (what the report plots). The
    parameter ``train_fraction`` sets the model's share of training units (the data-size
    sweep) rather than a family parameter. A sweep with ``within: OTHER`` expands every
    model of sweep ``OTHER`` instead (``mlp_window4_train_fraction0p5``) and records
    ``groups: {model_name: OTHER's value}``.

    Examples
    --------
    >>> from retrograde.config import ModelConfig, SweepConfig
    >>> study = StudyConfig(models={"ngram": ModelConfig(family="ngram", params={"n": 2})},
    ...                     sweeps={"context": SweepConfig(model="ngram", parameter="n", values=[1, 3])})
    >>> expand_sweeps(study)
    >>> sorted(study.models), study.models["ngram_n3"].params
    (['ngram', 'ngram_n1', 'ngram_n3'], {'n': 3})
    """
    declared = dict(study.models)
    # A sweep within another expands that one's models, so it comes after it.
    ordered = sorted(study.sweeps.items(), key=lambda item: (item[1].within is not None, item[0]))
    for sweep_name, sweep in ordered:
        where = f"study.sweeps.{sweep_name}"
        if sweep.model not in declared:
            raise ConfigError(
                f"{where}.model={sweep.model!r} is not a model"
                f"{did_you_mean(sweep.model, declared)}; allowed: one of {', '.join(sorted(declared))}"
            )
        if not sweep.values:
            raise ConfigError(f"{where}.values is empty; allowed: a non-empty list of values")
        if not NAME_PATTERN.match(str(sweep.parameter)):
            raise ConfigError(f"{where}.parameter={sweep.parameter!r} is not a parameter name")
        bases = _bases(study, sweep_name, sweep)
        sweep.models = {}
        sweep.groups = {} if sweep.within is not None else None
        for base, group in bases.items():
            for value in sweep.values:
                name = f"{base}_{sweep.parameter}{_value_label(value)}"
                if name in study.models:
                    raise ConfigError(
                        f"{where}: model name {name!r} (value {value!r}) is already taken; "
                        "rename the model or drop the duplicate value"
                    )
                model = copy.deepcopy(study.models[base])
                set_model_value(model, sweep.parameter, value, f"{where}.values")
                study.models[name] = model
                sweep.models[name] = value
                if sweep.groups is not None:
                    sweep.groups[name] = group


def _bases(study: StudyConfig, name: str, sweep: SweepConfig) -> dict[str, Any]:
    """The models a sweep expands, each with the value of the sweep it lies within."""
    if sweep.within is None:
        return {sweep.model: None}
    other = study.sweeps.get(sweep.within)
    where = f"study.sweeps.{name}.within"
    if other is None or sweep.within == name:
        allowed = [s for s in study.sweeps if s != name]
        raise ConfigError(
            f"{where}={sweep.within!r} is not another sweep"
            f"{did_you_mean(str(sweep.within), allowed)}; allowed: {', '.join(allowed) or 'none'}"
        )
    if other.within is not None or other.model != sweep.model:
        raise ConfigError(
            f"{where}={sweep.within!r}: that sweep must sweep the same model ({sweep.model!r}) "
            "and lie within no other sweep"
        )
    return dict(other.models or {})


def fit_cells(study: StudyConfig) -> dict[str, FitCell]:
    """The fit cells of a composed study, as the ``fits`` block of ``params.yaml``.

    Keys are what DVC appends to ``fit@`` (``source-model-order-seed``), in the order
    source, model, order, seed; a model with its own ``seeds`` or ``sources`` gets only
    those. Each cell's ``code`` dependency (seen from the pipeline
    folder) is a ``command`` model's trainer files, or else the source's units, which every
    cell depends on anyway.
    """
    fits: dict[str, FitCell] = {}
    for source in study.sources:
        for model in study.models_on(source):
            spec = study.models[model]
            code = f"{WDIR_TO_ROOT}/{spec.code}" if spec.code else str(units_dir(source))
            for order in study.orders:
                for seed in study.seeds_of(model):
                    key = f"{source}-{model}-{order}-{seed}"
                    fits[key] = FitCell(source, model, order, int(seed), code)
    return fits
