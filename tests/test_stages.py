"""Stage entry points run in-process on a laid-out pipeline folder (no DVC here)."""

from __future__ import annotations

import csv
import io
import json
import math
import shutil
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import yaml

from retrograde import families, sources
from retrograde.config import ModelConfig, RetrogradeConfig, compose, from_dict, load_params
from retrograde.data import Ragged, SequenceSet, tokenizers
from retrograde.errors import FitError, HostRepoError
from retrograde.families._base import Family
from retrograde.host import UNITS_BEGIN, UNITS_END, render_dvc_yaml
from retrograde.orders import Order
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage
from retrograde.stages.fit import fit_cell

LINES = ["the cat sat on the mat", "a dog ran far", "birds sing at dawn", "rain falls softly"]
CORPUS = "\n".join(f"{line} {i % 7}" for i in range(120) for line in LINES[i % 4 : i % 4 + 1])


class BrokenOrder(Order):
    """Not a bijection: every position reads the unit's first token."""

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        return np.repeat(units.offsets[:-1], units.lengths)


class CrashingFamily(Family):
    name = "crashing"

    def fit(self, train, valid=None, seed=0):
        raise RuntimeError("out of memory in layer 3")

    def logprobs(self, units):  # pragma: no cover - never reached
        raise NotImplementedError

    def next_token_probs(self, contexts):  # pragma: no cover - never reached
        raise NotImplementedError


def _host(root: Path, overrides: list[str]) -> Path:
    """A host folder with the packaged conf and a corpus; returns the wdir with params.yaml."""
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, root / "conf" / "retrograde")
    (root / "data").mkdir()
    (root / "data" / "corpus.txt").write_text(CORPUS + "\n")
    wdir = root / "pipelines" / "retrograde"
    wdir.mkdir(parents=True)
    _write_params(wdir, compose(root, overrides))
    return wdir


def _write_params(wdir: Path, params) -> None:
    plain = params if isinstance(params, dict) else params.to_dict()
    (wdir / "params.yaml").write_text(yaml.safe_dump(plain, sort_keys=False))


def _params(wdir: Path) -> dict:
    return yaml.safe_load((wdir / "params.yaml").read_text())


GRID = ["study=smoke", "study.models.ngram.params.order=2", "stats.n_boot=200"]


@pytest.fixture(scope="module")
def pipeline(tmp_path_factory) -> Path:
    """Every stage of a 1 source x 1 model x 2 orders x 2 seeds grid, run once."""
    wdir = _host(tmp_path_factory.mktemp("stages") / "host", GRID)
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    for order in ("forward", "reverse"):
        assert (
            reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", order]) == 0
        )
        for seed in ("0", "1"):
            argv = ["--source", "corpus", "--model", "ngram", "--order", order, "--seed", seed]
            assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0
    return wdir


# --------------------------------------------------------------------------------- units
def test_units_stage_cuts_one_unit_per_line_and_keeps_identical_lines_in_one_split(pipeline):
    units = {
        s: SequenceSet.load(pipeline / f"data/corpus/units/{s}") for s in ("train", "valid", "test")
    }
    # Reference: Python's own str.splitlines counts the lines (mode=line).
    assert sum(len(u) for u in units.values()) == len(CORPUS.splitlines())
    split_of_content: dict[bytes, set[str]] = {}
    for name, split in units.items():
        for unit in split:
            split_of_content.setdefault(unit.tobytes(), set()).add(name)
    assert all(len(names) == 1 for names in split_of_content.values())  # invariant 1
    info = json.loads((pipeline / "data/corpus/units/info.json").read_text())
    assert info["kind"] == "file" and info["n_units"]["train"] == len(units["train"])
    assert (pipeline / "data/corpus/units/tokenizer.json").is_file()
    assert info["vocab_size"] == units["train"].vocab_size


