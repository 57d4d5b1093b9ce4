"""Throughput and peak memory of the ``ngram`` family, with NLTK as the reference.

Data: Python source files shipped with this machine (see ``_corpus.py``), line units, the
``chars`` and ``words`` tokenizers; one more character case on the ``unicode`` source (the
``site-packages`` files with non-ASCII text: thousands of distinct, mostly rare, symbols).
Every measured case runs in a fresh process.

What is timed
-------------
``ours``
    ``families.make("ngram", order=K).fit(train)`` on the first units of the train split
    holding N tokens, then ``logprobs(test)`` on the first units of the test split holding
    N / 8 tokens (the test split is 1/8 of train in an 80/10/10 split). Scoring covers
    every token and the end marker of each unit. Throughputs count real tokens.
``nltk``
    ``nltk.lm.KneserNeyInterpolated(K)``: ``padded_everygram_pipeline`` + ``fit`` on the
    same small training units as ``ours_small`` (NLTK's pipeline is lazy, so both are
    timed together), then ``model.logscore(token, context)`` for each token and the end
    marker of the same test units, one call per event (NLTK has no batch scorer).
``ours_small``
    Our fit and score on exactly the NLTK data, median of 5 runs (each is milliseconds).
    For this pair the token ids are renumbered to the training units' own vocabulary
    (unseen test tokens -> the unknown id), which is the vocabulary NLTK builds; otherwise
    our side would also pay for the whole corpus's vocabulary (118 k words).

Targets (issues #3 and #9): fit >= 100x and scoring >= 1000x NLTK's throughput; fit +
score >= 2 M tokens/s for a character 5-gram; time per token flat within 30% from 1 M to
16 M tokens; peak memory < 1 GB for a character 5-gram with 25 M training tokens. Large
alphabets and word corpora: a character 5-gram on 25 M tokens of the ``unicode`` source at
>= 6 M tokens per CPU second and <= 500 MiB peak; word time per token (CPU) at 16 M within
25% of that at 1 M, for every order.

Run: ``python benchmarks/bench_ngram.py [--quick] [--out PATH]``.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import _common
import _corpus
import numpy as np

ORDERS = (3, 5, 8)
KINDS = ("chars", "words")
SIZES = (1_000_000, 4_000_000, 16_000_000)
LARGE_CASE = ("chars", 5, 25_000_000)  # issue #3's memory target
#: (corpus folder, tokenizer, order, train tokens): the large-alphabet target
UNICODE_CASE = ("unicode", "chars", 5, 25_000_000)
UNICODE_TOKENS_PER_CPU_S = 6e6
UNICODE_PEAK_MIB = 500
WORD_CPU_RATIO_TARGET = 1.25
NLTK_TRAIN_TOKENS = 20_000
#: scored events (tokens + end markers) per NLTK order: its scoring slows with the order
NLTK_SCORED_EVENTS = {3: 2000, 5: 1000, 8: 250}
#: --quick: enough to run every code path in seconds
QUICK = {
    "orders": (3,),
    "sizes": (20_000, 40_000),
    "large": 60_000,
    "unicode": 60_000,
    "nltk_train": 2000,
}
QUICK_NLTK_EVENTS = 40
GIGABYTE = 1e9


def load_case_units(case: dict[str, Any]) -> tuple[Any, Any]:
    """The case's train and test units; with ``compact``, in the train units' own vocabulary.

    NLTK's vocabulary is the tokens its training data holds (others become ``<UNK>``); the
    compact ids give our family the same outcome set: the ids seen in train become
    ``1..k`` and every other id the unknown id 0 (``vocab_size = k + 1``).
    """
    from retrograde.data import SequenceSet

    folder = Path(case["data"])
    train = _corpus.load_prefix(folder, "train", case["train_tokens"])
    test = _corpus.load_prefix(folder, "test", case["test_tokens"])
    if not case.get("compact"):
        return train, test
    seen = np.unique(train.tokens)
    compact = np.zeros(int(train.effective_vocab_size()), dtype=np.int32)
    compact[seen] = np.arange(1, len(seen) + 1)
    return tuple(
        SequenceSet(compact[units.tokens], units.offsets, vocab_size=len(seen) + 1)
        for units in (train, test)
    )


def measure_ours(case: dict[str, Any]) -> dict[str, Any]:
    from retrograde.families import make

    train, test = load_case_units(case)
    rss_before_fit_mib = _common.current_rss_bytes() / _common.MIB
    repeats = case.get("repeats", 1)
    model, fit_seconds, fit_cpu = _common.median_seconds(
        lambda: make("ngram", order=case["order"]).fit(train), repeats
    )
    scores, score_seconds, score_cpu = _common.median_seconds(lambda: model.logprobs(test), repeats)
    return {
        "train_tokens": len(train.tokens),
        "test_tokens": len(test.tokens),
        "test_units": len(test),
        "test_events": len(scores.values),
        "fit_seconds": fit_seconds,
        "score_seconds": score_seconds,
        "fit_cpu_seconds": fit_cpu,
        "score_cpu_seconds": score_cpu,
        "bits_per_token": float(-scores.values.sum() / math.log(2) / len(test.tokens)),
        "rss_before_fit_mib": round(rss_before_fit_mib, 1),
    }


def measure_nltk(case: dict[str, Any]) -> dict[str, Any]:
    from nltk.lm import KneserNeyInterpolated
    from nltk.lm.preprocessing import pad_both_ends, padded_everygram_pipeline
    from nltk.util import ngrams

    order = case["order"]
    train, test = load_case_units(case)
    # NLTK's vocabulary looks up strings only: the ids become their decimal text.
    sentences = [list(map(str, row.tolist())) for row in train]

    def fit() -> Any:
        grams, vocabulary = padded_everygram_pipeline(order, sentences)
        model = KneserNeyInterpolated(order)
        model.fit(grams, vocabulary)
        return model

    model, fit_seconds, fit_cpu = _common.timed(fit)
    # NLTK pads with K-1 begin and K-1 end symbols; the first len+1 K-grams of a unit predict
    # its tokens and one end marker: the same events our family scores.
    events = [
        gram
        for row in test
        for gram in list(ngrams(pad_both_ends(list(map(str, row.tolist())), n=order), order))[
            : len(row) + 1
        ]
    ]
    log2_probs, score_seconds, score_cpu = _common.timed(
        lambda: [model.logscore(gram[-1], gram[:-1]) for gram in events]
    )
    total_bits = -float(np.sum(log2_probs))
    return {
        "train_tokens": len(train.tokens),
        "test_tokens": len(test.tokens),
        "test_units": len(test),
        "test_events": len(events),
        "fit_seconds": fit_seconds,
        "score_seconds": score_seconds,
        "fit_cpu_seconds": fit_cpu,
        "score_cpu_seconds": score_cpu,
        "bits_per_token": total_bits / len(test.tokens) if math.isfinite(total_bits) else None,
    }


def with_throughput(row: dict[str, Any]) -> dict[str, Any]:
    row["fit_tokens_per_s"] = row["train_tokens"] / row["fit_seconds"]
    row["score_tokens_per_s"] = row["test_tokens"] / row["score_seconds"]
    row["fit_score_tokens_per_s"] = (row["train_tokens"] + row["test_tokens"]) / (
        row["fit_seconds"] + row["score_seconds"]
    )
    row["seconds_per_million_tokens"] = 1e6 / row["fit_score_tokens_per_s"]
    # The same figures per CPU second: less sensitive to other work on a shared machine.
    row["fit_tokens_per_cpu_s"] = row["train_tokens"] / row["fit_cpu_seconds"]
    row["score_tokens_per_cpu_s"] = row["test_tokens"] / row["score_cpu_seconds"]
    row["fit_score_tokens_per_cpu_s"] = (row["train_tokens"] + row["test_tokens"]) / (
        row["fit_cpu_seconds"] + row["score_cpu_seconds"]
    )
    row["cpu_seconds_per_million_tokens"] = 1e6 / row["fit_score_tokens_per_cpu_s"]
    return row


def nltk_events_cap_to_tokens(events: int, units: Any) -> int:
    """Test tokens whose units hold about ``events`` events (tokens + end markers)."""
    ends = units.offsets[1:] + np.arange(1, len(units) + 1)
    n_units = int(min(len(units), 1 + ends.searchsorted(events)))
    return int(units.offsets[n_units])


def run_all(args: argparse.Namespace, workdir: Path) -> dict[str, Any]:
    script = Path(__file__).resolve()
    sizes = QUICK["sizes"] if args.quick else SIZES
    orders = QUICK["orders"] if args.quick else ORDERS
    large_kind, large_order, large_size = LARGE_CASE
    large_size = QUICK["large"] if args.quick else large_size
    nltk_train = QUICK["nltk_train"] if args.quick else NLTK_TRAIN_TOKENS
    corpora = {}
    unicode_corpus, unicode_kind, unicode_order, unicode_size = UNICODE_CASE
    unicode_size = QUICK["unicode"] if args.quick else unicode_size
    for corpus, kind, need, source in [
        *(
            (kind, kind, max(sizes) if kind != large_kind else max(*sizes, large_size), "python")
            for kind in KINDS
        ),
        (unicode_corpus, unicode_kind, unicode_size, "unicode"),
    ]:
        print(f"preparing {corpus} units ({need:,} train tokens) ...", flush=True)
        start = time.perf_counter()
        corpora[corpus] = _corpus.prepare_corpus(
            kind, need, workdir / corpus, n_test_tokens=need // 8, source=source
        )
        corpora[corpus]["prepare_seconds"] = round(time.perf_counter() - start, 1)

    grid = []
    # (corpus folder, tokenizer, order, size, large case, unicode case)
    cases = [(k, k, o, n, False, False) for k in KINDS for o in orders for n in sizes]
    cases.append((large_kind, large_kind, large_order, large_size, True, False))
    cases.append((unicode_corpus, unicode_kind, unicode_order, unicode_size, False, True))
    for corpus, kind, order, size, is_large, is_unicode in cases:
        case = {"data": str(workdir / corpus), "order": order}
        case |= {"train_tokens": size, "test_tokens": size // 8}
        row = with_throughput(_common.run_fresh(script, case | {"system": "ours"}))
        source = "unicode" if is_unicode else "python"
        grid.append(
            {"tokens": kind, "corpus": source, "order": order, "size": size}
            | {"large_case": is_large, "unicode_case": is_unicode, **row}
        )
        print(
            f"  ours {corpus} {kind} order {order} N={size:,}: "
            f"{row['fit_score_tokens_per_s']:,.0f} tok/s"
        )

    versus_nltk = []
    for kind in KINDS:
        test = _corpus.load_split(workdir / kind, "test")
        for order in orders:
            events = QUICK_NLTK_EVENTS if args.quick else NLTK_SCORED_EVENTS[order]
            case = {"data": str(workdir / kind), "order": order, "train_tokens": nltk_train}
            case["compact"] = True
            case["test_tokens"] = nltk_events_cap_to_tokens(events, test)
            nltk = with_throughput(_common.run_fresh(script, case | {"system": "nltk"}))
            ours = with_throughput(
                _common.run_fresh(script, case | {"system": "ours", "repeats": 5})
            )
            versus_nltk.append(
                {
                    "tokens": kind,
                    "order": order,
                    "nltk": nltk,
                    "ours": ours,
                    "fit_ratio": ours["fit_tokens_per_s"] / nltk["fit_tokens_per_s"],
                    "score_ratio": ours["score_tokens_per_s"] / nltk["score_tokens_per_s"],
                    "fit_ratio_cpu": ours["fit_tokens_per_cpu_s"] / nltk["fit_tokens_per_cpu_s"],
                    "score_ratio_cpu": ours["score_tokens_per_cpu_s"]
                    / nltk["score_tokens_per_cpu_s"],
                }
            )
            print(f"  nltk {kind} order {order}: fit x{versus_nltk[-1]['fit_ratio']:,.0f}")
    return {"corpora": corpora, "grid": grid, "versus_nltk": versus_nltk}


def scaling(grid: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Time per token at the largest grid size over that at the smallest, per (tokens, order)."""
    rows = []
    for kind in KINDS:
        for order in ORDERS:
            runs = sorted(
                (
                    r
                    for r in grid
                    if (r["tokens"], r["order"]) == (kind, order)
                    and not r["large_case"]
                    and not r.get("unicode_case")
                ),
                key=lambda r: r["size"],
            )
            if len(runs) >= 2:
                first, last = runs[0], runs[-1]
                wall = last["seconds_per_million_tokens"] / first["seconds_per_million_tokens"]
                cpu = (
                    last["cpu_seconds_per_million_tokens"] / first["cpu_seconds_per_million_tokens"]
                )
                rows.append(
                    {
                        "tokens": kind,
                        "order": order,
                        "time_per_token_ratio": wall,
                        "cpu_time_per_token_ratio": cpu,
                    }
                )
    return rows


