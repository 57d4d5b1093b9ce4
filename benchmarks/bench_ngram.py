"""Time and size the ``ngram`` family at the scale issue #3 names.

A 5-gram on character data: the invented demo corpus (UTF-8 bytes as tokens, one unit per
line), cut into contiguous train / valid / test blocks of 80 / 10 / 10 %. The fit gets the
validation units as the pipeline's fit stage does (one scoring pass for the curve), then
the test units are scored. Targets: fit + score >= 2 M tokens/s, peak memory < 1 GB with
25 M training tokens.

Run: ``python benchmarks/bench_ngram.py [--train-tokens N] [--order K]``.
Peak memory is measured in a second pass with ``tracemalloc`` (numpy reports its array
allocations to it), so the timing pass runs untraced.
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np

from retrograde import SequenceSet
from retrograde.families import make
from retrograde.sources.demo import corpus_text


def character_splits(train_tokens: int, seed: int) -> dict[str, SequenceSet]:
    """Byte tokens of the demo corpus, one unit per line, split 80 / 10 / 10 in order."""
    data = np.frombuffer(
        corpus_text(size_bytes=int(train_tokens / 0.8), seed=seed).encode("utf-8"),
        dtype=np.uint8,
    )
    # Units are lines without their newline; offsets index the newline-free token array.
    newline = np.flatnonzero(data == 10)
    tokens = np.delete(data, newline).astype(np.int32)
    ends = newline - np.arange(len(newline))
    offsets = np.concatenate([[0], ends]).astype(np.int64)
    units = SequenceSet(tokens[: offsets[-1]], offsets, vocab_size=256)
    cuts = np.searchsorted(offsets, [0.8 * offsets[-1], 0.9 * offsets[-1]])
    index = np.arange(len(units))
    return {
        "train": units.subset(index[: cuts[0]]),
        "valid": units.subset(index[cuts[0] : cuts[1]]),
        "test": units.subset(index[cuts[1] :]),
    }


def fit_and_score(splits: dict[str, SequenceSet], order: int) -> tuple[float, float, float]:
    """(fit seconds, score seconds, test bits per token)."""
    start = time.perf_counter()
    model = make("ngram", order=order).fit(splits["train"], splits["valid"])
    fitted = time.perf_counter()
    scores = model.logprobs(splits["test"])
    scored = time.perf_counter()
    bits = -scores.values.sum() / np.log(2) / len(splits["test"].tokens)
    return fitted - start, scored - fitted, bits


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--train-tokens", type=float, default=25e6)
    parser.add_argument("--order", type=int, default=5)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    splits = character_splits(int(args.train_tokens), args.seed)
    n = {name: len(units.tokens) for name, units in splits.items()}
    fit_seconds, score_seconds, bits = fit_and_score(splits, args.order)
    tracemalloc.start()
    fit_and_score(splits, args.order)
    peak_bytes = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    total = n["train"] + n["valid"] + n["test"]
    print(
        f"{args.order}-gram on demo characters: train {n['train']:,} valid {n['valid']:,} "
        f"test {n['test']:,} tokens"
    )
    print(f"fit (incl. valid scoring) {fit_seconds:.2f} s, test scoring {score_seconds:.2f} s")
    print(
        f"fit + score: {total / (fit_seconds + score_seconds) / 1e6:.2f} M tokens/s "
        f"(target >= 2); test scoring alone {n['test'] / score_seconds / 1e6:.2f} M tokens/s"
    )
    print(f"peak traced memory during fit + score: {peak_bytes / 2**30:.2f} GiB (target < 1 GB)")
    print(f"test bits per token: {bits:.4f}")
    # Whole process, corpus text and all three splits included (Linux reports KiB).
    max_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    print(f"process peak RSS (corpus generation and splits included): {max_rss:.2f} GiB")


if __name__ == "__main__":
    main()
