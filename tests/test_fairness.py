"""Fair comparisons: tuning trials per order (picked on validation), budgets held equal and
stated, and the data-size sweep (train_fraction) with nested subsamples."""

from __future__ import annotations

import csv
import io
import itertools
import json
import shutil
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from retrograde import stats
from retrograde.config import TuneConfig, compose, load_params, tune_settings
from retrograde.data import SequenceSet, nested_subsample
from retrograde.errors import ConfigError
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage
from test_stages import CORPUS, _write_params


@pytest.fixture
def root(tmp_path: Path) -> Path:
    """A host root with the packaged conf and a corpus (nothing composed yet)."""
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, tmp_path / "host" / "conf" / "retrograde")
    (tmp_path / "host" / "data").mkdir()
    (tmp_path / "host" / "data" / "corpus.txt").write_text(CORPUS + "\n")
    return tmp_path / "host"


def _error(root: Path, overrides: list[str]) -> str:
    with pytest.raises(ConfigError) as info:
        compose(root, overrides)
    message = str(info.value)
    assert "\n" not in message
    return message


def run_grid(root: Path, overrides: list[str]) -> Path:
    """Compose, then run every stage of the grid in process; returns the wdir."""
    wdir = root / "pipelines" / "retrograde"
    wdir.mkdir(parents=True, exist_ok=True)
    config = compose(root, overrides)
    _write_params(wdir, config)
    for source in config.study.sources:
        assert units_stage.main(["--params", str(wdir), "--source", source]) == 0
        for order in config.study.orders:
            argv = ["--params", str(wdir), "--source", source, "--order", order]
            assert reorder_stage.main(argv) == 0
    for source, model, order, seed in config.cells():
        argv = ["--source", source, "--model", model, "--order", order, "--seed", str(seed)]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0
    return wdir


# ------------------------------------------------------------------ the search space
def test_tune_grid_is_the_whole_product_when_trials_cover_it():
    space = {"hidden": [8, 16, 32], "lr": [0.01, 0.001]}
    settings = tune_settings(TuneConfig(trials=6, space=space), "here")
    # Outside reference: the standard library's product, in the same (last fastest) order.
    expected = [
        dict(zip(space, values, strict=True)) for values in itertools.product(*space.values())
    ]
    assert settings == expected
    assert tune_settings(TuneConfig(trials=50, space=space), "here") == expected


def test_tune_sample_is_seeded_distinct_and_inside_the_space():
    space = {"a": list(range(10)), "b": list(range(10)), "c": [0, 1]}
    first = tune_settings(TuneConfig(trials=7, space=space, seed=3), "here")
    assert first == tune_settings(TuneConfig(trials=7, space=space, seed=3), "here")
    assert first != tune_settings(TuneConfig(trials=7, space=space, seed=4), "here")
    assert len(first) == 7 and len({tuple(s.values()) for s in first}) == 7
    grid = [dict(zip(space, v, strict=True)) for v in itertools.product(*space.values())]
    assert all(setting in grid for setting in first)
    # kept in grid order, so trial names follow the grid
    assert [grid.index(s) for s in first] == sorted(grid.index(s) for s in first)


def test_a_tuned_model_gets_every_trial_in_every_order_and_seed(root):
    config = compose(
        root,
        ["study=smoke", "+study.models.ngram.tune={trials: 3, space: {order: [1, 2, 3]}}"],
    )
    study = config.study
    tune = study.tuning["ngram"]
    assert tune.models == {f"ngram_tune{i}": {"order": i + 1} for i in range(3)}
    # The shared entry, all its fit stages read, is the same as without a search space:
    # adding or editing one refits trials only.
    untuned = compose(root, ["study=smoke"]).to_dict()["study"]["models"]["ngram"]
    assert config.to_dict()["study"]["models"]["ngram"] == untuned
    assert study.models["ngram_tune2"].params["order"] == 3
    assert study.trial_models() == set(tune.models)
    cells = set(config.cells())
    for trial in ["ngram", *tune.models]:
        for order in study.orders:
            for seed in study.seeds:
                assert ("corpus", trial, order, seed) in cells


def test_sweeps_combine_when_one_lies_within_another(root):
    config = compose(
        root,
        [
            "study=smoke",
            "+study.models.mlp={family: mlp, params: {window: 2, hidden: 4, epochs: 1}}",
            "+study.sweeps.context={model: mlp, parameter: window, values: [1, 2]}",
            "+study.sweeps.data={model: mlp, parameter: train_fraction, values: [0.5, 1.0], "
            "within: context}",
        ],
    )
    data = config.study.sweeps["data"]
    assert data.models == {
        "mlp_window1_train_fraction0p5": 0.5,
        "mlp_window1_train_fraction1p0": 1.0,
        "mlp_window2_train_fraction0p5": 0.5,
        "mlp_window2_train_fraction1p0": 1.0,
    }
    assert data.groups == {name: int(name[10]) for name in data.models}
    model = config.study.models["mlp_window2_train_fraction0p5"]
    assert model.train_fraction == 0.5 and model.params["window"] == 2


