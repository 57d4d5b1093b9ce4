"""The demo: a throwaway host repository with an invented corpus and a demo study.

:func:`prepare_demo` creates ``folder`` as a git + DVC repository whose *own* pipeline
writes an INVENTED corpus (the log book of an imaginary maintenance crew), adopts
retrograde there (``init``) and selects a demo study: the corpus plus the ``markov``,
``linear_gf2`` and ``automaton`` calibration sources; orders ``forward``, ``reverse`` and
``block4``; families ``ngram`` and ``mlp``; three seeds. Run again on the same folder it
reuses it; it never writes into a folder it did not make.
"""

from __future__ import annotations

import shutil
import sys
from importlib import resources
from pathlib import Path

from ..config import CONF_DIR, PIPELINE_DIR
from ..errors import ConfigError
from ._corpus_paths import resolve_sources
from ._driver import initialize
from ._repo import find_host, run_dvc, run_git

__all__ = ["CORPUS_BYTES", "MARKER", "commit_demo_results", "next_steps", "prepare_demo"]

#: marks a folder the demo created, so a second run may reuse it and nothing else
MARKER = ".retrograde-demo"
#: bytes of invented corpus the host stage writes (small: the mlp cells dominate the time)
CORPUS_BYTES = 40_000


def _template(name: str) -> str:
    return (resources.files("retrograde") / "templates" / "demo" / name).read_text(encoding="utf-8")


def _create_host(folder: Path) -> None:
    """The host repo before retrograde: git, DVC, and its own corpus-writing stage."""
    folder.mkdir(parents=True)
    run_git(folder, ["init", "-q"])
    for key, value in (("user.email", "demo@localhost"), ("user.name", "retrograde demo")):
        run_git(folder, ["config", key, value])
    run_dvc(folder, ["init", "-q"])
    run_dvc(folder, ["config", "core.analytics", "false"])
    host_dvc = _template("host_dvc.yaml").replace("{size_bytes}", str(CORPUS_BYTES))
    (folder / "dvc.yaml").write_text(host_dvc, encoding="utf-8")
    (folder / "README.md").write_text(_template("README.md"), encoding="utf-8")
    run_git(folder, ["add", "-A"])
    run_git(folder, ["commit", "-q", "-m", "demo host: its own stage writes an invented corpus"])


def _adopt(folder: Path) -> None:
    """``retrograde init`` plus the demo study, committed."""
    host = find_host(folder)
    corpus = resolve_sources(host, ["data/corpus.txt"], cwd=folder)  # written by the host stage
    initialize(host, corpus)
    conf = folder / CONF_DIR
    (conf / "config.yaml").write_text(_template("config.yaml"), encoding="utf-8")
    (conf / "study" / "demo.yaml").write_text(_template("study_demo.yaml"), encoding="utf-8")
    for source in ("linear_gf2", "automaton"):
        text = _template(f"source_{source}.yaml")
        (conf / "source" / f"{source}.yaml").write_text(text, encoding="utf-8")
    (folder / MARKER).write_text("created by `retrograde demo`; safe to delete\n", encoding="utf-8")
    run_git(folder, ["add", "-A"])
    run_git(folder, ["commit", "-q", "-m", "adopt retrograde with the demo study"])


def prepare_demo(folder: Path) -> bool:
    """Create the demo host in ``folder`` unless the demo made it before; True when created.

    Refuses a non-empty folder the demo did not make; a half-made host is removed.
    """
    folder = folder.resolve()
    if folder.exists() and not (folder / MARKER).exists():
        if any(folder.iterdir()):
            raise ConfigError(
                f"{folder} exists and was not made by `retrograde demo`; "
                "choose another --dir (the demo never writes into an existing project)"
            )
        folder.rmdir()
    if (folder / MARKER).exists():
        return False
    try:
        _create_host(folder)
        _adopt(folder)
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)  # nothing half-made is left behind
        raise
    return True


def commit_demo_results(folder: Path) -> None:
    """Commit what the run changed, as a team would after a study."""
    if run_git(folder, ["status", "--porcelain"]).stdout.strip():
        run_git(folder, ["add", "-A"])
        run_git(folder, ["commit", "-q", "-m", "retrograde demo results"])


def next_steps(folder: Path) -> str:
    """Where the results are and what to try next, naming a command the user can type."""
    pipeline = folder / PIPELINE_DIR
    # `make demo` runs .venv/bin/retrograde without activating the environment.
    installed = Path(sys.executable).parent / "retrograde"
    command = "retrograde" if shutil.which("retrograde") == str(installed) else str(installed)
    figures = ", ".join(sorted(p.name for p in (pipeline / "plots").glob("*.png"))) or "none"
    return f"""
The table above is in {pipeline / "report.md"} (with its cautions and each cell's
budget), {pipeline / "metrics.json"} and {pipeline / "cells.csv"} (per seed); figures
are in {pipeline / "plots"}/ ({figures}). The corpus is INVENTED demo data.

Try next, inside {folder}:
  1. edit conf/retrograde/study/demo.yaml (e.g. ngram order: 8 -> 5), then
     {command} run            # only the ngram cells and the table rerun
  2. {command} compare HEAD   # what changed against the committed results
  3. {command} table --format csv"""
