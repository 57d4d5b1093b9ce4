"""Commands that only read, plan or check import neither torch nor scikit-learn.

Importing torch costs seconds and scikit-learn over one; a command that fits nothing
(``check``, ``table``, ``compare``, ``plan``, ``run --dry``) must not pay it even when the
config names an ``mlp`` and a torch model. Each command runs in a fresh interpreter that
reports, after the command, which of those packages ``sys.modules`` holds.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from _host_fixtures import new_pipeline_host, sh

HEAVY = ("torch", "sklearn")
#: the command, then a line naming the heavy packages it imported (JSON list)
PROBE = (
    "import json, sys\n"
    "from retrograde.cli import main\n"
    "status = main(sys.argv[1:])\n"
    "heavy = sorted({m.split('.')[0] for m in sys.modules} & {'torch', 'sklearn'})\n"
    "print('HEAVY=' + json.dumps([status, heavy]))\n"
)
#: an mlp and a gru on top of the smoke study's ngram (nothing is fitted with them)
MODELS = [
    "+study.models.mlp={family: mlp, params: {window: 2, hidden: 4, epochs: 1}}",
    "+study.models.gru={family: gru, params: {hidden: 4, layers: 1, epochs: 1}}",
]


def _heavy_imports(argv: list[str], cwd: Path) -> tuple[int, list[str]]:
    result = subprocess.run(
        [sys.executable, "-c", PROBE, *argv], cwd=cwd, capture_output=True, text=True
    )
    line = [x for x in result.stdout.splitlines() if x.startswith("HEAVY=")]
    assert line, f"{argv}: no report\n{result.stdout}\n{result.stderr}"
    status, heavy = json.loads(line[-1].removeprefix("HEAVY="))
    return status, heavy


def _leaf(gap: float) -> dict[str, float]:
    return {
        "bits_per_token": 2.0,
        "gap_pct": gap,
        "gap_pct_low": gap - 1.0,
        "gap_pct_high": gap + 1.0,
        "p_value": 0.01,
        "seeds": 3,
    }


@pytest.mark.dvc
@pytest.mark.slow
def test_reading_planning_and_checking_commands_import_neither_torch_nor_sklearn(tmp_path):
    pytest.importorskip("torch")  # without torch the gru model would not compose at all
    host = new_pipeline_host(tmp_path / "host")
    # A committed gap table of an mlp (written here: reading it needs no fit).
    table = {"corpus": {"mlp": {"forward": _leaf(0.0), "reverse": _leaf(2.0)}}}
    metrics = host / "pipelines" / "retrograde" / "metrics.json"
    metrics.write_text(json.dumps(table, indent=2, sort_keys=True) + "\n")
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "first results"], host)
    commands = {
        "run --dry": ["run", "--dry", "study=smoke", *MODELS],
        "plan": ["plan", "--shard", "1/2", "study=smoke", *MODELS],
        "check": ["check", "study=smoke", *MODELS],
        "table": ["table"],
        "compare": ["compare", "HEAD"],
    }
    for name, argv in commands.items():
        status, heavy = _heavy_imports(argv, host)
        assert status in (0, 1), name  # check exits 1 when the new models' stages are stale
        assert heavy == [], f"`retrograde {name}` imported {heavy}"


def test_the_probe_sees_a_heavy_import(tmp_path):
    # The check above would pass vacuously if the probe could not see an import.
    pytest.importorskip("sklearn")
    code = PROBE.replace("status = main(sys.argv[1:])", "import sklearn; status = 0")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert 'HEAVY=[0, ["sklearn"]]' in result.stdout
