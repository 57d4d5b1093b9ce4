"""`retrograde init` + `retrograde run` in real git + DVC host repositories (temporary folders).

DVC's own view (``dvc stage list``, ``dvc.lock``, the "Running stage" lines of
``dvc repro``) is the outside reference for what ran: never timing.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
import yaml

from _host_fixtures import DVC, new_host, sh, snapshot
from retrograde.cli import main
from retrograde.config import fit_stage_name

pytestmark = [pytest.mark.dvc, pytest.mark.slow]

HOST_STAGES = """\
stages:
  corpus:
    cmd: python make_corpus.py
    deps:
      - make_corpus.py
    params:
      - corpus.seed
    outs:
      - data/corpus.txt
  unrelated:
    cmd: python -c "open('other.txt', 'w').write('a host output')"
    outs:
      - other.txt
"""
# The host's own corpus stage (a stand-in for a team's data pipeline), run with `python`.
CORPUS_SCRIPT = """\
import pathlib, random, yaml
seed = yaml.safe_load(open("params.yaml"))["corpus"]["seed"]
rng = random.Random(seed)
words = ["red", "fox", "runs", "over", "the", "lazy", "dog", "and", "back"]
lines = [" ".join(rng.choice(words) for _ in range(rng.randint(3, 9))) for _ in range(240)]
pathlib.Path("data").mkdir(exist_ok=True)
pathlib.Path("data/corpus.txt").write_text("\\n".join(lines) + "\\n")
"""
STUDY = """\
# @package study
orders:
  forward: {name: forward}
  reverse: {name: reverse}
models:
  small: {family: ngram, params: {order: 2}}
  large: {family: ngram, params: {order: 3}}