def test_equal_epochs_switch_off_early_stopping(root):
    grid = ["study=smoke", "+study.models.mlp={family: mlp, params: {epochs: 5}}"]
    config = compose(root, [*grid, "+study.equal_budget=epochs"])
    assert config.study.models["mlp"].params["patience"] == 5
    assert compose(root, grid).study.models["mlp"].params["patience"] == 3  # the default


@pytest.mark.parametrize(
    ("overrides", "expected"),
    [
        (["+study.models.ngram.tune={trials: 0, space: {order: [1]}}"], "trials=0"),
        (["+study.models.ngram.tune={trials: 2, space: {}}"], "tune.space is empty"),
        (["+study.models.ngram.tune={trials: 2, space: {order: []}}"], "tune.space.order=[]"),
        (
            ["+study.models.ngram.tune={trials: 2, space: {ordr: [1, 2]}}"],
            "study.models.ngram.tune (trial ngram_tune0",
        ),
        (["+study.models.ngram.tune={trials: 2, space: {order: [0, 2]}}"], "order"),
        (["+study.models.ngram.train_fraction=1.5"], "train_fraction=1.5 is invalid"),
        (
            ["+study.sweeps.data={model: ngram, parameter: train_fraction, values: [0, 1]}"],
            "study.sweeps.data.values: train_fraction=0 is invalid",
        ),
        (
            [
                "+study.sweeps.data={model: ngram, parameter: train_fraction, values: [1], within: ctx}"
            ],
            "study.sweeps.data.within='ctx' is not another sweep",
        ),
        (["+study.equal_budget=flops"], "study.equal_budget='flops' is invalid"),
        (
            ["+study.models.g={family: gru, params: {}}", "+study.equal_budget=train_tokens"],
            "study.models.g.params.token_budget is not set",
        ),
        (
            [
                "+study.models.g={family: gru, params: {token_budget: 500}}",
                "+study.equal_budget=epochs",
            ],
            "study.models.g.params.token_budget=500 ends training by tokens",
        ),
        (
            [
                "+study.models.mlp={family: mlp, params: {epochs: 5, patience: 2}}",
                "+study.equal_budget=epochs",
            ],
            "study.models.mlp.params.patience=2 stops early",
        ),
    ],
)
def test_bad_fairness_settings_are_one_line_errors(root, overrides, expected):
    assert expected in _error(root, ["study=smoke", *overrides])


# ------------------------------------------------------------------ nested subsamples
def test_subsamples_are_nested_seeded_and_shared_by_every_order():
    fractions = [0.0625, 0.125, 0.25, 0.5, 1.0]
    for seed in (0, 1):
        subsets = [set(nested_subsample(800, f, seed).tolist()) for f in fractions]
        assert [len(s) for s in subsets] == [50, 100, 200, 400, 800]
        assert all(a <= b for a, b in itertools.pairwise(subsets))
    assert not np.array_equal(nested_subsample(800, 0.25, 0), nested_subsample(800, 0.25, 1))


# ------------------------------------------------------------------ selection on validation
TUNED = [
    "source=[markov]",
    "study=smoke",
    "study.models.ngram.params.order=1",  # the shared setting: a unigram
    "+study.models.ngram.tune={trials: 2, space: {order: [1, 2]}}",
    "study.seeds=[0]",
    "stats.n_boot=50",
]


@pytest.fixture(scope="module")
def tuned(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("tuned") / "host"
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, root / "conf" / "retrograde")
    return run_grid(root, TUNED)


def _test_nats(wdir: Path, model: str, order: str) -> float:
    return -float(np.load(wdir / f"cells/markov/{model}/{order}/seed0/test_logprobs.npy").sum())


