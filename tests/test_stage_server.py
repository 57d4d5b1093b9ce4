"""The stage server: a stage command served by a fork of a warm process behaves as itself."""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import pytest

from _host_fixtures import metrics_without_times, new_pipeline_host
from retrograde.cli import main
from retrograde.stages.server import SERVER_ENV, available, stage_server

pytestmark = pytest.mark.skipif(not available(), reason="needs fork and Unix sockets")


def _table_stage(folder: Path) -> subprocess.CompletedProcess[str]:
    """The table stage on a folder without params.yaml, importing verbosely (-X importtime)."""
    argv = [sys.executable, "-X", "importtime", "-m", "retrograde.stages.table"]
    return subprocess.run(
        [*argv, "--params", str(folder)], capture_output=True, text=True, cwd=folder
    )


def _imported(stderr: str) -> set[str]:
    return {
        line.rsplit("|", 1)[1].strip() for line in stderr.splitlines() if "import time:" in line
    }


def test_a_served_stage_exits_and_reports_as_the_command_would(tmp_path, monkeypatch):
    monkeypatch.setenv(SERVER_ENV, str(tmp_path / "no-server.sock"))  # nothing listens
    alone = _table_stage(tmp_path)
    with stage_server(["retrograde.families"]):
        served = _table_stage(tmp_path)
    error = [line for line in alone.stderr.splitlines() if "error:" in line]
    assert alone.returncode == 2 and len(error) == 1 and "params.yaml not found" in error[0]
    # The same status and the same one-line error, written to the command's own stderr...
    assert served.returncode == 2
    assert [line for line in served.stderr.splitlines() if "error:" in line] == error
    # ...by the server's fork: the command itself never imported numpy (the fork had it).
    assert "numpy" in _imported(alone.stderr)
    assert "numpy" not in _imported(served.stderr)
    assert os.environ[SERVER_ENV] == str(tmp_path / "no-server.sock")  # restored


@pytest.mark.dvc
@pytest.mark.slow
def test_a_run_with_the_server_writes_the_same_results_as_one_without(tmp_path, monkeypatch):
    grid = ["study=smoke", "+study.models.mlp={family: mlp, params: {window: 2, epochs: 2}}"]
    hosts = {mode: new_pipeline_host(tmp_path / mode) for mode in ("served", "alone")}
    for mode, host in hosts.items():
        if mode == "alone":
            monkeypatch.setenv(SERVER_ENV, "")  # off: every stage is its own process
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            assert main(["run", "--dir", str(host), "stats.n_boot=50", *grid]) == 0
    pipelines = {mode: host / "pipelines" / "retrograde" for mode, host in hosts.items()}
    # Every file of every cell (budget.json holds measured times) and the gap table.
    for mode in ("served", "alone"):
        cells = pipelines[mode] / "cells"
        files = sorted(
            p.relative_to(cells)
            for p in cells.rglob("*")
            if p.is_file() and p.name not in ("budget.json", ".gitignore")
        )
        if mode == "served":
            first = {f: (cells / f).read_bytes() for f in files}
        else:
            assert {f: (cells / f).read_bytes() for f in files} == first
    assert len(first) > 10
    # metrics.json: the same bytes but for each leaf's mean measured cpu_s and wall_s
    metrics = {
        mode: metrics_without_times((p / "metrics.json").read_text())
        for mode, p in pipelines.items()
    }
    assert metrics["served"] == metrics["alone"]


@pytest.mark.dvc
@pytest.mark.slow
def test_killing_a_served_stage_command_stops_the_stage_and_its_trainer(tmp_path):
    from retrograde.stages import reorder as reorder_stage
    from retrograde.stages import units as units_stage

    host = new_pipeline_host(tmp_path / "host")
    alive = tmp_path / "alive"
    os.mkfifo(alive)
    # A trainer that says it is up through a FIFO, then holds it open for 10 minutes: the
    # reader sees end-of-file only once the trainer is gone.
    trainer = (
        f"import time; f = open({str(alive)!r}, 'w'); f.write('up'); f.flush(); time.sleep(600)"
    )
    slow = f"+study.models.slow={{family: command, params: {{command: [python, -c, {trainer!r}]}}}}"
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["check", "--dir", str(host), "study=smoke", slow]) == 0  # params.yaml
    wdir = host / "pipelines" / "retrograde"
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    assert (
        reorder_stage.main(["--params", str(wdir), "--source", "corpus", "--order", "forward"]) == 0
    )
    cell = ["--source", "corpus", "--model", "slow", "--order", "forward", "--seed", "0"]
    with stage_server(["retrograde.families"]):
        client = subprocess.Popen(
            [sys.executable, "-m", "retrograde.stages.fit", *cell],
            cwd=wdir,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        with open(alive) as up:  # blocks until the trainer runs
            assert up.read(2) == "up"
            client.kill()  # as when DVC's own process is killed
            client.wait()
            assert up.read() == ""  # the trainer is gone (its process group was killed)
    assert not (wdir / "cells/corpus/slow/forward/seed0/test_logprobs.npy").exists()
