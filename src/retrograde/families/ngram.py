"""The ``ngram`` family: interpolated modified Kneser–Ney (Chen & Goodman 1998).

Each unit is padded on the left with ``order - 1`` begin markers (context only, never
predicted) and ends with the end marker (predicted, never context), so the model's
probabilities over (unit, length) sum to one. The lowest level interpolates with a uniform
distribution over the ``vocab_size + 1`` outcomes, so no outcome ever has probability 0.
Counting and scoring are vectorized (see :mod:`retrograde.families._ngram_counts`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from ..data import Ragged, SequenceSet
from ..errors import DataError
from ..validation import check_float, check_int
from ._base import Family
from ._events import unit_event_blocks, unit_events
from ._ngram_counts import KneserNeyTables, count_tables, interpolated_probs
from ._progress import progress_bar

__all__ = ["NGram"]

#: tokens scored per batch in ``logprobs``: about 100 bytes of working memory per event;
#: measured faster than 2**20 and 2**22 (the batch's arrays stay in cache) and than 2**17
#: at order 8 (per-batch costs), benchmarks/README.md
_SCORE_TOKENS = 1 << 19


class NGram(Family):
    """Interpolated modified Kneser–Ney n-gram model.

    Parameters
    ----------
    order : int, default 5
        n-gram order ``N`` in 1..10 (the model sees the previous ``N - 1`` tokens).
    discount : float or None, default None
        ``None`` estimates three discounts per level from counts-of-counts (Chen & Goodman
        1998, eq. 26, with the fallback documented in
        :func:`~retrograde.families._ngram_counts.modified_kn_discounts`); a number in
        ``(0, 1]`` uses that one discount everywhere (plain interpolated Kneser–Ney).

    Examples
    --------
    >>> from retrograde import SequenceSet
    >>> train = SequenceSet.from_list([[0, 1, 2], [0, 1, 1, 2]] * 20, vocab_size=3)
    >>> model = NGram(order=2).fit(train)
    >>> model.next_token_probs([np.array([0])]).sum().round(12)
    np.float64(1.0)
    """

    name: ClassVar[str] = "ngram"
    #: 2: context ids and keys in int64 on every look-up path (vocabularies above ~46 k)
    numerics_version: ClassVar[int] = 2
    #: counting is exact: the seed only chooses the training sample (retrograde.data.resample_train)
    has_own_randomness: ClassVar[bool] = False
    #: n_parameters() counts the n-gram types each order's data holds
    parameters_follow_data: ClassVar[bool] = True
    #: small, fast parameters for the conformance test and the docs
    example_params: ClassVar[dict[str, Any]] = {"order": 3}

    order: int
    discount: float | None
    tables_: KneserNeyTables

    def __init__(self, *, order: int = 5, discount: float | None = None) -> None:
        super().__init__(order=order, discount=discount)

    def _validate_params(self) -> None:
        owner = f"family {self.name!r}"
        check_int(owner, "order", self.order, 1, 10)
        if self.discount is not None:
            check_float(owner, "discount", self.discount, 0.0, 1.0, low_open=True)

    # ------------------------------------------------------------------- learning
    def fit(self, train: SequenceSet, valid: SequenceSet | None = None, seed: int = 0) -> NGram:
        """Count ``train`` and estimate discounts; ``seed`` is unused (counting is exact)."""
        self._validate_params()
        if len(train.tokens) == 0 and len(train) == 0:
            raise DataError(f"family {self.name!r}: the training split has no units")
        self.vocab_size_ = train.effective_vocab_size()
        train = _with_vocab(train, self.vocab_size_)
        # Events read a block at a time from the tokens: no per-event array but the keys.
        symbol_at_lag, n_events = unit_event_blocks(train)
        # One step per pass over the events (a bar on a terminal, lines in a fit.log).
        with progress_bar(total=self.order, desc="ngram fit", unit="pass") as bar:
            self.tables_ = count_tables(
                symbol_at_lag,
                n_events,
                order=self.order,
                n_symbols=self.vocab_size_ + 1,
                fixed_discount=self.discount,
                on_level=bar.update,
            )
        self.learning_curve_ = []
        if valid is not None and len(valid):
            # Not iterative: one point, so reports can still show validation loss.
            nats = -float(self.logprobs(valid).values.sum())
            bits = nats / math.log(2) / max(len(valid.tokens), 1)
            self.learning_curve_ = [{"epoch": 1, "valid_bits_per_token": bits}]
        return self

    def n_parameters(self) -> int | None:
        """Stored n-gram types (each with its count) over all levels, plus the discounts."""
        self._check_fitted()
        tables = self.tables_
        return int(sum(len(c) for c in tables.type_counts[1:]) + tables.discounts.size)

    # -------------------------------------------------------------------- scoring
    def logprobs(self, units: SequenceSet) -> Ragged:
        """Row ``i``: ``len(units[i]) + 1`` natural-log probabilities, end marker last."""
        self._check_fitted()
        self._check_units(units)
        event_offsets = units.offsets + np.arange(len(units) + 1)
        values = np.empty(int(event_offsets[-1]), dtype=np.float64)
        # Whole units in batches of about _SCORE_TOKENS tokens bound the working memory
        # (about 100 bytes per event) whatever the size of the test split.
        cuts = np.unique(
            np.searchsorted(units.offsets, np.arange(0, len(units.tokens), _SCORE_TOKENS))
        )
        bounds = [0, *[int(c) for c in cuts if 0 < c < len(units)], len(units)]
        for first, last in zip(bounds[:-1], bounds[1:], strict=True):
            batch = _unit_range(units, first, last, self.vocab_size_)
            symbol_at_lag, outcomes, _ = unit_events(batch)
            start = event_offsets[first]
            values[start : event_offsets[last]] = np.log(
                interpolated_probs(self.tables_, symbol_at_lag, outcomes)
            )
        return Ragged(values, event_offsets)

    def next_token_probs(self, contexts: Sequence[np.ndarray]) -> np.ndarray:
        """(n_contexts, vocab_size + 1) full distribution after each context (from unit start)."""
        self._check_fitted()
        n_outcomes = self.vocab_size_ + 1
        begin = self.vocab_size_
        history = self.order - 1
        # (n_contexts, history) last symbols, most recent first; begin marker before the start.
        lagged = np.full((len(contexts), max(history, 1)), begin, dtype=np.int64)
        for row, context in enumerate(contexts):
            recent = np.asarray(context, dtype=np.int64)[::-1][:history]
            lagged[row, : len(recent)] = recent
        # Score every (context, outcome) pair at once: n_contexts * n_outcomes events.
        repeated = np.repeat(lagged, n_outcomes, axis=0)
        outcomes = np.tile(np.arange(n_outcomes, dtype=np.int64), len(contexts))
        probs = interpolated_probs(self.tables_, lambda lag: repeated[:, lag - 1], outcomes)
        return probs.reshape(len(contexts), n_outcomes)

    # ---------------------------------------------------------------- persistence
    def _get_state(self) -> dict[str, np.ndarray]:
        tables: KneserNeyTables = self.tables_
        state = {"discounts": tables.discounts}
        for j in range(1, self.order):
            state[f"context_keys_{j}"] = tables.context_keys[j]
        for k in range(1, self.order + 1):
            state[f"type_keys_{k}"] = tables.type_keys[k]
            # int64 on disk whatever the dtype in memory (int32 when the counts fit)
            state[f"type_counts_{k}"] = tables.type_counts[k].astype(np.int64)
        return state

    def _set_state(self, state: dict[str, np.ndarray]) -> None:
        empty = np.zeros(0, dtype=np.int64)
        self.tables_ = KneserNeyTables(
            order=self.order,
            n_symbols=self.vocab_size_ + 1,
            context_keys=[empty] + [state[f"context_keys_{j}"] for j in range(1, self.order)],
            type_keys=[empty] + [state[f"type_keys_{k}"] for k in range(1, self.order + 1)],
            type_counts=[empty] + [state[f"type_counts_{k}"] for k in range(1, self.order + 1)],
            discounts=state["discounts"],
        )


def _unit_range(units: SequenceSet, first: int, last: int, vocab_size: int) -> SequenceSet:
    """Units ``first:last`` as a view (no copy), with the model's vocabulary size."""
    offsets = units.offsets[first : last + 1]
    tokens = units.tokens[offsets[0] : offsets[-1]]
    return SequenceSet(tokens, offsets - offsets[0], vocab_size=vocab_size)


def _with_vocab(units: SequenceSet, vocab_size: int) -> SequenceSet:
    """The same units with ``vocab_size`` set (it fixes the begin and end marker ids)."""
    if units.vocab_size == vocab_size:
        return units
    return SequenceSet(units.tokens, units.offsets, vocab_size=vocab_size)
