"""Fair comparisons at compose time: tuning trials per model, and one budget held equal.

``study.models.M.tune: {trials: N, space: {param: [values, ...]}, seed: 0}`` expands into
the trial models ``M_tune0 .. M_tune<K-1>``, each ``M`` with one setting of the space.
They are models like any other, so every order is fitted with every trial, seed for seed,
as cached DVC cells; the table stage picks each order's best trial by validation loss.
The shared setting (``M`` itself) is still fitted, so the report can say how much tuning
moved the gap.

``study.equal_budget`` holds one budget equal across orders by switching off what lets
orders consume different amounts: early stopping.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..validation import check_int
from ._schema import NAME_PATTERN, ModelConfig, StudyConfig, TuneConfig

__all__ = [
    "EQUAL_BUDGETS",
    "apply_equal_budget",
    "expand_tuning",
    "model_where",
    "set_model_value",
    "tune_settings",
]

#: what ``study.equal_budget`` may hold
EQUAL_BUDGETS = ("epochs", "train_tokens")
#: the model field (not a family parameter) a sweep or a search space may set
TRAIN_FRACTION = "train_fraction"
#: families that train by epochs with early stopping on validation loss
_EPOCH_FAMILIES = ("mlp",)
_TORCH_FAMILIES = ("gru", "lstm", "transformer")


def set_model_value(model: ModelConfig, parameter: str, value: Any, where: str) -> None:
    """Set a family parameter, or the model's ``train_fraction`` (checked: 0 < f <= 1)."""
    if parameter == TRAIN_FRACTION:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if not ok or not 0.0 < float(value) <= 1.0:
            raise ConfigError(
                f"{where}: train_fraction={value!r} is invalid; allowed: a number with "
                "0 < value <= 1 (the share of the training units the fit uses)"
            )
        model.train_fraction = float(value)
    else:
        model.params = {**model.params, parameter: value}


def tune_settings(tune: TuneConfig, where: str) -> list[dict[str, Any]]:
    """The settings a search space is tried with, in a fixed order.

    The whole grid (``itertools.product`` over the parameters in the order written) when
    ``trials`` is at least its size; else ``trials`` distinct settings drawn uniformly
    without replacement with ``numpy.random.default_rng(seed)``, kept in grid order.

    >>> tune_settings(TuneConfig(trials=9, space={"a": [1, 2], "b": [3]}), "w")
    [{'a': 1, 'b': 3}, {'a': 2, 'b': 3}]
    >>> len(tune_settings(TuneConfig(trials=3, space={"a": [1, 2, 3, 4], "b": [5, 6]}), "w"))
    3
    """
    check_int(where, "trials", tune.trials, 1)
    check_int(where, "seed", tune.seed, 0)
    if not tune.space:
        raise ConfigError(f"{where}.space is empty; allowed: {{param: [values, ...]}}")
    names = list(tune.space)
    for name in names:
        values = tune.space[name]
        if not NAME_PATTERN.match(str(name)):
            raise ConfigError(f"{where}.space: {name!r} is not a parameter name")
        if not isinstance(values, list) or not values:
            raise ConfigError(
                f"{where}.space.{name}={values!r} is invalid; allowed: a non-empty list of values"
            )
    sizes = [len(tune.space[name]) for name in names]
    total = math.prod(sizes)
    if tune.trials >= total:
        chosen: list[int] = list(range(total))
    else:
        rng = np.random.default_rng(int(tune.seed))
        chosen = sorted(int(i) for i in rng.choice(total, size=int(tune.trials), replace=False))
    settings = []
    for flat in chosen:
        # mixed-radix digits of the grid index, last parameter fastest (as itertools.product)
        digits = []
        for size in reversed(sizes):
            flat, digit = divmod(flat, size)
            digits.append(digit)
        picked = zip(names, reversed(digits), strict=True)
        settings.append({name: tune.space[name][digit] for name, digit in picked})
    return settings


def expand_tuning(study: StudyConfig) -> None:
    """Add the trial models of every model with ``tune`` and record them in ``study.tuning``.

    The tuned model's own entry loses its ``tune`` block (it moves to ``study.tuning``), so
    adding or editing a search space refits only trials, never the shared setting.
    """
    study.tuning = {}
    for name, model in list(study.models.items()):
        if model.tune is None:
            continue
        where = f"study.models.{name}.tune"
        tune, model.tune = model.tune, None
        tune.models = {}
        for index, setting in enumerate(tune_settings(tune, where)):
            trial_name = f"{name}_tune{index}"
            if trial_name in study.models:
                raise ConfigError(
                    f"{where}: trial model name {trial_name!r} is already taken; rename "
                    f"study.models.{trial_name}"
                )
            trial = copy.deepcopy(model)
            for parameter, value in setting.items():
                set_model_value(trial, parameter, value, f"{where}.space.{parameter}")
            study.models[trial_name] = trial
            tune.models[trial_name] = setting
        study.tuning[name] = tune


def model_where(study: StudyConfig, name: str) -> str:
    """The config key a model's errors name: a trial's is its tuned model's ``tune`` block."""
    for tuned, tune in (study.tuning or {}).items():
        if name in (tune.models or {}):
            return f"study.models.{tuned}.tune (trial {name}: {tune.models[name]})"  # type: ignore[index]
    return f"study.models.{name}"


def apply_equal_budget(study: StudyConfig) -> None:
    """Hold ``study.equal_budget`` equal across orders: no early stopping anywhere.

    ``epochs``: every epoch-trained model runs all its ``epochs`` (``mlp``: ``patience`` =
    ``epochs``; torch families: ``patience`` 0 and no ``token_budget``). ``train_tokens``:
    torch families need ``params.token_budget`` (they stop at exactly that many positions);
    ``mlp`` runs all its epochs, and since every order trains on the same positions, equal
    epochs are equal tokens. Counting families (``ngram``) read their data once. A
    parameter the user set that contradicts the choice is refused rather than overridden.
    """
    held = study.equal_budget
    if held is None:
        return
    if held not in EQUAL_BUDGETS:
        raise ConfigError(
            f"study.equal_budget={held!r} is invalid; allowed: null, {', '.join(EQUAL_BUDGETS)}"
        )
    for name, model in study.models.items():
        where = f"study.models.{name}.params"
        params = model.params
        if model.family in _EPOCH_FAMILIES:
            epochs = params.get("epochs", 20)
            if "patience" in params and params["patience"] < epochs:
                raise ConfigError(
                    f"{where}.patience={params['patience']!r} stops early, so orders may train "
                    f"for different epochs; study.equal_budget={held} needs patience >= epochs "
                    "(or leave patience out)"
                )
            model.params = {**params, "patience": max(int(epochs), int(params.get("patience", 1)))}
        elif model.family in _TORCH_FAMILIES:
            budget = params.get("token_budget")
            if held == "train_tokens" and budget is None:
                raise ConfigError(
                    f"{where}.token_budget is not set; study.equal_budget=train_tokens needs "
                    "every torch model to train on a fixed number of positions"
                )
            if held == "epochs" and budget is not None:
                raise ConfigError(
                    f"{where}.token_budget={budget!r} ends training by tokens, not epochs; "
                    "remove it or use study.equal_budget=train_tokens"
                )
            if params.get("patience", 3) != 0 and "patience" in params and held == "epochs":
                raise ConfigError(
                    f"{where}.patience={params['patience']!r} stops early; "
                    "study.equal_budget=epochs needs patience 0 (or leave it out)"
                )
            if held == "epochs":
                model.params = {**params, "patience": 0}
