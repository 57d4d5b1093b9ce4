"""A number never outlives the code that made it: defaults, numerics versions, trainer files.

In a real git + DVC host, a change that alters what a model computes, without any change
to the config the user wrote, reruns exactly that model's cells (DVC's "Running stage"
lines are the outside reference for what ran).
"""

from __future__ import annotations

import contextlib
import io
import shutil
import sys
from pathlib import Path

import pytest

from _host_fixtures import dvc_events, new_host
from _trainers import TOY
from retrograde.cli import main

pytestmark = [pytest.mark.dvc, pytest.mark.slow]

PLUGIN = """\
from retrograde.families.ngram import NGram


class Plugged(NGram):
    numerics_version = {version}

    def __init__(self, *, order={order}, discount=None):
        super().__init__(order=order, discount=discount)
"""

STUDY = """\
# @package study
orders:
  forward: {name: forward}
  reverse: {name: reverse}
models:
  builtin: {family: ngram, params: {order: 2}}
  plugged: {_target_: teamfamilies.Plugged}
  trainer:
    family: command
    params:
      command: [python, ../../trainers/toy.py, fit, --train, "{train}", --valid, "{valid}",
                --test, "{test}", --out, "{out}", --seed, "{seed}"]
seeds: [0]
reference_order: forward
sweeps: {}
"""


def _write_plugin(host: Path, *, order: int = 2, version: int = 1) -> None:
    (host / "plugins" / "teamfamilies.py").write_text(PLUGIN.format(order=order, version=version))
    sys.modules.pop("teamfamilies", None)  # compose runs in this process: forget the old one


def _run(host: Path) -> set[str]:
    """`retrograde run`; the fit stages DVC ran."""
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        assert main(["run", "--dir", str(host)]) == 0
    return {stage for stage in dvc_events(host)["ran"] if stage.startswith("fit@")}


def _cells(model: str) -> set[str]:
    return {f"fit@markov-{model}-{order}-0" for order in ("forward", "reverse")}


@pytest.fixture
def host(tmp_path, monkeypatch) -> Path:
    host = new_host(tmp_path / "host")
    (host / "plugins").mkdir()
    _write_plugin(host)
    (host / "trainers").mkdir()
    shutil.copy(TOY, host / "trainers" / "toy.py")
    # The plug-in module is importable here and in the stage processes DVC starts.
    monkeypatch.syspath_prepend(str(host / "plugins"))
    monkeypatch.setenv("PYTHONPATH", str(host / "plugins"))
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["init", "--dir", str(host)]) == 0
    conf = host / "conf" / "retrograde"
    (conf / "study" / "code.yaml").write_text(STUDY)
    config = (conf / "config.yaml").read_text()
    config = config.replace("source: [corpus]", "source: [markov]").replace(
        "study: default", "study: code"
    )
    (conf / "config.yaml").write_text(config)
    markov = (conf / "source" / "markov.yaml").read_text().replace("n_units: 1000", "n_units: 120")
    (conf / "source" / "markov.yaml").write_text(markov)
    assert _run(host) == _cells("builtin") | _cells("plugged") | _cells("trainer")
    return host


def test_each_change_of_code_reruns_exactly_the_cells_it_can_change(host, monkeypatch):
    # One host, one step after another (each full run of the grid costs seconds).
    # 1. A plug-in family's default changes; the user's config does not.
    _write_plugin(host, order=3)
    assert _run(host) == _cells("plugged")
    assert _run(host) == set()
    # 2. The family's numerics version is raised (its code changed its numbers).
    _write_plugin(host, order=3, version=2)
    assert _run(host) == _cells("plugged")
    # 3. The command model's trainer file is edited.
    trainer = host / "trainers" / "toy.py"
    trainer.write_text(trainer.read_text() + "\n# tuned\n")
    assert _run(host) == _cells("trainer")
    # 4. A new package version: every cell.
    import retrograde.config._plugins

    monkeypatch.setattr(retrograde.config._plugins, "__version__", "99.0.0")
    assert _run(host) == _cells("builtin") | _cells("plugged") | _cells("trainer")
