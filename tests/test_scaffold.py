"""`retrograde init`: installs conf/ and the stage file into a real git + DVC host, safely."""

from __future__ import annotations

import contextlib
import io
import subprocess
from importlib import resources
from pathlib import Path

import pytest
import yaml

from _host_fixtures import DVC, dvc_events, new_host, sh, snapshot
from retrograde.cli import main
from retrograde.config import compose
from retrograde.host import (
    IGNORE_RULES,
    find_host,
    install,
    planned_files,
    render_dvc_yaml,
    source_config,
)
from retrograde.sources.demo import write_corpus

pytestmark = pytest.mark.dvc

HOST_STAGES = "stages:\n  prepare:\n    cmd: python prepare.py\n    outs:\n      - data/prepared\n"


def _init(capsys, *argv: str) -> tuple[int, str, str]:
    status = main(["init", *argv])
    out, err = capsys.readouterr()
    return status, out, err


def _changed(before: dict[str, bytes], after: dict[str, bytes]) -> set[str]:
    return {p for p in before.keys() | after.keys() if before.get(p) != after.get(p)}


@pytest.fixture
def host(tmp_path, monkeypatch):
    """A committed git + DVC host with its own root dvc.yaml and params.yaml."""
    folder = new_host(tmp_path / "host")
    (folder / "dvc.yaml").write_text(HOST_STAGES)
    (folder / "params.yaml").write_text("prepare: {lowercase: true}\n")
    (folder / "data").mkdir()
    (folder / "data" / "corpus.txt").write_text("one line\nanother line\n")
    sh(["git", "add", "-A"], folder)
    sh(["git", "commit", "-q", "-m", "host pipeline"], folder)
    monkeypatch.chdir(folder)
    return folder


def test_init_writes_only_conf_and_pipeline_folders_and_prints_the_next_command(host, capsys):
    before = snapshot(host)
    status, out, err = _init(capsys)
    assert (status, err) == (0, "")
    changed = _changed(before, snapshot(host))
    assert changed and all(
        p.startswith(("conf/retrograde/", "pipelines/retrograde/")) for p in changed
    )
    assert "dvc.yaml" not in changed and "params.yaml" not in changed
    # The packaged config groups arrive byte for byte.
    package_conf = resources.files("retrograde") / "conf"
    assert (host / "conf/retrograde/config.yaml").read_bytes() == (
        package_conf / "config.yaml"
    ).read_bytes()
    template = (resources.files("retrograde") / "templates" / "dvc.yaml").read_text()
    installed = (host / "pipelines/retrograde/dvc.yaml").read_text()
    # The template, with the units block `run` owns filled in for the default config.
    assert installed == render_dvc_yaml(template, compose(host))
    assert f"cd {host.resolve()} && git add conf/retrograde pipelines/retrograde" in out
    assert out.rstrip().endswith("retrograde run")


def test_the_commit_that_adopts_retrograde_leaves_every_dvc_command_working(host, capsys):
    # A teammate who checks out the adoption commit (before any `retrograde run`) keeps
    # their own pipeline: DVC parses the stage file, whose matrix needs params.yaml.
    assert _init(capsys)[0] == 0
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "Add order-ablation stages"], host)
    (host / "prepare.py").write_text("import os\nos.makedirs('data/prepared', exist_ok=True)\n")
    for argv in (["status"], ["dag"], ["stage", "list", "--all"], ["repro", "prepare"]):
        result = subprocess.run([*DVC, *argv], cwd=host, capture_output=True, text=True)
        assert result.returncode == 0, (argv, result.stderr)
    listed = sh([*DVC, "stage", "list", "--all"], host)
    assert "fit@corpus-ngram-reverse-0" in listed and "prepare" in listed


def test_installed_files_are_what_planned_files_lists(host, capsys):
    _init(capsys)
    for relative, content in planned_files().items():
        if relative.name == "dvc.yaml":  # its units block is filled in (test above)
            continue
        assert (host / relative).read_bytes() == content


def test_git_itself_ignores_the_parallel_logs_but_not_the_stage_file(host, capsys):
    _init(capsys)
    ignored = sh(
        ["git", "check-ignore", "--no-index", "pipelines/retrograde/logs/fit@a.log"], host
    ).strip()
    assert ignored == "pipelines/retrograde/logs/fit@a.log"
    result = subprocess.run(
        ["git", "check-ignore", "-q", "pipelines/retrograde/dvc.yaml"], cwd=host, check=False
    )
    assert result.returncode == 1  # git check-ignore's documented status for "not ignored"


