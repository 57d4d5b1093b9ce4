"""The folder tree is the architecture: layers, arrows only downward, public names that exist.

``DEVELOPERS.md`` draws the layers; these tests hold the code to the drawing. Imports are
read with :mod:`ast` (function-local imports included), so nothing is executed.
"""

from __future__ import annotations

import ast
import importlib
import pkgutil
from pathlib import Path

import pytest

import retrograde

SRC = Path(retrograde.__file__).parent

#: bottom to top; a package may import its own modules and any package of a lower layer
LAYERS: list[set[str]] = [
    {"errors"},
    {"validation"},
    {"registry"},
    {"data"},
    {"orders", "sources", "families"},
    {"stats"},
    {"report"},
    {"config"},
    {"stages"},
    {"host"},
    {"commands"},
    {"cli"},
    {"__main__"},
]
LAYER_OF = {name: level for level, names in enumerate(LAYERS) for name in names}


def _modules() -> list[str]:
    found = ["retrograde"]
    for info in pkgutil.walk_packages(retrograde.__path__, "retrograde."):
        found.append(info.name)
    return sorted(found)


def _path(module: str) -> Path:
    parts = module.split(".")[1:]
    folder = SRC.joinpath(*parts)
    return folder / "__init__.py" if folder.is_dir() else folder.with_suffix(".py")


def _imported(module: str) -> set[str]:
    """Absolute names of the retrograde modules (or module attributes) ``module`` imports."""
    tree = ast.parse(_path(module).read_text(encoding="utf-8"))
    package = module if _path(module).name == "__init__.py" else module.rpartition(".")[0]
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {alias.name for alias in node.names if alias.name.startswith("retrograde")}
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.startswith("retrograde"):
                names |= {f"{target}.{alias.name}" for alias in node.names} | {target}
    return names


def _top(name: str) -> str | None:
    parts = name.split(".")
    return parts[1] if len(parts) > 1 else None


MODULES = [m for m in _modules() if not m.endswith("__main__") or m == "retrograde.__main__"]


def test_every_module_belongs_to_a_layer():
    tops = {_top(m) for m in MODULES if _top(m)}
    assert tops <= set(LAYER_OF), f"modules outside every layer: {sorted(tops - set(LAYER_OF))}"


@pytest.mark.parametrize("module", [m for m in MODULES if _top(m)])
def test_imports_point_down_the_layers_and_never_into_another_packages_private_modules(module):
    own = _top(module)
    for name in sorted(_imported(module)):
        other = _top(name)
        if other is None or other == own or other == "__version__":
            continue  # the package root (its version) or the same package
        assert other in LAYER_OF, f"{module} imports {name}, which is in no layer"
        assert LAYER_OF[other] < LAYER_OF[own], f"{module} ({own}) imports upward: {name}"
        private = [part for part in name.split(".")[2:] if part.startswith("_")]
        assert not private, f"{module} imports {name}, private to retrograde.{other}"


@pytest.mark.parametrize("module", MODULES)
def test_every_name_a_module_exports_exists(module):
    if module == "retrograde.__main__":
        return  # running it would start the command line
    imported = importlib.import_module(module)
    for name in getattr(imported, "__all__", []):
        assert hasattr(imported, name), f"{module}.__all__ names {name!r}, which it lacks"


def test_plug_in_authors_are_shown_only_public_modules():
    root = SRC.parents[1]
    pages = [root / "README.md", root / "DEVELOPERS.md", *(root / "docs").glob("*.md")]
    for page in pages:
        text = page.read_text(encoding="utf-8")
        for line in text.splitlines():
            if "import" in line and "retrograde." in line:
                modules = [w for w in line.replace(",", " ").split() if w.startswith("retrograde.")]
                for word in modules:
                    private = [p for p in word.split(".")[1:] if p.startswith("_")]
                    assert not private, f"{page.name} tells readers to import {word}: {line!r}"
