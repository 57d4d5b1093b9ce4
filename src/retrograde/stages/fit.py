"""Stage ``fit``: fit one cell (source, model, order, seed) and score its test units.

``python -m retrograde.stages.fit --source S --model M --order O --seed N`` reads only
``study.models.M`` from ``params.yaml`` and ``data/S/orders/O/``, and writes
``cells/S/M/O/seedN/``:

- ``model/``            the fitted family (``Family.save``; no pickle)
- ``test_logprobs.npy`` float64 (n_test_tokens + n_test_units,): natural-log probabilities
  in the model's order, ``len + 1`` per test unit (end marker last), units back to back
- ``curve.json``        the learning curve (one dict per epoch)
- ``fit.log``           what happened; on a crash it ends with the traceback

A crash becomes one line naming the cell and its ``fit.log`` (exit status 2).
"""

from __future__ import annotations

import argparse
import io
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from .._io import atomic_write_bytes, atomic_write_json
from ..errors import FitError, RetrogradeError
from ..sequences import SequenceSet
from . import cell_dir, order_dir, read_params, run_stage

__all__ = ["fit_cell", "main"]


def _plain(value: Any) -> Any:
    """A numpy scalar as the Python number it holds; anything else unchanged."""
    return value.item() if isinstance(value, np.generic) else value


def fit_cell(
    model_spec: dict[str, Any],
    splits: dict[str, SequenceSet],
    *,
    seed: int,
    log: TextIO | None = None,
) -> tuple[Any, np.ndarray, list[dict[str, Any]]]:
    """Fit ``model_spec`` (``{family, params}``) on train (valid for early stopping).

    ``model_spec["train_sample"]`` (default ``auto``) chooses the training units seed
    ``seed`` sees: all of them, or for a family without randomness of its own a half-sample
    chosen by the seed (:mod:`retrograde._train_sample`).

    Returns ``(model, test_logprobs, curve)``; ``test_logprobs`` is the flat float64 array
    of the test units' log-probabilities (``len + 1`` per unit, end marker last).
    """
    from .. import families
    from .._train_sample import resample_train, resolve_train_sample
    from ..families._probe import check_probe, probe_positions, probe_size

    def note(line: str) -> None:
        if log is not None:
            print(line, file=log, flush=True)

    model = families.make(model_spec["family"], **model_spec["params"])
    train, valid, test = splits["train"], splits["valid"], splits["test"]
    note(f"fit {model_spec['family']} {model_spec['params']} seed={seed}")
    scheme = resolve_train_sample(model_spec.get("train_sample", "auto"), model)
    if scheme != "none" and len(train):  # an empty split: the family says so itself
        n_all = len(train)
        train = resample_train(train, seed, scheme=scheme)
        note(f"train sample: {scheme} of {n_all} units chosen by seed {seed}")
    note(
        f"train {len(train)} units / {len(train.tokens)} tokens; valid {len(valid)}; test {len(test)}"
    )
    # One call, so a family whose training run scores the test units trains only once.
    logprobs = model.fit_logprobs(train, valid if len(valid) else None, test, seed=seed)
    # Plain Python numbers only: curve.json must load anywhere (numpy ints are not JSON).
    curve = [
        {str(key): _plain(value) for key, value in epoch.items()}
        for epoch in getattr(model, "learning_curve_", [])
    ]
    for epoch in curve:
        note(f"epoch {epoch}")
    values = np.asarray(logprobs.values, dtype=np.float64)
    expected = len(test.tokens) + len(test)
    if values.shape != (expected,) or not np.array_equal(logprobs.lengths, test.lengths + 1):
        raise FitError(
            f"family {model_spec['family']!r} returned {values.size} log-probabilities for "
            f"{len(test)} test units; expected len + 1 per unit ({expected} in all)"
        )
    if not np.all(np.isfinite(values)) or np.any(values > 1e-9):
        raise FitError(
            f"family {model_spec['family']!r} returned log-probabilities that are not finite "
            "and <= 0; every outcome needs a probability above 0"
        )
    # The normalization probe (families/_probe.py): whole distributions at a few positions.
    positions = probe_positions(test, probe_size(model.vocab_size), seed)
    distributions = model.probe_logprobs(test, positions)
    check_probe(f"family {model_spec['family']!r}", test, values, positions, distributions)
    note(f"probe: {len(positions)} test positions score distributions that sum to 1")
    note(f"test nats {-values.sum():.6f} over {len(test.tokens)} tokens")
    return model, values, curve


def _body(args: argparse.Namespace) -> None:
    wdir = Path(args.params).resolve()
    cell = wdir / str(cell_dir(args.source, args.model, args.order, args.seed))
    name = f"{args.source}/{args.model}/{args.order}/seed{args.seed}"
    cell.mkdir(parents=True, exist_ok=True)
    log_path = cell / "fit.log"
    # The log is written as the fit goes (not atomically) so that a crash leaves it behind.
    with log_path.open("w", encoding="utf-8") as log:
        try:
            spec = read_params(wdir)["study"]["models"][args.model]
            data = wdir / str(order_dir(args.source, args.order))
            splits = {s: SequenceSet.load(data / s) for s in ("train", "valid", "test")}
            model, values, curve = fit_cell(spec, splits, seed=args.seed, log=log)
            model.save(cell / "model")
            buffer = io.BytesIO()
            np.save(buffer, values)
            atomic_write_bytes(cell / "test_logprobs.npy", buffer.getvalue())
            atomic_write_json(cell / "curve.json", curve)
        except Exception as exc:
            traceback.print_exc(file=log)
            reason = (
                str(exc) if isinstance(exc, RetrogradeError) else f"{type(exc).__name__}: {exc}"
            )
            rel_log = log_path.relative_to(wdir)
            raise FitError(
                f"cell {name} failed ({reason}); see pipelines/retrograde/{rel_log.as_posix()}"
            ) from exc


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, help="a key of study.sources")
    parser.add_argument("--model", required=True, help="a key of study.models")
    parser.add_argument("--order", required=True, help="a key of study.orders")
    parser.add_argument("--seed", required=True, type=int, help="one of study.seeds")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.fit --source S --model M --order O --seed N``."""
    return run_stage("fit", _configure, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
