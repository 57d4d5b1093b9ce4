"""``dvc.lock`` in stage-file order, whatever order DVC ran the stages in.

DVC records stages in the order it happens to run them, which depends on the targets it
was given (``run --jobs`` reproduces ``reorder`` first, then the fits in parallel, then the
rest) and is not promised to be stable. Ordering the entries as ``dvc stage list`` lists
the stages (declaration order, items in ``foreach``/matrix order) makes ``dvc.lock`` the
same bytes whatever ``--jobs`` was, so reviews see no reshuffled entries.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from pathlib import Path

from ..config import DVC_FILE, LOCK_FILE
from ..data import atomic_write_text
from ._repo import run_dvc

__all__ = ["normalize_lock_order", "order_lock_entries", "ordered_keys"]


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


def normalize_lock_order(host: Path) -> None:
    """Put every entry of ``pipelines/retrograde/dvc.lock`` in the stage file's order.

    DVC records stages in the order it happens to run them, which depends on the targets it
    was given (``run --jobs`` reproduces ``reorder`` first, then the fits, then the rest) and
    is not promised to be stable. Ordering the entries as ``dvc stage list`` lists the stages
    (declaration order, matrix items in matrix order) makes ``dvc.lock`` the same bytes
    whatever ``jobs`` was. Entries for stages no longer declared stay where they are.
    """
    lock_path = Path(host) / LOCK_FILE
    if not lock_path.is_file():
        return
    listed = run_dvc(host, ["stage", "list", "--name-only", DVC_FILE.as_posix()])
    names = [line.strip().rpartition(":")[2] for line in listed.stdout.splitlines()]
    order_lock_entries(lock_path, [name for name in names if name])


def order_lock_entries(lock_path: Path, names: Sequence[str]) -> None:
    """Reorder the ``stages`` of a ``dvc.lock`` with :func:`ordered_keys`; content unchanged.

    The file is read and written with ruamel.yaml's round-trip mode and the settings DVC
    itself uses for lock files, so DVC's next update produces the same layout. Nothing is
    written when the order is already right or the file does not exist.
    """
    from ruamel.yaml import YAML
    from ruamel.yaml.comments import CommentedMap

    if not lock_path.is_file():
        return
    yaml = YAML()  # round trip, as DVC's modify_yaml
    yaml.default_flow_style = False
    data = yaml.load(lock_path.read_text(encoding="utf-8"))
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
