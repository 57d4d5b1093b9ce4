"""Stage ``fit``: fit one cell (source, model, order, seed) and score its test units.

``python -m retrograde.stages.fit --source S --model M --order O --seed N`` reads only
``study.models.M`` from ``params.yaml`` and ``data/S/orders/O/``, and writes
``cells/S/M/O/seedN/``:

- ``model/``            the fitted family (``Family.save``; no pickle)
- ``test_logprobs.npy`` float64 (n_test_tokens + n_test_units,): natural-log probabilities
  in the model's order, ``len + 1`` per test unit (end marker last), units back to back
- ``curve.json``        the learning curve (one dict per epoch)
- ``budget.json``       what the fit cost: ``train_tokens`` (target positions trained on,
  end markers included), ``steps`` (optimizer or minibatch updates; ``null`` for counting
  families), ``n_params`` (numbers learned), ``cpu_s`` and ``wall_s`` (fit, test scoring and
  the normalization probe, trainer processes included). Times differ between runs, so they
  stay out of ``metrics.json``; the table stage puts them in ``cells.csv`` and the report.
- ``valid.json``        the fitted model's score on the validation units: ``nats``,
  ``tokens``, ``units`` and ``bits_per_token`` (``null`` values without validation units);
  the table stage picks a tuned model's best trial by it, never by the test units
- ``fit.log``           what happened; on a crash it ends with the traceback

A model with ``train_fraction`` f < 1 trains (and stops early) on a nested subsample of the
training units drawn from the cell's seed (:func:`retrograde.data.nested_subsample`): the
same units for every order, validation and test units unchanged.

A family that declares ``own_stream_per_order`` (``mlp``, the torch families) draws its own
random numbers (initial weights, batch order) from ``order_seed(seed, order)``
(:func:`retrograde.data.order_seed`): fits of two orders share no random numbers, while the
training units a seed chooses stay the same in every order.

A crash becomes one line naming the cell and its ``fit.log`` (exit status 2).
"""

from __future__ import annotations

if __name__ == "__main__":  # a command of a run: the run's stage server may run it (server.py)
    from retrograde.stages.server import delegate

    delegate("fit")

import argparse
import contextlib
import io
import os
import time
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from ..config import ModelConfig, cell_dir, load_params, order_dir
from ..data import (
    SPLITS,
    SequenceSet,
    atomic_write_bytes,
    atomic_write_json,
    nested_subsample,
    open_for_writing,
    order_seed,
    resample_train,
    resolve_train_sample,
)
from ..errors import FitError, RetrogradeError
from . import run_stage

__all__ = ["BUDGET_FIELDS", "cell_budget", "fit_cell", "main", "training_units", "valid_score"]

#: the fields of ``budget.json``, in order
BUDGET_FIELDS = ("train_tokens", "steps", "cpu_s", "wall_s", "n_params")


def _plain(value: Any) -> Any:
    """A numpy scalar as the Python number it holds; anything else unchanged."""
    return value.item() if isinstance(value, np.generic) else value


def valid_score(model: Any, valid: SequenceSet) -> dict[str, Any]:
    """``valid.json``: the fitted model's validation nats, tokens, units and bits per token."""
    if not len(valid):
        return {"nats": None, "tokens": 0, "units": 0, "bits_per_token": None}
    nats = -float(np.sum(model.logprobs(valid).values))
    tokens = int(len(valid.tokens))
    return {
        "nats": nats,
        "tokens": tokens,
        "units": len(valid),
        "bits_per_token": nats / float(np.log(2)) / max(tokens, 1),
    }


def fit_cell(
    model_spec: ModelConfig,
    splits: dict[str, SequenceSet],
    *,
    seed: int,
    order: str | None = None,
    log: TextIO | None = None,
) -> tuple[Any, np.ndarray, list[dict[str, Any]]]:
    """Fit the model ``model_spec`` describes on train (valid for early stopping).

    ``model_spec.train_sample`` chooses the training units seed ``seed`` sees
    (:func:`training_units`). A family that declares ``own_stream_per_order`` draws its
    own random numbers from ``order_seed(seed, order)`` when ``order`` is given (what the
    stage does), so fits of two orders share none; else from ``seed``.

    Returns ``(model, test_logprobs, curve)``; ``test_logprobs`` is the flat float64 array
    of the test units' log-probabilities (``len + 1`` per unit, end marker last).
    """
    from .. import families

    def note(line: str) -> None:
        if log is not None:
            print(line, file=log, flush=True)

    model = families.make(model_spec.family, **model_spec.params)
    train, valid, test = splits["train"], splits["valid"], splits["test"]
    note(f"fit {model_spec.family} {model_spec.params} seed={seed}")
    fit_seed = seed
    if order is not None and getattr(model, "own_stream_per_order", False):
        fit_seed = order_seed(seed, order)
        note(f"the family's own random numbers: stream {fit_seed} (seed {seed}, order {order})")
    total = len(train)
    scheme = resolve_train_sample(model_spec.train_sample, model)
    train = training_units(model_spec, model, train, seed)
    if float(model_spec.train_fraction) < 1.0:
        note(f"train_fraction {model_spec.train_fraction}: a nested subsample of {total} units")
    if scheme != "none":
        note(f"train sample: {scheme} chosen by seed {seed}")
    note(
        f"train {len(train)} units / {len(train.tokens)} tokens; valid {len(valid)}; test {len(test)}"
    )
    # One call, so a family whose training run scores the test units trains only once;
    # its progress goes to the log as plain lines (no terminal inside a DVC stage).
    with contextlib.ExitStack() as stack:
        if log is not None:
            stack.enter_context(families.progress_log(log))
        logprobs = model.fit_logprobs(train, valid if len(valid) else None, test, seed=fit_seed)
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
            f"family {model_spec.family!r} returned {values.size} log-probabilities for "
            f"{len(test)} test units; expected len + 1 per unit ({expected} in all)"
        )
    if not np.all(np.isfinite(values)) or np.any(values > 1e-9):
        raise FitError(
            f"family {model_spec.family!r} returned log-probabilities that are not finite "
            "and <= 0; every outcome needs a probability above 0"
        )
    # The normalization probe (families/_probe.py): whole distributions at a few positions.
    positions = families.probe_positions(test, families.probe_size(model.vocab_size), seed)
    distributions = model.probe_logprobs(test, positions)
    families.check_probe(f"family {model_spec.family!r}", test, values, positions, distributions)
    note(f"probe: {len(positions)} test positions score distributions that sum to 1")
    note(f"test nats {-values.sum():.6f} over {len(test.tokens)} tokens")
    return model, values, curve


