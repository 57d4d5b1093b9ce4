"""What ``retrograde run`` costs beyond the fits themselves, on a grid of cheap fits.

The host: ``git init``, ``dvc init``, ``retrograde init`` and a grid of 3 sources (the
invented demo corpus, 40,000 bytes; the ``markov`` and ``linear_gf2`` calibration sources)
x 4 orders (``forward``, ``reverse``, ``block_reverse`` size 4, ``stride`` step 2) x 2 models
(``ngram`` order 3, a small ``mlp``) x 5 seeds = 120 fit cells, all committed. Each seed
of the n-gram trains on its own half-sample of the units (``train_sample: auto``), so every
cell is a fit stage: 120 fit stages, 136 stages in all. ``--quick``: the corpus only (20,000 bytes), 2 orders, 1 seed (4 fit stages).

For each ``--jobs`` value (1 and 2) the benchmark copies the host and runs, each as a fresh
process whose CPU time is read with ``os.wait4`` (every descendant it waited for: DVC, the
stage commands, the stage server and its forks):

``scratch``  ``retrograde run --jobs N`` on the fresh copy: every stage runs;
``noop``     the same command again: nothing runs;
``bare``     ``python -m dvc repro pipelines/retrograde/dvc.yaml``: DVC's own no-op;
``edit``     (``--jobs 1`` only) ``study.models.ngram.params.order=4``: only that model's
             fit stages and the table run.

``direct`` fits the same cells (the ``fits`` block of the composed params) in one process
with :func:`retrograde.stages.fit.fit_cell` and saves what the stage saves; data loading
is inside the timer, imports outside. Then:

- overhead per cell = (CPU of ``scratch`` - CPU of ``direct``) / grid cells (120);
- ``--jobs 2`` over ``--jobs 1``: wall and CPU of ``scratch``;
- no-op ratio: ``noop`` over ``bare``, wall and CPU.

``metrics.json`` must be the same bytes for every ``--jobs`` but for each leaf's mean
measured ``cpu_s`` and ``wall_s`` (checked; ``report.md`` and ``cells.csv`` also hold each
cell's measured times, so they differ).

Run: ``python benchmarks/bench_pipeline.py [--quick] [--out PATH]``.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import _common

from retrograde.host import parse_repro_line

CORPUS_BYTES = 40_000
CONFIG = """\
defaults:
  - source: SOURCES
  - study: grid
  - stats: default
  - _self_
"""
STUDY = """\
# @package study
orders:
ORDERS
models:
  ngram: {family: ngram, params: {order: 3}}
  mlp:
    family: mlp
    params: {window: 8, hidden: 32, epochs: 3, lr: 0.01, batch_size: 128, progress: false}
seeds: SEEDS
reference_order: forward
sweeps: {}
"""
ORDERS = {
    "forward": "{name: forward}",
    "reverse": "{name: reverse}",
    "block4": "{name: block_reverse, params: {size: 4}}",
    "stride2": "{name: stride, params: {step: 2}}",
}
MARKOV = """\
# @package study.sources.markov
name: markov
params: {vocab_size: 4, order: 1, concentration: 1.0, length: 32, chain_seed: 0}
calibration: {n_units: 400, seed: 0}
split: {fractions: [0.8, 0.1, 0.1], salt: retrograde}
"""
LINEAR_GF2 = """\
# @package study.sources.linear_gf2
name: linear_gf2
params: {n_bits: 8, nonzeros: 1, matrix_seed: 57}
calibration: {n_units: 1000, seed: 0}
split: {fractions: [0.7, 0.1, 0.2], salt: retrograde}
"""
EDIT = "study.models.ngram.params.order=4"
#: the direct fits, in a fresh process: imports outside the timer
DIRECT = """\
import json, sys, time
from pathlib import Path
import numpy as np
from retrograde import families
from retrograde.config import load_params
from retrograde.data import SequenceSet
from retrograde.stages.fit import fit_cell
import sklearn.neural_network, scipy.sparse  # the mlp's imports, outside the timer
wdir, out = Path(sys.argv[1]), Path(sys.argv[2])
config = load_params(wdir)
wall, cpu = time.perf_counter(), time.process_time()
for key, cell in config.fits.items():
    data = wdir / "data" / cell.source / "orders" / cell.order
    splits = {s: SequenceSet.load(data / s) for s in ("train", "valid", "test")}
    spec = config.study.models[cell.model]
    model, values, curve = fit_cell(spec, splits, seed=cell.seed)
    model.save(out / key / "model")
    np.save(out / key / "test_logprobs.npy", values)
    (out / key / "curve.json").write_text(json.dumps(curve))
