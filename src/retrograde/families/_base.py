"""The contract every model family follows.

A family is configured by keyword-only parameters stored unchanged in ``__init__`` and
checked in ``_validate_params`` (called first thing in ``fit``). ``fit`` learns state whose
attribute names end in ``_`` and returns ``self``. A fitted model scores units: for every
unit, one natural-log probability per token **plus one for the end-of-unit marker**, each
under a distribution over ``vocab_size + 1`` outcomes (every token id, unknown token
included, and the end marker, which is outcome ``vocab_size``). A unit is scored with no
context beyond its own earlier tokens.

Saving writes ``family.json`` (name, params, vocab size, learning curve) and ``state.npz``
(arrays only, loaded with ``allow_pickle=False``). Families with other weight formats
override ``_save_state`` / ``_load_state``.
"""

from __future__ import annotations

import json
import os
from abc import ABC, abstractmethod
from collections.abc import Sequence
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..data import Ragged, SequenceSet, atomic_dir, write_npz
from ..errors import DataError, FitError

__all__ = ["Family", "FAMILY_FORMAT"]

FAMILY_FORMAT = "retrograde.family/1"


class Family(ABC):
    """Base class of every model family (an estimator in scikit-learn's sense)."""

    #: registry name, set by each subclass
    name: ClassVar[str] = ""
    #: Version of this family's numbers: raise it whenever a change of code (not of
    #: parameters) changes what ``fit`` or ``logprobs`` return, or what seed the fit stage
    #: gives them. The composed params record
    #: it for every model, so a raise reruns exactly that family's cells.
    numerics_version: ClassVar[int] = 1
    #: Whether ``fit`` draws random numbers of its own from ``seed`` (initial weights, batch
    #: order). A family that does not (its fit is a function of the training units alone) has
    #: seed ``s`` train on a sample of the units it chooses instead, so its seeds vary like
    #: every other family's (``retrograde.data.resample_train``; ``train_sample`` in docs/config.md).
    #: With ``train_sample: none`` its fit ignores the seed, and the pipeline fits each
    #: (source, model, order) once (:func:`retrograde.config.ignores_seed`).
    has_own_randomness: ClassVar[bool] = True
    #: Whether all of the family's own randomness comes from ``seed``, so the fit stage may
    #: give each order a stream of its own (``retrograde.data.order_seed``): fits of two
    #: orders then share no random numbers, and unless the seed also chooses their training
    #: units the interval treats them as independent (:func:`retrograde.config.seeds_paired`).
    #: ``False`` (the default, and the ``command`` family's: an outside trainer gets the cell's
    #: seed as it is) keeps the cell's seed and pairs the seeds of every order.
    own_stream_per_order: ClassVar[bool] = False
    #: Modules the family imports to fit (beyond numpy): a run's stage server imports them
    #: once, before its first fit, instead of every fit stage paying for them
    #: (:mod:`retrograde.stages.server`).
    warm_imports: ClassVar[tuple[str, ...]] = ()
    #: Whether ``n_parameters()`` counts what the data put there (an n-gram's stored types)
    #: rather than a size the config chose: orders of one model then differ in it by
    #: nature, so the table does not flag that difference as an unequal budget.
    parameters_follow_data: ClassVar[bool] = False
    #: the parameter a context-length sweep varies (None: the family names none)
    context_parameter: ClassVar[str | None] = None
    #: what a sweep can hold equal across its values (``steps``, ``tokens``) -> the
    #: parameter of this family that fixes it; empty when it has no such budget
    budget_parameters: ClassVar[dict[str, str]] = {}

    def __init__(self, **params: Any) -> None:
        self._params = dict(params)
        for key, value in params.items():
            setattr(self, key, value)

    # ----------------------------------------------------------------- parameters
    def get_params(self) -> dict[str, Any]:
        """The keyword parameters this family was built with (JSON-able)."""
        return dict(self._params)

    def _validate_params(self) -> None:  # noqa: B027 (optional hook, not abstract)
        """Raise ConfigError naming the parameter, the value and what is allowed."""

    # ------------------------------------------------------------------- learning
    @abstractmethod
    def fit(self, train: SequenceSet, valid: SequenceSet | None = None, seed: int = 0) -> Family:
        """Learn from ``train`` (``valid`` for early stopping); deterministic for ``seed``."""

    @abstractmethod
    def logprobs(self, units: SequenceSet) -> Ragged:
        """Per-position natural-log probabilities: row i has ``len(units[i]) + 1`` values."""

    def fit_logprobs(
        self,
        train: SequenceSet,
        valid: SequenceSet | None,
        test: SequenceSet,
        seed: int = 0,
    ) -> Ragged:
        """``fit(train, valid, seed)``, then ``logprobs(test)``: what a pipeline cell needs.

        Override it when one training run can also score ``test`` (the ``command`` family
        without a ``score_command`` would otherwise train twice); the result and the
        fitted model must be those of ``fit`` followed by ``logprobs``.
        """
        self.fit(train, valid, seed=seed)
        return self.logprobs(test)

    @abstractmethod
    def next_token_probs(self, contexts: Sequence[np.ndarray]) -> np.ndarray:
        """(n_contexts, vocab_size + 1) full next-outcome distributions after each context."""

    def probe_logprobs(self, units: SequenceSet, positions: np.ndarray) -> np.ndarray:
        """(k, vocab_size + 1) natural-log distributions at ``positions`` of ``units``.

        ``positions`` are ``(unit, position)`` pairs (``retrograde.families._probe``). The
        fit stage checks that each row sums to 1 and agrees with :meth:`logprobs`.
        """
        from ._probe import probe_contexts

        with np.errstate(divide="ignore"):  # a zero probability is a log of -inf, allowed
            return np.log(self.next_token_probs(probe_contexts(units, positions)))

    #: validation curve; one dict per epoch: {"epoch": int, "valid_bits_per_token": float, ...}
    learning_curve_: list[dict[str, float]]

    @property
    def vocab_size(self) -> int:
        """Token ids the model covers (the end marker is the extra outcome ``vocab_size``)."""
        self._check_fitted()
        return int(self.vocab_size_)

    vocab_size_: int

    def n_parameters(self) -> int | None:
        """How many numbers the fitted model learned (weights, or stored counts), for the
        report's budget; ``None`` when the family cannot tell (an external trainer)."""
        return None

    def _check_fitted(self) -> None:
        if not hasattr(self, "vocab_size_"):
            raise FitError(f"family {self.name!r}: call fit() before scoring")

    def _check_units(self, units: SequenceSet) -> None:
        if len(units.tokens) and int(units.tokens.max()) >= self.vocab_size:
            raise DataError(
                f"family {self.name!r}: token id {int(units.tokens.max())} is outside the "
                f"fitted vocabulary of {self.vocab_size}; units and model must share one vocabulary"
            )

    # --------------------------------------------------------------- persistence
    def _get_state(self) -> dict[str, np.ndarray]:
        """Arrays that, with the params, reconstruct the fitted model."""
        raise NotImplementedError

    def _set_state(self, state: dict[str, np.ndarray]) -> None:
        raise NotImplementedError

    def _save_state(self, folder: Path) -> None:
        write_npz(folder / "state.npz", self._get_state())

    def _load_state(self, folder: Path) -> None:
        with np.load(folder / "state.npz", allow_pickle=False) as data:
            self._set_state({key: data[key] for key in data.files})

    def save(self, folder: str | os.PathLike[str]) -> None:
        """Write the fitted model to ``folder`` (atomically; no pickle)."""
        self._check_fitted()
        with atomic_dir(folder) as tmp:
            meta = {
                "format": FAMILY_FORMAT,
                "family": self.name,
                "params": self.get_params(),
                "vocab_size": int(self.vocab_size_),
                "learning_curve": getattr(self, "learning_curve_", []),
            }
            (tmp / "family.json").write_text(json.dumps(meta, indent=2, sort_keys=True) + "\n")
            self._save_state(tmp)

    @classmethod
    def _from_saved(cls, folder: Path, meta: dict[str, Any]) -> Family:
        model = cls(**meta["params"])
        model.vocab_size_ = int(meta["vocab_size"])
        model.learning_curve_ = list(meta.get("learning_curve", []))
        model._load_state(folder)
        return model
