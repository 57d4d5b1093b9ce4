"""Wall time of ``retrograde run`` in a throwaway git + DVC host, and DVC's share of it.

The host: ``git init``, ``dvc init``, the invented demo corpus (``retrograde.sources.demo``,
300,000 bytes) at ``data/corpus.txt``, ``retrograde init --source data/corpus.txt``, and a
study of 2 orders (``forward``, ``reverse``) x 2 models (``ngram`` order 3, a small
``mlp``) x 3 seeds = 12 fit cells, all committed. Three runs are timed, each as the CLI a
user types (a fresh ``python -m retrograde run`` process):

``scratch``  the first run: every stage runs;
``noop``     the same command again: nothing should run;
``edit``     one model's parameter changed (``study.models.ngram.params.order=4``): only
             that model's 6 cells and the table should run.

How DVC's share is measured
---------------------------
retrograde starts DVC as ``sys.executable -m dvc`` and stage commands as ``python -m
retrograde.stages.<stage>`` (``run`` puts ``sys.executable``'s folder first on ``PATH``). The
benchmark starts ``run`` with ``sys.executable`` set to a small shell shim named ``python``
that runs the real interpreter and appends its start and end time to a log. So each run
splits into: the ``dvc repro`` process's wall time, the stage commands' wall time (stages
run one after another with ``--jobs 1``), and the rest (retrograde's CLI: Hydra compose,
printing the table). **DVC's share** = (``dvc repro`` wall - stage commands' wall) / total:
DVC's start-up, hashing, lock files, cache checkouts. A stage's wall includes its own
interpreter start-up and imports, counted as ours.

Which stages ran is read from DVC's own ``Running stage`` lines, which ``run`` keeps in
``pipelines/retrograde/logs/run.log``.

Run: ``python benchmarks/bench_pipeline.py [--quick] [--out PATH]``.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import _common

from retrograde.host import parse_repro_line

CORPUS_BYTES = 300_000
STUDY = """\
# @package study
orders:
  forward: {name: forward}
  reverse: {name: reverse}
models:
  ngram: {family: ngram, params: {order: 3}}
  mlp: {family: mlp, params: {window: 4, hidden: 32, epochs: 3}}
seeds: SEEDS
reference_order: forward
sweeps: {}
"""
EDIT = "study.models.ngram.params.order=4"
SHIM = """\
#!/bin/sh
# Benchmark shim: run the real interpreter and log "start end arguments" (seconds).
start=$(date +%s.%N)
"$RETROGRADE_BENCH_PYTHON" "$@"
status=$?
end=$(date +%s.%N)
printf '%s %s %s\\n' "$start" "$end" "$*" >> "$RETROGRADE_BENCH_LOG"
exit $status
"""
# `python -c` launcher: point sys.executable at the shim, then run the real CLI.
LAUNCH = (
    "import sys; sys.executable = sys.argv.pop(1); "
    "from retrograde.cli import main; sys.exit(main(sys.argv[1:]))"
)


def sh(argv: list[str], cwd: Path) -> str:
    result = subprocess.run(argv, cwd=cwd, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise RuntimeError(f"{argv} failed:\n{result.stdout}\n{result.stderr}")
    return result.stdout


def make_host(host: Path, *, corpus_bytes: int, seeds: list[int]) -> None:
    """A committed git + DVC repository with the demo corpus and `retrograde init` done."""
    from retrograde.sources.demo import write_corpus

    host.mkdir(parents=True)
    sh(["git", "init", "-q", "-b", "main"], host)
    for key, value in (("user.email", "bench@localhost"), ("user.name", "bench")):
        sh(["git", "config", key, value], host)
    sh(["git", "config", "commit.gpgsign", "false"], host)
    dvc = [sys.executable, "-m", "dvc"]
    sh([*dvc, "init", "-q"], host)
    sh([*dvc, "config", "core.analytics", "false"], host)
    sh([*dvc, "config", "core.check_update", "false"], host)
    write_corpus(host / "data" / "corpus.txt", size_bytes=corpus_bytes, seed=0)
    retrograde = [sys.executable, "-m", "retrograde"]
    sh([*retrograde, "init", "--dir", str(host), "--source", "data/corpus.txt"], host)
    study = STUDY.replace("SEEDS", str(seeds))
    (host / "conf" / "retrograde" / "study" / "default.yaml").write_text(study)
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "host with retrograde"], host)


def split_log(lines: list[str]) -> dict[str, float]:
    """Seconds per kind of process in the shim's log: ``dvc`` and each stage kind."""
    seconds: dict[str, float] = {}
    for line in lines:
        start, end, *argv = line.split()
        module = argv[1] if len(argv) > 1 and argv[0] == "-m" else "other"
        kind = "dvc" if module == "dvc" else module.rsplit(".", 1)[-1]
        seconds[kind] = seconds.get(kind, 0.0) + float(end) - float(start)
    return seconds