print(json.dumps({"wall": time.perf_counter() - wall, "cpu": time.process_time() - cpu,
                  "fits": len(config.fits)}))
"""


def sh(argv: list[str], cwd: Path) -> str:
    result = subprocess.run(argv, cwd=cwd, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise RuntimeError(f"{argv} failed:\n{result.stdout}\n{result.stderr}")
    return result.stdout


def _without_times(path: Path) -> str:
    """``metrics.json`` without the lines of the leaves' measured ``cpu_s``/``wall_s``."""
    lines = path.read_text(encoding="utf-8").splitlines()
    return "\n".join(x for x in lines if not x.strip().startswith(('"cpu_s"', '"wall_s"')))


def make_host(host: Path, *, quick: bool) -> dict[str, int]:
    """A committed git + DVC host holding the grid; returns its shape."""
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
    write_corpus(host / "data" / "corpus.txt", size_bytes=20_000 if quick else CORPUS_BYTES, seed=0)
    sh([sys.executable, "-m", "retrograde", "init", "--dir", str(host)], host)
    conf = host / "conf" / "retrograde"
    sources = ["corpus"] if quick else ["corpus", "markov", "linear_gf2"]
    orders = list(ORDERS)[:2] if quick else list(ORDERS)
    seeds = [0] if quick else [0, 1, 2, 3, 4]
    (conf / "config.yaml").write_text(CONFIG.replace("SOURCES", f"[{', '.join(sources)}]"))
    order_lines = "\n".join(f"  {name}: {ORDERS[name]}" for name in orders)
    study = STUDY.replace("ORDERS", order_lines).replace("SEEDS", str(seeds))
    (conf / "study" / "grid.yaml").write_text(study)
    (conf / "source" / "markov.yaml").write_text(MARKOV)
    (conf / "source" / "linear_gf2.yaml").write_text(LINEAR_GF2)
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "host with retrograde"], host)
    return {"sources": len(sources), "orders": len(orders), "models": 2, "seeds": len(seeds)}


def measure(argv: list[str], cwd: Path, log: Path) -> dict[str, Any]:
    """Wall and CPU seconds of ``argv`` and every process it waited for (``os.wait4``)."""
    load = os.getloadavg()[0]
    with log.open("w") as out:
        start = time.perf_counter()
        process = subprocess.Popen(argv, cwd=cwd, stdout=out, stderr=subprocess.STDOUT)
        _, status, usage = os.wait4(process.pid, 0)
        wall = time.perf_counter() - start
    if os.waitstatus_to_exitcode(status) != 0:
        raise RuntimeError(f"{argv} failed; see {log}:\n{log.read_text()[-3000:]}")
    return {
        "wall_seconds": round(wall, 3),
        "cpu_seconds": round(usage.ru_utime + usage.ru_stime, 3),
        "load_average_1min_before": round(load, 2),
    }


def stages_ran(host: Path) -> tuple[int, int]:
    """(stages, fit stages) DVC reported running in the last run (its ``run.log``)."""
    log = host / "pipelines" / "retrograde" / "logs" / "run.log"
    events = [parse_repro_line(line) for line in log.read_text().splitlines()]
    ran = [event.stage for event in events if event is not None and event.event == "ran"]
    return len(ran), sum(name.startswith("fit@") for name in ran)