def test_units_stage_for_a_calibration_source_writes_exact_floors(tmp_path):
    wdir = _host(
        tmp_path / "host", ["source=[markov]", "study.sources.markov.calibration.n_units=60"]
    )
    assert units_stage.main(["--params", str(wdir), "--source", "markov"]) == 0
    folder = wdir / "data/markov/units"
    test = SequenceSet.load(folder / "test")
    params = _params(wdir)["study"]["sources"]["markov"]["params"]
    source = sources.make("markov", **params)
    np.testing.assert_allclose(np.load(folder / "floors.npy"), source.nll(test))
    # Reference (chain rule, Cover & Thomas, Elements of Information Theory, eq. 2.61):
    # the floor of a first-order chain unit is -log pi(x0) - sum_t log P(x_t | x_{t-1}),
    # with pi the stationary distribution (left eigenvector of P for eigenvalue 1, scipy).
    from scipy.linalg import eig

    transition = source.transition_
    values, vectors = eig(transition.T)
    stationary = np.real(vectors[:, np.argmin(np.abs(values - 1))])
    stationary /= stationary.sum()
    unit = test[0].astype(int)
    by_hand = -np.log(stationary[unit[0]]) - np.log(transition[unit[:-1], unit[1:]]).sum()
    assert np.load(folder / "floors.npy")[0] == pytest.approx(by_hand, rel=1e-9)
    info = json.loads((folder / "info.json").read_text())
    assert info["kind"] == "calibration" and sum(info["n_units"].values()) == 60


def test_units_stage_cuts_token_arrays_into_windows_and_keeps_a_declared_vocabulary(tmp_path):
    root = tmp_path / "host"
    wdir = _host(root, [])
    stream = np.random.default_rng(0).integers(0, 50, size=1003).astype(np.int32)
    np.save(root / "data" / "ids.npy", stream)
    overrides = [
        "study.sources.corpus.name=tokens",
        "study.sources.corpus.params.files=[data/ids.npy]",
        "~study.sources.corpus.params.split",
        "study.sources.corpus.deps=[data/ids.npy]",
        "study.sources.corpus.tokenizer=null",
        "study.sources.corpus.units.mode=window",
        "study.sources.corpus.units.window=10",
    ]
    _write_params(wdir, compose(root, overrides))
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    folder = wdir / "data/corpus/units"
    rows = [
        tuple(unit.tolist())
        for name in ("train", "valid", "test")
        for unit in SequenceSet.load(folder / name)
    ]
    # Reference: numpy's reshape of the stream into 100 windows, the last 3 ids dropped.
    expected = [tuple(row) for row in stream[:1000].reshape(100, 10).tolist()]
    assert sorted(rows) == sorted(expected)
    assert not (folder / "tokenizer.json").exists()
    assert SequenceSet.load(folder / "train").vocab_size == int(stream[:1000].max()) + 1

    # With the tokenizer's vocabulary size declared, every split carries it.
    _write_params(wdir, compose(root, [*overrides, "+study.sources.corpus.params.vocab_size=64"]))
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    assert {SequenceSet.load(folder / name).vocab_size for name in ("train", "test")} == {64}


# ------------------------------------------------------------------------------- reorder
def test_reorder_stage_reverses_every_unit_and_records_natural_positions(pipeline):
    natural = SequenceSet.load(pipeline / "data/corpus/units/test")
    folder = pipeline / "data/corpus/orders/reverse"
    reversed_units = SequenceSet.load(folder / "test")
    positions = np.load(folder / "positions_test.npy")
    for i in range(len(natural)):
        np.testing.assert_array_equal(reversed_units[i], np.flip(natural[i]))  # numpy reference
    np.testing.assert_array_equal(reversed_units.tokens, natural.tokens[positions])


def test_reorder_stage_refuses_an_order_that_is_not_a_bijection(pipeline, tmp_path, capsys):
    wdir = tmp_path / "wdir"
    shutil.copytree(pipeline / "data/corpus/units", wdir / "data/corpus/units")
    params = _params(pipeline)
    params["study"]["orders"]["broken"] = {"name": "test_stages.BrokenOrder", "params": {}}
    _write_params(wdir, params)
    status = reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", "broken"])
    err = capsys.readouterr().err
    assert status == 2 and len(err.strip().splitlines()) == 1
    assert "order 'broken' is not a bijection" in err
    assert not (wdir / "data/corpus/orders/broken").exists()  # nothing half-written


