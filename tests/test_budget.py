"""What each fit cost (budget.json), per-seed values (cells.csv) and the report's data and
budget section; every leaf of metrics.json holds the mean budget over its seeds."""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest

from retrograde import families
from retrograde.config import fitted_seed, load_params
from retrograde.data import SequenceSet, resample_train
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage
from retrograde.stages.fit import BUDGET_FIELDS, cell_budget
from test_stages import _host

GRID = [
    "study=smoke",
    "study.models.ngram.params.order=2",
    "+study.models.mlp={family: mlp, params: {window: 2, hidden: 8, epochs: 2, progress: false}}",
    "stats.n_boot=200",
]


@pytest.fixture(scope="module")
def pipeline(tmp_path_factory: pytest.TempPathFactory) -> Path:
    wdir = _host(tmp_path_factory.mktemp("budget") / "host", GRID)
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    for order in ("forward", "reverse"):
        assert (
            reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", order]) == 0
        )
        for model in ("ngram", "mlp"):
            for seed in ("0", "1"):
                argv = ["--source", "corpus", "--model", model, "--order", order, "--seed", seed]
                assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0
    return wdir


def budget(wdir: Path, model: str, order: str = "forward", seed: int = 0) -> dict:
    return json.loads((wdir / f"cells/corpus/{model}/{order}/seed{seed}/budget.json").read_text())


def test_every_cell_records_its_budget_under_the_agreed_names(pipeline):
    for model in ("ngram", "mlp"):
        found = budget(pipeline, model)
        assert (
            set(found)
            == set(BUDGET_FIELDS)
            == {
                "train_tokens",
                "steps",
                "cpu_s",
                "wall_s",
                "n_params",
            }
        )
        assert found["cpu_s"] >= 0 and found["wall_s"] >= 0


def test_ngram_budget_is_one_pass_over_the_training_positions_and_its_stored_counts(pipeline):
    # seed 0's half-sample of the training units (train_sample auto is half for an n-gram)
    train = resample_train(SequenceSet.load(pipeline / "data/corpus/orders/forward/train"), 0)
    found = budget(pipeline, "ngram")
    # one counting pass over every token and every end marker, by hand
    assert found["train_tokens"] == len(train.tokens) + len(train)
    assert found["steps"] is None  # counting, no optimizer
    model = families.load(pipeline / "cells/corpus/ngram/forward/seed0/model")
    assert found["n_params"] == model.n_parameters() > 0


def test_mlp_budget_counts_its_epochs_minibatches_and_weights(pipeline):
    train = SequenceSet.load(pipeline / "data/corpus/orders/forward/train")
    found = budget(pipeline, "mlp")
    model = families.load(pipeline / "cells/corpus/mlp/forward/seed0/model")
    epochs = len(model.learning_curve_)
    assert found["train_tokens"] == epochs * (len(train.tokens) + len(train))
    # a dense layer n_in -> n_out has n_in * n_out weights and n_out biases (common
    # practice, no source): one hidden layer of 8 units, V + 1 outputs
    n_in, n_out = model.coefs_[0].shape[0], model.coefs_[-1].shape[1]
    assert found["n_params"] == n_in * 8 + 8 + 8 * n_out + n_out
    # minibatches of at most batch_size events: at least ceil(events / batch) per epoch
    positions = len(train.tokens) + len(train)
    assert found["steps"] >= epochs * math.ceil(positions / model.batch_size)


def test_cell_budget_of_an_external_trainer_that_does_not_say_leaves_tokens_unknown():
    class Trainer:
        name = "command"

        def n_parameters(self):
            return None

    train = SequenceSet.from_list([[0, 1], [1]], vocab_size=2)
    found = cell_budget(Trainer(), train, [{"epoch": 1}], cpu_s=1.23456, wall_s=2.0)
    assert found == {
        "train_tokens": None,
        "steps": None,
        "cpu_s": 1.235,
        "wall_s": 2.0,
        "n_params": None,
    }
    said = cell_budget(Trainer(), train, [{"epoch": 1, "tokens_seen": 40}], cpu_s=0, wall_s=0)
    assert said["train_tokens"] == 40


def test_cells_csv_has_one_row_per_fit_with_per_seed_bits_gap_and_budget(pipeline):
    rows = list(csv.DictReader(io.StringIO((pipeline / "cells.csv").read_text())))
    assert len(rows) == 2 * 2 * 2  # models x orders x seeds
    study = load_params(pipeline).study
    test = SequenceSet.load(pipeline / "data/corpus/units/test")
    for row in rows:
        cell = f"cells/corpus/{row['model']}/{row['order']}/seed{row['seed']}"
        values = np.load(pipeline / cell / "test_logprobs.npy")
        reference = np.load(pipeline / cell.replace(row["order"], "forward") / "test_logprobs.npy")
        # per-seed bits per token and gap, from the cell files by the definitions
        assert float(row["bits_per_token"]) == pytest.approx(
            -values.sum() / math.log(2) / len(test.tokens), rel=1e-5
        )
        assert float(row["gap_pct"]) == pytest.approx(
            100 * (values.sum() / reference.sum() - 1), rel=1e-4, abs=1e-6
        )
        assert int(row["test_units"]) == len(test) and int(row["test_tokens"]) == len(test.tokens)
        # the budget of the cell holding this seed's results (each seed is a fit of its own:
        # the n-gram's seed chooses its half-sample)
        fitted = fitted_seed(study, row["model"], int(row["seed"]))
        assert fitted == int(row["seed"])
        assert row["wall_s"] == str(budget(pipeline, row["model"], row["order"], fitted)["wall_s"])


def test_report_shows_test_sizes_and_budget_and_every_leaf_its_mean_budget(pipeline):
    report = (pipeline / "report.md").read_text()
    test = SequenceSet.load(pipeline / "data/corpus/units/test")
    assert "## Data and budget" in report
    assert f"Test set: {len(test):,} units, {len(test.tokens):,} tokens" in report
    assert "| `mlp` | `forward` | 2 |" in report
    table = json.loads((pipeline / "metrics.json").read_text())
    for model in ("ngram", "mlp"):
        for order in ("forward", "reverse"):
            leaf = table["corpus"][model][order]
            seeds = [budget(pipeline, model, order, seed) for seed in (0, 1)]
            assert set(leaf["budget"]) == set(BUDGET_FIELDS)
            for field in BUDGET_FIELDS:
                values = [b[field] for b in seeds]
                if None in values:
                    assert leaf["budget"][field] is None
                else:  # the mean over seeds, by its definition
                    assert leaf["budget"][field] == pytest.approx(np.mean(values), abs=1e-3)
            # both orders train on the same positions for the same epochs: equal budgets
            assert leaf["budget_unequal"] == []


def test_the_table_is_byte_identical_when_regenerated_from_the_same_cells(pipeline):
    before = {
        name: (pipeline / name).read_bytes() for name in ("metrics.json", "report.md", "cells.csv")
    }
    assert table_stage.main(["--params", str(pipeline)]) == 0
    assert {name: (pipeline / name).read_bytes() for name in before} == before
