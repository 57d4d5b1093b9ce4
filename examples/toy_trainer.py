"""A tiny external trainer for retrograde's ``command`` family: an add-k bigram model.

It reads units in the SequenceSet folder format with plain numpy (no retrograde import, as
a team's own trainer would) and writes the files the ``command`` family expects::

    python examples/toy_trainer.py fit --train {train} --valid {valid} --test {test} \\
        --out {out} --seed {seed}
    python examples/toy_trainer.py score --model {model} --test {test} --out {out}

``fit`` trains, saves ``{out}/model.npz``, writes ``{out}/curve.json`` (validation bits per
token) and ``{out}/logprobs.npy`` for the test units; ``score`` reloads ``model.npz`` and
scores. Log-probabilities follow the protocol (``docs/trainers.md``): per test unit,
``len + 1`` natural logs (each token, then the end marker, outcome ``vocab_size``); the
begin marker ``vocab_size`` pads the context before the first token. For the normalization
probe, ``{test}/probe.npy`` lists ``(unit, position)`` pairs and ``{out}/probe_logprobs.npy``
gets the whole distribution at each: ``vocab_size + 1`` natural logs that sum to 1.

The model: ``p(w | c) = (n(c, w) + k) / (n(c) + k (V + 1))`` with ``k`` add-k smoothing
(Laplace's rule for ``k = 1``). The seed is unused (counting is exact); it is accepted
because real trainers need one. A dense ``(V + 1, V + 1)`` table is fine for a toy.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import numpy as np


def read_units(folder: str) -> tuple[np.ndarray, np.ndarray, int]:
    """(tokens, offsets, vocab_size) of a SequenceSet folder."""
    path = Path(folder)
    meta = json.loads((path / "meta.json").read_text())
    tokens = np.load(path / "tokens.npy", allow_pickle=False).astype(np.int64)
    offsets = np.load(path / "offsets.npy", allow_pickle=False).astype(np.int64)
    return tokens, offsets, int(meta["vocab_size"])


def bigram_events(tokens: np.ndarray, offsets: np.ndarray, vocab_size: int):
    """(previous symbol, outcome) for every token and every unit's end marker."""
    lengths = np.diff(offsets)
    n_units = len(lengths)
    unit = np.repeat(np.arange(n_units), lengths + 1)
    event_offsets = offsets + np.arange(n_units + 1)
    position = np.arange(len(unit)) - event_offsets[:-1][unit]  # 0..len within each unit
    flat = offsets[:-1][unit] + position  # the token at this position (or the next unit)
    padded = np.append(tokens, 0)  # keeps every index below valid, even with no tokens
    outcome = np.where(position < lengths[unit], padded[flat], vocab_size)
    previous = np.where(position > 0, padded[np.maximum(flat - 1, 0)], vocab_size)
    return previous, outcome


def logprobs(table: np.ndarray, folder: str) -> tuple[np.ndarray, int]:
    tokens, offsets, vocab_size = read_units(folder)
    if len(offsets) == 1:
        return np.zeros(0), 0
    previous, outcome = bigram_events(tokens, offsets, vocab_size)
    return np.log(table[previous, outcome]), len(tokens)


def write_scores(table: np.ndarray, test: str, out: str) -> None:
    """``{out}/logprobs.npy`` for the test units, and the probe's full distributions."""
    np.save(Path(out) / "logprobs.npy", logprobs(table, test)[0])
    probe_path = Path(test) / "probe.npy"
    if probe_path.is_file():
        tokens, offsets, vocab_size = read_units(test)
        unit, position = np.load(probe_path, allow_pickle=False).reshape(-1, 2).T
        # The symbol before each probed position: the previous token, or the begin marker.
        padded = np.append(tokens, 0)
        previous = np.where(position > 0, padded[offsets[unit] + position - 1], vocab_size)
        np.save(Path(out) / "probe_logprobs.npy", np.log(table[previous]))  # (k, V + 1)


def fit(args: argparse.Namespace) -> None:
    tokens, offsets, vocab_size = read_units(args.train)
    previous, outcome = bigram_events(tokens, offsets, vocab_size)
    n_symbols = vocab_size + 1
    counts = np.bincount(previous * n_symbols + outcome, minlength=n_symbols**2)
    counts = counts.reshape(n_symbols, n_symbols).astype(np.float64) + args.k
    table = counts / counts.sum(axis=1, keepdims=True)  # (context, outcome), rows sum to 1
    out = Path(args.out)
    np.savez(out / "model.npz", table=table)
    valid_logprobs, valid_tokens = logprobs(table, args.valid)
    if valid_tokens:
        bits = -valid_logprobs.sum() / math.log(2) / valid_tokens
        curve = [{"epoch": 1, "valid_bits_per_token": float(bits)}]
        (out / "curve.json").write_text(json.dumps(curve))
    write_scores(table, args.test, args.out)
    print(f"toy_trainer: fitted add-{args.k} bigram, seed {args.seed}", file=sys.stderr)


def score(args: argparse.Namespace) -> None:
    with np.load(Path(args.model) / "model.npz", allow_pickle=False) as data:
        table = data["table"]
    write_scores(table, args.test, args.out)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="mode", required=True)
    fit_parser = sub.add_parser("fit", help="train, then score --test")
    for flag in ("--train", "--valid", "--test", "--out"):
        fit_parser.add_argument(flag, required=True)
    fit_parser.add_argument("--seed", type=int, default=0)
    fit_parser.add_argument("--k", type=float, default=0.5, help="add-k smoothing constant")
    score_parser = sub.add_parser("score", help="score --test with a saved model")
    for flag in ("--model", "--test", "--out"):
        score_parser.add_argument(flag, required=True)
    score_parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    if args.mode == "fit":
        fit(args)
    else:
        score(args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
