"""Training and scoring throughput of the ``mlp`` family (and the torch families if installed).

Data: character units of the Python source corpus (see ``_corpus.py``): the first lines of
the train split holding 200,000 tokens, and of the test split holding 50,000 tokens.
Every case runs in a fresh process.

What is timed
-------------
``mlp`` (ours)
    ``families.make("mlp", window=8, hidden=64, epochs=2, progress=False).fit(train)``
    (one-hot features, two ``partial_fit`` epochs, no validation) and ``logprobs(test)``.
``sklearn`` (reference, same run)
    ``sklearn.neural_network.MLPClassifier`` with the same layer, batch size, learning
    rate and penalty, ``fit`` for 2 epochs on the same one-hot matrix, built outside the
    timer; scoring is ``predict_proba`` on the test matrix. Both run with one BLAS thread
    (``threadpoolctl``), as the family does. The ratio ours / sklearn shows
    what the family's feature building, chunking and probability floor cost on top.
``gru``, ``lstm``, ``transformer``
    When PyTorch is installed (and not with ``--quick``): default widths, ``context=128``,
    one epoch on 1 thread over 100,000 train tokens, then ``logprobs(test)``.

Training tokens/s = train tokens x epochs run / fit seconds; scoring tokens/s = test
tokens / scoring seconds (every token and each unit's end marker is scored).

Run: ``python benchmarks/bench_mlp.py [--quick] [--out PATH]``.
"""

from __future__ import annotations

import argparse
import importlib.util
import math
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

import _common
import _corpus
import numpy as np

TRAIN_TOKENS = 200_000
TEST_TOKENS = 50_000
TORCH_TRAIN_TOKENS = 100_000
MLP_PARAMS = {"window": 8, "hidden": 64, "epochs": 2, "batch_size": 256, "lr": 1e-3}
TORCH_PARAMS: dict[str, dict[str, Any]] = {
    "gru": {"context": 128, "epochs": 1},
    "lstm": {"context": 128, "epochs": 1},
    "transformer": {"context": 128, "epochs": 1},
}
QUICK = {"train": 3000, "test": 1000}


def one_hot_windows(units: Any, window: int, vocab_size: int) -> tuple[Any, np.ndarray]:
    """``(n_events, window * (V + 1))`` CSR one-hot of the previous ``window`` symbols, outcomes.

    Written here, independently of the family, so the reference sees the same task: events
    are each token and the end marker (id V); context before the unit start is id V.
    """
    import scipy.sparse

    n_symbols = vocab_size + 1
    padded, outcomes = [], []
    for row in units:  # setup only, outside every timer
        padded.append(np.concatenate([np.full(window, vocab_size), row]))
        outcomes.append(np.concatenate([row, [vocab_size]]))
    columns = np.concatenate(
        [
            np.lib.stride_tricks.sliding_window_view(p, window)[:, ::-1]
            + np.arange(window) * n_symbols
            for p in padded
        ]
    )
    n_rows = len(columns)
    matrix = scipy.sparse.csr_matrix(
        (np.ones(columns.size), columns.ravel(), np.arange(0, columns.size + 1, window)),
        shape=(n_rows, window * n_symbols),
    )
    return matrix, np.concatenate(outcomes)


def measure(case: dict[str, Any]) -> dict[str, Any]:
    folder = Path(case["data"])
    train = _corpus.load_prefix(folder, "train", case["train_tokens"])
    test = _corpus.load_prefix(folder, "test", case["test_tokens"])
    system, params = case["system"], case["params"]
    if system == "sklearn":
        from sklearn.exceptions import ConvergenceWarning
        from sklearn.neural_network import MLPClassifier
        from threadpoolctl import threadpool_limits

        vocab_size = train.effective_vocab_size()
        train_x, train_y = one_hot_windows(train, params["window"], vocab_size)
        test_x, _ = one_hot_windows(test, params["window"], vocab_size)
        classifier = MLPClassifier(
            hidden_layer_sizes=(params["hidden"],),
            batch_size=params["batch_size"],
            learning_rate_init=params["lr"],
            max_iter=params["epochs"],
            random_state=0,
        )
        # One BLAS thread, as the family itself runs (two threads on a busy 2-core machine
        # spin and run ~10x slower: measured by the family's owner).
        with warnings.catch_warnings(), threadpool_limits(limits=1, user_api="blas"):
            warnings.simplefilter("ignore", ConvergenceWarning)  # 2 epochs never converge
            _, fit_seconds, fit_cpu = _common.timed(lambda: classifier.fit(train_x, train_y))
            _, score_seconds, score_cpu = _common.timed(lambda: classifier.predict_proba(test_x))
        epochs_run, bits = classifier.n_iter_, None
    else:
        from retrograde.families import make

        model = make(system, progress=False, **params)
        _, fit_seconds, fit_cpu = _common.timed(lambda: model.fit(train, seed=0))
        scores, score_seconds, score_cpu = _common.timed(lambda: model.logprobs(test))
        epochs_run = len(model.learning_curve_) or params["epochs"]
        bits = float(-scores.values.sum() / math.log(2) / len(test.tokens))
    return {
        "train_tokens": len(train.tokens),
        "test_tokens": len(test.tokens),
        "epochs_run": int(epochs_run),
        "fit_seconds": fit_seconds,
        "score_seconds": score_seconds,
        "train_tokens_per_s": len(train.tokens) * int(epochs_run) / fit_seconds,
        "score_tokens_per_s": len(test.tokens) / score_seconds,
        "fit_cpu_seconds": fit_cpu,
        "score_cpu_seconds": score_cpu,
        "train_tokens_per_cpu_s": len(train.tokens) * int(epochs_run) / fit_cpu,
        "score_tokens_per_cpu_s": len(test.tokens) / score_cpu,
        "bits_per_token": bits,
    }


