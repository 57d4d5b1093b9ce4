"""The stage file's generated block: one ``units_<source>`` stage per source.

``pipelines/retrograde/dvc.yaml`` is fixed text except between its two ``units`` marker
lines, which ``retrograde run`` rewrites from the composed config: DVC cannot give a
matrix item its own list of dependencies, so each source's ``units`` stage is a plain
stage listing the files that source reads.
"""

from __future__ import annotations

import json
import re
from collections.abc import Sequence

from ..config import WDIR_TO_ROOT, RetrogradeConfig, units_dir, units_stage_name
from ..errors import HostRepoError

__all__ = ["UNITS_BEGIN", "UNITS_END", "render_dvc_yaml"]

UNITS_BEGIN = "  # >>> units stages: written by `retrograde run` from params.yaml >>>"
UNITS_END = "  # <<< units stages <<<"


def _units_block(config: RetrogradeConfig, wdir_to_root: str) -> list[str]:
    lines: list[str] = []
    for source, spec in config.study.sources.items():
        deps: Sequence[str] = spec.deps or []
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


def render_dvc_yaml(text: str, config: RetrogradeConfig, wdir_to_root: str = WDIR_TO_ROOT) -> str:
    """``text`` (the pipeline's dvc.yaml) with the units block rewritten for ``config``.

    Dependency paths are the sources' ``deps`` (relative to the host root) seen from the
    wdir. Paths are quoted when they hold anything beyond safe characters.
    """
    lines = text.splitlines()
    try:
        begin, end = lines.index(UNITS_BEGIN), lines.index(UNITS_END)
    except ValueError:
        raise HostRepoError(
            "pipelines/retrograde/dvc.yaml has no units markers; commit it (or move it away) "
            "and reinstall it with `retrograde init --force`, which keeps every changed file "
            "in conf/retrograde/ as it is"
        ) from None
    block = [_quote_path_line(line) for line in _units_block(config, wdir_to_root)]
    return "\n".join([*lines[: begin + 1], *block, *lines[end:]]) + "\n"


def _quote_path_line(line: str) -> str:
    # A dependency path may hold spaces or YAML punctuation; JSON quoting is valid YAML.
    match = re.match(r"^(      - )(.+)$", line)
    if match and not re.fullmatch(r"[A-Za-z0-9_./-]+", match.group(2)):
        return match.group(1) + json.dumps(match.group(2))
    return line
