"""Coverage, width and power of the gap interval: real fits on a reversible chain, and noise.

**Real fits** (the main table). A reversible Markov chain with a non-uniform stationary law
(symmetric weights normalized by rows, so ``pi_i P_ij = pi_j P_ji``, checked here) reads the
same backwards as forwards, so the true gap of *any* model family between ``forward`` and
``reverse`` is 0: a null. Each repetition draws fresh training, validation and test units
from it (``retrograde.sources.make("markov", ...)`` with the chain's tables set to the
reversible ones) and fits, in both orders and for 10 seeds,

- ``ngram`` (order 3): seed ``s`` trains on ``resample_train(train, s)``, a half-sample, as
  the fit stage does (``train_sample: auto``), and, to compare schemes, on a bootstrap
  sample, an 80% subsample, and on all units (``train_sample: none``, every seed alike);
- ``mlp`` (window 4, 16 hidden units, early stopping): seeds are its own randomness, each
  order with a stream of its own (``order_seed(seed, order)``, as the fit stage does).

The ``ngram``'s seeds are paired across orders (a seed's half-sample is the same units in
every order); the ``mlp``'s are not (its fits of two orders share no random numbers), as the
table stage decides (``retrograde.config.seeds_paired``). The ``mlp`` is also shown paired,
the alternative.

For 3, 5 and 10 seeds (disjoint blocks of the 10: three, two and one per repetition) it
reports how often the 95% interval covers 0, its mean width against ``3.92 x`` the spread
of the point gap across repetitions (what a normal interval with the variance known would
take), and the power at the demo's effect size: the reverse losses multiplied by
``1.16 (1 + e_s)`` with a per-seed ``e_s ~ N(0, 1%)`` (the ``mlp`` reverse gap on
``linear_gf2`` in ``retrograde demo`` before each order's fits had streams of their own:
about +16% with a seed spread of about 1%), and at an effect of 4 null spreads. The
demo's present effect is measured with real fits below. Every figure is given for the whole gap and for the content
gap (end marker left out), with the default ``t`` interval and the earlier ``bootstrap``.

**The demo's effect, real fits** (a few repetitions): ``mlp`` with the demo's parameters on
``linear_gf2`` as ``retrograde demo`` configures it (8 bits, matrix seed 57, 3,000 units
split 70/10/20 by content hash), fresh units in every repetition, 3 seeds per order: the
gap, the share of intervals that exclude 0 (power), paired and unpaired widths, and how
alike two orders' fits with the same seed are.

**Simulated noise** (the short table): the noise model of ``tests/test_stats.py``.

Run: ``python benchmarks/bench_coverage.py [--quick] [--repetitions N] [--simulated N]``.
"""

from __future__ import annotations

import argparse
import time
from typing import Any

import _common
import numpy as np

from retrograde import families, orders, sources
from retrograde.data import SequenceSet, order_seed, resample_train
from retrograde.stats import summarize_model

#: the reversible chain and the split sizes (units of LENGTH tokens)
VOCAB_SIZE, LENGTH, CHAIN_SEED = 4, 64, 0
N_TRAIN, N_VALID, N_TEST = 400, 60, 300
N_SEEDS = 10
NGRAM = {"order": 3}
MLP = {"window": 4, "hidden": 16, "epochs": 10, "lr": 0.01, "patience": 2, "batch_size": 512}
#: how an ngram seed draws its training units: None = all units (every seed alike)
SCHEMES: dict[str, tuple[str, float | None] | None] = {
    "none": None,
    "half": ("half", None),  # the default (train_sample: auto)
    "bootstrap": ("bootstrap", None),
    "sub80": ("subsample", 0.8),
}
#: the demo's mlp reverse gap on linear_gf2 and its seed spread (relative)
DEMO_EFFECT, DEMO_SEED_SD = 0.16, 0.01
SEED_BLOCKS = {3: 3, 5: 2, 10: 1}  # seeds per interval -> disjoint blocks of the 10 seeds


