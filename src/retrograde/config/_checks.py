"""One rule per parameter, used when the config is composed and again when a stage runs.

Each rule is a function of the typed config; composition calls every one before any work,
and a stage calls the ones for what it reads, so a value that passes ``retrograde run
--dry`` also passes the stage (and the other way round).
"""

from __future__ import annotations

from ..data import check_fractions, check_units
from ..errors import ConfigError
from ..stats import INTERVALS
from ..validation import check_choice, check_float, check_int, did_you_mean
from ._schema import SourceConfig, StatsConfig, StudyConfig

__all__ = ["MIN_BOOT", "check_source_values", "check_stats", "check_study"]

#: fewest bootstrap replicates: percentile intervals need a few in each tail
MIN_BOOT = 10


def check_stats(stats: StatsConfig) -> None:
    """``stats.*``: the interval level and kind, bootstrap size and seed, the profile's buckets."""
    check_float("stats", "level", stats.level, 0.0, 1.0, low_open=True, high_open=True)
    check_choice("stats", "interval", stats.interval, INTERVALS)
    check_int("stats", "n_boot", stats.n_boot, MIN_BOOT)
    check_int("stats", "seed", stats.seed, 0)
    check_int("stats", "position_buckets", stats.position_buckets, 1)


def check_study(study: StudyConfig) -> None:
    """``study.*`` as a whole: non-empty groups, distinct seeds, a known reference order."""
    for group in ("sources", "orders", "models"):
        if not getattr(study, group):
            raise ConfigError(
                f"study.{group} is empty; allowed: at least one entry (see docs/config.md)"
            )
    _check_seeds("study", study.seeds)
    for name, model in study.models.items():
        where = f"study.models.{name}"
        if model.seeds is not None:
            _check_seeds(where, model.seeds)
        for source in model.sources if model.sources is not None else []:
            if source not in study.sources:
                raise ConfigError(
                    f"{where}: parameter sources={model.sources!r} names {source!r}, which is "
                    f"not a source{did_you_mean(source, study.sources)}; allowed: names from "
                    f"study.sources ({', '.join(study.sources)})"
                )
        fraction = model.train_fraction
        if isinstance(fraction, bool) or not 0.0 < float(fraction) <= 1.0:
            raise ConfigError(
                f"{where}: train_fraction={fraction!r} is invalid; allowed: a number with "
                "0 < value <= 1 (the share of the training units the fit uses)"
            )
        if model.sources is not None and not model.sources:
            raise ConfigError(f"{where}: parameter sources=[] is invalid; allowed: null or names")
    for source in study.sources:
        if not study.models_on(source):
            raise ConfigError(
                f"study.sources.{source} is fitted by no model (every model's sources leaves "
                "it out); drop the source or add it to a model's sources"
            )
    reference = study.reference_order
    if reference not in study.orders:
        raise ConfigError(
            f"study.reference_order={reference!r} is not among study.orders"
            f"{did_you_mean(reference, study.orders)}; allowed: one of "
            f"{', '.join(sorted(study.orders))}"
        )


def _check_seeds(where: str, seeds: list[int]) -> None:
    if not seeds or len(set(seeds)) != len(seeds):
        raise ConfigError(
            f"{where}: parameter seeds={seeds!r} is invalid; allowed: a non-empty list of "
            "distinct integers >= 0"
        )
    for seed in seeds:
        check_int(where, "seeds", seed, 0)


def check_source_values(name: str, source: SourceConfig, *, calibration: bool) -> None:
    """``study.sources.NAME``'s split, and its unit cutting or its generation."""
    where = f"study.sources.{name}"
    check_fractions(source.split.fractions, f"{where}.split")
    if source.subsample.max_units is not None:
        check_int(f"{where}.subsample", "max_units", source.subsample.max_units, 3)
    check_int(f"{where}.subsample", "seed", source.subsample.seed, 0)
    test_ids = source.split.test_ids
    if test_ids is not None and (not isinstance(test_ids, str) or not test_ids.strip()):
        raise ConfigError(
            f"{where}.split: parameter test_ids={test_ids!r} is invalid; allowed: null or a "
            "path (relative to the repository root) of a file of unit ids"
        )
    if calibration and test_ids is not None:
        raise ConfigError(
            f"{where}.split.test_ids: a calibration source generates its units, so no file "
            "can name them; remove test_ids (its units are split by their hash)"
        )
    if calibration:
        assert source.calibration is not None
        check_int(f"{where}.calibration", "n_units", source.calibration.n_units, 3)
        check_int(f"{where}.calibration", "seed", source.calibration.seed, 0)
    else:
        assert source.units is not None
        units = source.units
        check_units(units.mode, units.window, units.remainder, f"{where}.units")
