"""Throughput of the torch families' training loop against a bare PyTorch loop.

Both loops train the same network (same class, same initial weights) on the same windows
with the same batch size, number of steps, AdamW, warm-up/cosine learning rate and gradient
clipping, on one thread. The bare loop is what one writes by hand: the whole data set as
one (n_windows, context) tensor, a permutation per epoch, index, forward, loss, step. Ours
adds the window bookkeeping, the token budget check, the learning-curve record and the
(disabled) progress bar. Runs alternate and the median time of each is kept.

Prints the ratio (ours / bare tokens per second; the goal is >= 0.8) and records it under
the family's name (the median over alternating pairs) in ``benchmarks/results/torch_loop.json``::

    python benchmarks/bench_torch_loop.py [--family transformer] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import math
import platform
import statistics
import time
from pathlib import Path

import numpy as np
import torch

import retrograde
from retrograde import SequenceSet
from retrograde.data import atomic_write_json
from retrograde.families import make
from retrograde.families._torch_common import learning_rate, torch_session

RESULTS = Path(__file__).resolve().parent / "results" / "torch_loop.json"


def _data(n_units: int, length: int, vocab_size: int, seed: int) -> SequenceSet:
    tokens = np.random.default_rng(seed).integers(0, vocab_size, (n_units, length))
    return SequenceSet.from_list(list(tokens), vocab_size=vocab_size)


def _params(family: str, context: int, batch_size: int, epochs: int) -> dict[str, object]:
    shared = dict(context=context, batch_size=batch_size, epochs=epochs, threads=1, progress=False)
    if family == "transformer":
        return {**shared, "width": 64, "layers": 2, "heads": 4}
    return {**shared, "embedding": 32, "hidden": 128}


def time_ours(family: str, units: SequenceSet, params: dict[str, object]) -> float:
    started = time.perf_counter()
    make(family, **params).fit(units, seed=0)
    return time.perf_counter() - started


def time_bare(family: str, units: SequenceSet, params: dict[str, object]) -> float:
    """The hand-written loop; every unit fits one window (length + 1 == context)."""
    vocab_size, batch_size, epochs = (
        int(units.vocab_size or 0),
        int(params["batch_size"]),
        int(params["epochs"]),
    )  # type: ignore[call-overload]
    tokens = torch.from_numpy(units.tokens.astype(np.int64)).view(len(units), -1)
    begin = torch.full((len(units), 1), vocab_size + 1)
    end = torch.full((len(units), 1), vocab_size)
    inputs, targets = torch.cat([begin, tokens], 1), torch.cat([tokens, end], 1)
    started = time.perf_counter()
    with torch_session(torch, threads=1, seed=0):
        network = make(family, **params)._build_network(torch, vocab_size)  # type: ignore[attr-defined]
        optimizer = torch.optim.AdamW(network.parameters(), lr=3e-3, weight_decay=0.01)
        generator = torch.Generator().manual_seed(0)
        total_steps = epochs * math.ceil(len(units) / batch_size)
        step = 0
        network.train()
        for _ in range(epochs):
            order = torch.randperm(len(units), generator=generator)
            for first in range(0, len(units), batch_size):
                index = order[first : first + batch_size]
                step += 1
                for group in optimizer.param_groups:
                    group["lr"] = learning_rate(
                        step,
                        total_steps=total_steps,
                        peak=3e-3,
                        warmup_steps=round(0.05 * total_steps),
                        min_ratio=0.1,
                    )
                logits = network(inputs[index])
                loss = torch.nn.functional.cross_entropy(
                    logits.flatten(0, 1), targets[index].flatten()
                )
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                torch.nn.utils.clip_grad_norm_(network.parameters(), 1.0)
                optimizer.step()
    return time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--family", default="transformer", choices=["gru", "lstm", "transformer"])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--units", type=int, default=512)
    parser.add_argument("--context", type=int, default=64)
    parser.add_argument("--epochs", type=int, default=2)
    parser.add_argument("--batch-size", type=int, default=32)
    args = parser.parse_args()
    units = _data(args.units, args.context - 1, vocab_size=16, seed=0)
    params = _params(args.family, args.context, args.batch_size, args.epochs)
    positions = args.epochs * args.units * args.context
    time_ours(args.family, units, params)  # warm-up: first-call allocations, lazy imports
    ours, bare = [], []
    for _ in range(args.repeats):  # alternate so background load hits both alike
        ours.append(time_ours(args.family, units, params))
        bare.append(time_bare(args.family, units, params))
    ours_rate, bare_rate = positions / statistics.median(ours), positions / statistics.median(bare)
    result = {
        "family": args.family,
        "params": params,
        "units": args.units,
        "positions_per_fit": positions,
        "ours_seconds": ours,
        "bare_seconds": bare,
        "ours_tokens_per_second": round(ours_rate, 1),
        "bare_tokens_per_second": round(bare_rate, 1),
        # Per alternating pair, so a burst of background load cancels within the pair.
        "ratio": round(statistics.median(b / o for o, b in zip(ours, bare, strict=True)), 3),
        "torch": torch.__version__,
        "retrograde": retrograde.__version__,
        "machine": platform.processor() or platform.machine(),
    }
    # One entry per family: running the other family keeps this one's figures.
    table = json.loads(RESULTS.read_text()) if RESULTS.is_file() else {}
    if "family" in table:  # the older single-result layout
        table = {table["family"]: table}
    table[args.family] = result
    atomic_write_json(RESULTS, table)
    print(
        json.dumps(
            {
                k: result[k]
                for k in ("family", "ours_tokens_per_second", "bare_tokens_per_second", "ratio")
            }
        )
    )


if __name__ == "__main__":
    main()
