"""Every user error is one stderr line, exit status 2, and leaves the host as it was.

Each test breaks one thing in a real git + DVC host (after ``retrograde init``), calls the
CLI and checks the status, that stderr is one line naming what, where and how to fix, and
that nothing was written (a snapshot of the host before and after).
"""

from __future__ import annotations

import contextlib
import io
import os
from pathlib import Path

import pytest

from _host_fixtures import new_pipeline_host, snapshot
from retrograde.cli import main
from retrograde.stages import units as units_stage

pytestmark = pytest.mark.dvc

STUDY = "conf/retrograde/study/default.yaml"


@pytest.fixture
def host(tmp_path) -> Path:
    return new_pipeline_host(tmp_path / "host")


def one_line_error(capsys, host: Path, *argv: str) -> str:
    """Run ``retrograde ARGV --dir HOST``; assert status 2, one stderr line, nothing written."""
    before = snapshot(host)
    status = main([*argv[:1], "--dir", str(host), *argv[1:]])
    out, err = capsys.readouterr()
    assert status == 2, (out, err)
    assert err.startswith("retrograde: error: ") and err.count("\n") == 1, err
    assert snapshot(host) == before
    return err


def edit(host: Path, relative: str, old: bytes, new: bytes) -> None:
    path = host / relative
    data = path.read_bytes()
    assert old in data
    path.write_bytes(data.replace(old, new, 1))


# ------------------------------------------------------------------------ config files
@pytest.mark.parametrize("command", [["run", "--dry"], ["check"], ["run"]])
@pytest.mark.parametrize(
    ("old", "new", "expected"),
    [
        (b"seeds: [0, 1, 2]", b"seeds: [0, 1, 2", f"{STUDY}:"),  # unclosed flow list
        (
            b"seeds: [0, 1, 2]",
            b"seeds: [0, 1, 2]\nseeds: [3]",
            f"{STUDY}:9:1: duplicate key 'seeds'",
        ),
        (b"The grid", b"The gr\xe9d", f"{STUDY}:2: not UTF-8 (byte 0xe9"),
        (b"# @package study", b"# @package study..models", f"{STUDY}:1: bad header"),
        (b"# @package study", b"# @package study extra", f"{STUDY}:1: bad header"),
        (b"# @package study", b"# @pakage study", "unknown header '# @pakage study'"),
        (b"# @package study\n", b"# a comment\n# @package study\n", "move it to the top"),
        (
            b"seeds: [0, 1, 2]",
            b"seeds: !!python/tuple [0, 1, 2]",
            "'!!python/tuple' is not allowed",
        ),
    ],
    ids=[
        "syntax",
        "duplicate-key",
        "not-utf8",
        "header-path",
        "header-words",
        "header-key",
        "header-late",
        "python-tag",
    ],
)
def test_a_broken_config_file_is_one_line_naming_file_and_line(
    host, capsys, command, old, new, expected
):
    edit(host, STUDY, old, new)
    assert expected in one_line_error(capsys, host, *command)


def test_a_python_tag_is_refused_before_anything_is_constructed(host, capsys):
    edit(
        host, STUDY, b"sweeps: {}", b"sweeps: {}\nx: !!python/object/apply:os.system [touch PWNED]"
    )
    assert "is not allowed" in one_line_error(capsys, host, "run", "--dry")
    assert not list(host.parent.rglob("PWNED"))


def test_a_fifo_among_the_config_files_is_refused_instead_of_blocking(host, capsys):
    os.mkfifo(host / "conf/retrograde/study/mine.yaml")
    err = one_line_error(capsys, host, "run", "--dry")
    assert "conf/retrograde/study/mine.yaml is not a regular file" in err


def test_a_broken_file_the_composition_does_not_use_is_refused_too(host, capsys):
    edit(host, "conf/retrograde/source/markov.yaml", b"name: markov", b"name: markov\nname: x")
    err = one_line_error(capsys, host, "run", "--dry")
    assert "conf/retrograde/source/markov.yaml:" in err and "duplicate key 'name'" in err


# ------------------------------------------------------------------------------- models
@pytest.mark.parametrize(
    "override",
    ["+study.models.mlp={params: {hidden: 8}}", "~study.models.ngram.family"],
)
def test_a_model_without_family_is_refused_instead_of_becoming_an_ngram(host, capsys, override):
    err = one_line_error(capsys, host, "run", "--dry", override)
    assert "has no family; add family: NAME (one of " in err and "ngram" in err
    assert "_target_: package.Class" in err


