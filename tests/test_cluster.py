"""--cluster: fit stages as tasks of a Dask cluster (real git, DVC and distributed)."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from _host_fixtures import (
    lock_without_measured,
    metrics_without_times,
    new_pipeline_host,
    report_without_measured,
    sh,
    snapshot,
)
from retrograde.cli import main
from retrograde.config import LOG_DIR

SMOKE = ["study=smoke", "study.seeds=[0]", "stats.n_boot=200"]
PIPELINE = "pipelines/retrograde"


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    status = main(["run", *argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_the_plain_install_does_not_import_dask():
    # The command line, the host layer and `run` without --cluster never import dask.
    code = textwrap.dedent(
        """
        import sys
        from retrograde.cli import build_parser
        import retrograde.host
        build_parser().parse_args(["run", "--dry"])
        print(sorted(m for m in sys.modules if m.split(".")[0] in ("dask", "distributed")))
        """
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout
    assert out.strip() == "[]"


def test_a_missing_cluster_extra_is_one_line_saying_how_to_install_it(
    tmp_path, capsys, monkeypatch
):
    host = new_pipeline_host(tmp_path / "host")
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` fails
    before = snapshot(host)
    status, _, err = _run(capsys, "--dir", str(host), "--cluster", "local:2", *SMOKE)
    assert status == 2
    assert len(err.strip().splitlines()) == 1
    assert "pip install -e '.[cluster]'" in err
    assert snapshot(host) == before


@pytest.mark.parametrize(
    ("argv", "expected"),
    [
        (["--cluster", "local:0"], "option --cluster: 'local:0' is invalid"),
        (["--cluster", "local:two"], "option --cluster: 'local:two' is invalid"),
        (["--cluster", "my scheduler"], "option --cluster: 'my scheduler' is invalid"),
        (["--cluster", "local:2", "--jobs", "2"], "--jobs and --cluster do not go together"),
        (["--cluster", "local:2", "--cluster-repo", "rel/path"], "an absolute path"),
        (["--cluster-mode", "clone"], "need --cluster ADDRESS"),
    ],
)
def test_bad_cluster_options_are_one_line_exit_2_and_write_nothing(
    tmp_path, capsys, argv, expected
):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    status, _, err = _run(capsys, "--dir", str(host), *argv, *SMOKE)
    assert status == 2
    assert len(err.strip().splitlines()) == 1 and expected in err, err
    assert snapshot(host) == before


@pytest.mark.slow
def test_an_unreachable_scheduler_is_one_line_exit_2_and_writes_nothing(tmp_path, capsys):
    import dask
    import distributed  # noqa: F401  (its config defaults first: set() restores what it found)

    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    # Port 9 (discard) on the loopback: nothing listens there; give up after a second.
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        status, _, err = _run(capsys, "--dir", str(host), "--cluster", "tcp://127.0.0.1:9", *SMOKE)
    assert status == 2
    assert len(err.strip().splitlines()) == 1, err
    assert "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in err
    assert snapshot(host) == before


@pytest.mark.slow
@pytest.mark.dvc
def test_a_local_cluster_writes_the_same_results_as_a_plain_run(tmp_path, capsys):
    plain = new_pipeline_host(tmp_path / "plain")
    spread = new_pipeline_host(tmp_path / "cluster")
    status, out_plain, _ = _run(capsys, "--dir", str(plain), *SMOKE)
    assert status == 0
    status, out_cluster, err = _run(capsys, "--dir", str(spread), "--cluster", "local:2", *SMOKE)
    assert status == 0, err
    assert out_cluster == out_plain  # the gap table
    metrics = [
        metrics_without_times((h / PIPELINE / "metrics.json").read_text()) for h in (plain, spread)
    ]
    assert metrics[0] == metrics[1]
    # report.md also shows each cell's measured fit times (budget tables); the rest is equal.
    reports = [(h / PIPELINE / "report.md").read_text() for h in (plain, spread)]
    assert report_without_measured(reports[0]) == report_without_measured(reports[1])
    assert "(time)" in report_without_measured(reports[0])  # the helper found the table
    locks = [
        lock_without_measured((h / PIPELINE / "dvc.lock").read_text()) for h in (plain, spread)
    ]
    assert locks[0] == locks[1]
    # The fits went to the workers: their lines name the worker and its count.
    fits = [line for line in err.splitlines() if " fit@" in line]
    assert len(fits) == 2 and all(" on worker " in line and " there)" in line for line in fits)
    assert sorted(p.name for p in (spread / LOG_DIR).glob("fit@*.log")) == [
        "fit@corpus-ngram-forward-0.log",
        "fit@corpus-ngram-reverse-0.log",
    ]
    # Outside reference: DVC's own status finds nothing left to run.
    assert "up to date" in sh(
        [sys.executable, "-m", "dvc", "status", f"{PIPELINE}/dvc.yaml"], spread
    )


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


WORKER_KILLING_FAMILY = """\
import os
import signal
from pathlib import Path