def test_each_order_picks_the_setting_that_is_best_by_construction(tuned):
    # A first-order Markov chain (and its time reversal, also first-order Markov) is
    # predicted better by a bigram (order 2) than by a unigram (order 1): every order's
    # best setting is order 2, known before any fit (common practice, no source).
    table = json.loads((tuned / "metrics.json").read_text())
    leaves = table["markov"]["ngram"]
    assert set(table["markov"]) == {"ngram"}  # trials are not rows of their own
    for order, leaf in leaves.items():
        assert leaf["tuned_params"] == {"order": 2} and leaf["tuned_model"] == "ngram_tune1"
        valid = json.loads(
            (tuned / f"cells/markov/ngram_tune1/{order}/seed0/valid.json").read_text()
        )
        assert leaf["valid_bits_per_token"] == pytest.approx(valid["bits_per_token"], rel=1e-5)
    # the tuned gap compares the tuned cells; the shared gap the unigram's, by the definition
    tuned_gap = 100 * (
        _test_nats(tuned, "ngram_tune1", "reverse") / _test_nats(tuned, "ngram_tune1", "forward")
        - 1
    )
    shared_gap = 100 * (
        _test_nats(tuned, "ngram", "reverse") / _test_nats(tuned, "ngram", "forward") - 1
    )
    reverse = leaves["reverse"]
    assert reverse["gap_pct"] == pytest.approx(tuned_gap, rel=1e-4, abs=1e-6)
    assert reverse["shared_gap_pct"] == pytest.approx(shared_gap, rel=1e-4, abs=1e-6)
    assert reverse["tuning_gap_change_pct"] == pytest.approx(tuned_gap - shared_gap, abs=1e-4)
    report = (tuned / "report.md").read_text()
    assert "## Tuning" in report and "order=2 (`ngram_tune1`)" in report
    rows = list(csv.DictReader(io.StringIO((tuned / "cells.csv").read_text())))
    assert {r["model"] for r in rows} == {"ngram", "ngram_tune0", "ngram_tune1"}


def test_the_choice_follows_validation_never_test(tuned, tmp_path):
    wdir = tmp_path / "copy"
    shutil.copytree(tuned, wdir)
    # Claim the unigram trial scored best on validation in the reverse order only; its test
    # loss stays worse, so a choice made on test would keep the bigram.
    path = wdir / "cells/markov/ngram_tune0/reverse/seed0/valid.json"
    claimed = json.loads(path.read_text()) | {"bits_per_token": 0.01}
    path.write_text(json.dumps(claimed))
    assert _test_nats(wdir, "ngram_tune0", "reverse") > _test_nats(wdir, "ngram_tune1", "reverse")
    assert table_stage.main(["--params", str(wdir)]) == 0
    leaves = json.loads((wdir / "metrics.json").read_text())["markov"]["ngram"]
    assert leaves["reverse"]["tuned_params"] == {"order": 1}
    assert leaves["forward"]["tuned_params"] == {"order": 2}


def test_a_trial_without_a_validation_score_is_named(tuned, tmp_path):
    wdir = tmp_path / "copy"
    shutil.copytree(tuned, wdir)
    (wdir / "cells/markov/ngram_tune0/forward/seed0/valid.json").unlink()
    with pytest.raises(Exception, match="ngram_tune0/forward/seed0 has no validation score"):
        table_stage.collect(wdir, load_params(wdir))


# ------------------------------------------------------------------ budgets
def test_orders_whose_budgets_differ_by_more_than_5_percent_are_named():
    table = {
        "s": {
            "m": {
                "forward": {
                    "gap_pct": 0.0,
                    "budget": {"train_tokens": 100, "steps": 10, "n_params": 7},
                },
                "reverse": {
                    "gap_pct": 1.0,
                    "budget": {"train_tokens": 130, "steps": 10, "n_params": 7},
                },
            }
        }
    }
    from retrograde.config import ModelConfig, StudyConfig

    study = StudyConfig(models={"m": ModelConfig(family="mlp")})
    lines = table_stage._budget_flags(table, "forward", study)
    assert table["s"]["m"]["reverse"]["budget_unequal"] == ["train_tokens"]
    assert len(lines) == 1 and "train_tokens by 30% (forward 100, reverse 130)" in lines[0]
    # an n-gram stores the types each order's data holds: its n_params is not a budget
    table["s"]["m"]["reverse"]["budget"] = {"train_tokens": 100, "steps": 10, "n_params": 9}
    assert len(table_stage._budget_flags(table, "forward", study)) == 1  # mlp: flagged
    ngram = StudyConfig(models={"m": ModelConfig(family="ngram")})
    assert table_stage._budget_flags(table, "forward", ngram) == []
    assert table["s"]["m"]["reverse"]["budget_unequal"] == []
    equal = {"forward": {"train_tokens": 100}, "reverse": {"train_tokens": 104}}
    assert stats.unequal_budgets(equal) == {}


# ------------------------------------------------------------------ data size, closed form
K_STATES = 4  # the markov source's vocab_size
LENGTH = 64  # its unit length
FRACTIONS = [0.0625, 0.125, 0.25, 0.5, 1.0]


