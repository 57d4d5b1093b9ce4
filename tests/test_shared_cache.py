"""Sharing fitted cells between clones through a DVC remote and its run-cache (real git + DVC).

The recipe in docs/ci.md, run from the page itself: shard clones fit their cells and run
``dvc push --run-cache``; a final clone, cloned before any result existed (no ``dvc.lock``),
runs ``retrograde run --pull`` (``dvc repro --pull``) and DVC restores every fit from the
run-cache instead of running it.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from _host_fixtures import DVC, dvc_events, new_pipeline_host, sh

SMOKE = "study=smoke"  # 4 fit cells
FITS = [f"fit@corpus-ngram-{order}-{seed}" for order in ("forward", "reverse") for seed in (0, 1)]


# ---------------------------------------------------------------- the recipe in docs/ci.md
ROOT = Path(__file__).resolve().parents[1]
RECIPE = ROOT / "docs" / "ci.md"
WORKFLOW = ROOT / "examples" / "ci-workflow.yml"
BLOCK = re.compile(r"^```sh (?P<tag>ci-[\w-]+)\n(?P<code>.*?)^```", re.M | re.S)


def _recipe_blocks() -> dict[str, str]:
    return {m["tag"]: m["code"] for m in BLOCK.finditer(RECIPE.read_text())}


def _bash(script: str, cwd: Path, **env: str) -> subprocess.CompletedProcess[str]:
    """Run a documented block as CI would: bash, stop at the first failing command."""
    path = os.pathsep.join([str(Path(sys.executable).parent), os.environ["PATH"]])
    result = subprocess.run(
        ["bash", "-euo", "pipefail", "-c", script],
        cwd=cwd,
        env={**os.environ, "PATH": path, **env},
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, f"{script}\n{result.stdout}\n{result.stderr}"
    return result


@pytest.mark.dvc
@pytest.mark.slow
def test_the_documented_shard_and_final_jobs_fit_each_cell_once_and_the_final_job_none(tmp_path):
    blocks = _recipe_blocks()
    assert set(blocks) == {"ci-setup", "ci-shard", "ci-gather"}
    origin = new_pipeline_host(tmp_path / "origin")
    _bash(blocks["ci-setup"], origin, REMOTE_URL=str(tmp_path / "store"))
    clones = {}
    for name in ("shard1", "shard2", "final"):
        clones[name] = tmp_path / name
        sh(["git", "clone", "-q", str(origin), str(clones[name])], tmp_path)

    shard_outputs = [
        _bash(blocks["ci-shard"], clones[f"shard{i}"], SHARD=str(i), SHARDS="2", OVERRIDES=SMOKE)
        for i in (1, 2)
    ]
    planned = [
        line.split(":", 1)[1]
        for result in shard_outputs
        for line in result.stdout.splitlines()
        if line.startswith("pipelines/retrograde/dvc.yaml:fit@")
    ]
    assert sorted(planned) == sorted(FITS)  # each cell in exactly one shard
    for i in (1, 2):  # a shard fits its own cells and no other
        cells = clones[f"shard{i}"] / "pipelines/retrograde/cells/corpus/ngram"
        assert len(list(cells.glob("*/seed*"))) == 2

    final = _bash(blocks["ci-gather"], clones["final"], OVERRIDES=SMOKE)
    events = dvc_events(clones["final"])  # DVC's own words, from run's log
    assert set(FITS) <= set(events["restored"]), final.stderr
    assert not any(name.startswith("fit@") for name in events["ran"]), final.stderr
    # What DVC itself printed (run's log of the repro): each fit came from the run-cache ...
    log = (clones["final"] / "pipelines/retrograde/logs/run.log").read_text()
    for name in FITS:
        assert f"Stage 'pipelines/retrograde/dvc.yaml:{name}' is cached - skipping run" in log
    # ... and is the very bytes the shard that fitted it produced.
    for order, seed in (("forward", 0), ("reverse", 1)):
        fitted_by = clones["shard1" if seed == 0 else "shard2"]
        path = Path(f"pipelines/retrograde/cells/corpus/ngram/{order}/seed{seed}/test_logprobs.npy")
        assert (clones["final"] / path).read_bytes() == (fitted_by / path).read_bytes()
    assert (clones["final"] / "pipelines/retrograde/metrics.json").is_file()
    # Outside reference: DVC's own expansion of the fit matrix equals the planned stages.
    listed = sh(
        [*DVC, "stage", "list", "--name-only", "pipelines/retrograde/dvc.yaml"], clones["final"]
    ).split()
    assert sorted(n.split(":", 1)[1] for n in listed if ":fit@" in n) == sorted(planned)


def test_the_example_workflow_runs_the_documented_commands_over_its_shard_matrix():
    workflow = yaml.safe_load(WORKFLOW.read_text())
    blocks = _recipe_blocks()
    shard_job, table_job = workflow["jobs"]["shard"], workflow["jobs"]["table"]
    shards = shard_job["strategy"]["matrix"]["shard"]
    assert shards == list(range(1, len(shards) + 1))
    assert workflow["env"]["SHARDS"] == str(len(shards))
    assert shard_job["env"]["SHARD"] == "${{ matrix.shard }}"
    for job, block in ((shard_job, "ci-shard"), (table_job, "ci-gather")):
        commands = [line for step in job["steps"] for line in step.get("run", "").splitlines()]
        for line in blocks[block].splitlines():
            assert line in commands, (block, line)
    assert table_job["needs"] == "shard"