seeds: [0]
reference_order: forward
sweeps: {}
"""


def _run(capsys, host: Path, *argv: str) -> tuple[int, set[str], str, str]:
    """Run `retrograde run`; return (status, stages DVC ran, stdout, stderr)."""
    status = main(["run", "--dir", str(host), *argv])
    out, err = capsys.readouterr()
    # Progress lines read "  [k/N] ran      <stage> in 1.2 s  (counters)" (or "restored").
    pattern = re.compile(r"^  \[ *\d+/\d+\] ran +(\S+) ")
    ran = {match[1] for line in err.splitlines() if (match := pattern.match(line))}
    # The host's own stages are reported outside the counters: "  host stage corpus: ran in …".
    host_pattern = re.compile(r"^  host stage (\S+): ran ")
    ran |= {match[1] for line in err.splitlines() if (match := host_pattern.match(line))}
    return status, ran, out, err


def _lock(host: Path) -> dict:
    return yaml.safe_load((host / "pipelines/retrograde/dvc.lock").read_text())["stages"]


def _cells(models=("small", "large"), orders=("forward", "reverse"), seeds=(0,)) -> set[str]:
    return {fit_stage_name("corpus", m, o, s) for m in models for o in orders for s in seeds}


@pytest.fixture(scope="module")
def fitted_host(tmp_path_factory) -> Path:
    """A host with its own corpus stage, `retrograde init`, one full `run`, all committed."""
    host = new_host(tmp_path_factory.mktemp("e2e") / "host")
    (host / "dvc.yaml").write_text(HOST_STAGES)
    (host / "params.yaml").write_text("corpus:\n  seed: 0\n")
    (host / "make_corpus.py").write_text(CORPUS_SCRIPT)
    assert main(["init", "--dir", str(host), "--source", str(host / "data/corpus.txt")]) == 0
    (host / "conf/retrograde/study/default.yaml").write_text(STUDY)
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "host corpus stage and retrograde config"], host)
    assert main(["run", "--dir", str(host), "stats.n_boot=200"]) == 0
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "first run"], host)
    return host


@pytest.fixture
def host(fitted_host, tmp_path) -> Path:
    copy = tmp_path / "host"
    shutil.copytree(fitted_host, copy, symlinks=True)
    return copy


def test_first_run_fits_every_cell_and_writes_metrics_report_and_plots(fitted_host):
    root = fitted_host / "pipelines/retrograde"
    lock = _lock(fitted_host)
    assert _cells() <= set(lock)
    assert {"units_corpus", "reorder@corpus-forward", "reorder@corpus-reverse", "table"} <= set(
        lock
    )
    # DVC's own expansion of the matrix gives exactly the names retrograde computes.
    listed = sh(
        [*DVC, "stage", "list", "pipelines/retrograde/dvc.yaml", "--name-only"], fitted_host
    )
    assert _cells() <= {name.rsplit(":", 1)[-1] for name in listed.split()}
    metrics = yaml.safe_load((root / "metrics.json").read_text())
    assert set(metrics["corpus"]) == {"small", "large"}
    assert set(metrics["corpus"]["large"]) == {"forward", "reverse"}
    assert (root / "report.md").read_text().startswith("# Order-ablation gap table")
    assert any(p.suffix == ".png" for p in (root / "plots").iterdir())
    # The host's own stage ran upstream of the units stage.
    assert (fitted_host / "data/corpus.txt").is_file()


def test_second_run_reruns_nothing_and_prints_the_table(host, capsys):
    before = snapshot(host)
    status, ran, out, err = _run(capsys, host, "stats.n_boot=200")
    assert status == 0 and ran == set()
    assert "| `large` | `reverse` |" in out
    changed = {
        p for p in before.keys() | snapshot(host).keys() if before.get(p) != snapshot(host).get(p)
    }
    assert changed <= {"pipelines/retrograde/logs/run.log"}


def test_editing_one_models_hyperparameter_reruns_only_its_cells_and_the_table(host, capsys):
    lock_before = _lock(host)
    status, ran, _, _ = _run(capsys, host, "stats.n_boot=200", "study.models.large.params.order=4")
    assert status == 0
    assert ran == _cells(models=("large",)) | {"table"}
    lock_after = _lock(host)
    for cell in _cells(models=("small",)):
        assert lock_after[cell] == lock_before[cell]


def test_adding_a_seed_fits_only_the_new_cells(host, capsys):
    # Each seed of an n-gram trains on its own half-sample (train_sample auto), so a new
    # seed is new fits; the old seeds' cells stay (a seed-free model: test_stages.py).
    status, ran, _, _ = _run(capsys, host, "stats.n_boot=200", "study.seeds=[0,1]")
    assert status == 0 and ran == _cells(seeds=(1,)) | {"table"}
    metrics = yaml.safe_load((host / "pipelines/retrograde/metrics.json").read_text())
    assert metrics["corpus"]["small"]["reverse"]["seeds"] == 2


def test_removing_an_order_removes_it_from_the_table(host, capsys):
    status, ran, _, _ = _run(capsys, host, "stats.n_boot=200", "~study.orders.reverse")
    assert status == 0 and ran == {"table"}
    metrics = yaml.safe_load((host / "pipelines/retrograde/metrics.json").read_text())
    assert set(metrics["corpus"]["small"]) == {"forward"}


def test_editing_the_host_corpus_reruns_units_and_downstream_but_not_unrelated_stages(host, capsys):
    (host / "params.yaml").write_text("corpus:\n  seed: 1\n")
    status, ran, _, _ = _run(capsys, host, "stats.n_boot=200")
    assert status == 0
    expected = {"corpus", "units_corpus", "reorder@corpus-forward", "reorder@corpus-reverse"}
    assert ran == expected | _cells() | {"table"}
    assert "unrelated" not in ran


def test_a_second_clone_restores_every_fit_from_the_shared_remote(fitted_host, tmp_path, capsys):
    first = tmp_path / "first"
    shutil.copytree(fitted_host, first, symlinks=True)
    remote = tmp_path / "remote"
    sh([*DVC, "remote", "add", "-d", "shared", str(remote)], first)
    sh(["git", "commit", "-q", "-am", "shared DVC remote"], first)
    sh([*DVC, "push", "--run-cache"], first)
    second = tmp_path / "second"
    sh(["git", "clone", "-q", str(first), str(second)], tmp_path)
    assert not list((second / "pipelines/retrograde").rglob("test_logprobs.npy"))
    status, ran, out, _ = _run(capsys, second, "--pull", "stats.n_boot=200")
    assert status == 0 and ran == set()  # nothing was fitted again
    for cell in _cells():
        source, model, order, seed = cell.removeprefix("fit@").split("-")
        folder = second / f"pipelines/retrograde/cells/{source}/{model}/{order}/seed{seed}"
        assert (folder / "test_logprobs.npy").is_file()
    assert (second / "pipelines/retrograde/metrics.json").read_bytes() == (
        first / "pipelines/retrograde/metrics.json"
    ).read_bytes()


@pytest.mark.parametrize(
    ("overrides", "expected"),
    [
        (["study.sedes=[1]"], "did you mean 'seeds'"),
        (["study.orders.reverse.name=revrese"], "unknown order 'revrese'"),
        (["study.models.small.family=ngarm"], "unknown family 'ngarm'"),
        (
            [
                "study.sources.corpus.params.files=[../outside.txt]",
                "study.sources.corpus.deps=null",
            ],
            "lies outside the host repository",
        ),
    ],
)
def test_bad_input_is_one_line_exit_2_and_leaves_the_host_unchanged(
    host, capsys, overrides, expected
):
    (host.parent / "outside.txt").write_text("text outside the repository\n")
    before = snapshot(host)
    status, ran, out, err = _run(capsys, host, *overrides)
    assert status == 2 and ran == set()
    assert len(err.strip().splitlines()) == 1 and expected in err
    assert snapshot(host) == before


CRASHING_FAMILY = """\
from retrograde.families._base import Family

