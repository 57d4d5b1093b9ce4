"""Time :func:`retrograde.stats.summarize_model` at the size issue #5 names.

10 orders x 5 seeds x 100,000 test units and 2,000 sign flips, with the default ``t``
interval and with the earlier ``bootstrap`` interval (2,000 replicates). CPU time is
reported next to wall time: on a shared machine the wall time mostly measures the other
processes. Run: ``python benchmarks/bench_stats.py [--quick] [--units N]``.
"""

from __future__ import annotations

import argparse
import time

import _common
import numpy as np

from retrograde.stats import summarize_model


def simulated_losses(n_orders: int, n_seeds: int, n_units: int, seed: int) -> dict[str, np.ndarray]:
    """(n_seeds, n_units) nats per order: a shared unit difficulty, a 1% step per order."""
    rng = np.random.default_rng(seed)
    difficulty = rng.gamma(5.0, 20.0, size=n_units)
    return {
        f"order{k}": difficulty * (1.0 + 0.01 * k) + rng.normal(0.0, 3.0, (n_seeds, n_units))
        for k in range(n_orders)
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "stats")
    parser.add_argument("--units", type=int, default=100_000)
    parser.add_argument("--orders", type=int, default=10)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    if args.quick:
        args.units, args.repeats = 2_000, 1
    losses = simulated_losses(args.orders, args.seeds, args.units, seed=0)
    n_tokens = np.full(args.units, 20)
    timings: dict[str, dict[str, object]] = {}
    for interval in ("t", "bootstrap"):
        # Untimed warm-up: imports (scipy.stats for the t quantiles) are not the work timed.
        small = {order: values[:, :100] for order, values in losses.items()}
        summarize_model(small, reference_order="order0", n_tokens=n_tokens[:100], interval=interval)
        runs = []
        for _ in range(args.repeats):
            wall, cpu = time.perf_counter(), time.process_time()
            leaves = summarize_model(
                losses, reference_order="order0", n_tokens=n_tokens, interval=interval
            )
            runs.append({"wall_s": time.perf_counter() - wall, "cpu_s": time.process_time() - cpu})
        best_cpu = min(r["cpu_s"] for r in runs)
        best_wall = min(r["wall_s"] for r in runs)
        print(
            f"summarize_model ({interval}): {args.orders} orders x {args.seeds} seeds x "
            f"{args.units} units: best {best_cpu:.2f} s CPU, {best_wall:.2f} s wall over "
            f"{args.repeats} runs"
        )
        leaf = leaves["order3"]
        print(f"  order3 gap {leaf['gap_pct']} % [{leaf['gap_pct_low']}, {leaf['gap_pct_high']}]")
        timings[interval] = {"runs": runs, "best_cpu_s": best_cpu, "best_wall_s": best_wall}
    _common.write_results(
        args.out,
        {
            "machine": _common.machine(),
            "case": {
                "orders": args.orders,
                "seeds": args.seeds,
                "units": args.units,
                "n_boot": 2000,
                "n_flips": 2000,
            },
            "best_cpu_s": timings["t"]["best_cpu_s"],
            "best_wall_s": timings["t"]["best_wall_s"],
            "runs": timings["t"]["runs"],
            "bootstrap": timings["bootstrap"],
        },
    )


if __name__ == "__main__":
    main()
