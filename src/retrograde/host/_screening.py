"""``retrograde rank``'s screening: a cheap proxy family, the validation split, successive halving.

Round 1 fits the proxy on a fraction (``min_fraction``) of the training units in every
candidate order and scores the validation units; each later round keeps the best
``1/eta`` of the candidates (never fewer than ``top_k``) and gives the survivors ``eta``
times more training units, until ``top_k`` are left or the proxy has seen every training
unit. Every order of a round trains on the same units (a seeded choice, nested from round
to round), so the comparison is paired. The test split is never read here: the top ``k``
are confirmed on it afterwards, so choosing them does not bias the confirmation.

Screening fits are not DVC stages. Each is small (a proxy on part of the training data)
and there are many of them: one DVC stage apiece would cost more than the fit (a DVC
process and its locking per fit) and would need a stage matrix over (candidate, round) in
the fixed stage file. Instead each result is cached under ``pipelines/retrograde/screen/``
(git-ignored) by the sha256 of everything it depends on: the proxy's resolved params with its
family's numerics version, the order's resolved params, the package version, the exact
training and validation units (their bytes) and the seed. A wider space or another round
computes only new keys; a changed input makes a new key, so a stale score is never read.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__
from ..config import ModelConfig, OrderConfig, to_dict
from ..data import SequenceSet, atomic_write_json, atomic_write_text
from ..errors import FitError, RetrogradeError

__all__ = ["SCREEN_CACHE_VERSION", "ScreenRound", "proxy_bits", "screen", "training_subset"]

#: raised when the cache's file format or the screening's arithmetic changes
SCREEN_CACHE_VERSION = 1


@dataclass
class ScreenRound:
    """One round: the training units used and every scored order's validation bits/token."""

    fraction: float
    train_units: int
    #: order name -> proxy bits per validation token (reference included)
    bits_per_token: dict[str, float]
    #: the candidates that go on (the last round: the top k, best first)
    kept: list[str]

    def to_dict(self) -> dict[str, Any]:
        return {
            "fraction": self.fraction,
            "train_units": self.train_units,
            "bits_per_token": self.bits_per_token,
            "kept": self.kept,
        }


def _units_digest(units: SequenceSet) -> str:
    digest = hashlib.sha256()
    digest.update(np.ascontiguousarray(units.tokens, dtype="<i8").tobytes())
    digest.update(np.ascontiguousarray(units.offsets, dtype="<i8").tobytes())
    digest.update(str(units.vocab_size).encode())
    return digest.hexdigest()


def training_subset(train: SequenceSet, fraction: float, seed: int) -> SequenceSet:
    """The first ``ceil(fraction * n)`` units of one seeded shuffle, in their original order.

    Nested: a larger fraction holds every unit of a smaller one.

    >>> units = SequenceSet.from_list([[i] for i in range(8)], vocab_size=8)
    >>> small, large = training_subset(units, 0.25, 0), training_subset(units, 0.5, 0)
    >>> set(small.tokens.tolist()) <= set(large.tokens.tolist()), len(small), len(large)
    (True, 2, 4)
    """
    n = len(train)
    take = min(n, max(1, math.ceil(fraction * n - 1e-9)))
    shuffled = np.random.default_rng([seed, 0x5C2EE4]).permutation(n)
    return train.subset(np.sort(shuffled[:take]))


def proxy_bits(
    proxy: ModelConfig,
    order: OrderConfig,
    train: SequenceSet,
    valid: SequenceSet,
    *,
    seed: int,
    cache_dir: Path | None = None,
) -> float:
    """Bits per validation token of ``proxy`` fitted on ``train`` in ``order`` (cached)."""
    from .. import families, orders

    key = {
        "cache_version": SCREEN_CACHE_VERSION,
        "package_version": __version__,
        "proxy": to_dict(proxy),
        "order": {"name": order.name, "params": to_dict(order.params)},
        "train_sha256": _units_digest(train),
        "valid_sha256": _units_digest(valid),
        "seed": seed,
    }
    digest = hashlib.sha256(json.dumps(key, sort_keys=True, default=str).encode()).hexdigest()
    path = None if cache_dir is None else cache_dir / f"{digest}.json"
    if path is not None and path.is_file():
        try:
            found = json.loads(path.read_text(encoding="utf-8"))
            return float(found["bits_per_token"])
        except (ValueError, KeyError, TypeError):
            pass  # unreadable: computed again and replaced
    transform = orders.make(order.name, **order.params)
    for units in (train, valid):
        orders.verify_bijection(transform, units, order_name=order.name)
    try:
        model = families.make(proxy.family, **proxy.params)
        logprobs = model.fit_logprobs(
            transform.apply_set(train), None, transform.apply_set(valid), seed=seed
        )
    except RetrogradeError:
        raise
    except Exception as exc:  # a family's own bug: one line naming the fit, cause chained
        raise FitError(
            f"rank.proxy: screening fit of {proxy.family!r} in order {order.name} "
            f"{order.params} on {len(train)} training units failed "
            f"({type(exc).__name__}: {exc}); rerun with --debug for the traceback"
        ) from exc
    nats = -float(np.asarray(logprobs.values, dtype=np.float64).sum())
    bits = nats / math.log(2) / max(int(len(valid.tokens)), 1)
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        ignore = path.parent / ".gitignore"
        if not ignore.is_file():
            atomic_write_text(ignore, "# retrograde rank's screening cache\n*\n")
        atomic_write_json(path, {"key": key, "bits_per_token": bits})
    return bits


def screen(
    candidates: Mapping[str, OrderConfig],
    reference: tuple[str, OrderConfig],
    proxy: ModelConfig,
    splits: Mapping[str, SequenceSet],
    *,
    top_k: int,
    eta: int,
    min_fraction: float,
    seed: int,
    cache_dir: Path | None = None,
) -> list[ScreenRound]:
    """Successive halving over ``candidates``; the last round's ``kept`` is the top ``k``.

    The reference order is scored in every round beside the survivors (for the report;
    it is never eliminated, and never counts toward ``k``). Ties keep the space's order.
    """
    train, valid = splits["train"], splits["valid"]
    survivors = list(candidates)
    fraction = float(min_fraction)
    rounds: list[ScreenRound] = []
    while True:
        subset = training_subset(train, fraction, seed)
        scores = {
            name: proxy_bits(proxy, entry, subset, valid, seed=seed, cache_dir=cache_dir)
            for name, entry in [reference, *((n, candidates[n]) for n in survivors)]
        }
        ranked = sorted(survivors, key=lambda name: scores[name])  # stable: ties keep order
        last = fraction >= 1.0 or len(survivors) <= top_k
        keep = top_k if last else max(top_k, math.ceil(len(survivors) / eta))
        survivors = ranked[:keep]
        rounds.append(ScreenRound(min(fraction, 1.0), len(subset), scores, survivors))
        if len(survivors) <= top_k:  # the cut reached k (always so in the last round)
            return rounds
        fraction = min(1.0, fraction * eta)
