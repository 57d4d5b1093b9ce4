"""``retrograde rank``: the space of candidates, successive halving, the ranking and its sentence.

The end-to-end ranking on data whose best order is known by construction is in
``test_rank_e2e.py``; these tests are fast (no DVC).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from retrograde import SequenceSet
from retrograde.config import (
    ModelConfig,
    OrderConfig,
    RankConfig,
    RetrogradeConfig,
    ScreeningConfig,
    SourceConfig,
    StudyConfig,
    rank_candidates,
    rank_grid,
)
from retrograde.errors import ConfigError
from retrograde.host import screen, training_subset
from retrograde.report import RANK_FIELDS, format_rank, rank_rows, recommendation


def config_with(space=None, **rank) -> RetrogradeConfig:
    study = StudyConfig(
        sources={"s": SourceConfig(name="markov")},
        orders={"forward": OrderConfig(name="forward"), "mine": OrderConfig(name="reverse")},
        models={"m": ModelConfig(family="ngram", params={"order": 2})},
        seeds=[0, 1],
    )
    rank = {"source": "s", "model": "m", "top_k": 1, **rank}
    block = RankConfig(space=space or {}, **rank)
    return RetrogradeConfig(study=study, rank=block)


# ------------------------------------------------------------------------------ the space
def test_every_combination_of_the_space_is_one_named_resolved_candidate():
    found = rank_candidates(
        config_with({"block_reverse": {"size": [2, 4]}, "stride": {"step": [3]}, "reverse": {}})
    )
    assert list(found) == ["block_reverse_size2", "block_reverse_size4", "stride_step3", "reverse"]
    assert found["block_reverse_size4"].name == "block_reverse"
    assert found["block_reverse_size4"].params == {"size": 4}
    assert found["stride_step3"].package_version  # resolved like a study order


def test_custom_orders_join_by_their_study_name_and_the_reference_is_never_a_candidate():
    found = rank_candidates(
        config_with({"forward": {}, "rotate": {"shift": [1]}}, orders=["mine"], top_k=2)
    )
    assert list(found) == ["rotate_shift1", "mine"]  # forward is the reference itself


def test_the_confirmation_grid_is_the_reference_and_the_chosen_candidates_as_fit_cells():
    config = config_with({"rotate": {"shift": [1, 2]}})
    found = rank_candidates(config)
    grid = rank_grid(config, {"rotate_shift2": found["rotate_shift2"]})
    assert list(grid.study.orders) == ["forward", "rotate_shift2"]
    assert grid.cells() == [
        ("s", "m", "forward", 0),
        ("s", "m", "forward", 1),
        ("s", "m", "rotate_shift2", 0),
        ("s", "m", "rotate_shift2", 1),
    ]
    # The model entry is the study's own, so a cell `run` fitted is the same DVC cell.
    assert grid.study.models["m"] == config.study.models["m"]


@pytest.mark.parametrize(
    ("space", "rank", "expected"),
    [
        ({"bogus": {}}, {}, "rank.space.bogus"),
        ({"block_reverse": {"size": 4}}, {}, "rank.space.block_reverse.size=4"),
        ({"block_reverse": {"size": []}}, {}, "a non-empty list"),
        ({"block_reverse": {"width": [2]}}, {}, "has no parameter 'width'"),
        ({"block_reverse": {"size": [0]}}, {}, "size"),
        ({"reverse": {}}, {"top_k": 2}, "rank.top_k=2 is more than the 1 candidates"),
        ({"reverse": {}}, {"top_k": 0}, "top_k"),
        ({"forward": {}}, {}, "no candidate besides the reference order"),
        ({"reverse": {}}, {"source": "nope"}, "rank.source='nope'"),
        ({"reverse": {}}, {"model": "nope"}, "rank.model='nope'"),
        ({"reverse": {}}, {"orders": ["nope"]}, "rank.orders='nope'"),
        ({"reverse": {}}, {"reference_order": "nope"}, "rank.reference_order='nope'"),
        ({"reverse": {}}, {"screening": ScreeningConfig(eta=1)}, "eta"),
        ({"reverse": {}}, {"screening": ScreeningConfig(min_fraction=0.0)}, "min_fraction"),
    ],
)
def test_a_bad_rank_block_is_one_line_naming_the_key(space, rank, expected):
    with pytest.raises(ConfigError) as caught:
        rank_candidates(config_with(space, **rank))
    message = str(caught.value)
    assert expected in message
    assert "\n" not in message


def test_list_valued_parameters_name_candidates_readably():
    # A field-permutation order (records) joins a space as any registered order does.
    from retrograde.config import candidate_name

    assert candidate_name("fields", {"fields": ["total", "a", "b"]}) == "fields_fieldstotal_a_b"
    assert candidate_name("rotate", {"shift": -2}) == "rotate_shiftm2"
    assert candidate_name("segment_reverse", {"separators": [0, 5]}) == (
        "segment_reverse_separators0_5"
    )


def test_the_rank_may_measure_against_another_study_order():
    config = config_with({"rotate": {"shift": [1]}}, reference_order="mine")
    grid = rank_grid(config, rank_candidates(config))
    assert grid.study.reference_order == "mine"
    assert list(grid.study.orders) == ["mine", "rotate_shift1"]


def test_a_candidate_may_not_take_the_name_of_a_different_study_order():
    config = config_with({"rotate": {"shift": [2]}})
    config.study.orders["rotate_shift2"] = OrderConfig(name="rotate", params={"shift": 5})
    with pytest.raises(ConfigError, match="rename that study order"):
        rank_candidates(config)
    config.study.orders["rotate_shift2"] = OrderConfig(name="rotate", params={"shift": 2})
    assert list(rank_candidates(config)) == ["rotate_shift2"]  # the same order: shared


def test_a_config_without_a_rank_block_says_how_to_add_one():
    config = config_with({"reverse": {}})
    config.rank = None
    with pytest.raises(ConfigError, match=r"\+rank=NAME"):
        rank_candidates(config)


def test_the_rank_block_is_never_written_to_params_yaml():
    assert "rank" not in config_with({"reverse": {}}).to_dict()


# -------------------------------------------------------------------- successive halving
def _units(n_units: int, seed: int) -> SequenceSet:
    rng = np.random.default_rng(seed)
    return SequenceSet.from_list(
        [rng.integers(0, 4, size=int(rng.integers(3, 9))) for _ in range(n_units)], vocab_size=4
    )


def test_training_subsets_are_nested_and_seeded():
    train = _units(40, 0)
    small, large = training_subset(train, 0.25, 3), training_subset(train, 0.5, 3)
    assert (len(small), len(large)) == (10, 20)
    rows = {tuple(large[i].tolist()) for i in range(len(large))}
    assert all(tuple(small[i].tolist()) in rows for i in range(len(small)))
    assert training_subset(train, 0.25, 3).tokens.tolist() == small.tokens.tolist()


def test_successive_halving_keeps_a_fraction_eta_and_multiplies_the_data_by_eta(tmp_path):
    # Successive halving as in Li et al., "Hyperband", JMLR 18 (2018), Algorithm 1, inner
    # loop: round i scores n * eta^-i configurations with budget r * eta^i (from memory).
    candidates = {
        f"rotate_shift{s}": OrderConfig(name="rotate", params={"shift": s}) for s in range(1, 9)
    }
    splits = {"train": _units(64, 1), "valid": _units(16, 2)}
    proxy = ModelConfig(family="ngram", params={"order": 2})
    rounds = screen(
        candidates,
        ("forward", OrderConfig(name="forward")),
        proxy,
        splits,
        top_k=1,
        eta=2,
        min_fraction=0.25,
        seed=0,
        cache_dir=tmp_path,
    )
    assert [r.train_units for r in rounds] == [16, 32, 64]
    assert [len(r.bits_per_token) - 1 for r in rounds] == [8, 4, 2]  # the reference beside
    assert [len(r.kept) for r in rounds] == [4, 2, 1]
    for before, after in zip(rounds, rounds[1:], strict=False):
        best = sorted(before.kept)
        assert sorted(after.bits_per_token) == sorted([*best, "forward"])
        scores = before.bits_per_token
        dropped = set(candidates) & set(scores) - set(before.kept)
        assert max(scores[n] for n in before.kept) <= min(scores[n] for n in dropped)
    # 8 + 4 + 2 candidate fits and one reference fit per round, each cached once.
    assert len(list(tmp_path.glob("*.json"))) == 17


def test_a_cached_screening_fit_is_not_fitted_again(tmp_path, monkeypatch):
    candidates = {
        "reverse": OrderConfig(name="reverse"),
        "rotate_shift1": OrderConfig(name="rotate", params={"shift": 1}),
    }
    splits = {"train": _units(32, 1), "valid": _units(8, 2)}
    proxy = ModelConfig(family="ngram", params={"order": 2})
    reference = ("forward", OrderConfig(name="forward"))
    kwargs = {"top_k": 1, "eta": 2, "min_fraction": 0.5, "seed": 0, "cache_dir": tmp_path}
    first = screen(candidates, reference, proxy, splits, **kwargs)
    from retrograde import families

    def refuse(*args, **kwargs):
        raise AssertionError("a cached fit was fitted again")

    monkeypatch.setattr(families, "make", refuse)
    again = screen(candidates, reference, proxy, splits, **kwargs)
    assert [r.to_dict() for r in again] == [r.to_dict() for r in first]


# ---------------------------------------------------------------- ranking and sentence
def _leaf(gap: float, low: float, high: float, significant: bool) -> dict:
    return {
        "bits_per_token": 1.0 + gap / 100,
        "gap_pct": gap,
        "gap_pct_simultaneous_low": low,
        "gap_pct_simultaneous_high": high,
        "significant": significant,
        "p_value_holm": 0.001 if significant else 0.5,
    }


def test_rows_are_best_first_with_exactly_the_json_fields():
    leaves = {
        "forward": {"bits_per_token": 1.0, "gap_pct": 0.0},
        "a": _leaf(3.0, 1.0, 5.0, True),
        "b": _leaf(-4.0, -6.0, -2.0, True),
        "c": _leaf(-1.0, -3.0, 1.0, False),
    }
    rows = rank_rows(leaves, "forward")
    assert [r["order"] for r in rows] == ["b", "c", "a"]
    result = {
        "ranking": rows,
        "reference_order": "forward",
        "leaves": leaves,
        "source": "s",
        "model": "m",
        "screening": {
            "proxy": {"family": "ngram"},
            "rounds": [{"bits_per_token": {}, "train_units": 4, "kept": ["b"]}],
        },
        "recommendation": "x",
    }
    listed = json.loads(format_rank(result, "json"))
    assert [tuple(entry) for entry in listed] == [RANK_FIELDS] * 3
    assert listed[0] == {
        "order": "b",
        "gap_pct": -4.0,
        "gap_pct_low": -6.0,
        "gap_pct_high": -2.0,
        "significant": True,
    }
    assert "| 1 | `b` |" in format_rank(result, "markdown")


def test_the_recommendation_names_the_best_and_whether_the_runner_up_is_distinguishable():
    overlapping = rank_rows(
        {"f": {}, "a": _leaf(-5.0, -7.0, -3.0, True), "b": _leaf(-4.0, -6.0, -2.0, True)}, "f"
    )
    text = recommendation(overlapping, "f", level=0.95, n_candidates=5)
    assert text.startswith("Train in order `a`")
    assert "not clearly better than `b`" in text
    lead = rank_rows(
        {"f": {}, "a": _leaf(-5.0, -7.0, -3.0, True), "b": _leaf(-2.0, -4.0, 1.0, False)}, "f"
    )
    text = recommendation(lead, "f", level=0.95, n_candidates=2)
    assert "the only candidate the test separates from the reference" in text
    assert "its lead over them is not established" in text
    apart = rank_rows(
        {"f": {}, "a": _leaf(-9.0, -10.0, -8.0, True), "b": _leaf(-4.0, -6.0, -2.0, True)}, "f"
    )
    assert "clear best" in recommendation(apart, "f", level=0.95, n_candidates=2)


def test_the_recommendation_says_when_no_order_is_distinguishable_from_the_reference():
    rows = rank_rows(
        {"f": {}, "a": _leaf(-0.5, -2.0, 1.0, False), "b": _leaf(0.4, -1.0, 2.0, False)}, "f"
    )
    text = recommendation(rows, "f", level=0.95, n_candidates=4)
    assert "no order is distinguishable from the reference" in text
    assert text.startswith("Keep the reference order `f`")
    worse = rank_rows({"f": {}, "a": _leaf(6.0, 2.0, 9.0, True)}, "f")
    text = recommendation(worse, "f", level=0.95, n_candidates=1)
    assert (
        "no candidate is distinguishably better" in text and "`a` is distinguishably worse" in text
    )


def test_a_proxy_that_crashes_is_one_line_naming_the_screening_fit(tmp_path, monkeypatch):
    from retrograde import families
    from retrograde.errors import FitError

    class Broken:
        def fit_logprobs(self, *args, **kwargs):
            raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(families, "make", lambda *args, **kwargs: Broken())
    proxy = ModelConfig(family="ngram", params={"order": 2})
    with pytest.raises(
        FitError, match=r"rank.proxy: screening fit of 'ngram' in order forward {} on 8 training"
    ):
        screen(
            {"reverse": OrderConfig(name="reverse")},
            ("forward", OrderConfig(name="forward")),
            proxy,
            {"train": _units(8, 1), "valid": _units(4, 2)},
            top_k=1,
            eta=2,
            min_fraction=1.0,
            seed=0,
            cache_dir=tmp_path,
        )
    assert not list(tmp_path.glob("*.json"))  # nothing cached for a failed fit