def _reorder_copy(pipeline: Path, wdir: Path, separators) -> int:
    shutil.copytree(pipeline / "data/corpus/units", wdir / "data/corpus/units")
    params = _params(pipeline)
    params["study"]["orders"]["words"] = {
        "name": "segment_reverse",
        "params": {"separators": separators},
    }
    _write_params(wdir, params)
    return reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", "words"])


def test_reorder_stage_looks_a_text_separator_up_in_the_source_vocabulary(pipeline, tmp_path):
    wdir = tmp_path / "wdir"
    assert _reorder_copy(pipeline, wdir, [" "]) == 0
    tokenizer = tokenizers.load(wdir / "data/corpus/units/tokenizer.json")
    natural = SequenceSet.load(wdir / "data/corpus/units/test")
    reordered = SequenceSet.load(wdir / "data/corpus/orders/words/test")
    for i in range(len(natural)):
        line = tokenizer.decode(natural[i])
        # Reference: Python's str.split / str.join (common practice, no source).
        assert tokenizer.decode(reordered[i]) == " ".join(reversed(line.split(" ")))


def test_reorder_stage_refuses_a_text_separator_outside_the_vocabulary(pipeline, tmp_path, capsys):
    wdir = tmp_path / "wdir"
    assert _reorder_copy(pipeline, wdir, ["#"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "study.orders.words on source 'corpus': separator '#' is not in the chars" in err
    assert not (wdir / "data/corpus/orders/words").exists()


# ----------------------------------------------------------------------------------- fit
def test_fit_stage_writes_model_scores_curve_and_log(pipeline):
    cell = pipeline / "cells/corpus/ngram/reverse/seed1"
    test = SequenceSet.load(pipeline / "data/corpus/orders/reverse/test")
    values = np.load(cell / "test_logprobs.npy", allow_pickle=False)
    assert values.dtype == np.float64 and values.shape == (len(test.tokens) + len(test),)
    assert np.all(values <= 0)
    # The saved model scores the same units to the same numbers.
    reloaded = families.load(cell / "model").logprobs(test)
    np.testing.assert_allclose(reloaded.values, values)
    assert isinstance(json.loads((cell / "curve.json").read_text()), list)
    assert "seed=1" in (cell / "fit.log").read_text()


def test_fit_cell_returns_a_json_ready_learning_curve_for_an_epoch_based_family():
    rng = np.random.default_rng(0)

    def units(n):
        rows = [rng.integers(0, 5, size=rng.integers(3, 9)) for _ in range(n)]
        return SequenceSet.from_list(rows, vocab_size=5)

    splits = {"train": units(60), "valid": units(10), "test": units(10)}
    spec = ModelConfig(family="mlp", params={"window": 2, "hidden": 8, "epochs": 2})
    _, values, curve = fit_cell(spec, splits, seed=0)
    assert [epoch["epoch"] for epoch in curve] == [1, 2]
    assert json.loads(json.dumps(curve)) == curve  # plain numbers only
    assert values.shape == (len(splits["test"].tokens) + len(splits["test"]),)


def test_fit_cell_runs_a_command_trainer_once_per_cell(tmp_path):
    from _trainers import counting_fit_command

    command, runs = counting_fit_command(tmp_path)
    rows = [[0, 1, 2], [2, 1], [1, 1, 0, 2]]
    splits = {
        name: SequenceSet.from_list(rows, vocab_size=3) for name in ("train", "valid", "test")
    }
    _, values, curve = fit_cell(
        ModelConfig(family="command", params={"command": command}), splits, seed=0
    )
    assert runs.read_text().splitlines() == ["run"]
    assert values.shape == (9 + 3,) and len(curve) == 1


def test_fit_crash_names_the_cell_and_keeps_its_log(pipeline, tmp_path, capsys):
    wdir = tmp_path / "wdir"
    shutil.copytree(pipeline / "data", wdir / "data")
    params = _params(pipeline)
    params["study"]["models"]["boom"] = {"family": "test_stages.CrashingFamily", "params": {}}
    _write_params(wdir, params)
    argv = ["--source", "corpus", "--model", "boom", "--order", "reverse", "--seed", "0"]
    status = fit_stage.main(["--params", str(wdir), *argv])
    err = capsys.readouterr().err.strip()
    assert status == 2 and len(err.splitlines()) == 1
    log = "pipelines/retrograde/cells/corpus/boom/reverse/seed0/fit.log"
    assert "cell corpus/boom/reverse/seed0 failed (RuntimeError: out of memory in layer 3)" in err
    assert err.endswith(f"see {log}")
    assert "Traceback" in (wdir / "cells/corpus/boom/reverse/seed0/fit.log").read_text()
    assert not (wdir / "cells/corpus/boom/reverse/seed0/test_logprobs.npy").exists()
    assert FitError.exit_status == status


def _fit_copy(pipeline: Path, wdir: Path, seed: str = "0") -> int:
    """Run one fit stage on a copy of the pipeline folder's data and params."""
    shutil.copytree(pipeline / "data", wdir / "data")
    _write_params(wdir, _params(pipeline))
    argv = ["--source", "corpus", "--model", "ngram", "--order", "reverse", "--seed", seed]
    return fit_stage.main(["--params", str(wdir), *argv])


def test_fit_log_that_is_a_symlink_out_of_the_repository_is_replaced_not_written_through(
    pipeline, tmp_path
):
    outside = tmp_path / "outside.txt"
    outside.write_text("precious\n")
    cell = tmp_path / "wdir/cells/corpus/ngram/reverse/seed0"
    cell.mkdir(parents=True)
    (cell / "fit.log").symlink_to(outside)
    assert _fit_copy(pipeline, tmp_path / "wdir") == 0
    assert outside.read_text() == "precious\n"
    assert not (cell / "fit.log").is_symlink() and "seed=0" in (cell / "fit.log").read_text()


def test_a_cell_folder_that_is_a_symlink_out_of_the_pipeline_is_refused(pipeline, tmp_path, capsys):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (tmp_path / "wdir/cells/corpus/ngram/reverse").mkdir(parents=True)
    (tmp_path / "wdir/cells/corpus/ngram/reverse/seed0").symlink_to(outside)
    assert _fit_copy(pipeline, tmp_path / "wdir") == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "leads outside" in err and "symbolic link" in err
    assert list(outside.iterdir()) == []


# --------------------------------------------------------------------------------- table
def _unit_totals(wdir: Path, order: str, seeds=(0, 1)) -> np.ndarray:
    """(n_seeds, n_units) nats per test unit, straight from the cell files."""
    test = SequenceSet.load(wdir / "data/corpus/units/test")
    offsets = np.concatenate([[0], np.cumsum(test.lengths + 1)])
    rows = []
    for seed in seeds:
        values = np.load(wdir / f"cells/corpus/ngram/{order}/seed{seed}/test_logprobs.npy")
        rows.append(-Ragged(values, offsets).sums())
    return np.stack(rows)


def test_table_matches_the_definitions_of_bits_per_token_and_gap(pipeline):
    metrics = json.loads((pipeline / "metrics.json").read_text())
    leaves = metrics["corpus"]["ngram"]
    n_tokens = len(SequenceSet.load(pipeline / "data/corpus/units/test").tokens)
    forward = _unit_totals(pipeline, "forward").mean(axis=0).sum()
    reverse = _unit_totals(pipeline, "reverse").mean(axis=0).sum()
    # DESIGN.md vocabulary: bits per token = total nats / ln 2 / real tokens (common practice,
    # no source); gap = 100 * (NLL_order / NLL_reference - 1).
    assert leaves["forward"]["bits_per_token"] == pytest.approx(
        forward / math.log(2) / n_tokens, rel=1e-5
    )
    assert leaves["reverse"]["gap_pct"] == pytest.approx(
        100 * (reverse / forward - 1), rel=1e-4, abs=1e-6
    )
    assert leaves["forward"]["gap_pct"] == 0
    assert (
        leaves["reverse"]["gap_pct_low"]
        <= leaves["reverse"]["gap_pct"]
        <= leaves["reverse"]["gap_pct_high"]
    )
    assert (pipeline / "report.md").is_file() and any((pipeline / "plots").iterdir())


def test_table_is_byte_identical_when_rerun(pipeline):
    before = (pipeline / "metrics.json").read_bytes()
    assert table_stage.main(["--params", str(pipeline)]) == 0
    assert (pipeline / "metrics.json").read_bytes() == before


def test_table_reads_only_the_cells_the_grid_names(pipeline, tmp_path):
    wdir = tmp_path / "wdir"
    shutil.copytree(pipeline / "data", wdir / "data")
    shutil.copytree(pipeline / "cells", wdir / "cells")
    params = _params(pipeline)
    # The reverse cells stay on disk (as after shrinking the grid) but the grid drops them.
    del params["study"]["orders"]["reverse"]
    _write_params(wdir, params)
    assert table_stage.main(["--params", str(wdir)]) == 0
    metrics = json.loads((wdir / "metrics.json").read_text())
    assert list(metrics["corpus"]["ngram"]) == ["forward"]


def test_table_names_a_missing_cell_and_how_to_fit_it(pipeline, tmp_path, capsys):
    wdir = tmp_path / "wdir"
    shutil.copytree(pipeline / "data", wdir / "data")
    shutil.copytree(pipeline / "cells", wdir / "cells")
    shutil.rmtree(wdir / "cells/corpus/ngram/reverse/seed0")  # the n-gram's one fit
    _write_params(wdir, _params(pipeline))
    assert table_stage.main(["--params", str(wdir)]) == 2
    err = capsys.readouterr().err
    assert "cell corpus/ngram/reverse/seed0 has no results" in err and "retrograde run" in err


def test_a_model_that_ignores_the_seed_is_read_from_its_one_fit_for_every_seed(tmp_path):
    # train_sample none: the n-gram's fit is a function of the training units alone. Fitted
    # stage by stage with seeds 0 and 1 it gives the same bytes, so reading seed 0's cell
    # for seed 1 (what the pipeline's single fit stage gives the table) changes no number.
    wdir = _host(tmp_path / "host", [*GRID, "++study.models.ngram.train_sample=none"])
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    for order in ("forward", "reverse"):
        argv = ["--params", str(wdir), "--source", "corpus", "--order", order]
        assert reorder_stage.main(argv) == 0
        for seed in ("0", "1"):
            argv = ["--source", "corpus", "--model", "ngram", "--order", order, "--seed", seed]
            assert fit_stage.main(["--params", str(wdir), *argv]) == 0
        cells = wdir / f"cells/corpus/ngram/{order}"
        for name in ("test_logprobs.npy", "curve.json", "model/family.json"):
            assert (cells / "seed0" / name).read_bytes() == (cells / "seed1" / name).read_bytes()
    assert load_params(wdir).cells() == [
        ("corpus", "ngram", "forward", 0),
        ("corpus", "ngram", "reverse", 0),
    ]
    shutil.rmtree(wdir / "cells/corpus/ngram/forward/seed1")  # the table must not need it
    shutil.rmtree(wdir / "cells/corpus/ngram/reverse/seed1")
    assert table_stage.main(["--params", str(wdir)]) == 0
    metrics = json.loads((wdir / "metrics.json").read_text())
    assert metrics["corpus"]["ngram"]["reverse"]["seeds"] == 2  # both seeds are counted
    rows = list(csv.DictReader(io.StringIO((wdir / "cells.csv").read_text())))
    assert [(r["order"], r["seed"]) for r in rows] == [
        (o, s) for o in ("forward", "reverse") for s in ("0", "1")
    ]


def test_by_default_each_seed_of_an_ngram_is_a_fit_of_its_own_half_sample(pipeline):
    # train_sample auto resolves to half for a family without randomness of its own
    assert load_params(pipeline).cells() == [
        ("corpus", "ngram", order, seed) for order in ("forward", "reverse") for seed in (0, 1)
    ]
    cells = pipeline / "cells/corpus/ngram/forward"
    seed0 = np.load(cells / "seed0/test_logprobs.npy")
    assert not np.array_equal(seed0, np.load(cells / "seed1/test_logprobs.npy"))


# ------------------------------------------------------------------------- dvc.yaml
TEMPLATE = (resources.files("retrograde") / "templates" / "dvc.yaml").read_text()


def test_render_writes_one_units_stage_per_source_with_its_files_as_deps(tmp_path):
    wdir = _host(tmp_path / "host", ["source=[corpus,markov]"])
    text = render_dvc_yaml(TEMPLATE, load_params(wdir))
    stages = yaml.safe_load(text)["stages"]  # PyYAML is the reference parser here
    assert stages["units_corpus"] == {
        "cmd": "python -m retrograde.stages.units --source corpus",
        "deps": ["../../data/corpus.txt"],
        "params": ["study.sources.corpus"],
        "outs": ["data/corpus/units"],
    }
    assert "deps" not in stages["units_markov"]
    assert {"reorder", "fit", "table"} <= set(stages)
    assert render_dvc_yaml(text, load_params(wdir)) == text  # idempotent
    assert UNITS_BEGIN in text and UNITS_END in text


def test_render_quotes_dependency_paths_yaml_would_misread():
    config = from_dict(
        RetrogradeConfig, {"study": {"sources": {"c": {"deps": ["data/my corpus: v2.txt"]}}}}
    )
    stages = yaml.safe_load(render_dvc_yaml(TEMPLATE, config))["stages"]
    assert stages["units_c"]["deps"] == ["../../data/my corpus: v2.txt"]


def test_render_refuses_a_stage_file_without_markers():
    with pytest.raises(HostRepoError, match="retrograde init --force"):
        render_dvc_yaml("stages: {}\n", RetrogradeConfig())


# ---------------------------------------------------------------- failures seen by `run`
def test_run_turns_a_failed_fit_stage_into_the_stages_own_line(tmp_path):
    from retrograde.host import HostRepo, parse_repro_line
    from retrograde.host._driver import _raise_failure

    output = (
        "Running stage 'pipelines/retrograde/dvc.yaml:fit@c-m-reverse-0':\n"
        "> python -m retrograde.stages.fit --source c --model m --order reverse --seed 0\n"
        "retrograde fit: error: cell c/m/reverse/seed0 failed (ValueError: nan); see "
        "pipelines/retrograde/cells/c/m/reverse/seed0/fit.log\n"
        "ERROR: failed to reproduce 'pipelines/retrograde/dvc.yaml:fit@c-m-reverse-0': "
        "failed to run: python -m retrograde.stages.fit, exited with 2\n"
    )
    failed = [p[1] for p in map(parse_repro_line, output.splitlines()) if p and p[0] == "failed"]
    assert failed == ["fit@c-m-reverse-0"]
    host = HostRepo(root=tmp_path, git_root=tmp_path)
    with pytest.raises(FitError) as info:
        _raise_failure(host, output, failed, tmp_path / "run.log")
    assert str(info.value) == (
        "cell c/m/reverse/seed0 failed (ValueError: nan); see "
        "pipelines/retrograde/cells/c/m/reverse/seed0/fit.log"
    )
    dvc_only = "ERROR: failed to reproduce 'prepare': output 'x' does not exist\n"
    with pytest.raises(
        HostRepoError, match="stage 'prepare' failed .*does not exist; see .*run.log"
    ):
        _raise_failure(host, dvc_only, ["prepare"], tmp_path / "run.log")


def test_run_refuses_a_host_without_dvc_or_without_init_naming_the_fix(tmp_path, capsys):
    import subprocess

    from retrograde.cli import main

    host = tmp_path / "host"
    host.mkdir()
    subprocess.run(["git", "init", "-q", str(host)], check=True)
    assert main(["run", "--dir", str(host)]) == 2
    assert "dvc init" in capsys.readouterr().err
    (host / ".dvc").mkdir()  # what `dvc init` leaves, as far as finding the host goes
    assert main(["run", "--dir", str(host)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "run `retrograde init --dir" in err
    assert sorted(p.name for p in host.iterdir()) == [".dvc", ".git"]  # nothing written


def test_table_refuses_a_cell_that_scores_below_the_exact_floor(tmp_path, capsys):
    # No model beats the true distribution on average (Gibbs' inequality: the expected
    # NLL - floor is a KL divergence >= 0; Cover & Thomas, Elements of Information Theory,
    # Thm 2.6.3). Half the floor on every unit can only be a leak or an unnormalized model.
    wdir = _host(
        tmp_path / "host",
        [
            "source=[markov]",
            "study=smoke",
            "study.seeds=[0]",
            "study.models.ngram.params.order=2",
            "stats.n_boot=50",
        ],
    )
    assert units_stage.main(["--params", str(wdir), "--source", "markov"]) == 0
    for order in ("forward", "reverse"):
        assert (
            reorder_stage.main(["--params", str(wdir), "--source", "markov", "--order", order]) == 0
        )
        argv = ["--source", "markov", "--model", "ngram", "--order", order, "--seed", "0"]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0  # honest cells pass
    test = SequenceSet.load(wdir / "data/markov/units/test")
    floors = np.load(wdir / "data/markov/units/floors.npy")
    cheat = np.repeat(-floors / 2 / (test.lengths + 1), test.lengths + 1)
    np.save(wdir / "cells/markov/ngram/reverse/seed0/test_logprobs.npy", cheat)
    assert table_stage.main(["--params", str(wdir)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "cell markov/ngram/reverse/seed0 scores" in err[0] and "below the exact floor" in err[0]


def test_table_reads_each_models_own_seeds_and_sources(tmp_path):
    wdir = _host(
        tmp_path / "host",
        [
            "source=[corpus,markov]",
            "study=smoke",
            "study.models.ngram.params.order=2",
            "study.sources.markov.calibration.n_units=60",
            "+study.models.one={family: ngram, params: {order: 1}, seeds: [5], sources: [markov]}",
            "stats.n_boot=50",
        ],
    )
    config = load_params(wdir)
    for source in ("corpus", "markov"):
        assert units_stage.main(["--params", str(wdir), "--source", source]) == 0
        for order in ("forward", "reverse"):
            argv = ["--params", str(wdir), "--source", source, "--order", order]
            assert reorder_stage.main(argv) == 0
    for source, model, order, seed in config.cells():
        argv = ["--source", source, "--model", model, "--order", order, "--seed", str(seed)]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    collected = table_stage.collect(wdir, config)
    table = collected["table"]
    assert sorted(table["corpus"]) == ["ngram"] and sorted(table["markov"]) == ["ngram", "one"]
    assert table["markov"]["one"]["reverse"]["seeds"] == 1
    assert table["markov"]["ngram"]["reverse"]["seeds"] == 2
    # Each model's own seed count, named, since the two differ; then the unigram 'one' is
    # flagged as worse than a bigram baseline (the order-2 'ngram' equals it: not flagged).
    assert collected["warnings"][:2] == [
        "model 'ngram': with 2 seeds the interval ignores training randomness (it resamples "
        "test units only); fit at least 3 seeds",
        "model 'one': with 1 seed the interval ignores training randomness (it resamples "
        "test units only); fit at least 3 seeds",
    ]
    assert len(collected["warnings"]) == 3
    assert collected["warnings"][2].startswith("source 'markov': model 'one' scores ")


def test_a_cells_fit_log_shows_progress_within_an_epoch():
    import io

    rng = np.random.default_rng(1)
    rows = [rng.integers(0, 5, size=8) for _ in range(60)]
    splits = {s: SequenceSet.from_list(rows, vocab_size=5) for s in ("train", "valid", "test")}
    log = io.StringIO()
    spec = ModelConfig(family="mlp", params={"window": 2, "hidden": 4, "epochs": 1})
    fit_cell(spec, splits, seed=0, log=log)
    lines = [line for line in log.getvalue().splitlines() if line.startswith("mlp fit (seed 0):")]
    # The epoch's 540 events (60 units x (8 tokens + end marker)) come in one chunk here.
    assert len(lines) == 1 and "100% (540/540 event)" in lines[0]


def test_a_progress_bar_writes_one_log_line_per_tenth_it_crosses():
    import io

    from retrograde.families import progress_bar, progress_log

    log = io.StringIO()
    with progress_log(log), progress_bar(total=100, desc="x", unit="tok", enabled=False) as bar:
        for step in (5, 5, 30, 1, 59):  # reaches 5, 10, 40, 41, 100
            bar.update(step)
    percents = [line.split(": ")[1].split("%")[0] for line in log.getvalue().splitlines()]
    assert percents == ["10", "40", "100"]


def test_table_pairs_seeds_only_where_fits_of_two_orders_share_something(tmp_path):
    # The mlp draws each order's random numbers from a stream of its own and no training
    # sample: unpaired (Welch's form). The ngram's seeds choose half-samples, the same units
    # in both orders: paired. (config.seeds_paired; docs/statistics.md, "Seeds and pairs")
    from retrograde import stats

    wdir = _host(
        tmp_path / "host",
        [
            "source=[markov]",
            "study=smoke",
            "study.seeds=[0,1,2]",
            "study.models.ngram.params.order=2",
            "study.sources.markov.calibration.n_units=80",
            "+study.models.net={family: mlp, params: {window: 2, hidden: 4, epochs: 2}}",
            "stats.n_boot=50",
        ],
    )
    config = load_params(wdir)
    assert units_stage.main(["--params", str(wdir), "--source", "markov"]) == 0
    for order in ("forward", "reverse"):
        argv = ["--params", str(wdir), "--source", "markov", "--order", order]
        assert reorder_stage.main(argv) == 0
    for source, model, order, seed in config.cells():
        argv = ["--source", source, "--model", model, "--order", order, "--seed", str(seed)]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    collected = table_stage.collect(wdir, config)
    table = collected["table"]["markov"]
    assert {leaf["seeds_paired"] for leaf in table["net"].values()} == {False}
    assert {leaf["seeds_paired"] for leaf in table["ngram"].values()} == {True}
    test = SequenceSet.load(wdir / "data/markov/units/test")
    offsets = np.concatenate([[0], np.cumsum(test.lengths + 1)])
    losses = {
        order: np.stack(
            [
                -Ragged(
                    np.load(wdir / f"cells/markov/net/{order}/seed{s}/test_logprobs.npy"), offsets
                ).sums()
                for s in (0, 1, 2)
            ]
        )
        for order in ("forward", "reverse")
    }
    expected = {
        paired: stats.summarize_model(
            losses, reference_order="forward", n_tokens=test.lengths, paired_seeds=paired
        )["reverse"]
        for paired in (True, False)
    }
    leaf = table["net"]["reverse"]
    assert (leaf["gap_pct_low"], leaf["gap_pct_high"]) == (
        expected[False]["gap_pct_low"],
        expected[False]["gap_pct_high"],
    )
    assert leaf["gap_pct_low"] != expected[True]["gap_pct_low"]
    assert table_stage.main(["--params", str(wdir)]) == 0
    report = (wdir / "report.md").read_text()
    assert "Seeds of `net` are not paired across orders" in " ".join(report.split())