def training_units(
    model_spec: ModelConfig, family: Any, train: SequenceSet, seed: int
) -> SequenceSet:
    """The training units seed ``seed`` of ``model_spec`` trains on, the same units in
    every order (both draws depend on the seed and the unit count alone).

    First ``train_fraction`` < 1 keeps a nested subsample of them
    (:func:`retrograde.data.nested_subsample`: the data-size sweep); then ``train_sample``
    (``auto`` for a ``family`` class or instance without randomness of its own) draws the
    seed's sample of what is left (:func:`retrograde.data.resample_train`).
    """
    fraction = float(model_spec.train_fraction)
    if fraction < 1.0:
        train = train.subset(nested_subsample(len(train), fraction, seed))
    scheme = resolve_train_sample(model_spec.train_sample, family)
    if scheme == "none" or not len(train):  # an empty split: the family says so itself
        return train
    return resample_train(train, seed, scheme=scheme)


def _cpu_seconds() -> float:
    """User + system CPU time of this process and its finished children (trainers)."""
    times = os.times()
    return times.user + times.system + times.children_user + times.children_system


def cell_budget(
    model: Any,
    train: SequenceSet,
    curve: list[dict[str, Any]],
    *,
    cpu_s: float,
    wall_s: float,
) -> dict[str, Any]:
    """The ``budget.json`` of one cell (see the module docstring); unknown values are None.

    ``train_tokens`` is what the family reports (``tokens_seen_``, or the last epoch's
    ``tokens_seen`` in its curve), else one pass over the training positions per epoch of
    the curve (at least one) for the built-in families, else None (an external trainer
    that does not say).
    """
    seen = getattr(model, "tokens_seen_", None)
    if seen is None and curve and isinstance(curve[-1].get("tokens_seen"), (int, float)):
        seen = curve[-1]["tokens_seen"]
    if seen is None and getattr(model, "name", "") != "command":
        seen = max(len(curve), 1) * (len(train.tokens) + len(train))
    steps = getattr(model, "steps_", None)
    n_params = model.n_parameters() if hasattr(model, "n_parameters") else None
    return {
        "train_tokens": None if seen is None else int(seen),
        "steps": None if steps is None else int(steps),
        "cpu_s": round(float(cpu_s), 3),
        "wall_s": round(float(wall_s), 3),
        "n_params": None if n_params is None else int(n_params),
    }


def _body(args: argparse.Namespace) -> None:
    wdir = Path(args.params).resolve()
    cell = wdir / str(cell_dir(args.source, args.model, args.order, args.seed))
    name = f"{args.source}/{args.model}/{args.order}/seed{args.seed}"
    cell.mkdir(parents=True, exist_ok=True)
    if not cell.resolve().is_relative_to(wdir):
        raise FitError(
            f"cell {name}: its folder {cell.relative_to(wdir).as_posix()} leads outside "
            f"{wdir} through a symbolic link; remove the link and rerun"
        )
    log_path = cell / "fit.log"
    # The log is written as the fit goes (not atomically) so that a crash leaves it behind;
    # a symbolic link in its place is replaced, never written through.
    with open_for_writing(log_path) as log:
        try:
            spec = load_params(wdir).study.models[args.model]
            data = wdir / str(order_dir(args.source, args.order))
            splits = {s: SequenceSet.load(data / s) for s in SPLITS}
            cpu_started, wall_started = _cpu_seconds(), time.perf_counter()
            model, values, curve = fit_cell(spec, splits, seed=args.seed, order=args.order, log=log)
            budget = cell_budget(
                model,
                training_units(spec, model, splits["train"], args.seed),
                curve,
                cpu_s=_cpu_seconds() - cpu_started,
                wall_s=time.perf_counter() - wall_started,
            )
            validation = valid_score(model, splits["valid"])  # after the clock: not a fit cost
            print(f"valid bits/token {validation['bits_per_token']}", file=log, flush=True)
            # Counts only: the log is hashed with the cell, its times are in budget.json.
            counts = {k: v for k, v in budget.items() if k not in ("cpu_s", "wall_s")}
            print(f"budget {counts} (times in budget.json)", file=log, flush=True)
            model.save(cell / "model")
            buffer = io.BytesIO()
            np.save(buffer, values)
            atomic_write_bytes(cell / "test_logprobs.npy", buffer.getvalue())
            atomic_write_json(cell / "curve.json", curve)
            atomic_write_json(cell / "budget.json", budget)
            atomic_write_json(cell / "valid.json", validation)
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