def test_dvc_itself_leaves_the_gitignore_files_it_writes_out_of_folder_hashes(host, capsys):
    _init(capsys)
    written_by_dvc = "pipelines/retrograde/data/corpus/orders/.gitignore"
    # Outside reference: DVC's own `dvc check-ignore` (exit 0 and the path when ignored).
    assert sh([*DVC, "check-ignore", written_by_dvc], host).strip() == written_by_dvc
    result = subprocess.run(
        [*DVC, "check-ignore", "pipelines/retrograde/data/corpus/orders/reverse"],
        cwd=host,
        capture_output=True,
        check=False,
    )
    assert result.returncode == 1  # the outputs themselves are still seen


def test_init_twice_writes_nothing_the_second_time(host, capsys):
    _init(capsys)
    before = snapshot(host)
    status, out, _ = _init(capsys)
    assert status == 0
    assert "already has every file (nothing written)" in out
    assert snapshot(host) == before


def test_a_changed_file_stops_init_before_anything_is_written(host, capsys):
    _init(capsys)
    study = host / "conf/retrograde/study/default.yaml"
    study.write_text(study.read_text() + "# my edit\n")
    (host / "conf/retrograde/config.yaml").unlink()  # would be re-created if init went on
    before = snapshot(host)
    status, out, err = _init(capsys)
    assert status == 2 and out == ""
    assert err.count("\n") == 1
    assert err.startswith("retrograde: error: conf/retrograde/study/default.yaml already exists")
    assert "rerun with --force" in err
    assert snapshot(host) == before


def test_force_keeps_changed_config_files_committed_or_not_and_installs_the_rest(host, capsys):
    _init(capsys)
    study = host / "conf/retrograde/study/default.yaml"
    study.write_text(study.read_text() + "# my committed edit\n")
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "adopt retrograde"], host)
    stats = host / "conf/retrograde/stats/default.yaml"
    stats.write_text(stats.read_text() + "# my uncommitted edit\n")
    (host / "conf/retrograde/config.yaml").unlink()
    edits = {path: path.read_bytes() for path in (study, stats)}
    status, out, err = _init(capsys, "--force")
    assert (status, err) == (0, "")
    assert {path: path.read_bytes() for path in edits} == edits
    assert "kept 2 changed config file(s)" in out
    assert (
        "conf/retrograde/study/default.yaml" in out and "conf/retrograde/stats/default.yaml" in out
    )
    packaged = planned_files()[Path("conf/retrograde/config.yaml")]
    assert (host / "conf/retrograde/config.yaml").read_bytes() == packaged


def _edit_stage_file_outside_the_units_block(host: Path) -> Path:
    stage_file = host / "pipelines/retrograde/dvc.yaml"
    stage_file.write_text(stage_file.read_text().replace("# <<< units stages <<<", "# mine"))
    return stage_file


def test_force_refuses_to_replace_a_stage_file_whose_edits_git_does_not_hold(host, capsys):
    _init(capsys)
    _edit_stage_file_outside_the_units_block(host)
    before = snapshot(host)
    status, out, err = _init(capsys, "--force")
    assert status == 2 and out == "" and err.count("\n") == 1
    assert "pipelines/retrograde/dvc.yaml has edits git has not committed" in err
    assert "nothing was written" in err and snapshot(host) == before


def test_the_missing_markers_advice_repairs_the_stage_file_and_keeps_the_config(host, capsys):
    # Follow the error's advice word for word: commit, then `init --force`.
    _init(capsys)
    study = host / "conf/retrograde/study/default.yaml"
    study.write_text(study.read_text().replace("seeds: [0, 1, 2]", "seeds: [5]"))
    edited = study.read_bytes()
    _edit_stage_file_outside_the_units_block(host)
    status, _, err = _init(capsys, "--force")
    assert status == 2  # uncommitted: refused
    assert main(["run", "--dry"]) == 2
    err = capsys.readouterr().err
    assert "has no units markers; commit it (or move it away)" in err
    assert "`retrograde init --force`, which keeps every changed file in conf/retrograde/" in err
    sh(["git", "add", "pipelines/retrograde/dvc.yaml"], host)
    sh(["git", "commit", "-q", "-m", "my stage file"], host)
    status, out, _ = _init(capsys, "--force")
    assert status == 0 and "pipelines/retrograde/dvc.yaml" in out
    repaired = (host / "pipelines/retrograde/dvc.yaml").read_text()
    # the packaged stage file again (with init's units block for the current config)
    assert "# mine" not in repaired and "# <<< units stages <<<" in repaired
    template = planned_files()[Path("pipelines/retrograde/dvc.yaml")].decode()
    assert repaired.splitlines()[:5] == template.splitlines()[:5]
    assert study.read_bytes() == edited
    assert main(["run", "--dry"]) == 0
    assert "fit@corpus-ngram-reverse-5" in capsys.readouterr().out


