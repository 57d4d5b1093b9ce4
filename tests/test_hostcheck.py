"""`retrograde check --dir HOST [OVERRIDES]`: config, round trip on the data, cells to run."""

from __future__ import annotations

import ast
import contextlib
import io
import json
import shutil

import pytest

from _host_fixtures import DVC, dvc_events, new_host, new_pipeline_host, sh, snapshot
from retrograde.cli import main
from retrograde.host import format_host_check

pytestmark = pytest.mark.dvc

SMOKE = "study=smoke"
# each seed of the n-gram trains on its own half-sample: a fit stage per order and seed
FITS = [f"fit@corpus-ngram-{o}-{s}" for o in ("forward", "reverse") for s in (0, 1)]


def _check(capsys, *argv: str) -> tuple[int, str, str]:
    status = main(["check", *argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_before_any_run_every_cell_is_to_run_and_every_order_round_trips(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    status, out, err = _check(capsys, "--dir", str(host), "--json", SMOKE)
    assert (status, err) == (0, "")
    report = json.loads(out)
    assert report["grid"]["cells"] == 4 and report["grid"]["fit_stages"] == 4
    assert report["cells"] == {"to_run": FITS, "up_to_date": [], "stale_inputs": {}}
    # init wrote the default config's files; the smoke study changes only the params
    assert report["written"] == ["pipelines/retrograde/params.yaml"]
    corpus = report["round_trip"]["corpus"]
    assert corpus["orders"] == ["forward", "reverse"] and corpus["units"] > 0
    # The check brought params.yaml up to date the way `run` does: DVC itself now lists the
    # same fit stages (outside reference: `dvc stage list`).
    listed = sh([*DVC, "stage", "list", "--name-only", "pipelines/retrograde/dvc.yaml"], host)
    assert [n.split(":", 1)[1] for n in listed.split() if ":fit@" in n] == FITS


def test_check_says_which_tracked_files_it_rewrote_and_only_when_it_did(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    status, out, _ = _check(capsys, "--dir", str(host), SMOKE)
    assert status == 0
    written = "pipelines/retrograde/params.yaml"  # init wrote the stage file for this grid
    assert f"wrote {written}: brought up to date from the config" in out
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "composed"], host)
    status, out, _ = _check(capsys, "--dir", str(host), SMOKE)
    assert status == 0 and "wrote" not in out  # nothing changed, nothing written or said
    assert sh(["git", "status", "--porcelain"], host) == ""
    status, out, _ = _check(capsys, "--dir", str(host), SMOKE, "study.seeds=[4]")
    assert "wrote pipelines/retrograde/params.yaml:" in out
    changed = sh(["git", "status", "--porcelain"], host).split()
    assert changed == ["M", "pipelines/retrograde/params.yaml"]


@pytest.mark.slow
def test_cells_check_calls_to_run_are_exactly_those_run_then_fits(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    first = io.StringIO()
    with contextlib.redirect_stderr(first), contextlib.redirect_stdout(io.StringIO()):
        assert main(["run", "--dir", str(host), SMOKE]) == 0, first.getvalue()
    shutil.rmtree(host / "pipelines/retrograde/cells/corpus/ngram/reverse/seed1")
    grid = [SMOKE, "study.seeds=[0,1,2]"]
    status, out, _ = _check(capsys, "--dir", str(host), "--json", *grid)
    to_run = json.loads(out)["cells"]["to_run"]
    assert status == 0
    assert to_run == [
        "fit@corpus-ngram-forward-2",
        "fit@corpus-ngram-reverse-1",
        "fit@corpus-ngram-reverse-2",
    ]
    # Outside reference: what DVC then reproduces (the deleted cell comes back from the
    # local run-cache instead of a new fit; either way DVC had to act on it).
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        assert main(["run", "--dir", str(host), *grid]) == 0, err.getvalue()
    events = dvc_events(host)
    acted = sorted(events["ran"] + events["restored"])
    assert [name for name in acted if name.startswith("fit@")] == sorted(to_run)


def test_an_order_that_is_not_a_bijection_fails_the_check_with_exit_one(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    override = "+study.orders.sorted={name:_host_fixtures.SortTokens}"
    status, out, err = _check(capsys, "--dir", str(host), SMOKE, override)
    assert status == 1 and out == ""
    assert err.startswith("retrograde check: round trip failed: ") and "sorted" in err
    assert snapshot(host) == before  # refused before anything was written


def test_a_bad_override_is_one_line_exit_two(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    status, out, err = _check(capsys, "--dir", str(host), "study.sedes=[0]")
    assert status == 2 and out == "" and err.count("\n") == 1


def test_a_host_without_init_is_told_to_run_init(tmp_path, capsys):
    host = new_host(tmp_path / "host")
    status, _, err = _check(capsys, "--dir", str(host))
    assert status == 2 and f"run `retrograde init --dir {host.resolve()}` first" in err


def test_plain_check_inside_a_host_checks_that_host_and_takes_overrides(
    tmp_path, capsys, monkeypatch
):
    host = new_pipeline_host(tmp_path / "host")
    monkeypatch.chdir(host / "data")  # anywhere inside the host
    status, out, err = _check(capsys, SMOKE, "study.seeds=[0]")
    assert (status, err) == (0, "")
    assert "= 2 fit cells" in out.splitlines()[0]


def test_plain_check_outside_a_repository_says_to_run_git_init(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    status, _, err = _check(capsys)
    assert status == 2 and "is not inside a git repository" in err


def test_the_text_report_lists_cells_to_run():
    text = format_host_check(
        {
            "grid": {
                "sources": ["s"],
                "models": ["m"],
                "orders": ["f"],
                "seeds": [0, 1],
                "cells": 2,
            },
            "round_trip": {"s": {"units": 3, "tokens": 9, "orders": ["f"]}},
            "cells": {"to_run": ["fit@s-m-f-1"], "up_to_date": ["fit@s-m-f-0"]},
        }
    )
    assert text.splitlines()[-2:] == ["cells: 1 up to date, 1 to run", "  to run: fit@s-m-f-1"]


PREPARE = """\
import pathlib
text = "{text}"
pathlib.Path("data").mkdir(exist_ok=True)
pathlib.Path("data/corpus.txt").write_text("\\n".join(f"{{text}} {{i}}" for i in range(200)) + "\\n")
"""


@pytest.mark.slow
def test_a_changed_host_stage_upstream_of_a_source_puts_its_cells_to_run(tmp_path, capsys):
    # Outside reference: `dvc status` itself reports the host's edited stage as changed.
    host = new_host(tmp_path / "host")
    (host / "prepare.py").write_text(PREPARE.format(text="the lamp is lit"))
    (host / "dvc.yaml").write_text(
        "stages:\n  prepare:\n    cmd: python prepare.py\n    deps: [prepare.py]\n"
        "    outs: [data/corpus.txt]\n"
    )
    sh([*DVC, "repro", "prepare"], host)
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["init", "--dir", str(host), "--source", str(host / "data/corpus.txt")]) == 0
    with contextlib.redirect_stderr(io.StringIO()), contextlib.redirect_stdout(io.StringIO()):
        assert main(["run", "--dir", str(host), SMOKE]) == 0
    (host / "prepare.py").write_text(PREPARE.format(text="the pump is off"))
    assert "prepare" in sh([*DVC, "status", "prepare"], host)
    status, out, _ = _check(capsys, "--dir", str(host), "--json", SMOKE)
    cells = json.loads(out)["cells"]
    assert status == 0 and cells["to_run"] == FITS and cells["up_to_date"] == []
    assert cells["stale_inputs"] == {"corpus": ["prepare"]}
    text = format_host_check(json.loads(out))
    assert "stage(s) prepare must remake first" in text


def test_check_prints_each_source_vocabulary_and_round_trips_a_text_separator(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    words = "+study.orders.words={name: segment_reverse, params: {separators: ' '}}"
    status, out, err = _check(capsys, "--dir", str(host), "--json", SMOKE, words)
    assert (status, err) == (0, "")
    corpus = json.loads(out)["round_trip"]["corpus"]
    assert corpus["orders"] == ["forward", "reverse", "words"]
    vocabulary = corpus["vocabulary"]
    tokens = vocabulary["tokens"]
    assert vocabulary["tokenizer"] == "chars" and len(tokens) == vocabulary["size"]
    assert tokens[0] == "<unknown>" and "' '" in tokens
    # Each entry is an escaped Python literal (reference: ast.literal_eval reads it back);
    # chars ids follow code-point order (docs/sources.md, tokenizers).
    characters = [ast.literal_eval(t) for t in tokens[1:]]
    assert characters == sorted(characters) and all(len(c) == 1 for c in characters)
    status, out, _ = _check(capsys, "--dir", str(host), SMOKE)
    assert status == 0 and "vocabulary of 'corpus' (chars, " in out and " 0 <unknown>" in out
    status, full, _ = _check(capsys, "--dir", str(host), SMOKE, "--vocab")
    assert status == 0 and "first " not in full and len(full) >= len(out)


def test_check_refuses_a_text_separator_outside_a_source_vocabulary_in_one_line(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    words = "+study.orders.words={name: segment_reverse, params: {separators: '☃'}}"
    status, _, err = _check(capsys, "--dir", str(host), SMOKE, words)
    assert status == 2 and len(err.strip().splitlines()) == 1
    assert "study.orders.words on source 'corpus': separator '☃' is not in the chars" in err


def test_the_text_report_truncates_a_large_vocabulary_and_names_the_flag():
    tokens = ["<unknown>", *[repr(f"w{i}") for i in range(1, 500)]]
    report = {
        "grid": {
            "sources": ["s"],
            "models": ["m"],
            "orders": ["forward"],
            "seeds": [0],
            "cells": 1,
        },
        "round_trip": {
            "s": {
                "units": 3,
                "tokens": 9,
                "orders": ["forward"],
                "vocabulary": {"size": 500, "tokenizer": "words", "tokens": tokens},
            }
        },
        "cells": {"to_run": [], "up_to_date": []},
    }
    text = format_host_check(report)
    assert "first 40; `check --vocab` or `--json` lists all" in text
    assert " 39 'w39'" in text and "'w40'" not in text
    assert "'w499'" in format_host_check(report, vocabulary_limit=None)
    report["round_trip"]["s"]["vocabulary"] = {"size": 2, "tokenizer": None, "tokens": None}
    assert "vocabulary of 's': ids 0..1 (token ids, no text tokenizer)" in format_host_check(report)
