"""The shell examples of README.md's quick start, the user guide and the torch calibration
recipe (docs/torch.md) run as written.

They run in order in one real git + DVC host (with a small invented corpus), as a user
would type them: README's quick start, then the guide's `retrograde run` variants, then
its review commands. The torch recipe runs in a host of its own, with its two YAML files
saved where the page says. Each line must exit 0 (`--fail-on-change` may exit 1: that is its
documented answer when a gap moved).
"""

from __future__ import annotations

import json
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

from _host_fixtures import new_host

pytestmark = [pytest.mark.dvc, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
BLOCK = re.compile(r"^```(?:bash|sh)\n(?P<code>.*?)^```", re.MULTILINE | re.DOTALL)


def shell_blocks(page: str, containing: str) -> list[str]:
    text = (ROOT / page).read_text()
    return [m["code"] for m in BLOCK.finditer(text) if containing in m["code"]]


def commands(block: str) -> list[list[str]]:
    """Each line split at `&&`, comments dropped, tools run from this interpreter."""
    tools = {
        "retrograde": [sys.executable, "-m", "retrograde"],
        "dvc": [sys.executable, "-m", "dvc"],
    }
    result = []
    for line in block.splitlines():
        words = shlex.split(line, comments=True)
        while words:
            cut = words.index("&&") if "&&" in words else len(words)
            argv, words = words[:cut], words[cut + 1 :]
            result.append([*tools.get(argv[0], [argv[0]]), *argv[1:]])
    return result


def run_all(block: str, host: Path) -> None:
    for argv in commands(block):
        done = subprocess.run(argv, cwd=host, capture_output=True, text=True, check=False)
        allowed = {0, 1} if "--fail-on-change" in argv else {0}
        assert done.returncode in allowed, f"{argv[2:]} exited {done.returncode}:\n{done.stderr}"


def test_quick_start_and_guide_shell_examples_run_in_a_real_host(tmp_path):
    from retrograde.sources.demo import write_corpus

    host = new_host(tmp_path / "host")
    write_corpus(host / "data" / "corpus.txt", size_bytes=6000, seed=0)  # invented data
    subprocess.run(["git", "add", "data"], cwd=host, check=True)
    subprocess.run(["git", "commit", "-q", "-m", "corpus"], cwd=host, check=True)

    (quick_start,) = shell_blocks("README.md", "retrograde init")
    run_all(quick_start, host)
    assert (host / "pipelines/retrograde/metrics.json").is_file()

    (variants,) = shell_blocks("docs/guide.md", "retrograde run --dry")
    run_all(variants, host)

    (review,) = shell_blocks("docs/guide.md", "retrograde compare main")
    run_all(review, host)


YAML = re.compile(r"^```yaml\n(?P<code>.*?)^```", re.MULTILINE | re.DOTALL)


def test_the_torch_calibration_recipe_runs_and_the_forward_fit_reaches_the_floor(tmp_path):
    pytest.importorskip("torch")
    host = new_host(tmp_path / "host")
    subprocess.run([sys.executable, "-m", "retrograde", "init"], cwd=host, check=True)
    text = (ROOT / "docs/torch.md").read_text()
    targets = {
        "# @package study.sources.gf2_banded": "conf/retrograde/source/gf2_banded.yaml",
        "# @package study\n": "conf/retrograde/study/gf2_torch.yaml",
    }
    for match in YAML.finditer(text):
        for header, path in targets.items():
            if match["code"].startswith(header):
                (host / path).write_text(match["code"])
    assert all((host / path).is_file() for path in targets.values())
    (block,) = shell_blocks("docs/torch.md", "study=gf2_torch")
    run_all(block, host)
    metrics = json.loads((host / "pipelines/retrograde/metrics.json").read_text())
    cells = metrics["gf2_banded"]["tf128"]
    assert cells["forward"]["excess_bits_per_token"] < 0.05, cells
    assert cells["reverse"]["excess_bits_per_token"] > 0.05, cells