@pytest.mark.parametrize("force", [[], ["--force"]])
def test_source_with_a_changed_corpus_config_is_refused_even_with_force(host, capsys, force):
    _init(capsys)
    corpus = host / "conf/retrograde/source/corpus.yaml"
    corpus.write_text(corpus.read_text() + "# mine\n")
    before = snapshot(host)
    status, _, err = _init(capsys, *force, "--source", "data/corpus.txt")
    assert status == 2 and err.count("\n") == 1
    assert "conf/retrograde/source/corpus.yaml already exists" in err
    assert "init never overwrites your config (not even with --force)" in err
    assert snapshot(host) == before


def test_the_units_block_written_by_run_does_not_count_as_a_change(host, capsys):
    _init(capsys)
    stage_file = host / "pipelines/retrograde/dvc.yaml"
    text = stage_file.read_text()
    start = text.index("  # >>>")
    end = text.index("\n", start) + 1
    units = "  units:\n    matrix: {source: [corpus]}\n    cmd: python -m retrograde.stages.units\n"
    stage_file.write_text(text[:end] + units + text[end:])
    # No "already exists with other content": the block is rewritten as `run` writes it.
    assert _init(capsys)[0] == 0
    assert stage_file.read_text() == text


def test_ignore_rules_merge_with_lines_dvc_appended(host, capsys):
    _init(capsys)
    ignore = host / "pipelines/retrograde/.gitignore"
    ignore.write_text(ignore.read_text() + "/metrics-cache\n")  # as DVC appends its outputs
    assert _init(capsys)[0] == 0
    lines = ignore.read_text().splitlines()
    assert lines.count("/metrics-cache") == 1
    assert all(lines.count(rule) == 1 for rule in IGNORE_RULES)


def test_outside_a_git_repository_init_says_to_run_git_init_and_writes_nothing(tmp_path, capsys):
    plain = tmp_path / "plain"
    plain.mkdir()
    status, out, err = _init(capsys, "--dir", str(plain))
    assert status == 2 and out == "" and err.count("\n") == 1
    assert f"run `git init {plain.resolve()}` first" in err
    assert list(plain.iterdir()) == []


def test_without_dvc_init_says_to_run_dvc_init_and_writes_nothing(tmp_path, capsys):
    folder = new_host(tmp_path / "nodvc", with_dvc=False)
    before = snapshot(folder)
    status, _, err = _init(capsys, "--dir", str(folder))
    assert status == 2 and err.count("\n") == 1
    assert "dvc init" in err and "DVC is not initialised" in err
    assert snapshot(folder) == before


def test_source_paths_become_the_corpus_files_and_dvc_dependencies(host, capsys):
    status, _, _ = _init(capsys, "--source", "data/corpus.txt", "data/prepared/extra.txt")
    assert status == 0
    corpus = yaml.safe_load((host / "conf/retrograde/source/corpus.yaml").read_text())
    assert corpus["params"]["files"] == ["data/corpus.txt", "data/prepared/extra.txt"]
    assert corpus["deps"] == ["data/corpus.txt", "data/prepared/extra.txt"]
    header = (host / "conf/retrograde/source/corpus.yaml").read_text().splitlines()[0]
    assert header == "# @package study.sources.corpus"


def test_source_paths_are_taken_relative_to_the_current_folder(host, capsys, monkeypatch):
    monkeypatch.chdir(host / "data")
    assert _init(capsys, "--dir", str(host), "--source", "corpus.txt")[0] == 0
    corpus = yaml.safe_load((host / "conf/retrograde/source/corpus.yaml").read_text())
    assert corpus["params"]["files"] == ["data/corpus.txt"]


