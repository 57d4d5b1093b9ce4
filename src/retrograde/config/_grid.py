"""The grid: sweeps expanded into named models, and one fit cell per (source, model, order, seed)."""

from __future__ import annotations

import copy
import re
from typing import Any

from ..errors import ConfigError
from ..validation import did_you_mean
from ._layout import WDIR_TO_ROOT, units_dir
from ._schema import NAME_PATTERN, FitCell, ModelConfig, StudyConfig, SweepConfig
from ._tuning import set_model_value

__all__ = [
    "HOLDS",
    "check_sweep_budgets",
    "expand_sweeps",
    "fit_cells",
    "fitted_seed",
    "grid_size",
    "ignores_seed",
    "seeds_paired",
]

#: what a sweep may hold equal across its values
HOLDS = ("steps", "tokens")


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


def ignores_seed(spec: ModelConfig) -> bool:
    """Whether a model's fit is the same for every seed, so it is fitted once per
    (source, model, order): the one rule :func:`fit_cells` and the table stage follow.

    True for a family without randomness of its own (``Family.has_own_randomness`` is
    false: the ``ngram``'s exact counts) whose ``train_sample`` resolves to ``none``: by
    default (``auto``) such a family's seed chooses its training sample
    (:func:`retrograde.data.resample_train`), so each seed is a fit of its own. A model
    setting that makes the seed matter for such a family belongs here, as one more
    condition.

    Examples
    --------
    >>> ignores_seed(ModelConfig(family="ngram", train_sample="none"))
    True
    >>> ignores_seed(ModelConfig(family="ngram")), ignores_seed(ModelConfig(family="mlp"))
    (False, False)
    """
    from .. import families
    from ..data import resolve_train_sample

    family = families.registry.get(spec.family)
    if getattr(family, "has_own_randomness", True):
        return False
    return resolve_train_sample(spec.train_sample, family) == "none"


def seeds_paired(spec: ModelConfig) -> bool:
    """Whether seed ``s`` of two orders of this model must be compared as a pair: the one
    rule the table stage follows (``summarize_model(paired_seeds=...)``).

    Fits of two orders with the same seed share what the seed chooses of the training units
    (a ``train_fraction`` subsample, a ``train_sample`` draw), and, unless the family draws
    its own random numbers from a stream of each order's own (``Family.own_stream_per_order``:
    ``mlp``, the torch families), the random numbers themselves. Only fits that share
    neither are independent, and only then is each order's seed variation estimated apart
    (Welch's form, up to twice the degrees of freedom); every other model is paired, which
    is right whatever two fits share (``docs/statistics.md``, "Seeds and pairs").

    Examples
    --------
    >>> seeds_paired(ModelConfig(family="mlp")), seeds_paired(ModelConfig(family="ngram"))
    (False, True)
    >>> seeds_paired(ModelConfig(family="mlp", train_fraction=0.5))
    True
    >>> seeds_paired(ModelConfig(family="command", params={"command": "x"}))
    True
    """
    from .. import families
    from ..data import resolve_train_sample

    family = families.registry.get(spec.family)
    if not getattr(family, "own_stream_per_order", False):
        return True
    if float(spec.train_fraction) < 1.0:
        return True
    return resolve_train_sample(spec.train_sample, family) != "none"


def fitted_seed(study: StudyConfig, model: str, seed: int) -> int:
    """The seed of the cell that holds ``model``'s results for ``seed``: ``seed`` itself,
    or the model's first seed when it :func:`ignores_seed` (its only fit).

    Examples
    --------
    >>> n = ModelConfig(family="ngram", train_sample="none")
    >>> study = StudyConfig(models={"n": n}, seeds=[3, 4])
    >>> fitted_seed(study, "n", 4)
    3
    """
    if ignores_seed(study.models[model]):
        return study.seeds_of(model)[0]
    return int(seed)


def grid_size(study: StudyConfig) -> int:
    """How many (source, model, order, seed) cells the grid names: the rows of the table;
    :func:`fit_cells` may hold fewer (a model that :func:`ignores_seed` is fitted once)."""
    return sum(
        len(study.orders) * len(study.seeds_of(model))
        for source in study.sources
        for model in study.models_on(source)
    )


def fit_cells(study: StudyConfig) -> dict[str, FitCell]:
    """The fit cells of a composed study, as the ``fits`` block of ``params.yaml``.

    Keys are what DVC appends to ``fit@`` (``source-model-order-seed``), in the order
    source, model, order, seed; a model with its own ``seeds`` or ``sources`` gets only
    those, and a model that :func:`ignores_seed` only its first seed (every seed's row of
    the table reads that cell). Each cell's ``code`` dependency (seen from the pipeline
    folder) is a ``command`` model's trainer files, or else the source's units, which every
    cell depends on anyway.
    """
    fits: dict[str, FitCell] = {}
    for source in study.sources:
        for model in study.models_on(source):
            spec = study.models[model]
            code = f"{WDIR_TO_ROOT}/{spec.code}" if spec.code else str(units_dir(source))
            seeds = study.seeds_of(model)
            if ignores_seed(spec):
                seeds = seeds[:1]
            for order in study.orders:
                for seed in seeds:
                    key = f"{source}-{model}-{order}-{seed}"
                    fits[key] = FitCell(source, model, order, int(seed), code)
    return fits


def check_sweep_budgets(study: StudyConfig) -> None:
    """Make every sweep hold its compute equal, and record which (``sweep.hold``).

    A longer context puts more positions in every optimizer step, so under a token budget
    (or a fixed number of epochs) context 256 trains 16x fewer steps than context 16: the
    sweep would confound context with optimization. A sweep of a family's context
    parameter therefore holds ``steps`` by default (the base model must set its step
    budget); ``hold: tokens`` keeps the token budget instead and says so. Runs after the
    plug-ins are resolved (every model entry holds its full parameters).
    """
    from .. import families

    for sweep_name, sweep in study.sweeps.items():
        where = f"study.sweeps.{sweep_name}"
        model = study.models[sweep.model]
        family = families.registry.get(model.family)
        budgets: dict[str, str] = dict(getattr(family, "budget_parameters", {}) or {})
        is_context = sweep.parameter == getattr(family, "context_parameter", None)
        if sweep.hold is None and is_context and budgets:
            sweep.hold = "steps"
        if sweep.hold is None:
            continue
        if sweep.hold not in HOLDS:
            raise ConfigError(
                f"{where}.hold={sweep.hold!r} is invalid; allowed: {', '.join(HOLDS)} or null"
            )
        if sweep.hold not in budgets:
            raise ConfigError(
                f"{where}.hold={sweep.hold!r}: family {model.family!r} of model "
                f"{sweep.model!r} has no {sweep.hold} budget; allowed: null"
                + (f" or {', '.join(budgets)}" if budgets else "")
            )
        parameter = budgets[sweep.hold]
        if model.params.get(parameter) is None:
            other = "tokens" if sweep.hold == "steps" else "steps"
            raise ConfigError(
                f"{where} holds {sweep.hold} equal across its {sweep.parameter} values, but "
                f"study.models.{sweep.model}.params.{parameter} is null; set it (a "
                f"longer context with equal {other} or epochs trains fewer steps), or set "
                f"{where}.hold: {other} with {budgets.get(other, other)}"
            )
