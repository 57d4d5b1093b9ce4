"""Coverage of the gap interval on simulated symmetric and shifted sources.

Each repetition simulates two fitted orders with the same true per-unit NLL (or a true gap
``shift``): ``NLL[s, i] = truth_i * (1 + training_s) + noise_si``, with a per-seed training
effect of standard deviation ``seed_sd`` (relative) and per-unit scoring noise (nats), plus,
for the grouped rows, a shared per-document effect. It prints how often the 95% interval
covers 0 (symmetric: should be about 0.95) and how often it excludes 0 (shifted: power).
The fast version of this check runs in ``tests/test_stats.py``.

Run: ``python benchmarks/bench_coverage.py [--quick] [--repetitions N]``.
"""

from __future__ import annotations

import argparse
import time

import _common
import numpy as np

from retrograde.stats import summarize_model


def simulate(rng, *, n_units, n_seeds, shift, seed_sd, doc_sd, docs):
    truth = rng.gamma(4.0, 10.0, size=n_units)  # nats per unit
    doc_ids = np.arange(n_units) // max(n_units // docs, 1) if docs else None
    losses = {}
    for order, factor in (("forward", 1.0), ("reverse", 1.0 + shift)):
        training = rng.normal(0.0, seed_sd, size=(n_seeds, 1))
        noise = rng.normal(0.0, 2.0, size=(n_seeds, n_units))
        if doc_ids is not None:  # this order finds some documents harder than the other does
            noise = noise + rng.normal(0.0, doc_sd, size=int(doc_ids.max()) + 1)[doc_ids]
        losses[order] = truth * factor * (1.0 + training) + noise
    return losses, doc_ids


def rate(*, repetitions, shift, n_seeds, seed_sd, n_units=300, docs=0, doc_sd=0.0, group=True):
    rng = np.random.default_rng(12345)
    covered = 0
    for repetition in range(repetitions):
        losses, doc_ids = simulate(
            rng,
            n_units=n_units,
            n_seeds=n_seeds,
            shift=shift,
            seed_sd=seed_sd,
            doc_sd=doc_sd,
            docs=docs,
        )
        leaf = summarize_model(
            losses,
            reference_order="forward",
            n_tokens=np.full(n_units, 10),
            doc_ids=doc_ids if group else None,
            n_boot=1000,
            n_flips=10,
            seed=repetition,
        )["reverse"]
        covered += leaf["gap_pct_low"] <= 0.0 <= leaf["gap_pct_high"]
    return covered / repetitions


def false_positive_rates(repetitions: int) -> tuple[float, float]:
    """Share of symmetric repetitions (5 seeds, training sd 1%) with p < 0.05: the unit-level
    sign-flip p-value alone, and the reported ``p_value``."""
    rng = np.random.default_rng(777)
    sign_flip = reported = 0
    for repetition in range(repetitions):
        losses, _ = simulate(
            rng, n_units=300, n_seeds=5, shift=0.0, seed_sd=0.01, doc_sd=0.0, docs=0
        )
        leaf = summarize_model(
            losses,
            reference_order="forward",
            n_tokens=np.full(300, 10),
            n_boot=1000,
            n_flips=1000,
            seed=repetition,
        )["reverse"]
        sign_flip += leaf["p_value_sign_flip"] < 0.05
        reported += leaf["p_value"] < 0.05
    return sign_flip / repetitions, reported / repetitions


