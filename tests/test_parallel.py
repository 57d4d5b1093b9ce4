"""parallel: independent stages as concurrent `dvc repro -s` processes (real git + DVC)."""

from __future__ import annotations

import contextlib
import io
import textwrap
from pathlib import Path

import pytest
import yaml

from _host_fixtures import (
    DVC,
    lock_without_measured,
    metrics_without_times,
    new_host,
    new_pipeline_host,
    sh,
)
from retrograde.cli import main
from retrograde.config import LOG_DIR
from retrograde.errors import ConfigError, FitError
from retrograde.host import (
    batch_pattern,
    batches,
    log_path_for,
    order_lock_entries,
    run_stage_batches,
    run_stages_in_parallel,
)

pytestmark = pytest.mark.dvc

# Each cell sleeps, records when it ran (outside DVC's graph, in ../../trace) and writes a
# deterministic output. `boom` exits 3 to stand in for a failing fit.
STAGE_FILE = textwrap.dedent(
    """\
    stages:
      fit:
        matrix:
          cell: [a, b, c, d]
        cmd: >-
          python -c "import time, pathlib;
          start = time.time(); time.sleep(1.0);
          pathlib.Path('../../trace').mkdir(exist_ok=True);
          pathlib.Path('../../trace/${item.cell}').write_text(f'{start} {time.time()}');
          pathlib.Path('out-${item.cell}.txt').write_text('cell ${item.cell}')"
        outs:
          - out-${item.cell}.txt
      boom:
        cmd: python -c "import sys; print('the trainer diverged', file=sys.stderr); sys.exit(3)"
    """
)
CELLS = ["fit@a", "fit@b", "fit@c", "fit@d"]


def _host_with_stages(folder: Path) -> Path:
    host = new_host(folder)
    pipeline = host / "pipelines" / "retrograde"
    pipeline.mkdir(parents=True)
    (pipeline / "dvc.yaml").write_text(STAGE_FILE)
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "stages"], host)
    return host


def _max_overlap(trace: Path) -> int:
    """Most intervals [start, end] open at one moment (sweep over sorted endpoints)."""
    events = []
    for path in trace.iterdir():
        start, end = map(float, path.read_text().split())
        events += [(start, 1), (end, -1)]
    running = peak = 0
    for _, step in sorted(events, key=lambda e: (e[0], e[1])):
        running += step
        peak = max(peak, running)
    return peak


@pytest.mark.slow
def test_run_replaces_symlinked_logs_instead_of_writing_through_them(tmp_path):
    host = new_pipeline_host(tmp_path / "host")
    outside = tmp_path / "outside.txt"
    outside.write_text("precious\n")
    logs = host / LOG_DIR
    logs.mkdir(parents=True, exist_ok=True)  # init made it (its lock file)
    cell = "fit@corpus-ngram-reverse-0"
    for name in ("run.log", f"{cell}.log"):
        (logs / name).symlink_to(outside)
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        status = main(["run", "--dir", str(host), "--jobs", "2", "study=smoke", "study.seeds=[0]"])
    assert status == 0
    assert outside.read_text() == "precious\n"
    for name in ("run.log", f"{cell}.log"):
        assert not (logs / name).is_symlink() and (logs / name).read_text()


@pytest.mark.slow
def test_two_jobs_run_every_stage_two_at_a_time_and_dvc_records_all(tmp_path):
    host = _host_with_stages(tmp_path / "host")
    run_stages_in_parallel(host, CELLS, jobs=2)
    assert _max_overlap(host / "trace") == 2
    lock = yaml.safe_load((host / "pipelines/retrograde/dvc.lock").read_text())
    assert list(lock["stages"]) == CELLS  # given order, whatever order they finished in
    # Outside reference: DVC's own status agrees that nothing is left to run.
    status = sh([*DVC, "status", "pipelines/retrograde/dvc.yaml:fit"], host)
    assert "up to date" in status
    for cell in "abcd":
        out = host / "pipelines/retrograde" / f"out-{cell}.txt"
        assert out.read_text() == f"cell {cell}"
    assert "Running stage" in log_path_for(host, "fit@a").read_text()