def test_data_size_learning_curve_follows_the_closed_form():
    """A bigram on a first-order Markov chain: excess over the floor = A + B / U_train.

    Outside reference (a textbook second-order expansion, stated from memory): the maximum-
    likelihood (and add-constant) estimate of a K-outcome distribution from n draws has
    expected KL divergence (K - 1) / (2 n) + O(1/n^2) nats per prediction, because
    KL(p || p_hat) ~ 1/2 sum_i (p_hat_i - p_i)^2 / p_i and E (p_hat_i - p_i)^2 =
    p_i (1 - p_i) / n; for add-beta estimators see Braess & Sauer, "Bernstein polynomials
    and learning theory", J. Approx. Theory 128 (2004). Summed over the bigram's contexts
    (state s seen ~ pi_s * 64 U times, with K + 1 outcomes: the K states and the end marker;
    the begin marker seen U times, with K outcomes) the excess per test token is B / U
    with B = (K * K / 2 + (K - 1) / 2) / 64. A is what no bigram can learn: the end marker
    after every 64th token, -(63 ln(63/64) + ln(1/64)) / 64 nats per token (the floor gives
    the fixed length probability 1). Interpolated Kneser-Ney smoothing changes O(1/n^2)
    terms. The fits go through the fit stage's core with ``train_fraction`` (nested
    subsamples), 16 seeds a fraction so the chi-square spread of each fit averages out.
    """
    from retrograde import sources
    from retrograde.config import ModelConfig

    source = sources.make("markov", vocab_size=K_STATES, order=1, length=LENGTH, chain_seed=0)
    units = source.generate(2400, seed=0)
    train, valid, test = (
        units.subset(np.arange(a, b)) for a, b in ((0, 1600), (0, 0), (1600, 2400))
    )
    floor, n_tokens = float(source.nll(test).sum()), len(test.tokens)
    inverse_units, excess = [], []
    for fraction in FRACTIONS:
        spec = ModelConfig(
            family="ngram", params={"order": 2}, train_fraction=fraction, train_sample="none"
        )  # the subsample alone (no half-sample of it): round(fraction * U) units
        nats = [
            -fit_stage.fit_cell(spec, {"train": train, "valid": valid, "test": test}, seed=s)[
                1
            ].sum()
            for s in range(16 if fraction < 1 else 1)  # every seed trains on all units at 1.0
        ]
        inverse_units.append(1 / round(fraction * len(train)))
        excess.append((float(np.mean(nats)) - floor) / n_tokens)
    slope, intercept = np.polyfit(inverse_units, excess, 1)
    assert slope == pytest.approx((K_STATES * K_STATES / 2 + (K_STATES - 1) / 2) / LENGTH, rel=0.2)
    end_marker = -((LENGTH - 1) * np.log((LENGTH - 1) / LENGTH) + np.log(1 / LENGTH)) / LENGTH
    assert intercept == pytest.approx(end_marker, abs=5e-4)
    assert excess == sorted(excess, reverse=True)  # more data, less excess


@pytest.mark.slow
def test_data_size_sweep_runs_nested_subsamples_and_draws_them_against_training_tokens(tmp_path):
    root = tmp_path / "host"
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, root / "conf" / "retrograde")
    values = [0.0625, 0.25, 1.0]
    wdir = run_grid(
        root,
        [
            "source=[markov]",
            "study=smoke",
            "study.models.ngram.params.order=2",
            # the subsample alone: no half-sample of it (checked below by its own sizes)
            "++study.models.ngram.train_sample=none",
            f"+study.sweeps.data={{model: ngram, parameter: train_fraction, values: {values}}}",
            "study.seeds=[0,1]",
            "stats.n_boot=50",
        ],
    )
    table = json.loads((wdir / "metrics.json").read_text())["markov"]
    train = SequenceSet.load(wdir / "data/markov/units/train")
    names = [f"ngram_train_fraction{str(v).replace('.', 'p')}" for v in values]
    sweep = list(csv.DictReader(io.StringIO((wdir / "plots/sweep_data.csv").read_text())))
    for value, name in zip(values, names, strict=True):
        for order in ("forward", "reverse"):
            leaf = table[name][order]
            # a counting family reads its units once: tokens seen = subsample tokens + ends
            subsets = [train.subset(nested_subsample(len(train), value, s)) for s in (0, 1)]
            seen = np.mean([len(u.tokens) + len(u) for u in subsets])
            assert leaf["budget"]["train_tokens"] == pytest.approx(seen)
            drawn = [r for r in sweep if r["model"] == name and r["order"] == order]
            assert float(drawn[0]["x"]) == pytest.approx(np.mean([len(u.tokens) for u in subsets]))
    # sixteen times the data, less excess over the floor (about 0.002 bits, by the closed
    # form of the test above)
    for order in ("forward", "reverse"):
        small, full = (
            table[name][order]["excess_bits_per_token"] for name in (names[0], names[-1])
        )
        assert small - full > 0.001


