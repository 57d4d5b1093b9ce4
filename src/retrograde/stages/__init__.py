"""DVC stage entry points (``python -m retrograde.stages.<name>``) and the pipeline layout.

Each stage runs with the pipeline folder (``pipelines/retrograde/``, the DVC wdir) as its
working folder and reads its values from ``params.yaml`` there; its command line carries
only names (source, model, order, seed), so config values never reach a shell.

Layout inside the pipeline folder (paths relative to it)::

    params.yaml                              composed by `retrograde run`
    data/<source>/units/{train,valid,test}/  SequenceSet folders, natural order
    data/<source>/units/info.json            vocabulary, tokenizer, spans, metadata
    data/<source>/units/tokenizer.json       file sources only
    data/<source>/units/floors.npy           calibration sources: exact nats per test unit
    data/<source>/orders/<order>/{train,valid,test}/ + positions_test.npy
    cells/<source>/<model>/<order>/seed<seed>/{model/,test_logprobs.npy,curve.json,fit.log}
    metrics.json  report.md  plots/

This module holds the names and paths every stage (and ``retrograde run``/``plan``) agrees
on, and :func:`render_dvc_yaml`, which writes the per-source ``units`` stages.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import sys
from collections.abc import Callable, Sequence
from pathlib import Path, PurePosixPath
from typing import Any

from ..errors import HostRepoError, RetrogradeError

__all__ = [
    "UNITS_BEGIN",
    "UNITS_END",
    "Cell",
    "cell_dir",
    "fit_entries",
    "fit_stage_name",
    "grid_cells",
    "order_dir",
    "read_params",
    "render_dvc_yaml",
    "reorder_stage_name",
    "run_stage",
    "units_dir",
    "units_stage_name",
]

UNITS_BEGIN = "  # >>> units stages: written by `retrograde run` from params.yaml >>>"
UNITS_END = "  # <<< units stages <<<"
#: the host root seen from the pipeline folder (the stages' working folder)
WDIR_TO_ROOT = "../.."

#: one fit: (source, model, order, seed)
Cell = tuple[str, str, str, int]


def units_dir(source: str) -> PurePosixPath:
    return PurePosixPath("data", source, "units")


def order_dir(source: str, order: str) -> PurePosixPath:
    return PurePosixPath("data", source, "orders", order)


def cell_dir(source: str, model: str, order: str, seed: int) -> PurePosixPath:
    return PurePosixPath("cells", source, model, order, f"seed{seed}")


def units_stage_name(source: str) -> str:
    """DVC refuses ``@`` in a plain stage name, so generated units stages use ``_``."""
    return f"units_{source}"


def reorder_stage_name(source: str, order: str) -> str:
    return f"reorder@{source}-{order}"


def fit_stage_name(source: str, model: str, order: str, seed: int) -> str:
    """The name DVC 3.67 gives a matrix fit stage (values joined by ``-``)."""
    return f"fit@{source}-{model}-{order}-{seed}"


def fit_entries(study: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """The fit cells of a composed study, as the ``fits`` block of ``params.yaml``.

    Keys are what DVC appends to ``fit@`` (``source-model-order-seed``), in the order
    source, model, order, seed. Each entry names the cell and its ``code`` dependency (seen
    from the pipeline folder): a ``command`` model's trainer files, or else the source's
    units, which every cell depends on anyway.
    """
    fits: dict[str, dict[str, Any]] = {}
    for source in study["sources"]:
        for model, spec in study["models"].items():
            code = spec.get("code")
            code_dep = f"{WDIR_TO_ROOT}/{code}" if code else str(units_dir(source))
            for order in study["orders"]:
                for seed in study["seeds"]:
                    fits[f"{source}-{model}-{order}-{seed}"] = {
                        "source": source,
                        "model": model,
                        "order": order,
                        "seed": int(seed),
                        "code": code_dep,
                    }
    return fits


def grid_cells(params: dict[str, Any]) -> list[Cell]:
    """Every cell the composed params name, in stage order (source, model, order, seed)."""
    return [
        (entry["source"], entry["model"], entry["order"], int(entry["seed"]))
        for entry in params["fits"].values()
    ]


def read_params(folder: str | os.PathLike[str] = ".") -> dict[str, Any]:
    """The composed ``params.yaml`` in ``folder`` as a plain dict."""
    from omegaconf import OmegaConf

    path = Path(folder) / "params.yaml"
    if not path.is_file():
        raise HostRepoError(f"{path} not found; compose it with `retrograde run`")
    params = OmegaConf.to_container(OmegaConf.load(path), resolve=True)
    assert isinstance(params, dict)
    return params  # type: ignore[return-value]


def _units_block(params: dict[str, Any], wdir_to_root: str) -> list[str]:
    lines: list[str] = []
    for source, spec in params["study"]["sources"].items():
        deps: Sequence[str] = spec.get("deps") or []
        lines += [
            f"  {units_stage_name(source)}:",
            f"    cmd: python -m retrograde.stages.units --source {source}",
        ]
        if deps:
            lines.append("    deps:")
            lines += [f"      - {wdir_to_root}/{dep}" for dep in deps]
        lines += [
            "    params:",
            f"      - study.sources.{source}",
            "    outs:",
            f"      - {units_dir(source)}",
        ]
    return lines


def render_dvc_yaml(text: str, params: dict[str, Any], wdir_to_root: str = WDIR_TO_ROOT) -> str:
    """``text`` (the pipeline's dvc.yaml) with the units block rewritten for ``params``.

    Dependency paths are the sources' ``deps`` (relative to the host root) seen from the
    wdir. Paths are quoted when they hold anything beyond safe characters.
    """
    lines = text.splitlines()
    try:
        begin, end = lines.index(UNITS_BEGIN), lines.index(UNITS_END)
    except ValueError:
        raise HostRepoError(
            "pipelines/retrograde/dvc.yaml has no units markers; reinstall it with "
            "`retrograde init --force` (your conf/retrograde/ is kept)"
        ) from None
    block = [_quote_path_line(line) for line in _units_block(params, wdir_to_root)]
    return "\n".join([*lines[: begin + 1], *block, *lines[end:]]) + "\n"


def _quote_path_line(line: str) -> str:
    # A dependency path may hold spaces or YAML punctuation; JSON quoting is valid YAML.
    match = re.match(r"^(      - )(.+)$", line)
    if match and not re.fullmatch(r"[A-Za-z0-9_./-]+", match.group(2)):
        return match.group(1) + json.dumps(match.group(2))
    return line


def run_stage(
    name: str,
    configure: Callable[[argparse.ArgumentParser], None],
    body: Callable[[argparse.Namespace], None],
    argv: Sequence[str] | None,
) -> int:
    """Parse ``argv``, run ``body``; a user-facing error becomes one stderr line, status 2."""
    parser = argparse.ArgumentParser(prog=f"python -m retrograde.stages.{name}")
    parser.add_argument("--params", default=".", help="folder holding params.yaml (the wdir)")
    configure(parser)
    args = parser.parse_args(argv)
    try:
        body(args)
    except RetrogradeError as exc:
        print(f"retrograde {name}: error: {exc}", file=sys.stderr)
        return exc.exit_status
    return 0