def test_a_model_without_family_in_a_config_file_is_refused(host, capsys):
    edit(host, STUDY, b"ngram: {family: ngram, params: {order: 3}}", b"ngram: {params: {order: 3}}")
    assert "study.models.ngram has no family" in one_line_error(capsys, host, "check")


# ------------------------------------------------------------------------ source files
def use_files(*paths: str, deps: list[str] | None = None) -> list[str]:
    """Overrides pointing the corpus source at ``paths`` (deps: listed, or found when None)."""
    files = f"study.sources.corpus.params.files=[{','.join(paths)}]"
    if deps is None:
        return [files, "~study.sources.corpus.deps"]
    return [files, f"study.sources.corpus.deps=[{','.join(deps)}]"]


@pytest.mark.parametrize(
    ("files", "deps"),
    [
        (["data/pipe.txt"], ["data/pipe.txt"]),  # named, and listed as a dependency
        (["data/*.txt"], None),  # matched by a glob
        (["data/corpus.txt"], ["data"]),  # inside a folder DVC would hash
    ],
    ids=["named", "glob", "in-deps-folder"],
)
@pytest.mark.parametrize("command", [["run", "--dry"], ["check"]])
def test_a_fifo_as_a_source_is_refused_instead_of_hanging_dvc(host, capsys, files, deps, command):
    os.mkfifo(host / "data" / "pipe.txt")
    err = one_line_error(capsys, host, *command, *use_files(*files, deps=deps))
    assert "data/pipe.txt" in err and "not a regular file" in err


def test_the_units_stage_refuses_a_fifo_put_in_place_of_a_source_file(host, capsys):
    pipeline = host / "pipelines" / "retrograde"
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        assert main(["check", "--dir", str(host)]) == 0  # writes params.yaml
    (host / "data" / "corpus.txt").unlink()
    os.mkfifo(host / "data" / "corpus.txt")
    status = units_stage.main(["--params", str(pipeline), "--source", "corpus"])
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1
    assert "FIFO" in err and "not a regular file" in err
    assert not (pipeline / "data").exists()


@pytest.mark.parametrize("path", [".git/config", ".dvc/config", ".git/HEAD"])
def test_files_of_git_or_dvc_as_a_source_are_refused(host, capsys, path):
    err = one_line_error(capsys, host, "run", "--dry", *use_files(path, deps=[path]))
    assert f"lies inside {path.split('/')[0]}/" in err


@pytest.mark.parametrize(
    ("name", "expected"),
    [
        (b"line\nbreak.txt", "control character '\\n'"),
        (b"${HOME}.txt", "holds '${', which DVC reads as a variable"),
        (b"caf\xe9.txt", "is not valid UTF-8"),
        (b"part[1].txt", "holds '[', a glob character"),
    ],
    ids=["newline", "dvc-variable", "not-utf8", "glob"],
)
def test_a_file_name_dvc_or_yaml_would_misread_is_refused_naming_the_file(
    host, capsys, name, expected
):
    with open(os.path.join(os.fsencode(host / "data"), name), "wb") as handle:
        handle.write(b"some text\nmore text\n")
    err = one_line_error(capsys, host, "run", "--dry", *use_files("data/*.txt"))
    assert expected in err and "rename the file" in err


def test_run_dry_with_a_missing_source_file_is_refused(host, capsys):
    (host / "data" / "corpus.txt").unlink()
    err = one_line_error(capsys, host, "run", "--dry")
    assert "study.sources.corpus:" in err and "'data/corpus.txt' not found" in err
    assert "no stage or .dvc file of the host writes its deps (data/corpus.txt)" in err


def test_a_missing_source_file_that_a_host_stage_writes_is_fine(host, capsys):
    (host / "dvc.yaml").write_text(
        "stages:\n  prepare:\n    cmd: python prepare.py\n    outs: [data/prepared]\n"
    )
    overrides = use_files("data/prepared/corpus.txt", deps=["data/prepared/corpus.txt"])
    assert main(["run", "--dry", "--dir", str(host), *overrides]) == 0
    assert "fit@corpus-ngram-reverse-0" in capsys.readouterr().out


# ------------------------------------------------------------------------- line ends
def test_lone_carriage_returns_in_a_source_stop_check_naming_file_and_line(host, capsys):
    (host / "data" / "corpus.txt").write_bytes(b"one line\r\nanother\rand a third\r\n" * 20)
    err = one_line_error(capsys, host, "check")
    assert "data/corpus.txt:2: carriage return without a line feed" in err


def test_lone_carriage_returns_stop_check_file(tmp_path, capsys):
    path = tmp_path / "old-mac.txt"
    path.write_bytes(b"one\rtwo\rthree\r" * 10)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"{path}:1: carriage return without a line feed" in err