def timed_run(host: Path, shim: Path, log: Path, overrides: list[str]) -> dict[str, Any]:
    log.write_text("")
    argv = [sys.executable, "-c", LAUNCH, str(shim), "run", "--dir", str(host), *overrides]
    env = os.environ | {"RETROGRADE_BENCH_PYTHON": sys.executable, "RETROGRADE_BENCH_LOG": str(log)}
    start = time.perf_counter()
    result = subprocess.run(argv, cwd=host, capture_output=True, text=True, env=env, check=False)
    total = time.perf_counter() - start
    if result.returncode != 0:
        raise RuntimeError(f"retrograde run failed:\n{result.stderr[-3000:]}")
    seconds = split_log(log.read_text().splitlines())
    dvc_total = seconds.pop("dvc", 0.0)
    stages = sum(seconds.values())
    # What ran, from DVC's own "Running stage" lines, which `run` keeps in logs/run.log.
    repro_log = host / "pipelines" / "retrograde" / "logs" / "run.log"
    events = [parse_repro_line(line) for line in repro_log.read_text().splitlines()]
    ran = [event[1] for event in events if event is not None and event[0] == "ran"]
    return {
        "total_seconds": total,
        "dvc_repro_seconds": dvc_total,
        "stage_seconds": stages,
        "stage_seconds_by_kind": seconds,
        "dvc_overhead_seconds": dvc_total - stages,
        "cli_seconds": total - dvc_total,
        "dvc_share": (dvc_total - stages) / total,
        "stages_ran": len(ran),
        "fit_stages_ran": sum(name.startswith("fit@") for name in ran),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "pipeline")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    info = _common.machine()
    corpus_bytes = 20_000 if args.quick else CORPUS_BYTES
    seeds = [0] if args.quick else [0, 1, 2]
    runs = {}
    with tempfile.TemporaryDirectory(prefix="retrograde-bench-pipeline-") as tmp:
        host = Path(tmp) / "host"
        print("creating the host repository ...", flush=True)
        make_host(host, corpus_bytes=corpus_bytes, seeds=seeds)
        shim, log = Path(tmp) / "shim" / "python", Path(tmp) / "timing.log"
        shim.parent.mkdir()
        shim.write_text(SHIM)
        shim.chmod(0o755)
        for name, overrides in (("scratch", []), ("noop", []), ("edit", [EDIT])):
            runs[name] = timed_run(host, shim, log, overrides)
            print(f"  {name}: {runs[name]['total_seconds']:.1f} s", flush=True)
    info["load_average_1min_after"] = round(os.getloadavg()[0], 2)
    grid = {"orders": 2, "models": 2, "seeds": len(seeds), "corpus_bytes": corpus_bytes}
    results = {"machine": info, "quick": args.quick, "grid": grid, "runs": runs}
    results["wall_seconds"] = round(time.perf_counter() - started, 1)
    rows = [{"run": name, **run} for name, run in runs.items()]
    print(
        f"\nretrograde run, {len(seeds) * 4} fit cells (2 orders x 2 models x {len(seeds)} seeds)"
    )
    print(
        _common.format_table(
            rows,
            [
                ("run", "run", ""),
                ("stages_ran", "stages ran", "d"),
                ("total_seconds", "total s", ".1f"),
                ("stage_seconds", "our stages s", ".1f"),
                ("dvc_overhead_seconds", "DVC s", ".1f"),
                ("cli_seconds", "CLI s", ".1f"),
                ("dvc_share", "DVC share", ".0%"),
            ],
        )
    )
    print(f"total wall time {results['wall_seconds']:.0f} s")
    _common.write_results(args.out, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