def run_all(args: argparse.Namespace, workdir: Path) -> dict[str, Any]:
    script = Path(__file__).resolve()
    train_tokens = QUICK["train"] if args.quick else TRAIN_TOKENS
    test_tokens = QUICK["test"] if args.quick else TEST_TOKENS
    torch_train = 0 if args.quick else TORCH_TRAIN_TOKENS
    print("preparing chars units ...", flush=True)
    corpus = _corpus.prepare_corpus(
        "chars", max(train_tokens, torch_train), workdir, n_test_tokens=test_tokens
    )
    data = {"data": str(workdir), "test_tokens": test_tokens}
    rows = []
    for system in ("mlp", "sklearn"):
        case = data | {"system": system, "params": MLP_PARAMS, "train_tokens": train_tokens}
        rows.append({"system": system, **_common.run_fresh(script, case)})
        print(f"  {system}: {rows[-1]['train_tokens_per_s']:,.0f} training tok/s", flush=True)
    torch_installed = importlib.util.find_spec("torch") is not None
    # --quick skips torch: importing it and its first steps take seconds on a busy machine,
    # and benchmarks/bench_torch_loop.py covers the training loop.
    for system, params in TORCH_PARAMS.items() if torch_installed and not args.quick else ():
        case = data | {"system": system, "params": params, "train_tokens": torch_train}
        rows.append({"system": system, **_common.run_fresh(script, case)})
        print(f"  {system}: {rows[-1]['train_tokens_per_s']:,.0f} training tok/s", flush=True)
    ours, reference = rows[0], rows[1]
    ratios = {
        "mlp_vs_sklearn_train": ours["train_tokens_per_s"] / reference["train_tokens_per_s"],
        "mlp_vs_sklearn_score": ours["score_tokens_per_s"] / reference["score_tokens_per_s"],
        "mlp_vs_sklearn_train_cpu": ours["train_tokens_per_cpu_s"]
        / reference["train_tokens_per_cpu_s"],
        "mlp_vs_sklearn_score_cpu": ours["score_tokens_per_cpu_s"]
        / reference["score_tokens_per_cpu_s"],
    }
    return {"corpus": corpus, "rows": rows, "ratios": ratios, "torch_installed": torch_installed}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    _common.add_common_arguments(parser, "mlp")
    args = parser.parse_args(argv)
    if args.case:
        return _common.serve_case(args.case, measure)
    started = time.perf_counter()
    info = _common.machine()
    with tempfile.TemporaryDirectory(prefix="retrograde-bench-mlp-") as tmp:
        results = run_all(args, Path(tmp))
    info["load_average_1min_after"] = round(os.getloadavg()[0], 2)
    results |= {"machine": info, "quick": args.quick, "mlp_params": MLP_PARAMS}
    results["torch_params"] = TORCH_PARAMS
    results["wall_seconds"] = round(time.perf_counter() - started, 1)
    print("\nneural families: training and scoring throughput (character tokens, fresh process)")
    print(
        _common.format_table(
            results["rows"],
            [
                ("system", "system", ""),
                ("train_tokens", "train tok", ",d"),
                ("epochs_run", "epochs", "d"),
                ("train_tokens_per_s", "train tok/s", ",.0f"),
                ("score_tokens_per_s", "score tok/s", ",.0f"),
                ("train_tokens_per_cpu_s", "train tok/CPU s", ",.0f"),
                ("score_tokens_per_cpu_s", "score tok/CPU s", ",.0f"),
                ("peak_rss_mib", "peak MiB", ",.0f"),
                ("bits_per_token", "test bits/tok", ".3f"),
            ],
        )
    )
    ratios = results["ratios"]
    print(
        f"\nmlp / sklearn MLPClassifier (same task, same run): training x"
        f"{ratios['mlp_vs_sklearn_train']:.2f}, scoring x{ratios['mlp_vs_sklearn_score']:.2f}"
        f" (CPU time: x{ratios['mlp_vs_sklearn_train_cpu']:.2f}, "
        f"x{ratios['mlp_vs_sklearn_score_cpu']:.2f})"
    )
    if not results["torch_installed"] or args.quick:
        print("gru, lstm and transformer skipped (torch not installed, or --quick)")
    print(f"total wall time {results['wall_seconds']:.0f} s")
    _common.write_results(args.out, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
