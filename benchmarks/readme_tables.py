"""Rewrite the measured tables in ``benchmarks/README.md`` from ``benchmarks/results/*.json``.

The README's figures come only from the results files: run the benchmarks, then
``python benchmarks/readme_tables.py``. Only the text between the markers changes.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
START, END = "<!-- results:start -->", "<!-- results:end -->"


def _load(name: str) -> dict[str, Any] | None:
    path = HERE / "results" / f"{name}.json"
    return json.loads(path.read_text()) if path.is_file() else None


def _table(header: list[str], rows: list[list[str]]) -> str:
    # Text in the first column reads best left-aligned, numbers right-aligned.
    align = ["---"] + ["---:"] * (len(header) - 1)
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join(align) + "|"]
    return "\n".join(lines + ["| " + " | ".join(row) + " |" for row in rows])


def _number(value: float | None, spec: str = ",.0f") -> str:
    return "-" if value is None else format(value, spec)


def _machine(result: dict[str, Any]) -> str:
    m = result["machine"]
    return (
        f"_Measured {m['date_utc']} on {m['cpu']} ({m['logical_cpus']} logical CPUs, "
        f"{m['memory_gib']} GiB), Python {m['python']}, numpy {m['numpy']}, retrograde "
        f"{m['retrograde_commit']}; 1-minute load average {m['load_average_1min']} before, "
        f"{m.get('load_average_1min_after', '?')} after; script wall time "
        f"{result['wall_seconds']:.0f} s._"
    )


def ngram_section(result: dict[str, Any]) -> list[str]:
    grid = [
        [
            r["tokens"]
            if r.get("corpus", "python") == "python"
            else f"{r['tokens']} ({r['corpus']})",
            str(r["order"]),
            _number(r["train_tokens"]),
            _number(r["fit_tokens_per_s"]),
            _number(r["score_tokens_per_s"]),
            _number(r["fit_score_tokens_per_s"]),
            _number(r["fit_score_tokens_per_cpu_s"]),
            _number(r["peak_rss_mib"]),
            _number(r["bits_per_token"], ".3f"),
        ]
        for r in result["grid"]
    ]
    versus = [
        [
            r["tokens"],
            str(r["order"]),
            _number(r["nltk"]["train_tokens"]),
            _number(r["nltk"]["test_events"]),
            _number(r["nltk"]["fit_tokens_per_s"]),
            _number(r["ours"]["fit_tokens_per_s"]),
            f"{r['fit_ratio']:,.0f}x",
            _number(r["nltk"]["score_tokens_per_s"]),
            _number(r["ours"]["score_tokens_per_s"]),
            f"{r['score_ratio']:,.0f}x",
            f"{r['fit_ratio_cpu']:,.0f}x",
            f"{r['score_ratio_cpu']:,.0f}x",
        ]
        for r in result["versus_nltk"]
    ]
    scaling = [
        [
            r["tokens"],
            str(r["order"]),
            f"{r['time_per_token_ratio']:.2f}",
            f"{r['cpu_time_per_token_ratio']:.2f}",
        ]
        for r in result["scaling"]
    ]
    t = result["targets"]
    checks = [
        ["fit throughput vs NLTK (min)", ">= 100x", "fit_ratio_min", "fit_ratio_cpu_min", "x"],
        [
            "scoring throughput vs NLTK (min)",
            ">= 1000x",
            "score_ratio_min",
            "score_ratio_cpu_min",
            "x",
        ],
        [
            "char 5-gram fit + score, tok/s (min over sizes)",
            ">= 2,000,000",
            "char5_fit_score_tokens_per_s_min",
            "char5_fit_score_tokens_per_cpu_s_min",
            "",
        ],
    ]
    rows = [
        [label, target, _number(t[wall]) + unit, _number(t[cpu]) + unit]
        for label, target, wall, cpu, unit in checks
    ]
    rows.append(
        [
            "time per token, largest / smallest size (max)",
            "<= 1.30",
            _number(t["time_per_token_ratio_max"], ".2f"),
            _number(t["cpu_time_per_token_ratio_max"], ".2f"),
        ]
    )
    rows.append(
        [
            f"peak memory, char 5-gram, {t['large_case_train_tokens']:,} train tokens",
            "< 1 GB (954 MiB)",
            f"{t['large_case_peak_rss_mib']:,.0f} MiB",
            "",
        ]
    )
    if "word_cpu_time_per_token_ratio_max" in t:
        rows.append(
            [
                "word time per token, 16 M / 1 M (max over orders)",
                "<= 1.25 (CPU)",
                "",
                _number(t["word_cpu_time_per_token_ratio_max"], ".2f"),
            ]
        )
    if "unicode_case_peak_rss_mib" in t:
        label = (
            f"char 5-gram, unicode source ({t['unicode_case_vocab_size']:,} symbols), "
            f"{t['unicode_case_train_tokens']:,} train tokens"
        )
        rows.append(
            [
                f"{label}: fit + score, tok/s",
                ">= 6,000,000 (CPU)",
                _number(t["unicode_case_fit_score_tokens_per_s"]),
                _number(t["unicode_case_fit_score_tokens_per_cpu_s"]),
            ]
        )
        rows.append(
            [
                f"{label}: peak memory",
                "<= 500 MiB",
                f"{t['unicode_case_peak_rss_mib']:,.0f} MiB",
                "",
            ]
        )
    return [
        "### n-gram (`bench_ngram.py`)",
        "",
        _machine(result),
        "",
        _table(["check", "target", "measured (wall)", "measured (CPU)"], rows),
        "",
        _table(
            ["tokens", "order", "train tokens", "fit tok/s", "score tok/s", "fit+score tok/s"]
            + ["fit+score tok/CPU s", "peak MiB", "test bits/token"],
            grid,
        ),
        "",
        "Against NLTK `KneserNeyInterpolated`, same data, same run:",
        "",
        _table(
            ["tokens", "order", "train tokens", "scored events", "NLTK fit tok/s"]
            + ["ours fit tok/s", "fit ratio", "NLTK score tok/s", "ours score tok/s"]
            + ["score ratio", "fit ratio (CPU)", "score ratio (CPU)"],
            versus,
        ),
        "",
        "Time per token (fit + score) at 16 M over 1 M tokens:",
        "",
        _table(["tokens", "order", "wall-time ratio", "CPU-time ratio"], scaling),
    ]


def mlp_section(result: dict[str, Any]) -> list[str]:
    rows = [
        [
            r["system"],
            _number(r["train_tokens"]),
            str(r["epochs_run"]),
            _number(r["train_tokens_per_s"]),
            _number(r["score_tokens_per_s"]),
            _number(r["train_tokens_per_cpu_s"]),
            _number(r["score_tokens_per_cpu_s"]),
            _number(r["peak_rss_mib"]),
            _number(r["bits_per_token"], ".3f"),
        ]
        for r in result["rows"]
    ]
    ratios = result["ratios"]
    return [
        "### Neural families (`bench_mlp.py`)",
        "",
        _machine(result),
        "",
        _table(
            ["system", "train tokens", "epochs", "train tok/s", "score tok/s"]
            + ["train tok/CPU s", "score tok/CPU s", "peak MiB", "test bits/token"],
            rows,
        ),
        "",
        f"`mlp` / scikit-learn `MLPClassifier` on the same one-hot task: training "
        f"{ratios['mlp_vs_sklearn_train']:.2f}x, scoring {ratios['mlp_vs_sklearn_score']:.2f}x "
        f"(CPU time: training {ratios['mlp_vs_sklearn_train_cpu']:.2f}x, scoring "
        f"{ratios['mlp_vs_sklearn_score_cpu']:.2f}x).",
    ]


def pipeline_section(result: dict[str, Any]) -> list[str]:
    g, runs, summary = result["grid"], result["runs"], result["summary"]
    rows = []
    for key, label in (
        ("scratch_jobs1", "`run --jobs 1` from scratch"),
        ("scratch_jobs2", "`run --jobs 2` from scratch"),
        ("noop_jobs1", "`run` again, nothing changed (`--jobs 1`)"),
        ("noop_jobs2", "`run` again, nothing changed (`--jobs 2`)"),
        ("bare_jobs1", "bare `dvc repro` no-op of the same pipeline"),
        ("edit_jobs1", "one model's parameter edited (`--jobs 1`)"),
        ("direct", "the same fits called directly in one process"),
    ):
        run = runs.get(key)
        if run is None:
            continue
        cpu = run["in_process"]["cpu"] if key == "direct" else run["cpu_seconds"]
        wall = run["in_process"]["wall"] if key == "direct" else run["wall_seconds"]
        ran = "" if "stages_ran" not in run else f"{run['stages_ran']} ({run['fit_stages_ran']})"
        rows.append([label, ran, f"{wall:.1f}", f"{cpu:.1f}", f"{run['load_average_1min_before']}"])
    checks = [
        [
            "overhead per grid cell, CPU s (`--jobs 1` / `--jobs 2`)",
            "<= 0.6",
            f"{summary['overhead_cpu_per_cell_jobs1']:.2f} / "
            f"{summary['overhead_cpu_per_cell_jobs2']:.2f}",
        ],
        [
            "`--jobs 2` over `--jobs 1` from scratch, wall",
            "<= 0.65",
            f"{summary['jobs2_over_jobs1_wall']:.2f}",
        ],
        [
            "`--jobs 2` over `--jobs 1` from scratch, CPU",
            "<= 1.15",
            f"{summary['jobs2_over_jobs1_cpu']:.2f}",
        ],
        [
            "no-op `run` over bare `dvc repro` no-op, wall (`--jobs 1` / `--jobs 2`)",
            "<= 1.3",
            f"{summary['noop_over_bare_wall_jobs1']:.2f} / {summary['noop_over_bare_wall_jobs2']:.2f}",
        ],
        [
            "no-op `run` over bare `dvc repro` no-op, CPU (`--jobs 1` / `--jobs 2`)",
            "<= 1.3",
            f"{summary['noop_over_bare_cpu_jobs1']:.2f} / {summary['noop_over_bare_cpu_jobs2']:.2f}",
        ],
        [
            "`metrics.json` the same bytes for every `--jobs` (but for measured times)",
            "yes",
            "yes" if summary["same_results_for_every_jobs"] else "NO",
        ],
    ]
    cells = g["cells"]
    return [
        "### Pipeline (`bench_pipeline.py`)",
        "",
        _machine(result),
        "",
        f"{g['sources']} sources x {g['orders']} orders x {g['models']} models x {g['seeds']} "
        f"seeds = {cells} grid cells in {g['fit_stages']} fit stages"
        + (
            " (each seed of the n-gram trains on its own half-sample: a fit per cell)"
            if g["fit_stages"] == cells
            else " (a model that ignores the seed is fitted once per source and order)"
        )
        + ". CPU is every process's (`os.wait4`).",
        "",
        _table(["check", "target", "measured"], checks),
        "",
        _table(["run", "stages ran (fits)", "wall s", "CPU s", "load before"], rows),
    ]


def coverage_section(result: dict[str, Any]) -> list[str]:
    """``bench_coverage.py``: the interval's coverage, width and power, and the schemes."""
    real = result["real"]
    machine = result.get("machine", {})
    sizes = real["sizes"]
    lines = [
        "### Coverage of the gap interval (`bench_coverage.py`, owned by the stats engineer)",
        "",
        f"_Measured {machine.get('date_utc', '?')}, retrograde "
        f"{machine.get('retrograde_commit', '?')}; 1-minute load average "
        f"{machine.get('load_average_1min', '?')}. {real['repetitions']} repetitions of real "
        f"fits (fits {real['fit_cpu_s']:.0f} s CPU, intervals {real['evaluate_cpu_s']:.0f} s "
        f"CPU; simulated rows {result.get('simulated_cpu_s', 0):.0f} s CPU)._",
        "",
        f"Reversible chain over {sizes['vocab_size']} symbols (stationary law "
        f"{real['chain']['stationary']}), units of {sizes['unit_length']} tokens; "
        f"{sizes['train_units']} training, {sizes['valid_units']} validation and "
        f"{sizes['test_units']} test units drawn afresh in every repetition; `ngram` "
        f"{sizes['ngram']}, `mlp` {sizes['mlp']}; {sizes['seeds_fitted']} seeds per order, "
        "split into disjoint blocks of 3, 5 or 10. True gap 0. *ratio* = mean width / "
        "(3.92 x the spread of the point gap across repetitions); *power demo*: reverse "
        "losses x 1.16 (1 + N(0, 1%) per seed); *power 4 sd*: a true gap of 4 spreads.",
        "",
    ]
    header = [
        "family",
        "train_sample",
        "seeds paired",
        "seeds",
        "gap",
        "interval",
        "covers 0",
        "mean width %",
        "3.92 x spread %",
        "ratio",
        "power demo",
        "power 4 sd",
    ]
    rows = [
        [
            f"`{r['family']}`",
            r["train_sample"],
            "yes" if r["paired"] else "no",
            str(r["seeds"]),
            r["gap"],
            r["interval"],
            f"{r['coverage']:.3f}",
            f"{r['mean_width_pct']:.3g}",
            f"{r['ideal_width_pct']:.3g}",
            f"{r['width_over_ideal']:.2f}",
            f"{r['power_demo']:.3f}",
            f"{r['power_4_spreads']:.3f}",
        ]
        for r in real["rows"]
    ]
    lines += [_table(header, rows), ""]
    correlation = real.get("mlp_same_seed_correlation")
    if correlation:
        lines += [
            "The `mlp`'s fits of the two orders draw their own random streams "
            "(`order_seed(seed, order)`); the correlation of their per-seed totals across "
            f"seed numbers is {correlation['mean']:+.3f} ± {correlation['standard_error']:.3f} "
            "(mean ± standard error over repetitions; 0 expected).",
            "",
        ]
    demo = result.get("demo")
    if demo:
        lines += [
            f"The demo's `mlp` on `linear_gf2` ({demo['repetitions']} fresh data draws, "
            f"{demo['seeds']} seeds per order, {demo['cpu_s']:.0f} s CPU): mean gap "
            f"{demo['mean_gap_pct']:+.1f}%, mean seed spread {demo['mean_seed_spread_pct']:.1f}%; "
            f"power (interval above 0) unpaired {demo['unpaired_power']:.2f}, paired "
            f"{demo['paired_power']:.2f}; mean width unpaired {demo['unpaired_mean_width_pct']:.1f}, "
            f"paired {demo['paired_mean_width_pct']:.1f} percentage points.",
            "",
        ]
    quality = [
        [
            f"`{key}`",
            f"{value['excess_bits_per_token']:.5f}",
            f"{value['content_excess_bits_per_token']:.5f}",
        ]
        for key, value in real["quality"].items()
    ]
    lines += [
        "Model quality (forward order, mean over repetitions and seeds), bits per token above "
        "the exact floor:",
        "",
        _table(["fits", "excess", "content excess"], quality),
        "",
        "Simulated noise (the model of `tests/test_stats.py`, 300 units), coverage of 0:",
        "",
        _table(
            ["setting", "t", "bootstrap"],
            [
                [label, f"{value['t']:.3f}", f"{value['bootstrap']:.3f}"]
                for label, value in result["simulated"].items()
            ],
        ),
    ]
    return lines


