"""Config: typed schemas, Hydra composition, one rule per value, the grid and the layout.

``retrograde run`` composes the host's ``conf/retrograde/`` config groups (``source/``,
``tokenizer/``, ``study/``, ``stats/``) with the user's Hydra overrides; :func:`compose`
turns the result into a :class:`RetrogradeConfig`:

1. ``_target_`` entries become ``{name|family: path, params: {...}}`` (:func:`normalize`);
2. every key is checked against the dataclass schemas; an unknown key fails with the key
   path, the allowed keys and a did-you-mean; OmegaConf checks the value types;
3. context-length, capacity and data-size sweeps expand into named models
   (:func:`expand_sweeps`), tuned models into their trial models (:func:`expand_tuning`),
   and ``study.equal_budget`` switches off early stopping (:func:`apply_equal_budget`);
4. every value passes its one rule (:mod:`._checks`), and every order, family, source and
   tokenizer is built once so its own parameter checks run before any work; entries get
   their full parameters and code versions, file sources their DVC dependencies
   (:func:`resolve_plugins`);
5. the grid becomes one fit cell per stage (:func:`fit_cells`).

The stages read ``params.yaml`` back with :func:`load_params` (plain YAML, no Hydra).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from ..errors import ConfigError, HostRepoError
from ._checks import MIN_BOOT, check_source_values, check_stats, check_study
from ._grid import (
    HOLDS,
    check_sweep_budgets,
    expand_sweeps,
    fit_cells,
    fitted_seed,
    grid_size,
    ignores_seed,
    seeds_paired,
)
from ._hydra import compose_raw, first_line
from ._layout import (
    CONF_DIR,
    DVC_FILE,
    LOCK_FILE,
    LOG_DIR,
    METRICS_FILE,
    PARAMS_FILE,
    PIPELINE_DIR,
    WDIR_TO_ROOT,
    cell_dir,
    fit_stage_name,
    order_dir,
    reorder_stage_name,
    units_dir,
    units_stage_name,
)
from ._plugins import (
    check_file_types,
    check_repo_path,
    covered,
    resolve_plugins,
    resolved_params,
)
from ._rank import (
    candidate_name,
    check_rank,
    rank_candidates,
    rank_grid,
    rank_proxy,
    rank_reference,
)
from ._schema import (
    NAME_PATTERN,
    CalibrationConfig,
    FitCell,
    ModelConfig,
    OrderConfig,
    ProxyConfig,
    RankConfig,
    RetrogradeConfig,
    ScreeningConfig,
    SourceConfig,
    SplitConfig,
    StatsConfig,
    StudyConfig,
    SubsampleConfig,
    SweepConfig,
    TokenizerConfig,
    TuneConfig,
    UnitsConfig,
    check_keys,
    check_required,
    from_dict,
    normalize,
    register_configs,
    to_dict,
)
from ._tuning import (
    EQUAL_BUDGETS,
    TRAIN_FRACTION,
    apply_equal_budget,
    expand_tuning,
    model_where,
    tune_settings,
)

__all__ = [
    "CONF_DIR",
    "DVC_FILE",
    "EQUAL_BUDGETS",
    "LOCK_FILE",
    "LOG_DIR",
    "METRICS_FILE",
    "MIN_BOOT",
    "NAME_PATTERN",
    "PARAMS_DIGEST_ENV",
    "PARAMS_FILE",
    "PIPELINE_DIR",
    "WDIR_TO_ROOT",
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
    "SubsampleConfig",
    "TRAIN_FRACTION",
    "StatsConfig",
    "StudyConfig",
    "SweepConfig",
    "TokenizerConfig",
    "TuneConfig",
    "UnitsConfig",
    "apply_equal_budget",
    "candidate_name",
    "cell_dir",
    "check_file_types",
    "check_rank",
    "check_keys",
    "check_repo_path",
    "check_required",
    "check_source_values",
    "check_stats",
    "check_study",
    "compose",
    "compose_raw",
    "covered",
    "HOLDS",
    "check_sweep_budgets",
    "expand_sweeps",
    "expand_tuning",
    "fit_cells",
    "fit_stage_name",
    "fitted_seed",
    "from_dict",
    "grid_size",
    "ignores_seed",
    "load_params",
    "model_where",
    "normalize",
    "order_dir",
    "params_digest",
    "params_text",
    "parse",
    "rank_candidates",
    "rank_grid",
    "rank_proxy",
    "rank_reference",
    "register_configs",
    "reorder_stage_name",
    "resolve_plugins",
    "seeds_paired",
    "resolved_params",
    "to_dict",
    "tune_settings",
    "units_dir",
    "units_stage_name",
]

#: the sha256 of the params.yaml a run composed, passed to the stage processes it starts
PARAMS_DIGEST_ENV = "RETROGRADE_PARAMS_SHA256"
_PARAMS_HEADER = (
    "# Composed by `retrograde run` from conf/retrograde/; edit the config, not this.\n"
)


def parse(raw: dict[str, Any]) -> RetrogradeConfig:
    """A composed raw dict as a typed config: ``_target_`` normalized, keys and types checked."""
    from omegaconf import OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    raw = normalize(raw)
    check_keys(raw)
    check_required(raw)
    try:
        merged = OmegaConf.merge(OmegaConf.structured(RetrogradeConfig), raw)
        container = OmegaConf.to_container(merged, resolve=True)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", "") or "?"
        raise ConfigError(
            f"config key {key!r}: {first_line(exc)}; fix it in conf/retrograde or the override"
        ) from exc
    assert isinstance(container, dict)
    return from_dict(RetrogradeConfig, container)  # type: ignore[arg-type]


def compose(
    root: str | os.PathLike[str], overrides: Sequence[str] = (), *, conf_dir: Path | None = None
) -> RetrogradeConfig:
    """The validated, resolved config for the host at ``root`` (nothing is written).

    Raises :class:`~retrograde.errors.ConfigError` (one line) on any bad key or value.
    """
    root = Path(root).resolve()
    config = parse(compose_raw(conf_dir or root / CONF_DIR, overrides))
    expand_sweeps(config.study)
    expand_tuning(config.study)
    apply_equal_budget(config.study)
    check_study(config.study)
    check_stats(config.stats)
    resolve_plugins(config.study, root)
    check_sweep_budgets(config.study)
    config.fits = fit_cells(config.study)
    return config


def params_text(config: RetrogradeConfig) -> str:
    """The text of ``params.yaml``: a header line, then the config as plain YAML."""
    import yaml

    body = yaml.safe_dump(config.to_dict(), sort_keys=False, default_flow_style=False)
    return _PARAMS_HEADER + body


def params_digest(path: str | os.PathLike[str]) -> str:
    """sha256 of a params file's bytes (empty string when it does not exist)."""
    import hashlib

    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except FileNotFoundError:
        return ""


def load_params(folder: str | os.PathLike[str] = ".") -> RetrogradeConfig:
    """The composed ``params.yaml`` in ``folder`` as a typed config (no Hydra, no OmegaConf)."""
    import yaml

    path = Path(folder) / "params.yaml"
    if not path.is_file():
        raise HostRepoError(f"{path} not found; compose it with `retrograde run`")
    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
    data = yaml.load(path.read_text(encoding="utf-8"), Loader=loader)
    return from_dict(RetrogradeConfig, data)
