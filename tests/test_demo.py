"""`retrograde demo`: the full demo study end to end in a throwaway host repository.

The grid is the one a new user runs (`make demo`), so this is the suite's slowest test
(a few minutes on two cores); every other check reuses its result.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from retrograde.cli import main

pytestmark = [pytest.mark.dvc, pytest.mark.slow]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo") / "host"
    status = main(["demo", "--dir", str(folder)])
    assert status == 0
    return folder


def _metrics(folder: Path) -> dict:
    return json.loads((folder / "pipelines/retrograde/metrics.json").read_text())


def test_demo_host_has_its_own_stage_writing_the_invented_corpus(demo):
    assert "write_corpus" in (demo / "dvc.yaml").read_text()
    assert (demo / "data/corpus.txt").read_text().startswith("INVENTED DEMO DATA")


def test_demo_table_covers_the_whole_grid(demo):
    table = _metrics(demo)
    assert sorted(table) == ["automaton", "corpus", "linear_gf2", "markov"]
    for source in table.values():
        assert sorted(source) == ["mlp", "ngram"]
        for model in source.values():
            assert sorted(model) == ["block4", "forward", "reverse"]
            assert model["reverse"]["seeds"] == 3


def test_symmetric_markov_null_has_a_reverse_interval_containing_zero(demo):
    # A stationary Markov chain read backwards is again a Markov chain with the same
    # entropy rate (Cover & Thomas, Elements of Information Theory, Thm 4.2.4 and the
    # time-reversed chain), so the true reverse gap is 0.
    leaf = _metrics(demo)["markov"]["ngram"]["reverse"]
    assert leaf["gap_pct_low"] <= 0 <= leaf["gap_pct_high"]


def test_sparse_linear_map_is_harder_backwards_for_the_mlp(demo):
    # y = A x with sparse rows is a local function of x; read backwards, x = A^-1 y needs
    # the denser inverse, so the reverse order costs more (interval strictly above 0).
    leaf = _metrics(demo)["linear_gf2"]["mlp"]["reverse"]
    assert leaf["gap_pct"] > 0 and leaf["gap_pct_low"] > 0


def test_demo_writes_report_and_plots(demo):
    pipeline = demo / "pipelines/retrograde"
    report = (pipeline / "report.md").read_text()
    assert "cautions" in report.lower() and "## Data and budget" in report
    # the per-seed CSV: one row per fit cell (4 sources x 2 models x 3 orders x 3 seeds)
    assert len((pipeline / "cells.csv").read_text().splitlines()) == 1 + 72
    for name in ("gaps.png", "learning_curves.png", "position_profile.png"):
        assert (pipeline / "plots" / name).stat().st_size > 0


def test_second_demo_run_reruns_nothing(demo, capsys):
    before = (demo / "pipelines/retrograde/metrics.json").read_bytes()
    assert main(["demo", "--dir", str(demo)]) == 0
    captured = capsys.readouterr()
    assert "retrograde: 0 stages ran" in captured.err
    assert "report.md" in captured.out
    assert (demo / "pipelines/retrograde/metrics.json").read_bytes() == before


def test_demo_refuses_a_folder_it_did_not_make(tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("mine\n")
    assert main(["demo", "--dir", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "was not made by `retrograde demo`" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]
