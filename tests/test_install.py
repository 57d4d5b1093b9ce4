"""The Makefile's install steps: the demo installs the package alone, the tests add the rest.

Read with `make -n` (print the commands, run none) against a virtual-environment path that
does not exist, so every install step is listed.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(shutil.which("make") is None, reason="make is not installed")


def planned(target: str, tmp_path: Path) -> str:
    done = subprocess.run(
        ["make", "-n", "-C", str(ROOT), target, f"VENV={tmp_path / 'venv'}"],
        capture_output=True,
        text=True,
        check=True,
    )
    return done.stdout


def test_make_demo_installs_the_package_without_test_tools_or_torch(tmp_path):
    steps = planned("demo", tmp_path)
    assert "pip install --quiet -e ." in steps
    assert "torch" not in steps
    assert "[test]" not in steps
    assert "retrograde demo" in steps


def test_make_test_installs_the_test_extra_and_the_cpu_torch_wheel_then_runs_pytest(tmp_path):
    steps = planned("test", tmp_path)
    assert "pip install --quiet torch==2.13.0" in steps
    assert "-e '.[test]'" in steps
    assert steps.index("torch==2.13.0") < steps.index("'.[test]'")  # CPU wheel first
    assert "pytest" in steps


def test_ci_still_runs_make_test():
    lines = (ROOT / ".ci" / "run").read_text().splitlines()
    assert "make test" in [line.strip() for line in lines]


def test_the_missing_torch_hint_works_from_a_checkout():
    from retrograde.families._torch_common import TORCH_HINT

    # the extra only adds this wheel; `pip install 'retrograde[torch]'` would resolve
    # retrograde itself against the package index, not the checkout
    assert "pip install torch==2.13.0" in TORCH_HINT
    assert "retrograde[torch]" not in TORCH_HINT
    assert "make test" in TORCH_HINT
