"""Common slips get one line (what, where, how to fix), exit status 2, and write nothing.

Each case is a mistake seen in practice: a copied source config that keeps its original's
``# @package`` line, a Hydra sweep list as a value, a file name given to ``run``, and
``check`` on a file that a host DVC stage has not made yet.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from _host_fixtures import new_pipeline_host, snapshot
from retrograde.cli import main

pytestmark = pytest.mark.dvc


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return new_pipeline_host(tmp_path_factory.mktemp("user-errors") / "host")


@pytest.fixture
def host(template: Path, tmp_path: Path) -> Path:
    return Path(shutil.copytree(template, tmp_path / "host", symlinks=True))


def one_line_error(capsys: pytest.CaptureFixture[str], host: Path, *argv: str) -> str:
    before = snapshot(host)
    status = main([*argv[:1], "--dir", str(host), *argv[1:]])
    out, err = capsys.readouterr()
    assert status == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("retrograde: error: ")
    assert "Traceback" not in err
    assert snapshot(host) == before  # nothing written, not even params.yaml
    return lines[0]


def test_a_copied_source_config_with_its_originals_package_line_names_the_line_to_edit(
    host, capsys
):
    source_dir = host / "conf" / "retrograde" / "source"
    shutil.copy(source_dir / "corpus.yaml", source_dir / "notes.yaml")
    line = one_line_error(capsys, host, "run", "--dry", "source=[corpus,notes]")
    assert "notes.yaml" in line
    assert "'# @package study.sources.corpus'" in line
    assert "'# @package study.sources.notes'" in line  # the fix
    # Selecting only the copy would silently replace 'corpus': refused the same way.
    assert "notes.yaml" in one_line_error(capsys, host, "check", "source=[notes]")


def test_a_comma_list_value_is_told_to_use_brackets(host, capsys):
    line = one_line_error(capsys, host, "run", "--dry", "study.seeds=0,1")
    assert "Ambiguous" not in line
    assert "study.seeds='[0,1]'" in line


def test_a_file_name_given_to_run_is_not_parsed_as_an_override(host, capsys):
    line = one_line_error(capsys, host, "run", "data/corpus.txt")
    assert "mismatched input" not in line
    assert "'data/corpus.txt' is not a config override" in line
    assert "conf/retrograde/source/corpus.yaml" in line


def test_a_bare_word_given_to_run_is_told_the_override_form(host, capsys):
    line = one_line_error(capsys, host, "run", "--dry", "seeds")
    assert "KEY=VALUE" in line


def test_overrides_of_every_form_still_compose(host, capsys):
    argv = ["run", "--dir", str(host), "--dry", "study.seeds=[0,1]", "~study.orders.reverse"]
    assert main([*argv, "+study.models.ngram.params.discount=0.5"]) == 0
    assert "2 fit cells" in capsys.readouterr().out


STAGE = """stages:
  make_notes:
    cmd: python -c "open('data/notes.txt', 'w').write('a b c\\\\n' * 100)"
    outs:
      - data/notes.txt
"""


def test_checking_a_file_a_host_stage_makes_says_to_repro_or_pull(host, capsys, monkeypatch):
    (host / "dvc.yaml").write_text(STAGE)
    monkeypatch.chdir(host)
    before = snapshot(host)
    assert main(["check", "data/notes.txt"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "stage 'make_notes' in dvc.yaml" in err
    assert "`dvc repro`" in err and "`dvc pull data/notes.txt`" in err
    assert snapshot(host) == before
    # the same file as a source of the host's config, in host mode
    line = one_line_error(
        capsys,
        host,
        "check",
        "study.sources.corpus.params.files=[data/notes.txt]",
        "study.sources.corpus.deps=[data/notes.txt]",
    )
    assert "source 'corpus'" in line and "stage 'make_notes'" in line and "dvc pull" in line


def test_a_missing_file_nothing_declares_is_still_a_plain_path_error(host, capsys, monkeypatch):
    monkeypatch.chdir(host)
    assert main(["check", "data/nothing.txt"]) == 2
    assert "no such file; check the path" in capsys.readouterr().err


def test_check_with_a_test_id_no_unit_has_is_one_line_naming_file_and_line(host, capsys):
    (host / "data" / "test_ids.txt").write_text("data/corpus.txt:1\ndata/corpus.txt:99999\n")
    line = one_line_error(
        capsys, host, "check", "study.sources.corpus.split.test_ids=data/test_ids.txt"
    )
    assert "data/test_ids.txt:2: unit id 'data/corpus.txt:99999' matches no document" in line


def test_check_with_a_missing_ids_file_is_one_line(host, capsys):
    line = one_line_error(
        capsys, host, "check", "study.sources.corpus.split.test_ids=data/nope.txt"
    )
    assert "data/nope.txt: file of test unit ids not found" in line


def test_check_says_which_units_a_fixed_test_split_and_a_cap_keep(host, capsys):
    lines = (host / "data" / "corpus.txt").read_text().splitlines()
    numbers = [n for n, line in enumerate(lines, 1) if line.strip()][:2]
    (host / "data" / "test_ids.txt").write_text("".join(f"data/corpus.txt:{n}\n" for n in numbers))
    status = main(
        [
            "check",
            "--dir",
            str(host),
            "study.sources.corpus.split.test_ids=data/test_ids.txt",
            "study.sources.corpus.subsample.max_units=20",
            "study.sources.corpus.subsample.seed=0",
        ]
    )
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "test split: the " in out and "data/test_ids.txt lists" in out
    assert "subsample: 20 of " in out