@pytest.mark.slow
def test_run_with_two_jobs_writes_byte_identical_metrics_to_one_job(tmp_path):
    hosts = {jobs: new_pipeline_host(tmp_path / f"jobs{jobs}") for jobs in (1, 2)}
    for jobs, host in hosts.items():
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            assert main(["run", "--dir", str(host), "--jobs", str(jobs), "study=smoke"]) == 0
    metrics = {
        jobs: metrics_without_times(
            (host / "pipelines/retrograde/metrics.json").read_text()
        ).encode()
        for jobs, host in hosts.items()
    }
    assert metrics[1] == metrics[2]  # the same bytes but for the measured times
    locks = {
        jobs: lock_without_measured((host / "pipelines/retrograde/dvc.lock").read_text())
        for jobs, host in hosts.items()
    }
    assert locks[1] == locks[2]  # same hashes and, after order_lock_entries, same layout
    # Every file of every cell is the same too, except the measured times of budget.json
    # (which DVC hashes with the cell: the lines compared above leave those hashes out) and
    # DVC's own .gitignore lines (in the order the stages finished).
    for jobs in (1, 2):
        cells = hosts[jobs] / "pipelines/retrograde/cells"
        files = sorted(
            p.relative_to(cells)
            for p in cells.rglob("*")
            if p.is_file() and p.name not in ("budget.json", ".gitignore")
        )
        if jobs == 1:
            first = {f: (cells / f).read_bytes() for f in files}
        else:
            assert {f: (cells / f).read_bytes() for f in files} == first
    assert b'"reverse"' in metrics[1]  # the table really holds the smoke grid's cells
    # The two-job run went through the parallel path: one log per fit stage (each seed of
    # the n-gram trains on its own half-sample: a stage per order and seed).
    logs = sorted(p.name for p in (hosts[2] / LOG_DIR).glob("fit@*.log"))
    assert logs == [f"fit@corpus-ngram-{o}-{s}.log" for o in ("forward", "reverse") for s in (0, 1)]


@pytest.mark.slow
def test_a_failing_stage_is_one_line_naming_it_and_its_log_and_no_new_stage_starts(tmp_path):
    host = _host_with_stages(tmp_path / "host")
    with pytest.raises(FitError) as info:
        run_stages_in_parallel(host, ["boom", "fit@a", "fit@b", "fit@c"], jobs=1)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith("stage 'boom' failed with exit status ")
    assert "1 of 1 finished stages failed, 3 not started" in message
    log = log_path_for(host, "boom")
    assert f"see {log}" in message
    assert "the trainer diverged" in log.read_text()
    assert not (host / "trace").exists()


@pytest.mark.slow
def test_an_already_recorded_stage_is_not_run_again(tmp_path):
    host = _host_with_stages(tmp_path / "host")
    run_stages_in_parallel(host, ["fit@a"], jobs=1)
    first = (host / "trace" / "a").read_text()
    run_stages_in_parallel(host, ["fit@a", "fit@a"], jobs=2)
    assert (host / "trace" / "a").read_text() == first
    assert "Stage 'pipelines/retrograde/dvc.yaml:fit@a' didn't change, skipping" in (
        log_path_for(host, "fit@a").read_text()
    )


@pytest.mark.parametrize("jobs", [0, -1, 1.5, True])
def test_jobs_must_be_a_positive_integer(tmp_path, jobs):
    with pytest.raises(
        ConfigError, match=rf"parameter jobs={jobs!r} is invalid; allowed: an integer >= 1"
    ):
        run_stages_in_parallel(tmp_path, ["fit@a"], jobs=jobs)


def test_no_stages_is_nothing_to_do(tmp_path):
    run_stages_in_parallel(tmp_path, [], jobs=4)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.slow