def _direct(host: Path, tmp: Path, runs: dict[str, Any], grid: dict[str, int]) -> None:
    """The run's fits called directly in one process (before any edit of the params)."""
    grid["fit_stages"] = runs["scratch_jobs1" if "scratch_jobs1" in runs else next(iter(runs))][
        "fit_stages_ran"
    ]
    argv = [sys.executable, "-c", DIRECT, str(host / "pipelines" / "retrograde"), str(tmp / "d")]
    log = tmp / "direct.log"
    runs["direct"] = measure(argv, host, log)
    runs["direct"]["in_process"] = json.loads(log.read_text().splitlines()[-1])
    print(f"  direct: {runs['direct']}", flush=True)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "pipeline")
    parser.add_argument("--jobs", default="1,2", help="comma-separated --jobs values")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    info = _common.machine()
    py = sys.executable
    jobs_values = [int(j) for j in args.jobs.split(",")]
    runs: dict[str, dict[str, Any]] = {}
    with tempfile.TemporaryDirectory(prefix="retrograde-bench-pipeline-") as tmp:
        template = Path(tmp) / "template"
        print("creating the host repository ...", flush=True)
        grid = make_host(template, quick=args.quick)
        grid["cells"] = grid["sources"] * grid["orders"] * grid["models"] * grid["seeds"]
        outputs: dict[int, dict[str, bytes]] = {}
        for jobs in jobs_values:
            host = Path(tmp) / f"jobs{jobs}"
            shutil.copytree(template, host, symlinks=True)
            run = [py, "-m", "retrograde", "run", "--jobs", str(jobs)]
            bare = [py, "-m", "dvc", "repro", "pipelines/retrograde/dvc.yaml"]
            steps = [("scratch", run), ("noop", run), ("bare", bare)]
            if jobs == jobs_values[0]:
                steps.append(("direct", []))
            if jobs == 1:
                steps.append(("edit", [*run, EDIT]))
            for name, command in steps:
                if name == "direct":
                    _direct(host, Path(tmp), runs, grid)
                    continue
                result = measure(command, host, Path(tmp) / f"{name}-{jobs}.log")
                if name != "bare":
                    result["stages_ran"], result["fit_stages_ran"] = stages_ran(host)
                runs[f"{name}_jobs{jobs}"] = result
                print(f"  --jobs {jobs} {name}: {result}", flush=True)
                if name == "noop":
                    pipeline = host / "pipelines" / "retrograde"
                    outputs[jobs] = {"metrics.json": _without_times(pipeline / "metrics.json")}
    info["load_average_1min_after"] = round(os.getloadavg()[0], 2)
    direct_cpu = runs["direct"]["in_process"]["cpu"]
    summary: dict[str, Any] = {
        "same_results_for_every_jobs": all(outputs[j] == outputs[jobs_values[0]] for j in outputs),
        "direct_cpu_seconds": round(direct_cpu, 3),
    }
    for jobs in jobs_values:
        scratch, noop, bare = (runs[f"{k}_jobs{jobs}"] for k in ("scratch", "noop", "bare"))
        summary[f"overhead_cpu_per_cell_jobs{jobs}"] = round(
            (scratch["cpu_seconds"] - direct_cpu) / grid["cells"], 3
        )
        summary[f"noop_over_bare_wall_jobs{jobs}"] = round(
            noop["wall_seconds"] / bare["wall_seconds"], 2
        )
        summary[f"noop_over_bare_cpu_jobs{jobs}"] = round(
            noop["cpu_seconds"] / bare["cpu_seconds"], 2
        )
    if 1 in jobs_values and 2 in jobs_values:
        one, two = runs["scratch_jobs1"], runs["scratch_jobs2"]
        summary["jobs2_over_jobs1_wall"] = round(two["wall_seconds"] / one["wall_seconds"], 2)
        summary["jobs2_over_jobs1_cpu"] = round(two["cpu_seconds"] / one["cpu_seconds"], 2)
    results = {"machine": info, "quick": args.quick, "grid": grid, "runs": runs}
    results["summary"] = summary
    results["wall_seconds"] = round(time.perf_counter() - started, 1)
    print(json.dumps(summary, indent=1))
    print(f"total wall time {results['wall_seconds']:.0f} s")
    _common.write_results(args.out, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