def reversible_chain(vocab_size: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """``(P, pi)`` of a reversible chain with a non-uniform stationary law.

    A symmetric positive weight matrix ``W`` normalized by rows gives ``P_ij = W_ij / w_i``
    with ``w_i = sum_j W_ij``; then ``pi_i = w_i / sum(w)`` satisfies detailed balance
    ``pi_i P_ij = W_ij / sum(w) = pi_j P_ji``. Rows and columns are scaled by unequal
    factors so ``pi`` is far from uniform.
    """
    rng = np.random.default_rng(seed)
    weights = rng.gamma(2.0, 1.0, size=(vocab_size, vocab_size))
    scale = np.linspace(0.5, 2.0, vocab_size)
    weights = (weights + weights.T) * scale[:, None] * scale[None, :]
    transition = weights / weights.sum(axis=1, keepdims=True)
    stationary = weights.sum(axis=1) / weights.sum()
    flux = stationary[:, None] * transition  # (V, V) pi_i P_ij
    assert np.allclose(flux, flux.T, rtol=0, atol=1e-15), "not reversible"
    assert np.allclose(stationary @ transition, stationary), "not stationary"
    assert stationary.max() / stationary.min() > 1.5, "stationary law nearly uniform"
    return transition, stationary


def reversible_source() -> Any:
    """The ``markov`` source with its tables replaced by :func:`reversible_chain`'s."""
    source = sources.make("markov", vocab_size=VOCAB_SIZE, order=1, length=LENGTH)
    source.transition_, source.stationary_ = reversible_chain(VOCAB_SIZE, CHAIN_SEED)
    return source


def _scores(model: Any, test: SequenceSet) -> np.ndarray:
    """(2, n_units): each unit's whole loss and its end marker's loss, nats."""
    logprobs = model.logprobs(test)
    return np.stack([-logprobs.sums(), -logprobs.values[logprobs.offsets[1:] - 1]])


def fit_repetition(source: Any, repetition: int) -> dict[str, dict[str, np.ndarray]]:
    """``{fits: {order: (2, n_seeds, n_units) losses}}`` for one fresh draw of the data."""
    train = source.generate(N_TRAIN, seed=3 * repetition)
    valid = source.generate(N_VALID, seed=3 * repetition + 1)
    test = source.generate(N_TEST, seed=3 * repetition + 2)
    out: dict[str, dict[str, np.ndarray]] = {}
    for order_name in ("forward", "reverse"):
        order = orders.make(order_name)
        train_o, valid_o, test_o = (order.apply_set(u) for u in (train, valid, test))
        for scheme, how in SCHEMES.items():
            seeds = [0] if how is None else range(N_SEEDS)
            rows = []
            for seed in seeds:
                sample = (
                    train_o
                    if how is None
                    else resample_train(train_o, seed, scheme=how[0], fraction=how[1])
                )
                model = families.make("ngram", **NGRAM).fit(sample, valid_o, seed=seed)
                rows.append(_scores(model, test_o))
            out.setdefault(f"ngram_{scheme}", {})[order_name] = np.stack(rows, axis=1)
        rows = [
            _scores(
                families.make("mlp", progress=False, **MLP).fit(
                    train_o, valid_o, seed=order_seed(seed, order_name)
                ),
                test_o,
            )
            for seed in range(N_SEEDS)
        ]
        out.setdefault("mlp", {})[order_name] = np.stack(rows, axis=1)
    out["floors"] = {"forward": source.nll(test)}
    return out


def _leaf(
    fits: dict[str, np.ndarray], seeds: list[int], *, paired: bool, interval: str, effect: Any
) -> dict[str, Any]:
    forward, reverse = fits["forward"][:, seeds], fits["reverse"][:, seeds]
    if effect is not None:
        reverse = reverse * effect[None, :, None]
    return summarize_model(
        {"forward": forward[0], "reverse": reverse[0]},
        reference_order="forward",
        n_tokens=np.full(forward.shape[2], LENGTH),
        end_nll={"forward": forward[1], "reverse": reverse[1]},
        interval=interval,
        paired_seeds=paired,
        n_boot=1000,
        n_flips=10,
    )["reverse"]


def evaluate(
    records: list[dict[str, Any]], key: str, n_seeds: int, *, paired: bool, interval: str
) -> dict[str, Any]:
    """Coverage, width, spread and power of one (fits, seeds, interval) over the repetitions."""
    single_fit = records[0][key]["forward"].shape[1] == 1
    if single_fit:  # one deterministic fit stands for every seed
        blocks = [[0] * n_seeds]
    else:
        blocks = [list(range(b * n_seeds, (b + 1) * n_seeds)) for b in range(SEED_BLOCKS[n_seeds])]
    parts = {"whole": "", "content": "content_"}
    # per part: (n_intervals, 4) rows of (gap, low, high, demo low), and the block of each
    rows: dict[str, list[tuple[float, float, float, float]]] = {name: [] for name in parts}
    block_of: list[int] = []
    for repetition, record in enumerate(records):
        rng = np.random.default_rng([repetition, n_seeds, 0x0DE])
        for block, seeds in enumerate(blocks):
            leaf = _leaf(record[key], seeds, paired=paired, interval=interval, effect=None)
            demo = (1.0 + DEMO_EFFECT) * (1.0 + rng.normal(0.0, DEMO_SEED_SD, size=n_seeds))
            shifted = _leaf(record[key], seeds, paired=paired, interval=interval, effect=demo)
            block_of.append(block)
            for name, prefix in parts.items():
                rows[name].append(
                    (
                        leaf[f"{prefix}gap_pct"],
                        leaf[f"{prefix}gap_pct_low"],
                        leaf[f"{prefix}gap_pct_high"],
                        shifted[f"{prefix}gap_pct_low"],
                    )
                )
    result: dict[str, Any] = {}
    blocks_array = np.asarray(block_of)
    for name in parts:
        gap, low, high, demo_low = np.asarray(rows[name]).T
        # The spread of the point gap across repetitions, pooled over the seed blocks (each
        # block is its own repetition of the experiment with other seeds).
        variances = [np.var(gap[blocks_array == b], ddof=1) for b in range(len(blocks))]
        spread = float(np.sqrt(np.mean(variances)))
        width = float(np.mean(high - low))
        result[name] = {
            "coverage": float(np.mean((low <= 0.0) & (high >= 0.0))),
            "mean_width_pct": width,
            "ideal_width_pct": 3.92 * spread,
            "width_over_ideal": width / (3.92 * spread) if spread > 0 else float("nan"),
            "spread_pct": spread,
            "power_demo": float(np.mean(demo_low > 0.0)),
            # a true gap of 4 spreads moves every interval up by it (widths barely change)
            "power_4_spreads": float(np.mean(low + 4.0 * spread > 0.0)),
            "intervals": len(gap),
        }
    return result


def _fit_chunk(repetitions: range) -> tuple[list[dict[str, dict[str, np.ndarray]]], float]:
    """Fit ``repetitions`` in one process: their records and the CPU seconds they took."""
    source = reversible_source()
    start = time.process_time()
    records = []
    for repetition in repetitions:
        records.append(fit_repetition(source, repetition))
        if (repetition + 1) % 25 == 0:
            print(f"  repetition {repetition + 1} fitted", flush=True)
    return records, time.process_time() - start


def real_fits(repetitions: int, workers: int = 1) -> dict[str, Any]:
    """Fit every repetition (in ``workers`` processes, one BLAS thread each) and evaluate."""
    source = reversible_source()
    start_wall = time.perf_counter()
    chunks = [range(w, repetitions, workers) for w in range(workers)]
    if workers == 1:
        parts = [_fit_chunk(chunks[0])]
    else:
        from concurrent.futures import ProcessPoolExecutor

        with ProcessPoolExecutor(workers) as pool:
            parts = list(pool.map(_fit_chunk, chunks))
    by_repetition = {
        r: record
        for chunk, (chunk_records, _) in zip(chunks, parts, strict=True)
        for r, record in zip(chunk, chunk_records, strict=True)
    }
    records = [by_repetition[r] for r in range(repetitions)]
    fit_cpu = sum(cpu for _, cpu in parts)
    rows = []
    start_evaluate = time.process_time()
    # (fits, family, train_sample, paired seeds, intervals): first what the pipeline does
    # by default, then the alternatives it was chosen over.
    cases = [
        ("ngram_half", "ngram", "half", True, ("t", "bootstrap"), SEED_BLOCKS),
        ("mlp", "mlp", "none", False, ("t",), SEED_BLOCKS),
        ("mlp", "mlp", "none", True, ("t", "bootstrap"), SEED_BLOCKS),
        ("ngram_bootstrap", "ngram", "bootstrap", True, ("t",), SEED_BLOCKS),
        ("ngram_sub80", "ngram", "sub80", True, ("t",), SEED_BLOCKS),
        ("ngram_none", "ngram", "none", True, ("t", "bootstrap"), (3,)),
    ]
    for key, family, scheme, paired, intervals, seed_counts in cases:
        for n_seeds in seed_counts:
            for interval in intervals:
                figures = evaluate(records, key, n_seeds, paired=paired, interval=interval)
                for part, values in figures.items():
                    rows.append(
                        {
                            "family": family,
                            "train_sample": scheme,
                            "paired": paired,
                            "seeds": n_seeds,
                            "gap": part,
                            "interval": interval,
                            **values,
                        }
                    )
    evaluate_cpu = time.process_time() - start_evaluate
    correlations = [
        np.corrcoef(r["mlp"]["forward"][0].sum(axis=1), r["mlp"]["reverse"][0].sum(axis=1))[0, 1]
        for r in records
    ]
    quality = {}
    floors = np.array([r["floors"]["forward"].sum() for r in records])
    for key in ("ngram_none", "ngram_half", "ngram_bootstrap", "ngram_sub80", "mlp"):
        forward = np.stack([r[key]["forward"] for r in records])  # (reps, 2, seeds, units)
        whole = forward[:, 0].sum(axis=2).mean(axis=1)
        content = (forward[:, 0] - forward[:, 1]).sum(axis=2).mean(axis=1)
        per_token = np.log(2) * N_TEST * LENGTH
        quality[key] = {
            "excess_bits_per_token": float(np.mean(whole - floors) / per_token),
            "content_excess_bits_per_token": float(np.mean(content - floors) / per_token),
        }
    return {
        "sizes": {
            "vocab_size": VOCAB_SIZE,
            "unit_length": LENGTH,
            "train_units": N_TRAIN,
            "valid_units": N_VALID,
            "test_units": N_TEST,
            "seeds_fitted": N_SEEDS,
            "ngram": NGRAM,
            "mlp": MLP,
        },
        "chain": {
            "stationary": reversible_chain(VOCAB_SIZE, CHAIN_SEED)[1].round(4).tolist(),
            "entropy_rate_bits": source.entropy_rate() / np.log(2),
        },
        "repetitions": repetitions,
        "fit_cpu_s": fit_cpu,
        "evaluate_cpu_s": evaluate_cpu,
        "total_wall_s": time.perf_counter() - start_wall,
        "rows": rows,
        "quality": quality,
        "mlp_same_seed_correlation": {
            "mean": float(np.mean(correlations)),
            "standard_error": float(np.std(correlations, ddof=1) / np.sqrt(len(correlations)))
            if len(correlations) > 1
            else None,
        },
    }


#: the demo's linear_gf2 source and mlp model (templates/demo/)
DEMO_SOURCE = {"n_bits": 8, "nonzeros": 1, "matrix_seed": 57}
DEMO_SPLIT = {"n_units": 3000, "fractions": (0.7, 0.1, 0.2), "salt": "retrograde"}
DEMO_MLP = {"window": 16, "hidden": 128, "epochs": 40, "lr": 0.003, "batch_size": 128}


def demo_fits(repetitions: int, n_seeds: int = 3) -> dict[str, Any]:
    """Real ``mlp`` fits on the demo's ``linear_gf2``: the reverse gap, power and widths."""
    from retrograde.sources import source_units

    source = sources.make("linear_gf2", **DEMO_SOURCE)
    start = time.process_time()
    rows = []
    for repetition in range(repetitions):
        splits = source_units(source, seed=1000 + repetition, **DEMO_SPLIT).splits
        losses: dict[str, np.ndarray] = {}
        for name in ("forward", "reverse"):
            order = orders.make(name)
            train, valid, test = (order.apply_set(splits[s]) for s in ("train", "valid", "test"))
            losses[name] = np.stack(
                [
                    _scores(
                        families.make("mlp", progress=False, **DEMO_MLP).fit(
                            train, valid, seed=order_seed(s, name)
                        ),
                        test,
                    )
                    for s in range(n_seeds)
                ],
                axis=1,
            )  # (2, n_seeds, n_units)
        row: dict[str, Any] = {}
        for paired in (True, False):
            leaf = summarize_model(
                {name: value[0] for name, value in losses.items()},
                reference_order="forward",
                n_tokens=np.full(losses["forward"].shape[2], 2 * DEMO_SOURCE["n_bits"]),
                paired_seeds=paired,
                n_flips=200,
            )["reverse"]
            key = "paired" if paired else "unpaired"
            row[f"{key}_low"], row[f"{key}_high"] = leaf["gap_pct_low"], leaf["gap_pct_high"]
            row["gap_pct"], row["seed_spread_pct"] = leaf["gap_pct"], leaf["seed_spread_pct"]
        totals = {name: value[0].sum(axis=1) for name, value in losses.items()}
        row["same_seed_correlation"] = float(
            np.corrcoef(totals["forward"], totals["reverse"])[0, 1]
        )
        rows.append(row)
        print(f"  demo repetition {repetition}: {row}", flush=True)
    summary: dict[str, Any] = {
        "repetitions": repetitions,
        "seeds": n_seeds,
        "mean_gap_pct": float(np.mean([r["gap_pct"] for r in rows])),
        "mean_seed_spread_pct": float(np.mean([r["seed_spread_pct"] for r in rows])),
        "mean_same_seed_correlation": float(np.mean([r["same_seed_correlation"] for r in rows])),
        "cpu_s": time.process_time() - start,
        "rows": rows,
    }
    for key in ("paired", "unpaired"):
        summary[f"{key}_power"] = float(np.mean([r[f"{key}_low"] > 0 for r in rows]))
        summary[f"{key}_mean_width_pct"] = float(
            np.mean([r[f"{key}_high"] - r[f"{key}_low"] for r in rows])
        )
    return summary


def simulate(rng, *, n_units, n_seeds, shift, seed_sd, doc_sd=0.0, docs=0):
    """Two orders with the same true per-unit NLL (or a true gap ``shift``), a relative
    per-seed training effect of sd ``seed_sd`` per order, per-unit noise of 2 nats and, with
    ``docs``, a per-document effect of sd ``doc_sd`` that one order feels and not the other."""
    truth = rng.gamma(4.0, 10.0, size=n_units)
    doc_ids = np.arange(n_units) // max(n_units // docs, 1) if docs else None
    losses = {}
    for order, factor in (("forward", 1.0), ("reverse", 1.0 + shift)):
        training = rng.normal(0.0, seed_sd, size=(n_seeds, 1))
        noise = rng.normal(0.0, 2.0, size=(n_seeds, n_units))
        if doc_ids is not None:
            noise = noise + rng.normal(0.0, doc_sd, size=int(doc_ids.max()) + 1)[doc_ids]
        losses[order] = truth * factor * (1.0 + training) + noise
    return losses, doc_ids


def simulated_rate(repetitions: int, *, interval: str, group: bool = True, **kwargs: Any) -> float:
    rng = np.random.default_rng(12345)
    covered = 0
    for repetition in range(repetitions):
        losses, doc_ids = simulate(rng, n_units=300, **kwargs)
        leaf = summarize_model(
            losses,
            reference_order="forward",
            n_tokens=np.full(300, 10),
            doc_ids=doc_ids if group else None,
            interval=interval,
            paired_seeds=False,
            n_boot=1000,
            n_flips=10,
            seed=repetition,
        )["reverse"]
        covered += leaf["gap_pct_low"] <= 0.0 <= leaf["gap_pct_high"]
    return covered / repetitions


def simulated(repetitions: int) -> dict[str, Any]:
    settings = {
        "1 seed, no training noise": {"n_seeds": 1, "seed_sd": 0.0},
        "2 seeds, training sd 1% (interval ignores it)": {"n_seeds": 2, "seed_sd": 0.01},
        "3 seeds, training sd 1%": {"n_seeds": 3, "seed_sd": 0.01},
        "5 seeds, no training noise": {"n_seeds": 5, "seed_sd": 0.0},
        "5 seeds, training sd 1%": {"n_seeds": 5, "seed_sd": 0.01},
        "5 seeds, training sd 3%": {"n_seeds": 5, "seed_sd": 0.03},
        "10 seeds, training sd 1%": {"n_seeds": 10, "seed_sd": 0.01},
        "5 seeds, 30 documents, resampled by document": {
            "n_seeds": 5,
            "seed_sd": 0.01,
            "docs": 30,
            "doc_sd": 6.0,
        },
        "5 seeds, 30 documents, resampled by unit (wrong)": {
            "n_seeds": 5,
            "seed_sd": 0.01,
            "docs": 30,
            "doc_sd": 6.0,
            "group": False,
        },
    }
    out: dict[str, Any] = {}
    for label, kwargs in settings.items():
        out[label] = {
            interval: simulated_rate(repetitions, interval=interval, shift=0.0, **kwargs)
            for interval in ("t", "bootstrap")
        }
        print(f"  {label:50s} t {out[label]['t']:.3f}  bootstrap {out[label]['bootstrap']:.3f}")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "coverage")
    parser.add_argument("--repetitions", type=int, default=300, help="real-fit repetitions")
    parser.add_argument("--simulated", type=int, default=1000, help="simulated repetitions")
    parser.add_argument("--demo", type=int, default=12, help="demo-effect repetitions")
    parser.add_argument("--workers", type=int, default=1, help="processes fitting repetitions")
    args = parser.parse_args()
    if args.quick:
        args.repetitions, args.simulated, args.demo = 4, 20, 1
    results: dict[str, Any] = {"machine": _common.machine()}
    print(f"simulated noise ({args.simulated} repetitions): coverage of 0")
    start = time.process_time()
    results["simulated"] = simulated(args.simulated)
    results["simulated_cpu_s"] = time.process_time() - start
    print(f"the demo's mlp on linear_gf2 ({args.demo} repetitions)")
    results["demo"] = demo_fits(args.demo)
    print(f"real fits on a reversible chain ({args.repetitions} repetitions)")
    results["real"] = real(args.repetitions, args.workers)
    _common.write_results(args.out, results)


def real(repetitions: int, workers: int = 1) -> dict[str, Any]:
    figures = real_fits(repetitions, workers)
    columns = [
        ("family", "family", ""),
        ("train_sample", "train_sample", ""),
        ("paired", "paired", ""),
        ("seeds", "seeds", ""),
        ("gap", "gap", ""),
        ("interval", "interval", ""),
        ("coverage", "covers 0", ".3f"),
        ("mean_width_pct", "width %", ".4g"),
        ("ideal_width_pct", "3.92 sd %", ".4g"),
        ("width_over_ideal", "ratio", ".2f"),
        ("power_demo", "power demo", ".3f"),
        ("power_4_spreads", "power 4 sd", ".3f"),
    ]
    print(_common.format_table(figures["rows"], columns))
    for key, value in figures["quality"].items():
        print(
            f"  {key:16s} excess {value['excess_bits_per_token']:.5f} bits/token, content "
            f"{value['content_excess_bits_per_token']:.5f}"
        )
    print(
        f"fits: {figures['fit_cpu_s']:.0f} s CPU; intervals: {figures['evaluate_cpu_s']:.0f} s "
        f"CPU; all: {figures['total_wall_s']:.0f} s wall"
    )
    return figures


if __name__ == "__main__":
    main()
