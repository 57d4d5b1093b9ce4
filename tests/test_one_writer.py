"""One writer at a time, and nothing lost: the pipeline lock, the params digest, the report swap.

A second command that would write under ``pipelines/retrograde/`` while another holds it is
refused in one line naming the holder, before it writes anything; a stage refuses to run
(or to be recorded) on a ``params.yaml`` other than the one its run composed; a new set of
results replaces the published one only when complete.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from _host_fixtures import new_pipeline_host, snapshot
from retrograde.cli import main
from retrograde.config import PARAMS_DIGEST_ENV, params_digest
from retrograde.host import pipeline_lock
from retrograde.report import STAGING, recover_report
from retrograde.stages import run_stage

pytestmark = pytest.mark.dvc


@pytest.fixture(scope="module")
def host(tmp_path_factory) -> Path:
    return new_pipeline_host(tmp_path_factory.mktemp("writer") / "host")


@pytest.mark.parametrize(
    "argv",
    [["run"], ["run", "--jobs", "2"], ["check"], ["plan", "--run"], ["init", "--force"]],
    ids=["run", "run-jobs", "check", "plan-run", "init"],
)
def test_a_second_writer_is_refused_naming_the_holder_before_it_writes(host, argv, capsys):
    before = snapshot(host)
    with pipeline_lock(host, "retrograde run"):
        status = main([*argv[:1], "--dir", str(host), *argv[1:]])
    errors = [line for line in capsys.readouterr().err.splitlines() if "error" in line]
    assert status == 2 and len(errors) == 1  # (plan prints its shard first)
    assert "is in use by `retrograde run` (process " in errors[0]
    assert f"{os.getpid()}" in errors[0] and "wait for it to finish" in errors[0]
    after = snapshot(host)
    after.pop("pipelines/retrograde/logs/.lock", None)
    before.pop("pipelines/retrograde/logs/.lock", None)
    assert after == before  # not one byte written


def test_the_lock_is_released_when_its_holder_is_done(host):
    with pipeline_lock(host, "first"):
        pass
    with pipeline_lock(host, "second"):  # would raise if the first were still held
        pass


def test_a_stage_refuses_a_params_file_other_than_the_one_its_run_composed(
    tmp_path, monkeypatch, capsys
):
    (tmp_path / "params.yaml").write_text("study: {}\n")
    monkeypatch.setenv(PARAMS_DIGEST_ENV, params_digest(tmp_path / "params.yaml"))
    ran = []
    assert (
        run_stage(
            "fit", lambda parser: None, lambda args: ran.append(1), ["--params", str(tmp_path)]
        )
        == 0
    )

    # Another command rewrites params.yaml while the stage works: not recorded.
    def rewrite(args):
        (tmp_path / "params.yaml").write_text("study: {models: {other: {}}}\n")

    assert run_stage("fit", lambda parser: None, rewrite, ["--params", str(tmp_path)]) == 2
    assert "params.yaml changed while this run was working" in capsys.readouterr().err
    # ... and a stage started on the rewritten file refuses before it does anything.
    assert (
        run_stage(
            "fit", lambda parser: None, lambda args: ran.append(2), ["--params", str(tmp_path)]
        )
        == 2
    )
    assert ran == [1]


def _published(folder: Path, text: str) -> None:
    (folder / "plots").mkdir(parents=True, exist_ok=True)
    (folder / "plots" / "gaps.csv").write_text(text)
    (folder / "metrics.json").write_text(json.dumps({"v": text}))
    (folder / "report.md").write_text(text)


def test_an_incomplete_new_set_is_dropped_and_the_published_one_kept(tmp_path):
    _published(tmp_path, "old")
    _published(tmp_path / STAGING, "new")  # written, but never marked complete
    recover_report(tmp_path)
    assert (tmp_path / "report.md").read_text() == "old"
    assert (tmp_path / "plots" / "gaps.csv").read_text() == "old"
    assert not (tmp_path / STAGING).exists()


def test_a_complete_new_set_replaces_the_published_one_whole(tmp_path):
    _published(tmp_path, "old")
    _published(tmp_path / STAGING, "new")
    (tmp_path / STAGING / "COMPLETE").write_text("")
    # A writer killed after moving plots/ in leaves the rest to the next one.
    os.replace(tmp_path / "plots", tmp_path / ".plots.old")
    os.replace(tmp_path / STAGING / "plots", tmp_path / "plots")
    recover_report(tmp_path)
    assert json.loads((tmp_path / "metrics.json").read_text()) == {"v": "new"}
    assert (tmp_path / "report.md").read_text() == "new"
    assert (tmp_path / "plots" / "gaps.csv").read_text() == "new"
    assert not (tmp_path / STAGING).exists()
