"""The example trainer (``examples/toy_trainer.py``) as the ``command`` family runs it."""

from __future__ import annotations

import sys
from pathlib import Path

TOY = str(Path(__file__).resolve().parents[1] / "examples" / "toy_trainer.py")
#: ``command`` for the toy trainer's ``fit`` (placeholders filled in by the family)
FIT = [sys.executable, TOY, "fit", "--train", "{train}", "--valid", "{valid}"]
FIT += ["--test", "{test}", "--out", "{out}", "--seed", "{seed}"]


def counting_fit_command(folder: Path) -> tuple[list[str], Path]:
    """:data:`FIT` behind a wrapper that appends one line to a file per trainer run.

    Returns ``(command, runs)``; ``runs`` does not exist until the first run.
    """
    runs = folder / "runs.txt"
    wrapper = folder / "count_runs.py"
    wrapper.write_text(
        "import runpy, sys\n"
        f"with open({str(runs)!r}, 'a') as f:\n    f.write('run\\n')\n"
        f"sys.argv = [{TOY!r}, *sys.argv[1:]]\n"
        f"runpy.run_path({TOY!r}, run_name='__main__')\n"
    )
    return [sys.executable, str(wrapper), *FIT[2:]], runs
