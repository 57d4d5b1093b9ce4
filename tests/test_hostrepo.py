"""hostrepo: locating the host repository and running git/DVC as argument lists."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from _host_fixtures import DVC, dvc_init, git_init, new_host, sh
from retrograde.errors import HostRepoError
from retrograde.host import (
    HostRepo,
    find_host,
    git_toplevel,
    last_error_line,
    run_dvc,
    run_git,
    run_tool,
)

pytestmark = pytest.mark.dvc


def test_find_host_from_a_subfolder_returns_the_folder_dvc_itself_calls_root(tmp_path):
    host = new_host(tmp_path / "host")
    sub = host / "src" / "deep"
    sub.mkdir(parents=True)
    found = find_host(sub)
    assert found.root == host.resolve()
    assert found.git_root == host.resolve()
    # Outside reference: DVC's own `dvc root` (prints the root relative to the folder).
    assert (sub / sh([*DVC, "root"], sub).strip()).resolve() == found.root


@pytest.mark.slow  # two DVC inits from scratch
def test_a_folder_above_a_dvc_subdir_project_is_not_a_host(tmp_path):
    monorepo = tmp_path / "mono"
    git_init(monorepo)
    project = monorepo / "projects" / "lm"
    project.mkdir(parents=True)
    dvc_init(project, "--subdir")
    with pytest.raises(HostRepoError, match="DVC is not initialised in"):
        find_host(project.parent)


@pytest.mark.slow  # two DVC inits from scratch
def test_find_host_inside_a_dvc_subdir_project_stops_at_that_project(tmp_path):
    monorepo = tmp_path / "mono"
    git_init(monorepo)
    project = monorepo / "projects" / "lm"
    (project / "data").mkdir(parents=True)
    dvc_init(project, "--subdir")
    found = find_host(project / "data")
    assert found.root == project.resolve()
    assert found.git_root == monorepo.resolve()
    assert (project / "data" / sh([*DVC, "root"], project / "data").strip()).resolve() == found.root


def test_outside_git_the_error_is_one_line_naming_the_folder_and_git_init(tmp_path):
    plain = tmp_path / "plain"
    plain.mkdir()
    with pytest.raises(HostRepoError) as info:
        find_host(plain)
    message = str(info.value)
    assert "\n" not in message
    assert "is not inside a git repository" in message
    assert f"git init {plain.resolve()}" in message


def test_a_missing_folder_is_reported_before_git_is_asked(tmp_path):
    with pytest.raises(HostRepoError, match="does not exist; pass --dir"):
        git_toplevel(tmp_path / "nope")


def test_git_without_dvc_says_exactly_which_commands_to_run(tmp_path):
    host = new_host(tmp_path / "host", with_dvc=False)
    with pytest.raises(HostRepoError) as info:
        find_host(host)
    assert f"DVC is not initialised in {host.resolve()}" in str(info.value)
    assert f"cd {host.resolve()} && dvc init && git commit" in str(info.value)
    # Following the advice works (the advice is a real command line, not prose).
    sh([*DVC, "init", "-q"], host)
    assert find_host(host).root == host.resolve()


def test_require_dvc_false_accepts_a_plain_git_repository(tmp_path):
    host = new_host(tmp_path / "host", with_dvc=False)
    assert find_host(host, require_dvc=False).root == host.resolve()


def test_stage_targets_are_qualified_with_the_pipeline_file():
    host = HostRepo(root=Path("/r"), git_root=Path("/r"))
    assert host.target("units@demo") == "pipelines/retrograde/dvc.yaml:units@demo"
    assert host.target("other/dvc.yaml:prepare") == "other/dvc.yaml:prepare"
    assert host.params_file == Path("/r/pipelines/retrograde/params.yaml")
    assert host.conf_dir == Path("/r/conf/retrograde")


def test_arguments_never_pass_through_a_shell(tmp_path):
    # Common practice, no source: list argv + shell=False means metacharacters stay literal.
    result = run_tool(
        [sys.executable, "-c", "import sys; print(sys.argv[1])", "x; touch pwned"], cwd=tmp_path
    )
    assert result.stdout == "x; touch pwned\n"
    assert not (tmp_path / "pwned").exists()


def test_a_command_log_that_is_a_symlink_out_of_the_repository_is_replaced(tmp_path):
    outside = tmp_path / "outside.txt"
    outside.write_text("precious\n")
    log = tmp_path / "repo" / "logs" / "stage.log"
    log.parent.mkdir(parents=True)
    log.symlink_to(outside)
    run_tool([sys.executable, "-c", "print('hi')"], cwd=tmp_path, log_path=log)
    assert outside.read_text() == "precious\n"
    assert not log.is_symlink() and log.read_text().endswith("hi\n")


def test_a_missing_program_is_one_line_saying_to_install_it(tmp_path):
    with pytest.raises(HostRepoError, match=r"`no-such-tool-xyz` is not installed or not on PATH"):
        run_tool(["no-such-tool-xyz", "--version"], cwd=tmp_path)


def test_a_failed_dvc_command_is_one_line_with_status_folder_and_dvc_error(tmp_path):
    host = new_host(tmp_path / "host")
    log = tmp_path / "logs" / "repro.log"
    with pytest.raises(HostRepoError) as info:
        run_dvc(host, ["repro", "-s", "no/such/dvc.yaml:stage"], log_path=log)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith("`dvc repro -s no/such/dvc.yaml:stage` failed with exit status ")
    assert f"in {host}" in message and "ERROR:" in message and f"see {log}" in message
    assert log.read_text().startswith("$ dvc repro -s no/such/dvc.yaml:stage\n")


def test_unchecked_commands_return_their_status_instead_of_raising(tmp_path):
    host = new_host(tmp_path / "host")
    assert run_git(host, ["rev-parse", "--verify", "no-such-branch"], check=False).returncode != 0
    assert run_git(host, ["rev-parse", "--abbrev-ref", "HEAD"]).stdout.strip() == "main"


def test_last_error_line_prefers_the_tools_error_line_and_stays_short():
    dvc_output = (
        "Running stage 'fit':\n> python x.py\nERROR: failed to reproduce 'fit': boom\nhint\n"
    )
    assert last_error_line(dvc_output) == "ERROR: failed to reproduce 'fit': boom"
    assert last_error_line("fatal: not a git repository\n") == "fatal: not a git repository"
    assert last_error_line("Traceback (most recent call last):\n  ...\nValueError: bad\n") == (
        "ValueError: bad"
    )
    assert len(last_error_line("x" * 1000)) == 300