def targets(results: dict[str, Any]) -> dict[str, Any]:
    grid, versus = results["grid"], results["versus_nltk"]
    char5 = [r for r in grid if r["tokens"] == "chars" and r["order"] == 5]
    large = next(r for r in grid if r["large_case"])
    ratios = [r["time_per_token_ratio"] for r in results["scaling"]]
    cpu_ratios = [r["cpu_time_per_token_ratio"] for r in results["scaling"]]
    word_cpu_ratios = [
        r["cpu_time_per_token_ratio"] for r in results["scaling"] if r["tokens"] == "words"
    ]
    unicode = next(r for r in grid if r.get("unicode_case"))
    return {
        "fit_ratio_min": min(r["fit_ratio"] for r in versus),
        "fit_ratio_target": 100,
        "score_ratio_min": min(r["score_ratio"] for r in versus),
        "score_ratio_target": 1000,
        "char5_fit_score_tokens_per_s_min": min(r["fit_score_tokens_per_s"] for r in char5),
        "char5_fit_score_target": 2e6,
        "time_per_token_ratio_max": max(ratios) if ratios else None,
        "cpu_time_per_token_ratio_max": max(cpu_ratios) if cpu_ratios else None,
        "fit_ratio_cpu_min": min(r["fit_ratio_cpu"] for r in versus),
        "score_ratio_cpu_min": min(r["score_ratio_cpu"] for r in versus),
        "char5_fit_score_tokens_per_cpu_s_min": min(r["fit_score_tokens_per_cpu_s"] for r in char5),
        "time_per_token_ratio_target": 1.3,
        "large_case_peak_rss_mib": large["peak_rss_mib"],
        "large_case_train_tokens": large["train_tokens"],
        "large_case_peak_target_mib": GIGABYTE / _common.MIB,
        "word_cpu_time_per_token_ratio_max": max(word_cpu_ratios) if word_cpu_ratios else None,
        "word_cpu_time_per_token_ratio_target": WORD_CPU_RATIO_TARGET,
        "unicode_case_fit_score_tokens_per_s": unicode["fit_score_tokens_per_s"],
        "unicode_case_fit_score_tokens_per_cpu_s": unicode["fit_score_tokens_per_cpu_s"],
        "unicode_case_fit_score_target_per_cpu_s": UNICODE_TOKENS_PER_CPU_S,
        "unicode_case_peak_rss_mib": unicode["peak_rss_mib"],
        "unicode_case_peak_target_mib": UNICODE_PEAK_MIB,
        "unicode_case_train_tokens": unicode["train_tokens"],
        "unicode_case_vocab_size": results["corpora"]["unicode"]["vocab_size"],
    }


