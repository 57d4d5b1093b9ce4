"""Under-trained models are flagged: worse than a bigram fitted on the same units, or a
validation curve still falling steeply at its end."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from retrograde import families
from retrograde.data import SequenceSet, resample_train
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage
from retrograde.stats import STEEP_FALL, still_falling, worse_than_baseline
from test_stages import _host

GRID = [
    "study=smoke",
    "~study.models.ngram",
    # a unigram cannot use context: worse than the bigram baseline on any structured text
    "+study.models.unigram={family: ngram, params: {order: 1}}",
    "+study.models.mlp={family: mlp, params: {window: 2, hidden: 4, epochs: 3, lr: 0.01,"
    " patience: 5, progress: false}}",
    "stats.n_boot=200",
]


@pytest.fixture(scope="module")
def pipeline(tmp_path_factory: pytest.TempPathFactory) -> Path:
    wdir = _host(tmp_path_factory.mktemp("flags") / "host", GRID)
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    for order in ("forward", "reverse"):
        assert (
            reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", order]) == 0
        )
        for model in ("unigram", "mlp"):
            for seed in ("0", "1"):
                argv = ["--source", "corpus", "--model", model, "--order", order, "--seed", seed]
                assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0
    return wdir


def curve(*values: float) -> list[dict]:
    return [{"epoch": i + 1, "valid_bits_per_token": v} for i, v in enumerate(values)]


def test_still_falling_means_the_last_epoch_beat_the_best_before_by_more_than_one_percent():
    # by hand: (2.30 - 2.25) / 2.25 = 2.2% > 1%; (2.30 - 2.29) / 2.29 = 0.44% < 1%
    assert STEEP_FALL == 0.01
    assert still_falling(curve(3.0, 2.6, 2.30, 2.25))
    assert not still_falling(curve(3.0, 2.6, 2.30, 2.29))
    assert not still_falling(curve(3.0, 2.2, 2.4, 2.25))  # early stopping kept epoch 2
    assert not still_falling(curve(2.5))  # one point: a counting family
    assert not still_falling([{"epoch": 1}, {"epoch": 2}])  # no validation scores


def test_worse_than_baseline_is_any_excess_on_the_same_units():
    assert worse_than_baseline(2.51, 2.50) and not worse_than_baseline(2.50, 2.50)


def test_the_table_flags_a_model_worse_than_the_bigram_baseline_and_names_it(pipeline):
    metrics = json.loads((pipeline / "metrics.json").read_text())
    folder = pipeline / "data/corpus/orders/forward"
    train, test = SequenceSet.load(folder / "train"), SequenceSet.load(folder / "test")
    # the baseline, refitted here: the package's KN n-gram (checked against NLTK in
    # tests/test_ngram.py) of order 2 on the reference order's training units; the unigram
    # (an n-gram: train_sample auto is half) trains each seed (0, 1 of the smoke study) on
    # its half-sample, so the bigram does too and its losses are averaged over the seeds
    nats = [
        -families.make("ngram", order=2)
        .fit(resample_train(train, seed))
        .logprobs(test)
        .values.sum()
        for seed in (0, 1)
    ]
    expected = sum(nats) / 2 / math.log(2) / len(test.tokens)
    unigram = metrics["corpus"]["unigram"]["forward"]
    assert unigram["baseline_bits_per_token"] == pytest.approx(expected, rel=1e-5)
    assert unigram["bits_per_token"] > expected and unigram["worse_than_baseline"] is True
    report = (pipeline / "report.md").read_text()
    warnings = report.split("> **Warnings**")[1].split("\n\n")[0]
    assert "model 'unigram' scores" in warnings
    assert "worse than a bigram (ngram order 2) fitted on the same training units" in warnings


def test_the_table_flags_a_model_whose_curves_still_fall_steeply(pipeline):
    metrics = json.loads((pipeline / "metrics.json").read_text())
    curves = [
        json.loads((pipeline / f"cells/corpus/mlp/{o}/seed{s}/curve.json").read_text())
        for o in ("forward", "reverse")
        for s in (0, 1)
    ]
    falling = sum(still_falling(c) for c in curves)
    assert falling > 0  # three short epochs: far from converged
    assert (
        metrics["corpus"]["mlp"]["forward"]["still_improving"]
        or metrics["corpus"]["mlp"]["reverse"]["still_improving"]
    )
    report = (pipeline / "report.md").read_text()
    assert f"model 'mlp': {falling} of 4 fits" in report
    assert "still falling by more than 1% per epoch" in report
    # the n-gram's one-point curve is never "still falling"
    assert metrics["corpus"]["unigram"]["forward"]["still_improving"] is False
