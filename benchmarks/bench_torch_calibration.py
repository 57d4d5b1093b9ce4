"""How close a torch family gets to the exact floor of ``linear_gf2``, forwards and backwards.

Not a speed benchmark: it measures the calibration that ``docs/torch.md`` reports. The
source is ``linear_gf2`` with ``structure: banded`` (every ``y`` bit is the parity of at
most two ``x`` bits; backwards a few ``x`` bits need the parity of many bits), the model
the transformer recipe of the docs. Each (data seed, model seed, order) is one fit on one
thread, ``--jobs`` of them at a time. Per fit it records the excess over the floor
(``mean NLL / (n ln 2) - 1``), the epochs run, and the mean bits on the positions whose
parity needs at least 4 earlier bits (``heavy``) and on those that need 1 or 2 (``light``),
from ``LinearGF2Source.parity_weights``, and the mean bits at each position of the second
half of the reordered unit (the determined half). Writes ``benchmarks/results/torch_calibration.json``::

    python benchmarks/bench_torch_calibration.py [--seeds 0 1 2] [--data-seeds 0 1] [--jobs 2]

Data seed ``d`` generates train, valid and test units with seeds ``3d + 1``, ``3d + 2`` and
``3d + 3`` (4000, 300 and 500 units); ``d = 0`` is the data of the calibration test in
``tests/test_torch_families.py``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import statistics
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np

import retrograde
from retrograde import orders, sources
from retrograde.data import atomic_write_json
from retrograde.families import make

RESULTS = Path(__file__).resolve().parent / "results" / "torch_calibration.json"
SOURCE = {"n_bits": 10, "nonzeros": 1, "structure": "banded", "matrix_seed": 298}
RECIPE = {
    "width": 128,
    "layers": 2,
    "heads": 8,
    "context": 21,
    "batch_size": 64,
    "lr": 1e-3,
    "min_lr_ratio": 1.0,
    "epochs": 40,
    "patience": 5,
    "threads": 1,
    "progress": False,
}
QUICK = {**RECIPE, "width": 16, "heads": 2, "epochs": 1, "patience": 0}
SIZES = (4000, 300, 500)  # train, valid, test units


def fit_one(case: dict[str, Any]) -> dict[str, Any]:
    """One fit, in a worker process: ``case`` holds source, params, sizes and seeds."""
    source = sources.make("linear_gf2", **case["source"])
    n_bits = source.n_bits
    first = 3 * case["data_seed"] + 1
    train, valid, test = (source.generate(n, seed=first + i) for i, n in enumerate(case["sizes"]))
    order = orders.make(case["order"])
    started = time.perf_counter()
    model = make("transformer", **case["params"]).fit(
        order.apply_set(train), order.apply_set(valid), seed=case["model_seed"]
    )
    seconds = time.perf_counter() - started
    rows = model.logprobs(order.apply_set(test))
    floor = n_bits * math.log(2)
    bits = -rows.values.reshape(len(test), -1).mean(axis=0) / math.log(2)  # per position
    unit = np.arange(2 * n_bits)
    weights = np.array(source.parity_weights(unit if case["order"] == "forward" else unit[::-1]))
    tokens = bits[: 2 * n_bits]
    heavy, light = weights >= 4, (weights >= 1) & (weights <= 2)
    return {
        "order": case["order"],
        "data_seed": case["data_seed"],
        "model_seed": case["model_seed"],
        "excess": round(float(-rows.sums().mean() / floor - 1), 4),
        "heavy_bits": round(float(tokens[heavy].mean()), 3) if heavy.any() else None,
        "light_bits": round(float(tokens[light].mean()), 3),
        "second_half_bits": [round(float(b), 3) for b in tokens[n_bits:]],  # y, or x reversed
        "epochs_run": len(model.learning_curve_),
        "seconds": round(seconds, 1),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2], help="model seeds")
    parser.add_argument("--data-seeds", type=int, nargs="+", default=[0, 1])
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--quick", action="store_true", help="a tiny model, one epoch, one fit")
    parser.add_argument("--out", type=Path, default=RESULTS)
    args = parser.parse_args()
    params = QUICK if args.quick else RECIPE
    sizes = (200, 50, 50) if args.quick else SIZES
    seeds, data_seeds = ([0], [0]) if args.quick else (args.seeds, args.data_seeds)
    cases = [
        {
            "source": SOURCE,
            "params": params,
            "sizes": sizes,
            "order": order,
            "data_seed": d,
            "model_seed": s,
        }
        for d in data_seeds
        for s in seeds
        for order in ("forward", "reverse")
    ]
    cells = []
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        for done, cell in enumerate(pool.map(fit_one, cases), start=1):
            cells.append(cell)
            print(f"[{done}/{len(cases)}] {json.dumps(cell)}", flush=True)
    by_order = {o: [c["excess"] for c in cells if c["order"] == o] for o in ("forward", "reverse")}
    source = sources.make("linear_gf2", **SOURCE)
    unit = np.arange(2 * SOURCE["n_bits"])
    result = {
        "source": SOURCE,
        "params": params,
        "sizes": {"train": sizes[0], "valid": sizes[1], "test": sizes[2]},
        "parity_weights": {
            "forward": source.parity_weights(unit),
            "reverse": source.parity_weights(unit[::-1]),
        },
        "cells": cells,
        "summary": {
            f"{order}_excess_{name}": round(fn(values), 4)
            for order, values in by_order.items()
            for name, fn in (("min", min), ("median", statistics.median), ("max", max))
        },
        "fits": len(cells),
        "retrograde": retrograde.__version__,
        "machine": {
            "processor": platform.processor() or platform.machine(),
            "cpus": os.cpu_count(),
            "date_utc": time.strftime("%Y-%m-%d %H:%M", time.gmtime()),
            "load_average_1min": round(os.getloadavg()[0], 2),
        },
    }
    atomic_write_json(args.out, result)
    print(json.dumps(result["summary"]))


if __name__ == "__main__":
    main()