class Crashing(Family):
    name = "crashing"

    def fit(self, train, valid=None, seed=0):
        raise RuntimeError("diverged at step 3")

    def logprobs(self, units):
        raise NotImplementedError

    def next_token_probs(self, contexts):
        raise NotImplementedError
"""


def test_a_crashing_fit_names_the_cell_and_its_log(host, capsys, monkeypatch):
    (host / "team_models.py").write_text(CRASHING_FAMILY)
    monkeypatch.setenv("PYTHONPATH", str(host))
    monkeypatch.syspath_prepend(str(host))  # compose builds the family in this process
    status, _, _, err = _run(
        capsys, host, "stats.n_boot=200", "+study.models.boom={_target_: team_models.Crashing}"
    )
    assert status == 2
    line = err.strip().splitlines()[-1]
    assert line.startswith("retrograde: error: cell corpus/boom/")
    assert "RuntimeError: diverged at step 3" in line
    log = line.rsplit("see ", 1)[1]
    assert log.startswith("pipelines/retrograde/cells/corpus/boom/") and log.endswith("fit.log")
    assert "Traceback" in (host / log).read_text()


def test_jobs_runs_the_new_fit_stages_as_parallel_dvc_processes(host, capsys):
    edits = ["study.seeds=[0,1]", "study.models.small.params.order=4"]
    status, ran, _, err = _run(capsys, host, "--jobs", "2", "stats.n_boot=200", *edits)
    assert status == 0
    new_cells = _cells(models=("small",))  # fitted once (the n-gram ignores the seed)
    assert new_cells <= set(_lock(host))
    # The parallel executor logs each stage it ran, and each is reported as run exactly once
    # (the closing `dvc repro` sees it unchanged, which is not counted again).
    logs = {p.stem for p in (host / "pipelines/retrograde/logs").glob("fit@*.log")}
    assert new_cells <= logs and new_cells <= ran
    for cell in new_cells:
        assert sum(f" {cell} " in line for line in err.splitlines() if "] " in line) == 1
    metrics = yaml.safe_load((host / "pipelines/retrograde/metrics.json").read_text())
    assert metrics["corpus"]["small"]["reverse"]["seeds"] == 2