from retrograde.families.ngram import NGram

def _dask_worker_pid():
    # The nearest ancestor started by multiprocessing (a LocalCluster worker process).
    pid = os.getppid()
    while pid > 1:
        if b"spawn_main" in Path(f"/proc/{pid}/cmdline").read_bytes():
            return pid
        pid = int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
    raise RuntimeError("this fit does not run below a Dask worker process")


class KillsItsWorker(NGram):
    name = "kills_its_worker"

    def fit(self, train, valid=None, seed=0):
        try:  # only the first fit, of any cell, on any worker (the flag file is new)
            flag = os.open(os.environ["KILL_FLAG"], os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            return super().fit(train, valid, seed=seed)
        worker = _dask_worker_pid()
        os.write(flag, str(worker).encode())
        os.close(flag)
        os.kill(worker, signal.SIGKILL)  # the worker is lost mid-cell
        os._exit(1)  # and this fit with it
"""


@pytest.mark.slow
@pytest.mark.dvc
def test_a_lost_worker_s_cell_is_fitted_again_on_another_and_the_run_completes(
    tmp_path, capsys, monkeypatch
):
    plain = new_pipeline_host(tmp_path / "plain")
    spread = new_pipeline_host(tmp_path / "cluster")
    plugins = tmp_path / "plugins"
    plugins.mkdir()
    (plugins / "worker_killers.py").write_text(WORKER_KILLING_FAMILY)
    monkeypatch.setenv("PYTHONPATH", str(plugins))  # the workers start with this environment
    monkeypatch.syspath_prepend(str(plugins))  # compose builds the family in this process
    model = ["~study.models.ngram", "+study.models.k={_target_: worker_killers.KillsItsWorker}"]
    flag = tmp_path / "worker-killed"
    flag.write_text("")  # the plain run (no cluster) must never kill
    monkeypatch.setenv("KILL_FLAG", str(flag))
    status, out_plain, err = _run(capsys, "--dir", str(plain), *SMOKE, *model)
    assert status == 0, err
    flag.unlink()  # the cluster's first fit kills its worker
    status, out_cluster, err = _run(
        capsys, "--dir", str(spread), "--cluster", "local:2", *SMOKE, *model
    )
    assert status == 0, err
    # a worker process really was killed mid-cell (its pid is gone, or a zombie)
    worker = int(flag.read_text())
    stat = Path(f"/proc/{worker}/stat")
    assert not stat.exists() or stat.read_text().rsplit(")", 1)[1].split()[0] == "Z"
    assert out_cluster == out_plain  # every cell was fitted after all: the same gap table
    metrics = [
        metrics_without_times((h / PIPELINE / "metrics.json").read_text()) for h in (plain, spread)
    ]
    assert metrics[0] == metrics[1]


@pytest.mark.slow
@pytest.mark.dvc
def test_a_cell_failing_on_a_worker_is_one_line_naming_the_cell_the_worker_and_the_log(
    tmp_path, capsys, monkeypatch
):
    host = new_pipeline_host(tmp_path / "host")
    (host / "team_models.py").write_text(CRASHING_FAMILY)
    monkeypatch.setenv("PYTHONPATH", str(host))  # the workers start with this environment
    monkeypatch.syspath_prepend(str(host))  # compose builds the family in this process
    status, _, err = _run(
        capsys,
        "--dir",
        str(host),
        "--cluster",
        "local:1",
        *SMOKE,
        "+study.models.boom={_target_: team_models.Crashing}",
    )
    assert status == 2
    lines = err.strip().splitlines()
    line = lines[-1]
    assert line.startswith("retrograde: error: stage 'fit@corpus-boom-")
    assert "on worker 0" in line and "RuntimeError: diverged at step 3" in line
    log = line.rsplit("see ", 1)[1]
    assert log.endswith(".log")
    with open(log, encoding="utf-8") as handle:
        assert "diverged at step 3" in handle.read()


@pytest.mark.slow
@pytest.mark.dvc
def test_clone_mode_fits_in_the_workers_clone_and_results_come_back_through_the_remote(
    tmp_path, capsys
):
    host = new_pipeline_host(tmp_path / "host")
    remote = tmp_path / "remote"
    remote.mkdir()
    sh([sys.executable, "-m", "dvc", "remote", "add", "-d", "store", str(remote)], host)
    sh(["git", "commit", "-q", "-m", "remote", "--", ".dvc/config"], host)
    clone = tmp_path / "worker-clone"
    sh(["git", "clone", "-q", str(host), str(clone)], tmp_path)
    status, _, err = _run(
        capsys,
        "--dir",
        str(host),
        "--cluster",
        "local:1",
        "--cluster-mode",
        "clone",
        "--cluster-repo",
        str(clone),
        *SMOKE,
    )
    assert status == 0, err
    # The fits ran in the clone (its dvc.lock records them) and came back here from the
    # remote's run-cache: restored, not fitted, by the closing `dvc repro --pull`.
    clone_lock = (clone / PIPELINE / "dvc.lock").read_text()
    assert "fit@corpus-ngram-forward-0" in clone_lock
    assert "fit@corpus-ngram-reverse-0" in clone_lock
    assert "1 there" in err and "retrograde: 4 stages ran, 2 restored" in err, err
    for cell in ("forward", "reverse"):
        log = (host / LOG_DIR / f"fit@corpus-ngram-{cell}-0.log").read_text()
        assert "push --run-cache" in log
    metrics = json.loads((host / PIPELINE / "metrics.json").read_text())
    assert set(metrics["corpus"]["ngram"]) == {"forward", "reverse"}
    assert "up to date" in sh([sys.executable, "-m", "dvc", "status", f"{PIPELINE}/dvc.yaml"], host)


@pytest.mark.dvc
def test_clone_mode_refuses_a_clone_at_another_commit(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    clone = tmp_path / "worker-clone"
    sh(["git", "clone", "-q", str(host), str(clone)], tmp_path)
    (host / "notes.txt").write_text("a newer commit\n")
    sh(["git", "add", "notes.txt"], host)
    sh(["git", "commit", "-q", "-m", "newer"], host)
    sh([sys.executable, "-m", "dvc", "remote", "add", "-d", "store", str(tmp_path / "r")], host)
    before = snapshot(host)
    status, _, err = _run(
        capsys,
        "--dir",
        str(host),
        "--cluster",
        "local:1",
        "--cluster-mode",
        "clone",
        "--cluster-repo",
        str(clone),
        *SMOKE,
    )
    # Every worker is asked before anything is written.
    assert status == 2
    assert len(err.strip().splitlines()) == 1, err
    assert "retrograde: error: option --cluster: worker tcp://127.0.0.1:" in err
    assert f"the clone at {clone} is at commit " in err and "check out the same commit" in err
    assert snapshot(host) == before


@pytest.mark.dvc
def test_clone_mode_without_a_default_dvc_remote_is_one_line(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    status, _, err = _run(
        capsys, "--dir", str(host), "--cluster", "local:1", "--cluster-mode", "clone", *SMOKE
    )
    assert status == 2 and len(err.strip().splitlines()) == 1, err
    assert "needs a default DVC remote" in err


@pytest.mark.dvc
def test_a_worker_without_the_repository_is_refused_before_anything_is_written(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    missing = tmp_path / "not-mounted-here"
    status, _, err = _run(
        capsys, "--dir", str(host), "--cluster", "local:1", "--cluster-repo", str(missing), *SMOKE
    )
    assert status == 2 and len(err.strip().splitlines()) == 1, err
    assert f"no DVC repository at {missing} there" in err
    assert snapshot(host) == before


def test_a_stop_request_ends_the_running_stage_process_group(tmp_path):
    # What Ctrl-C does to a running task: its DVC process group gets SIGTERM. The child
    # stands in for a long fit (it would wait a minute); the stop is asked at once.
    from retrograde.host._cluster import _watched

    argv = [sys.executable, "-c", "import time; print('fitting', flush=True); time.sleep(60)"]
    status, output = _watched(argv, tmp_path, {}, lambda: True)
    assert status == -15  # killed by SIGTERM (POSIX: negative signal number in returncode)
    assert "stopped: the run was cancelled" in output
