"""``retrograde demo [--dir DIR] [--jobs N]``: a real study in a throwaway host.

Creates ``DIR`` (default ``demo-host``) as a git + DVC repository whose *own* pipeline
writes an INVENTED corpus (the log book of an imaginary maintenance crew), adopts
retrograde there with ``init``, selects a demo study (the corpus plus the ``markov``,
``linear_gf2`` and ``automaton`` calibration sources; orders ``forward``, ``reverse`` and
``block4``; families ``ngram`` and ``mlp``; three seeds), runs it, commits the result, and
says where the report and plots are and what to try next. Run again on the same folder it
only reruns what changed (nothing, unless you edited something).
"""

from __future__ import annotations

import argparse
import shutil
import sys
from importlib import resources
from pathlib import Path

from .._validation import check_int
from ..errors import ConfigError
from ..hostrepo import CONF_DIR, PIPELINE_DIR, run_dvc, run_git

__all__ = ["configure", "run"]

#: marks a folder this command created, so a second run may reuse it and nothing else
MARKER = ".retrograde-demo"
#: bytes of invented corpus the host stage writes (small: the mlp cells dominate the time)
CORPUS_BYTES = 40_000


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", default="demo-host", help="folder to create (default: demo-host)")
    parser.add_argument(
        "--jobs", type=int, default=2, help="fit stages run in parallel (default 2)"
    )


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
    from ..cli import main

    corpus = str(folder / "data" / "corpus.txt")  # written by the host's own stage
    if main(["init", "--dir", str(folder), "--source", corpus]) != 0:
        raise ConfigError(f"`retrograde init` did not complete in {folder} (see above)")
    conf = folder / CONF_DIR
    (conf / "config.yaml").write_text(_template("config.yaml"), encoding="utf-8")
    (conf / "study" / "demo.yaml").write_text(_template("study_demo.yaml"), encoding="utf-8")
    for source in ("linear_gf2", "automaton"):
        text = _template(f"source_{source}.yaml")
        (conf / "source" / f"{source}.yaml").write_text(text, encoding="utf-8")
    (folder / MARKER).write_text("created by `retrograde demo`; safe to delete\n", encoding="utf-8")
    run_git(folder, ["add", "-A"])
    run_git(folder, ["commit", "-q", "-m", "adopt retrograde with the demo study"])


def run(args: argparse.Namespace) -> int:
    from ..cli import main

    jobs = check_int("option 'demo'", "jobs", args.jobs, low=1)
    folder = Path(args.dir).resolve()
    if folder.exists() and not (folder / MARKER).exists():
        if any(folder.iterdir()):
            raise ConfigError(
                f"{folder} exists and was not made by `retrograde demo`; "
                "choose another --dir (the demo never writes into an existing project)"
            )
        folder.rmdir()
    if not (folder / MARKER).exists():
        print(f"retrograde demo: creating a throwaway host repository in {folder}")
        try:
            _create_host(folder)
            _adopt(folder)
        except BaseException:
            shutil.rmtree(folder, ignore_errors=True)  # nothing half-made is left behind
            raise
    status = main(["run", "--dir", str(folder), "--jobs", str(jobs)])
    if status != 0:
        return status
    changed = run_git(folder, ["status", "--porcelain"]).stdout.strip()
    if changed:
        run_git(folder, ["add", "-A"])
        run_git(folder, ["commit", "-q", "-m", "retrograde demo results"])
    pipeline = folder / PIPELINE_DIR
    # `make demo` runs .venv/bin/retrograde without activating the environment: name the
    # command the user can actually type.
    installed = Path(sys.executable).parent / "retrograde"
    command = "retrograde" if shutil.which("retrograde") == str(installed) else str(installed)
    print(
        f"""
The table above is in {pipeline / "report.md"} (with its cautions) and
{pipeline / "metrics.json"}; figures are in {pipeline / "plots"}/ (gaps.png,
learning_curves.png, position_profile.png). The corpus is INVENTED demo data.

Try next, inside {folder}:
  1. edit conf/retrograde/study/demo.yaml (e.g. ngram order: 8 -> 5), then
     {command} run            # only the ngram cells and the table rerun
  2. {command} compare HEAD   # what changed against the committed results
  3. {command} table --format csv"""
    )
    return 0