def _scalar_leaves(value: Any, prefix: str = "") -> list[tuple[str, Any]]:
    """``(dotted key, value)`` for every scalar leaf, skipping lists and ``machine``."""
    if isinstance(value, dict):
        return [
            leaf
            for key, item in sorted(value.items())
            if key != "machine"
            for leaf in _scalar_leaves(item, f"{prefix}.{key}" if prefix else str(key))
        ]
    return [] if isinstance(value, list) else [(prefix, value)]


def _figure(value: Any) -> str:
    if isinstance(value, float):
        return format(value, ",.0f") if abs(value) >= 1000 else format(value, ".4g")
    return str(value)


def other_sections() -> list[str]:
    """Results of the scripts other engineers own, as their scalar figures (no reformatting)."""
    lines: list[str] = []
    owners = {
        "torch_loop": "torch",
        "torch_calibration": "torch",
        "stats": "stats",
    }
    for name, owner in owners.items():
        result = _load(name)
        if result is None:
            continue
        lines += ["", f"### `bench_{name}.py` (owned by the {owner} engineer)", ""]
        machine = result.get("machine")
        if isinstance(machine, dict) and "date_utc" in machine:
            load = machine.get("load_average_1min", "?")
            lines += [f"_Measured {machine['date_utc']}; 1-minute load average {load}._", ""]
        rows = [[f"`{key}`", _figure(value)] for key, value in _scalar_leaves(result)]
        lines.append(_table(["figure", "value"], rows))
    return lines


def main() -> int:
    sections: list[str] = []
    for name, render in (("ngram", ngram_section), ("mlp", mlp_section)):
        result = _load(name)
        if result is not None:
            sections += [*render(result), ""]
    pipeline = _load("pipeline")
    if pipeline is not None:
        sections += [*pipeline_section(pipeline), ""]
    sections += other_sections()
    coverage = _load("coverage")
    if coverage is not None and "real" in coverage:
        sections += ["", *coverage_section(coverage)]
    readme = HERE / "README.md"
    text = readme.read_text()
    head, rest = text.split(START, 1)
    tail = rest.split(END, 1)[1]
    readme.write_text(head + START + "\n" + "\n".join(sections).strip() + "\n" + END + tail)
    print(f"updated {readme}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
