"""Real git + DVC host repositories in temporary folders, for the host-integration tests.

Creating a repository costs a few DVC calls (about a second each), so one template per
test process is built once and each test gets a copy of it.
"""

from __future__ import annotations

import atexit
import contextlib
import functools
import io
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

DVC = [sys.executable, "-m", "dvc"]


def sh(argv: list[str], cwd: Path) -> str:
    """Run a command (argument list), fail the test with its output if it fails."""
    result = subprocess.run(argv, cwd=cwd, capture_output=True, text=True, check=False)
    assert result.returncode == 0, f"{argv} failed:\n{result.stdout}\n{result.stderr}"
    return result.stdout


def git_init(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    sh(["git", "init", "-q", "-b", "main"], folder)
    sh(["git", "config", "user.email", "tests@localhost"], folder)
    sh(["git", "config", "user.name", "retrograde tests"], folder)
    sh(["git", "config", "commit.gpgsign", "false"], folder)


def dvc_init(folder: Path, *extra: str) -> None:
    sh([*DVC, "init", "-q", *extra], folder)
    sh([*DVC, "config", "core.analytics", "false"], folder)
    sh([*DVC, "config", "core.check_update", "false"], folder)


@functools.cache
def _template(with_dvc: bool) -> Path:
    root = Path(tempfile.mkdtemp(prefix="retrograde-host-template-"))
    atexit.register(shutil.rmtree, root, True)
    host = root / "host"
    git_init(host)
    (host / "README.md").write_text("# a host project\n")
    (host / ".gitignore").write_text("*.pyc\n")
    if with_dvc:
        dvc_init(host)
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "host project"], host)
    return host


def new_host(dest: Path, *, with_dvc: bool = True) -> Path:
    """A fresh committed git repository at ``dest`` (with DVC initialised unless told not)."""
    shutil.copytree(_template(with_dvc), dest, symlinks=True)
    return dest


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file below ``folder`` (except git internals and DVC's scratch) with its bytes."""
    skip = (".git/", ".dvc/tmp/")
    return {
        path.relative_to(folder).as_posix(): path.read_bytes()
        for path in sorted(folder.rglob("*"))
        if path.is_file() and not path.relative_to(folder).as_posix().startswith(skip)
    }


def new_pipeline_host(dest: Path, *, corpus_bytes: int = 6000) -> Path:
    """A host with a small invented corpus at data/corpus.txt and `retrograde init` done,
    all committed (the state a team is in right after adopting retrograde)."""
    from retrograde.cli import main
    from retrograde.sources.demo import write_corpus

    host = new_host(dest)
    write_corpus(host / "data" / "corpus.txt", size_bytes=corpus_bytes, seed=0)
    with contextlib.redirect_stdout(io.StringIO()):  # keep init's report out of the test's
        assert main(["init", "--dir", str(host)]) == 0
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "adopt retrograde"], host)
    return host


def _sort_tokens_order() -> type:
    from retrograde.orders import Order

    class SortTokens(Order):
        """Not a bijection: sorting loses the order, so the output alone cannot be inverted."""

        def positions(self, x):  # type: ignore[no-untyped-def]
            import numpy as np

            return np.argsort(np.asarray(x), kind="stable").astype(np.int64)

    return SortTokens


#: An order a config can name by dotted path (``_host_fixtures.SortTokens``) that fails
#: the round trip on any unit whose tokens are not already sorted.
SortTokens = _sort_tokens_order()


def dvc_events(host: Path) -> dict[str, list[str]]:
    """What DVC itself reported per stage in the last `retrograde run` (its log, run.log),
    in order: ``{"ran": [...], "restored": [...], "unchanged": [...], "failed": [...]}``."""
    from retrograde.host import parse_repro_line

    events: dict[str, list[str]] = {"ran": [], "restored": [], "unchanged": [], "failed": []}
    log = host / "pipelines" / "retrograde" / "logs" / "run.log"
    for line in log.read_text(encoding="utf-8").splitlines():
        parsed = parse_repro_line(line)
        if parsed:
            events[parsed[0]].append(parsed[1])
    return events


def lock_without_measured(lock: str) -> str:
    """``dvc.lock`` without the hashes of what holds measured times (a cell's budget.json,
    the table's cells.csv, report.md and metrics.json's budgets): the cell folders (as
    outs, and as the table's deps), cells.csv, report.md and metrics.json."""
    kept, skip = [], False
    for line in lock.splitlines():
        stripped = line.strip()
        if stripped.startswith("- path:"):
            path = stripped.split(":", 1)[1].strip()
            skip = path.startswith("cells") or path in ("report.md", "metrics.json")
        elif not stripped.startswith(("md5:", "size:", "nfiles:", "hash:")):
            skip = False
        if not (skip and stripped.startswith(("md5:", "size:", "nfiles:"))):
            kept.append(line)
    return "\n".join(kept)


def metrics_without_times(metrics: str) -> str:
    """``metrics.json`` text without the lines of the leaves' measured ``cpu_s``/``wall_s``
    (each leaf's budget holds their mean over seeds: docs/statistics.md)."""
    return "\n".join(
        line
        for line in metrics.splitlines()
        if not line.strip().startswith(('"cpu_s"', '"wall_s"'))
    )


def report_without_measured(report: str) -> str:
    """``report.md`` without the measured times: the cells of the budget tables' fit wall
    and CPU seconds columns (found by their headers) read ``(time)``."""
    kept: list[str] = []
    timed: list[int] = []  # the columns of the current table that hold times
    for line in report.splitlines():
        if "fit wall s" in line:
            timed = [
                i
                for i, cell in enumerate(line.split("|"))
                if "fit wall s" in cell or "fit CPU s" in cell
            ]
        elif not line.startswith("|"):
            timed = []
        elif timed and not line.startswith("|---"):
            cells = line.split("|")
            for i in timed:
                cells[i] = " (time) "
            line = "|".join(cells)
        kept.append(line)
    return "\n".join(kept)
