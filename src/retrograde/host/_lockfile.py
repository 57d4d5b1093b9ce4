"""``dvc.lock`` in stage-file order, whatever order DVC ran the stages in.

DVC records stages in the order it happens to run them, which depends on the targets it
was given (``run --jobs`` reproduces ``reorder`` first, then the fits in parallel, then the
rest) and is not promised to be stable. Ordering the entries as ``dvc stage list`` lists
the stages (declaration order, items in ``foreach``/matrix order) makes ``dvc.lock`` the
same bytes whatever ``--jobs`` was, so reviews see no reshuffled entries.
"""

from __future__ import annotations

import io
import re
from collections.abc import Sequence
from pathlib import Path

from ..config import (
    DVC_FILE,
    LOCK_FILE,
    RetrogradeConfig,
    fit_stage_name,
    reorder_stage_name,
    units_stage_name,
)
from ..data import atomic_write_text
from ._repo import run_dvc

__all__ = ["normalize_lock_order", "order_lock_entries", "ordered_keys", "stage_order"]


def ordered_keys(keys: Sequence[str], names: Sequence[str]) -> list[str]:
    """``keys`` with those in ``names`` moved together, in ``names`` order, to where the
    first of them was; every other key keeps its place.

    Examples
    --------
    >>> ordered_keys(["units", "fit@b", "fit@a", "table", "fit@c"], ["fit@a", "fit@b", "fit@c"])
    ['units', 'fit@a', 'fit@b', 'fit@c', 'table']
    """
    wanted = [name for name in dict.fromkeys(names) if name in set(keys)]
    moved = set(wanted)
    out: list[str] = []
    for key in keys:
        if key not in moved:
            out.append(key)
        elif wanted:
            out.extend(wanted)  # the first moved key's slot takes the whole group
            wanted = []
    return out


def stage_order(config: RetrogradeConfig) -> list[str]:
    """The pipeline's stage names in the stage file's order, computed from the config (what
    ``dvc stage list`` prints, without starting DVC): the units stages (the generated block
    comes first), the ``reorder`` matrix (source-major), the fits in ``fits`` order, table.

    Examples
    --------
    >>> from retrograde.config import FitCell, OrderConfig, SourceConfig, StudyConfig
    >>> study = StudyConfig(sources={"s": SourceConfig()}, orders={"a": OrderConfig()})
    >>> config = RetrogradeConfig(study=study, fits={"s-m-a-0": FitCell("s", "m", "a", 0, "")})
    >>> stage_order(config)
    ['units_s', 'reorder@s-a', 'fit@s-m-a-0', 'table']
    """
    study = config.study
    return [
        *(units_stage_name(s) for s in study.sources),
        *(reorder_stage_name(s, o) for s in study.sources for o in study.orders),
        *(fit_stage_name(*cell) for cell in config.cells()),
        "table",
    ]


def normalize_lock_order(host: Path, config: RetrogradeConfig | None = None) -> None:
    """Put every entry of ``pipelines/retrograde/dvc.lock`` in the stage file's order.

    DVC records stages in the order it happens to run them, which depends on the targets it
    was given (``run --jobs`` reproduces ``reorder`` first, then the fits, then the rest) and
    is not promised to be stable. Ordering the entries as ``dvc stage list`` lists the stages
    (declaration order, matrix items in matrix order) makes ``dvc.lock`` the same bytes
    whatever ``jobs`` was. Entries for stages no longer declared stay where they are.

    With the composed ``config`` the order is computed (:func:`stage_order`); without it,
    ``dvc stage list`` gives it (a DVC process: about a CPU-second).
    """
    lock_path = Path(host) / LOCK_FILE
    if not lock_path.is_file():
        return
    if config is not None:
        order_lock_entries(lock_path, stage_order(config))
        return
    listed = run_dvc(host, ["stage", "list", "--name-only", DVC_FILE.as_posix()])
    names = [line.strip().rpartition(":")[2] for line in listed.stdout.splitlines()]
    order_lock_entries(lock_path, [name for name in names if name])


#: a stage's key line inside ``stages:`` as DVC writes it (two spaces, maybe quoted)
_LOCK_KEY = re.compile(r"""^  (?:'([^']+)'|"([^"]+)"|([^\s'"#][^:]*)):\s*$""")


def _reorder_text(text: str, names: Sequence[str]) -> str | None:
    """``dvc.lock`` text with its stage entries in :func:`ordered_keys` order, the bytes of
    every entry unchanged; ``None`` when the layout is not the plain one DVC writes.

    Examples
    --------
    >>> text = "schema: '2.0'\\nstages:\\n  b:\\n    cmd: x\\n  a:\\n    cmd: y\\n"
    >>> _reorder_text(text, ["a", "b"])
    "schema: '2.0'\\nstages:\\n  a:\\n    cmd: y\\n  b:\\n    cmd: x\\n"
    """
    lines = text.splitlines(keepends=True)
    try:
        start = lines.index("stages:\n") + 1
    except ValueError:
        return None
    entries: dict[str, list[str]] = {}
    key = None
    for line in lines[start:]:
        match = _LOCK_KEY.match(line)
        if match:
            key = next(g for g in match.groups() if g is not None)
            if key in entries:
                return None
            entries[key] = [line]
        elif key is not None and line.startswith("    "):
            entries[key].append(line)
        else:
            return None  # something DVC does not write inside `stages:`
    keys = ordered_keys(list(entries), names)
    return "".join(lines[:start] + [line for k in keys for line in entries[k]])


def order_lock_entries(lock_path: Path, names: Sequence[str]) -> None:
    """Reorder the ``stages`` of a ``dvc.lock`` with :func:`ordered_keys`; content unchanged.

    Whole entries are moved as text when the file has the plain layout DVC writes (no YAML
    round trip: a lock of a few hundred stages takes milliseconds); otherwise it is read
    and written with ruamel.yaml's round-trip mode and the settings DVC itself uses for lock
    files, so DVC's next update produces the same layout. Nothing is written when the order
    is already right or the file does not exist.
    """
    from ruamel.yaml import YAML
    from ruamel.yaml.comments import CommentedMap

    if not lock_path.is_file():
        return
    text = lock_path.read_text(encoding="utf-8")
    ordered = _reorder_text(text, names)
    if ordered is not None:
        if ordered != text:
            atomic_write_text(lock_path, ordered)
        return
    yaml = YAML()  # round trip, as DVC's modify_yaml
    yaml.default_flow_style = False
    data = yaml.load(text)
    stages = data.get("stages") if isinstance(data, dict) else None
    if not stages:
        return
    keys = ordered_keys(list(stages), names)
    if keys == list(stages):
        return
    data["stages"] = CommentedMap((key, stages[key]) for key in keys)
    stream = io.StringIO()
    yaml.dump(data, stream)
    atomic_write_text(lock_path, stream.getvalue())