def real_models(repetitions: int) -> tuple[float, float, float]:
    """A symmetric calibration source scored by real n-gram fits, forward and reversed.

    Each repetition draws a fresh training and test set from one stationary order-1 Markov
    chain (whose time reversal has the same entropy rate) and fits an n-gram model on each
    order. An n-gram fit is deterministic, so one seed; training-set sampling is not in the
    interval. Returns (coverage of 0, mean gap %, standard deviation of the gap %).
    """
    from retrograde import families, orders, sources
    from retrograde.stats import unit_nll

    source = sources.make("markov", vocab_size=4, order=1, length=64, chain_seed=0)
    covered, gaps = 0, []
    for repetition in range(repetitions):
        train = source.generate(400, seed=2 * repetition)
        test = source.generate(300, seed=2 * repetition + 1)
        losses = {}
        for name in ("forward", "reverse"):
            order = orders.make(name)
            model = families.make("ngram", order=2).fit(order.apply_set(train), seed=0)
            losses[name] = unit_nll(model.logprobs(order.apply_set(test)))[None]
        leaf = summarize_model(
            losses,
            reference_order="forward",
            n_tokens=test.lengths,
            n_boot=500,
            n_flips=10,
            seed=repetition,
        )["reverse"]
        covered += leaf["gap_pct_low"] <= 0.0 <= leaf["gap_pct_high"]
        gaps.append(leaf["gap_pct"])
    return covered / repetitions, float(np.mean(gaps)), float(np.std(gaps))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "coverage")
    parser.add_argument("--repetitions", type=int, default=1000)
    args = parser.parse_args()
    n = 20 if args.quick else args.repetitions
    results: dict[str, object] = {"machine": _common.machine(), "repetitions": n}
    print(f"{'setting':58s} {'covers 0':>9s}")
    settings = [
        ("1 seed, no training noise", {"n_seeds": 1, "seed_sd": 0.0}),
        ("2 seeds, training sd 1% (interval ignores it)", {"n_seeds": 2, "seed_sd": 0.01}),
        ("3 seeds, training sd 1%", {"n_seeds": 3, "seed_sd": 0.01}),
        ("5 seeds, no training noise", {"n_seeds": 5, "seed_sd": 0.0}),
        ("5 seeds, training sd 1%", {"n_seeds": 5, "seed_sd": 0.01}),
        ("5 seeds, training sd 3%", {"n_seeds": 5, "seed_sd": 0.03}),
        ("10 seeds, training sd 1%", {"n_seeds": 10, "seed_sd": 0.01}),
        (
            "5 seeds, 30 documents, resampled by document",
            {"n_seeds": 5, "seed_sd": 0.01, "docs": 30, "doc_sd": 6.0},
        ),
        (
            "5 seeds, 30 documents, resampled by unit (wrong)",
            {"n_seeds": 5, "seed_sd": 0.01, "docs": 30, "doc_sd": 6.0, "group": False},
        ),
    ]
    coverage_rows = {}
    for label, kwargs in settings:
        start = time.perf_counter()
        coverage = rate(repetitions=n, shift=0.0, **kwargs)
        coverage_rows[label] = coverage
        print(f"symmetric, {label:47s} {coverage:9.3f}   ({time.perf_counter() - start:.1f} s)")
    results["symmetric_coverage"] = coverage_rows
    power = {}
    for shift in (0.01, 0.03):
        excluded = 1.0 - rate(repetitions=n, shift=shift, n_seeds=5, seed_sd=0.01)
        power[f"{shift:.0%}"] = excluded
        print(f"shifted {shift:.0%}, 5 seeds, training sd 1%: excludes 0 in {excluded:.3f}")
    results["shifted_excludes_zero"] = power
    sign_flip, reported = false_positive_rates(min(n, 400))
    results["false_positive_rate"] = {"sign_flip": sign_flip, "p_value": reported}
    print(
        f"symmetric, 5 seeds, training sd 1%: p < 0.05 in {sign_flip:.3f} (sign flips alone), "
        f"{reported:.3f} (reported p_value)"
    )
    coverage, mean_gap, sd_gap = real_models(min(n, 200))
    results["markov_ngram"] = {"coverage": coverage, "mean_gap_pct": mean_gap, "sd_gap_pct": sd_gap}
    print(
        f"markov source + ngram fits (1 seed, fresh training set each time): covers 0 in "
        f"{coverage:.3f}; gap {mean_gap:.2e} % +- {sd_gap:.2e} %"
    )
    _common.write_results(args.out, results)


if __name__ == "__main__":
    main()