def test_a_report_row_says_when_its_budget_differs_from_the_reference_orders():
    from retrograde.report import render_report

    def leaf(gap, tokens):
        zero = gap == 0
        return {
            "bits_per_token": 2.0,
            "gap_pct": gap,
            "gap_pct_low": 0.0 if zero else gap - 1,
            "gap_pct_high": 0.0 if zero else gap + 1,
            **({} if zero else {"p_value_holm": 0.5}),
            "budget": {"train_tokens": tokens, "steps": 10, "n_params": 7},
        }

    table = {
        "s": {"m": {"forward": leaf(0.0, 100), "reverse": leaf(2.0, 130), "rot": leaf(1.0, 102)}}
    }
    cells = [
        {"source": "s", "model": "m", "order": o, "train_tokens": t, "steps": 10, "n_params": 7}
        for o, t in (("forward", 100), ("reverse", 130), ("rot", 102))
    ]
    text = render_report(table, spans={}, provenance={}, warnings=[], figures=[], cells=cells)
    rows = {
        line.split("|")[2].strip(): line for line in text.splitlines() if line.startswith("| `m`")
    }
    assert rows["`reverse`"].endswith("| train_tokens +30.0% **(>5%)** |")
    assert rows["`rot`"].endswith("| train_tokens +2.0% |")
    assert rows["`forward`"].endswith("| reference |")


def test_a_sweep_within_another_draws_one_line_per_order_and_value_against_x():
    from retrograde.report import _plots as plots

    def leaf(gap):
        zero = gap == 0
        return {
            "bits_per_token": 1.0,
            "gap_pct": gap,
            "gap_pct_low": gap - (0 if zero else 1),
            "gap_pct_high": gap + (0 if zero else 1),
            **({} if zero else {"p_value_holm": 0.01, "significant": True}),
        }

    models = {
        f"m_w{w}_f{f}": {"forward": leaf(0.0), "reverse": leaf(w * f)}
        for w in (2, 4)
        for f in (1, 2)
    }
    sweep = {
        "source": "s",
        "parameter": "train_fraction",
        "models": {name: float(name[-1]) / 2 for name in models},
        "x": {name: 1000.0 * int(name[-1]) for name in models},
        "x_label": "training tokens (mean over seeds)",
        "groups": {name: int(name[3]) for name in models},
        "group_parameter": "window",
    }
    rows = plots.sweep_rows(sweep, {"s": models})
    assert {(r["group"], r["x"]) for r in rows} == {(w, 1000.0 * f) for w in (2, 4) for f in (1, 2)}
    figure = plots.sweep_figure("data", sweep, {"s": models})
    ax = figure.axes[0]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels == ["reverse (window 2)", "reverse (window 4)"]
    assert ax.get_xscale() == "log" and ax.get_xlabel() == "training tokens (mean over seeds)"


def test_docstring_examples_of_the_fairness_modules_run():
    import doctest

    import retrograde.config._tuning
    import retrograde.data._subsample
    import retrograde.stats._fairness

    for module in (
        retrograde.config._tuning,
        retrograde.data._subsample,
        retrograde.stats._fairness,
    ):
        failures, _ = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
        assert failures == 0, module.__name__


def test_a_difference_the_table_does_not_compare_is_shown_but_not_flagged():
    from retrograde.report._fairness import budget_vs_reference

    # an n-gram's n_params counts what each order's data holds: the table leaves it out of
    # budget_unequal (Family.parameters_follow_data), so the report shows it unflagged
    orders = {
        "forward": {
            **{"gap_pct": 0.0, "gap_pct_low": 0.0, "gap_pct_high": 0.0},  # the reference
            "budget": {"train_tokens": 100, "n_params": 100},
        },
        "reverse": {
            "gap_pct": 1.0,
            "p_value_holm": 0.5,
            "budget": {"train_tokens": 100, "n_params": 160},
            "budget_unequal": [],
        },
    }
    assert budget_vs_reference(orders, "reverse") == "n_params +60.0%"
    orders["reverse"]["budget_unequal"] = ["n_params"]  # a family whose size is a setting
    assert budget_vs_reference(orders, "reverse") == "n_params +60.0% **(>5%)**"