def _wall_and_cpu(goal: dict[str, Any], key: str) -> tuple[Any, Any]:
    """The wall-time and CPU-time versions of one target figure."""
    if key == "char5_fit_score_tokens_per":
        return goal[f"{key}_s_min"], goal[f"{key}_cpu_s_min"]
    if key == "time_per_token_ratio":
        return goal[f"{key}_max"], goal[f"cpu_{key}_max"]
    return goal[f"{key}_min"], goal[f"{key}_cpu_min"]


def print_report(results: dict[str, Any]) -> None:
    print("\nngram family: fit on N train tokens, score N/8 test tokens (fresh process each)")
    print(
        _common.format_table(
            results["grid"],
            [
                ("tokens", "tokens", ""),
                ("corpus", "corpus", ""),
                ("order", "order", "d"),
                ("train_tokens", "train tok", ",d"),
                ("fit_tokens_per_s", "fit tok/s", ",.0f"),
                ("score_tokens_per_s", "score tok/s", ",.0f"),
                ("fit_score_tokens_per_s", "fit+score tok/s", ",.0f"),
                ("fit_score_tokens_per_cpu_s", "per CPU s", ",.0f"),
                ("seconds_per_million_tokens", "s/M tok", ".3f"),
                ("peak_rss_mib", "peak MiB", ",.0f"),
                ("bits_per_token", "test bits/tok", ".3f"),
            ],
        )
    )
    rows = [
        {
            "tokens": r["tokens"],
            "order": r["order"],
            "train": r["nltk"]["train_tokens"],
            "events": r["nltk"]["test_events"],
            "nltk_fit": r["nltk"]["fit_tokens_per_s"],
            "ours_fit": r["ours"]["fit_tokens_per_s"],
            "fit_ratio": r["fit_ratio"],
            "nltk_score": r["nltk"]["score_tokens_per_s"],
            "ours_score": r["ours"]["score_tokens_per_s"],
            "score_ratio": r["score_ratio"],
            "fit_ratio_cpu": r["fit_ratio_cpu"],
            "score_ratio_cpu": r["score_ratio_cpu"],
        }
        for r in results["versus_nltk"]
    ]
    print("\nversus NLTK KneserNeyInterpolated on the same small data (same run)")
    print(
        _common.format_table(
            rows,
            [
                ("tokens", "tokens", ""),
                ("order", "order", "d"),
                ("train", "train tok", ",d"),
                ("events", "scored", ",d"),
                ("nltk_fit", "NLTK fit tok/s", ",.0f"),
                ("ours_fit", "ours fit tok/s", ",.0f"),
                ("fit_ratio", "fit ratio", ",.0f"),
                ("nltk_score", "NLTK score tok/s", ",.0f"),
                ("ours_score", "ours score tok/s", ",.0f"),
                ("score_ratio", "score ratio", ",.0f"),
                ("fit_ratio_cpu", "fit ratio (CPU)", ",.0f"),
                ("score_ratio_cpu", "score ratio (CPU)", ",.0f"),
            ],
        )
    )
    print("\nscaling: time per token at the largest size / at the smallest (target <= 1.3)")
    print(
        _common.format_table(
            results["scaling"],
            [
                ("tokens", "tokens", ""),
                ("order", "order", "d"),
                ("time_per_token_ratio", "wall ratio", ".2f"),
                ("cpu_time_per_token_ratio", "CPU ratio", ".2f"),
            ],
        )
    )
    goal = results["targets"]
    print("\ntargets")
    print(f"  {'':<34} {'wall time':>12}   {'CPU time':<12}")
    for label, key, spec, target in (
        ("fit ratio vs NLTK, min", "fit_ratio", ",.0f", ">= 100"),
        ("score ratio vs NLTK, min", "score_ratio", ",.0f", ">= 1000"),
        ("char 5-gram fit+score tok/s, min", "char5_fit_score_tokens_per", ",.0f", ">= 2,000,000"),
        ("time per token largest/smallest", "time_per_token_ratio", ".2f", "<= 1.3"),
    ):
        wall, cpu = (_common.cell(value, spec) for value in _wall_and_cpu(goal, key))
        print(f"  {label:<34} {wall:>12} / {cpu:<12} (target {target})")
    print(
        f"  peak memory, char 5-gram at {goal['large_case_train_tokens']:,} train tokens: "
        f"{goal['large_case_peak_rss_mib']:,.0f} MiB (target < 1 GB = 954 MiB)"
    )
    print(
        f"  word CPU time per token largest/smallest: "
        f"{_common.cell(goal['word_cpu_time_per_token_ratio_max'], '.2f')} (target <= 1.25)"
    )
    print(
        f"  unicode char 5-gram ({goal['unicode_case_vocab_size']:,} symbols, "
        f"{goal['unicode_case_train_tokens']:,} train tokens): "
        f"{goal['unicode_case_fit_score_tokens_per_cpu_s']:,.0f} tok/CPU s "
        f"({goal['unicode_case_fit_score_tokens_per_s']:,.0f} tok/s wall; target >= 6,000,000 "
        f"per CPU s), peak {goal['unicode_case_peak_rss_mib']:,.0f} MiB (target <= 500 MiB)"
    )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "ngram")
    args = parser.parse_args(argv)
    if args.case:
        measure = {"ours": measure_ours, "nltk": measure_nltk}
        return _common.serve_case(args.case, lambda case: measure[case["system"]](case))
    started = time.perf_counter()
    info = _common.machine()
    with tempfile.TemporaryDirectory(prefix="retrograde-bench-ngram-") as tmp:
        results = run_all(args, Path(tmp))
    results["scaling"] = scaling(results["grid"])
    results["targets"] = targets(results)
    info["load_average_1min_after"] = round(os.getloadavg()[0], 2)
    results |= {"machine": info, "quick": args.quick}
    results["wall_seconds"] = round(time.perf_counter() - started, 1)
    print_report(results)
    print(f"\ntotal wall time {results['wall_seconds']:.0f} s")
    _common.write_results(args.out, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