def test_outputs_of_nested_stage_files_count_from_their_wdir(host, capsys):
    nested = host / "stages" / "prep"
    nested.mkdir(parents=True)
    (nested / "dvc.yaml").write_text(
        "stages:\n  make:\n    wdir: ../..\n    cmd: python make.py\n"
        "    outs:\n      - data/made.txt:\n          cache: true\n"
    )
    assert _init(capsys, "--source", "data/made.txt")[0] == 0


def test_data_tracked_by_dvc_add_but_not_pulled_is_a_valid_source(host, capsys):
    (host / "data" / "big.txt").write_text("a corpus tracked by DVC\n")
    sh([*DVC, "add", "-q", "data/big.txt"], host)
    (host / "data" / "big.txt").unlink()  # as in a fresh clone before `dvc pull`
    assert _init(capsys, "--source", "data/big.txt")[0] == 0
    corpus = yaml.safe_load((host / "conf/retrograde/source/corpus.yaml").read_text())
    assert corpus["deps"] == ["data/big.txt"]


def test_a_missing_source_that_no_host_stage_writes_is_refused_in_one_line(host, capsys):
    before = snapshot(host)
    status, _, err = _init(capsys, "--source", "data/typo.txt")
    assert status == 2 and err.count("\n") == 1
    assert "source 'data/typo.txt' does not exist" in err and "no stage or .dvc file" in err
    assert snapshot(host) == before


def test_a_source_outside_the_repository_is_refused_in_one_line(host, tmp_path, capsys):
    outside = tmp_path / "elsewhere.txt"
    outside.write_text("x\n")
    before = snapshot(host)
    status, _, err = _init(capsys, "--source", str(outside))
    assert status == 2 and "is outside the host repository" in err
    assert snapshot(host) == before


def test_a_symbolic_link_leading_out_of_the_two_folders_is_refused(host, tmp_path, capsys):
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (host / "conf").mkdir()
    (host / "conf" / "retrograde").symlink_to(elsewhere)
    status, _, err = _init(capsys)
    assert status == 2 and "would be written outside conf/retrograde/" in err
    assert list(elsewhere.iterdir()) == []


def test_install_reports_written_and_unchanged_paths(host):
    files = planned_files()
    first = install(find_host(host), files)
    second = install(find_host(host), files)
    assert len(first.written) == len(files) + 2  # + .gitignore and .dvcignore
    assert second.written == [] and len(second.unchanged) == len(files) + 2


def test_source_config_keeps_the_package_header_and_other_keys():
    template = (resources.files("retrograde") / "conf" / "source" / "corpus.yaml").read_bytes()
    rewritten = source_config(template, ["a.txt"])
    original = yaml.safe_load(template)
    updated = yaml.safe_load(rewritten)
    assert updated["params"]["files"] == ["a.txt"] and updated["deps"] == ["a.txt"]
    for key in original:
        if key not in ("params", "deps"):
            assert updated[key] == original[key]
    assert rewritten.startswith(b"# @package study.sources.corpus\n")


@pytest.mark.slow
def test_a_source_written_by_a_host_stage_connects_the_two_pipelines(tmp_path, monkeypatch):
    host = new_host(tmp_path / "upstream")
    write_corpus(host / "raw.txt", size_bytes=4000, seed=1)
    (host / "prepare.py").write_text(
        "import pathlib\n"
        "out = pathlib.Path('data/prepared')\n"
        "out.mkdir(parents=True, exist_ok=True)\n"
        "(out / 'corpus.txt').write_text(pathlib.Path('raw.txt').read_text().lower())\n"
    )
    (host / "dvc.yaml").write_text(
        "stages:\n  prepare:\n    cmd: python prepare.py\n"
        "    deps: [prepare.py, raw.txt]\n    outs: [data/prepared]\n"
    )
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "host pipeline"], host)
    monkeypatch.chdir(host)
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["init", "--source", "data/prepared/corpus.txt"]) == 0
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        status = main(["run", "study=smoke", "study.seeds=[0]"])
    assert status == 0, err.getvalue()
    ran = dvc_events(host)["ran"]
    # DVC ran the host's own stage first, because the corpus is a declared dependency.
    assert ran[:2] == ["prepare", "units_corpus"], ran
    assert "table" in ran
