"""Does the ``linear_gf2`` source show its effect at its shipped defaults?

The source exists to show a sparse-forward / dense-backward map: each ``y`` bit is the
parity of a few ``x`` bits, while recovering ``x`` from ``y`` needs parities of many bits.
A family that learns short parities should then find ``forward`` easy and ``reverse``
hard. This script generates each candidate setting as the ``units`` stage does (hash
split, identical units in one split), fits ``ngram`` and ``mlp`` in both orders with 3
seeds, and prints bits per token, the floor, and the gap with its 95% interval
(:func:`retrograde.stats.summarize_model`, the table's own computation).

Run: ``python benchmarks/bench_gf2_defaults.py [--quick] [--only NAME ...]``; results in
``benchmarks/results/gf2_defaults.json``.
"""

from __future__ import annotations

import argparse
import time

import _common
import numpy as np

from retrograde import families, orders, sources
from retrograde.sources import source_units
from retrograde.stats import summarize_model, unit_nll

CANDIDATES = {
    # the old shipped default: 32 bits, LU structure with 2 off-diagonals per factor row
    "old_default": (
        {"n_bits": 32, "nonzeros": 2, "matrix_seed": 0, "structure": "lu"},
        1000,
    ),
    # the new shipped default (conf/retrograde/source/linear_gf2.yaml)
    "new_default": (
        {"n_bits": 12, "nonzeros": 1, "matrix_seed": 0, "structure": "banded"},
        3000,
    ),
    # the same with two other matrices: the effect is not one lucky matrix
    "new_default_matrix1": (
        {"n_bits": 12, "nonzeros": 1, "matrix_seed": 1, "structure": "banded"},
        3000,
    ),
    "new_default_matrix2": (
        {"n_bits": 12, "nonzeros": 1, "matrix_seed": 2, "structure": "banded"},
        3000,
    ),
    # a longer unit: the mlp no longer reaches the floor forwards
    "banded16": (
        {"n_bits": 16, "nonzeros": 1, "matrix_seed": 0, "structure": "banded"},
        3000,
    ),
}

MODELS = {
    "ngram": ("ngram", {"order": 3}),
    "mlp": (
        "mlp",
        {
            "window": 32,
            "hidden": 64,
            "epochs": 20,
            "lr": 0.01,
            "batch_size": 128,
            "progress": False,
        },
    ),
}


def measure(name: str, params: dict, n_units: int, seeds: list[int]) -> dict:
    source = sources.make("linear_gf2", **params)
    made = source_units(source, fractions=(0.8, 0.1, 0.1), salt="retrograde", n_units=n_units)
    splits, floors = made.splits, made.floors
    result: dict = {
        "params": params,
        "n_units": n_units,
        "units": {k: len(v) for k, v in splits.items()},
        "metadata": {
            k: made.info["metadata"][k]
            for k in ("nonzeros_matrix", "nonzeros_inverse", "max_row_ones_inverse")
        },
        "models": {},
    }
    for model, (family, model_params) in MODELS.items():
        if model == "mlp":
            model_params = {**model_params, "window": min(2 * params["n_bits"], 127)}
        started = time.perf_counter()
        nll = {}
        for order_name in ("forward", "reverse"):
            order = orders.make(order_name)
            reordered = {k: order.apply_set(v) for k, v in splits.items()}
            rows = []
            for seed in seeds:
                fitted = families.make(family, **model_params).fit(
                    reordered["train"], reordered["valid"], seed=seed
                )
                rows.append(unit_nll(fitted.logprobs(reordered["test"])))
            nll[order_name] = np.asarray(rows)
        leaves = summarize_model(
            nll,
            reference_order="forward",
            n_tokens=splits["test"].lengths,
            floors=floors,
            n_boot=2000,
        )
        result["models"][model] = {
            "params": model_params,
            "seconds": round(time.perf_counter() - started, 1),
            **{
                order: {
                    k: leaves[order][k]
                    for k in (
                        "bits_per_token",
                        "floor_bits_per_token",
                        "gap_pct",
                        "gap_pct_low",
                        "gap_pct_high",
                    )
                }
                for order in ("forward", "reverse")
            },
        }
        print(name, model, result["models"][model], flush=True)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    _common.add_common_arguments(parser, "gf2_defaults")
    parser.add_argument("--only", nargs="*", default=None, help="candidate names")
    args = parser.parse_args()
    if args.quick:  # the smoke test: one small candidate, one seed
        candidates = {"quick": ({**CANDIDATES["new_default"][0], "n_bits": 4}, 200)}
        seeds = [0]
    else:
        candidates = {k: v for k, v in CANDIDATES.items() if args.only is None or k in args.only}
        seeds = [0, 1, 2]
    results = {
        name: measure(name, params, n_units, seeds)
        for name, (params, n_units) in candidates.items()
    }
    _common.write_results(args.out, {"machine": _common.machine(), "results": results})


if __name__ == "__main__":
    main()
