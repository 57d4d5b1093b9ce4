"""`retrograde plan`: the fit stages of one CI shard, from the composed config."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from _host_fixtures import new_host, new_pipeline_host, snapshot
from retrograde.cli import main
from retrograde.errors import ConfigError
from retrograde.host import parse_shard, shard_of

SMOKE = ["study=smoke"]  # one source, one model, two orders, two seeds: 4 fit stages
TARGET = "pipelines/retrograde/dvc.yaml:"


def _plan(capsys, *argv: str) -> tuple[int, list[str], str]:
    status = main(["plan", *argv])
    out, err = capsys.readouterr()
    return status, out.splitlines(), err


@given(st.integers(0, 60), st.integers(1, 12))
def test_the_shards_partition_the_stages_and_differ_in_size_by_at_most_one(n_names, count):
    names = [f"fit@s-m-o-{i}" for i in range(n_names)]
    shards = [shard_of(names, index, count) for index in range(1, count + 1)]
    assert sorted(name for shard in shards for name in shard) == sorted(names)
    assert len({name for shard in shards for name in shard}) == n_names
    sizes = [len(shard) for shard in shards]
    assert max(sizes) - min(sizes) <= 1


def test_round_robin_spreads_one_models_block_over_every_shard():
    names = [f"{model}-{seed}" for model in ("slow", "fast") for seed in range(4)]
    assert shard_of(names, 1, 2) == ["slow-0", "slow-2", "fast-0", "fast-2"]
    assert shard_of(names, 2, 2) == ["slow-1", "slow-3", "fast-1", "fast-3"]


@pytest.mark.parametrize("text", ["0/2", "3/2", "x", "1/0", "-1/2", "", "1/2/3", "1.5/2"])
def test_bad_shard_specs_are_refused_naming_the_value_and_the_form(text):
    with pytest.raises(ConfigError, match=r"allowed: I/N with 1 <= I <= N"):
        parse_shard(text)


@pytest.mark.parametrize(
    "text,expected", [("1/1", (1, 1)), (" 3 / 4 ", (3, 4)), ("12/12", (12, 12))]
)
def test_good_shard_specs_parse_to_index_and_count(text, expected):
    assert parse_shard(text) == expected


@pytest.mark.dvc
def test_plan_lists_the_smoke_grid_in_matrix_order_and_writes_nothing(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    status, lines, err = _plan(capsys, "--dir", str(host), *SMOKE)
    assert status == 0
    assert lines == [
        f"{TARGET}fit@corpus-ngram-forward-0",
        f"{TARGET}fit@corpus-ngram-forward-1",
        f"{TARGET}fit@corpus-ngram-reverse-0",
        f"{TARGET}fit@corpus-ngram-reverse-1",
    ]
    assert err == "retrograde plan: shard 1/1: 4 of 4 fit stages\n"
    assert snapshot(host) == before


@pytest.mark.dvc
def test_shards_of_a_grid_with_overrides_cover_it_exactly_once(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    grid = [*SMOKE, "study.seeds=[0,1,2]"]
    full = _plan(capsys, "--dir", str(host), "--bare", *grid)[1]
    assert len(full) == 6 and all(name.startswith("fit@corpus-ngram-") for name in full)
    shards = [
        _plan(capsys, "--dir", str(host), "--bare", "--shard", f"{i}/4", *grid)[1]
        for i in (1, 2, 3, 4)
    ]
    assert [len(shard) for shard in shards] == [2, 2, 1, 1]
    assert sorted(sum(shards, [])) == sorted(full)


@pytest.mark.dvc
def test_plan_before_init_says_to_run_init(tmp_path, capsys):
    host = new_host(tmp_path / "host")
    status, lines, err = _plan(capsys, "--dir", str(host))
    assert status == 2 and lines == [] and err.count("\n") == 1
    assert f"run `retrograde init --dir {host.resolve()}` first" in err


@pytest.mark.dvc
def test_a_bad_shard_on_the_command_line_is_one_line_exit_two(tmp_path, capsys):
    status, lines, err = _plan(capsys, "--dir", str(tmp_path), "--shard", "3/2")
    assert status == 2 and lines == []
    assert err == (
        "retrograde: error: option --shard: '3/2' is invalid; allowed: I/N with 1 <= I <= N, e.g. 1/4\n"
    )


@pytest.mark.dvc
def test_the_preview_shown_in_docs_ci_md_is_what_plan_prints(tmp_path, capsys, monkeypatch):
    page = (Path(__file__).resolve().parents[1] / "docs" / "ci.md").read_text()
    block = re.search(
        r"^```text\n\$ retrograde (?P<argv>.*?)\n(?P<shown>.*?)^```", page, re.M | re.S
    )
    assert block is not None
    host = new_pipeline_host(tmp_path / "host")
    monkeypatch.chdir(host)
    status = main(block["argv"].split())
    out, err = capsys.readouterr()
    assert status == 0
    assert out + err == block["shown"]
