"""Time :func:`retrograde.stats.summarize_model` at the size issue #5 names.

10 orders x 5 seeds x 100,000 test units, 2,000 bootstrap replicates and 2,000 sign flips.
Run: ``python benchmarks/bench_stats.py [--units N] [--orders K] [--seeds S]``.
"""

from __future__ import annotations

import argparse
import time

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
    parser.add_argument("--units", type=int, default=100_000)
    parser.add_argument("--orders", type=int, default=10)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    losses = simulated_losses(args.orders, args.seeds, args.units, seed=0)
    n_tokens = np.full(args.units, 20)
    timings = []
    for _ in range(args.repeats):
        start = time.perf_counter()
        leaves = summarize_model(losses, reference_order="order0", n_tokens=n_tokens)
        timings.append(time.perf_counter() - start)
    print(
        f"summarize_model: {args.orders} orders x {args.seeds} seeds x {args.units} units: "
        f"best {min(timings):.2f} s, median {float(np.median(timings)):.2f} s "
        f"over {args.repeats} runs"
    )
    leaf = leaves["order3"]
    print(f"order3 gap {leaf['gap_pct']} % [{leaf['gap_pct_low']}, {leaf['gap_pct_high']}]")


if __name__ == "__main__":
    main()
