"""Every Python example in README.md and docs/*.md runs (in a fresh folder, in order per file).

Fenced blocks tagged ``python`` run; a block tagged ``python no-run`` is shown only (used for
snippets that need a user's own package). Blocks in one file share a namespace, so a page can
build an example step by step.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PAGES = sorted([ROOT / "README.md", ROOT / "DEVELOPERS.md", *(ROOT / "docs").glob("*.md")])
BLOCK = re.compile(r"^```python[ \t]*(?P<tag>[^\n]*)\n(?P<code>.*?)^```", re.MULTILINE | re.DOTALL)


def _blocks(page: Path) -> list[str]:
    return [m["code"] for m in BLOCK.finditer(page.read_text()) if "no-run" not in m["tag"]]


PAGES_WITH_CODE = [p for p in PAGES if p.exists() and _blocks(p)]


@pytest.mark.parametrize("page", PAGES_WITH_CODE, ids=[p.name for p in PAGES_WITH_CODE])
def test_python_examples_in_page_run(page, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {"__name__": f"docs_{page.stem}"}
    for index, code in enumerate(_blocks(page)):
        try:
            exec(compile(code, f"{page.name}[block {index}]", "exec"), namespace)
        except Exception as exc:  # pragma: no cover - the message is the point
            pytest.fail(f"{page.name} block {index} failed: {exc!r}\n{code}")