def test_lock_entries_are_put_in_the_given_order_without_changing_content(tmp_path):
    host = _host_with_stages(tmp_path / "host")
    run_stages_in_parallel(host, ["fit@b", "fit@a"], jobs=1)  # recorded b, then a
    lock_path = host / "pipelines/retrograde/dvc.lock"
    as_dvc_wrote = lock_path.read_bytes()
    order_lock_entries(lock_path, ["fit@b", "fit@a"])  # already in this order: untouched
    assert lock_path.read_bytes() == as_dvc_wrote
    order_lock_entries(lock_path, ["fit@a", "fit@b"])
    assert list(yaml.safe_load(lock_path.read_text())["stages"]) == ["fit@a", "fit@b"]
    assert yaml.safe_load(lock_path.read_text()) == yaml.safe_load(as_dvc_wrote)
    # Outside reference: DVC reads the reordered file and finds both stages up to date.
    status = sh(
        [
            *DVC,
            "status",
            "pipelines/retrograde/dvc.yaml:fit@a",
            "pipelines/retrograde/dvc.yaml:fit@b",
        ],
        host,
    )
    assert "up to date" in status


@pytest.mark.dvc
def test_a_parallel_run_with_nothing_stale_starts_no_stage_process(tmp_path, capsys):
    # After a full run, `run --jobs 2` asks `dvc status` once and reproduces nothing.
    host = new_pipeline_host(tmp_path / "host")
    assert main(["run", "--dir", str(host), "--jobs", "2", "study=smoke"]) == 0
    lock = (host / "pipelines/retrograde/dvc.lock").read_bytes()
    capsys.readouterr()
    assert main(["run", "--dir", str(host), "--jobs", "2", "study=smoke"]) == 0
    assert "retrograde: 0 stages ran" in capsys.readouterr().err
    assert (host / "pipelines/retrograde/dvc.lock").read_bytes() == lock


# Batches: stage names as the fit stages' (parts joined by "-"), so one glob names a group.
BATCH_FILE = textwrap.dedent(
    """\
    stages:
      fit:
        matrix:
          model: [x, y]
          cell: [a, b]
        cmd: >-
          python -c "import time, pathlib;
          start = time.time(); time.sleep(1.0);
          pathlib.Path('../../trace').mkdir(exist_ok=True);
          pathlib.Path('../../trace/${item.model}${item.cell}').write_text(f'{start} {time.time()}');
          print('fitting ${item.model}-${item.cell}');
          pathlib.Path('out-${item.model}-${item.cell}.txt').write_text('${item.cell}')"
        outs:
          - out-${item.model}-${item.cell}.txt
    """
)
BATCHED = ["fit@x-a", "fit@x-b", "fit@y-a", "fit@y-b"]


@pytest.mark.slow
def test_batches_are_dvc_processes_of_several_stages_two_at_a_time(tmp_path):
    assert batches(BATCHED, 2, 1) == [["fit@x-a", "fit@x-b"], ["fit@y-a", "fit@y-b"]]
    assert [batch_pattern(b) for b in batches(BATCHED, 2, 1)] == ["fit@x-*", "fit@y-*"]
    host = new_host(tmp_path / "host")
    pipeline = host / "pipelines" / "retrograde"
    pipeline.mkdir(parents=True)
    (pipeline / "dvc.yaml").write_text(BATCH_FILE)
    run_stage_batches(host, BATCHED, jobs=2, per_job=1)
    assert _max_overlap(host / "trace") == 2  # one stage of each batch at a time
    lock = yaml.safe_load((pipeline / "dvc.lock").read_text())
    assert sorted(lock["stages"]) == BATCHED
    # Outside reference: DVC's own status agrees that nothing is left to run.
    assert "up to date" in sh([*DVC, "status", "pipelines/retrograde/dvc.yaml:fit"], host)
    for name in BATCHED:  # each stage's part of its process's output in its own log
        log = log_path_for(host, name).read_text()
        assert f"fitting {name.removeprefix('fit@')}" in log
        assert log.count("Running stage") == 1
