"""The ``mlp`` family: a fixed-window neural language model on scikit-learn.

Each event (every token of a unit, then the end marker) is predicted from the previous
``window`` symbols, padded with the begin marker before the unit starts. The symbols are
one-hot encoded into a sparse ``(n_events, window * (vocab_size + 1))`` matrix and fed to
``sklearn.neural_network.MLPClassifier`` (ReLU hidden layers, softmax over the
``vocab_size + 1`` outcomes). Training runs :meth:`~MLPClassifier.partial_fit` epochs and
stops early on the validation NLL, keeping the best epoch's weights.

Scoring uses the same forward pass in numpy (checked against ``predict_proba`` in the
tests), so a saved model is only arrays. **Floor**: every outcome's probability is raised
to at least :data:`PROBABILITY_FLOOR` and the row renormalized, so outcomes never seen in
training (whose softmax can underflow to 0) keep a finite log-probability.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np
from threadpoolctl import threadpool_limits

from ..data import Ragged, SequenceSet, index_dtype
from ..errors import DataError
from ..validation import check_float, check_int, invalid
from ._base import Family
from ._events import unit_events
from ._progress import progress_bar

if TYPE_CHECKING:  # scikit-learn takes ~1.5 s to import, scipy ~0.2 s: fit and scoring only
    import scipy.sparse
    from sklearn.neural_network import MLPClassifier

__all__ = ["MLP", "PROBABILITY_FLOOR"]

#: smallest probability any outcome gets before renormalizing (a common guard against
#: log(0); common practice, no source)
PROBABILITY_FLOOR = 1e-10

#: events per partial_fit call / forward chunk: bounds memory, paces the progress bar
_CHUNK_EVENTS = 1 << 15


class MLP(Family):
    """Fixed-window MLP language model (one-hot window -> ReLU layers -> softmax).

    Parameters
    ----------
    window : int, default 8
        Previous symbols the model sees (1..127).
    hidden : int, default 64
        Units per hidden layer.
    layers : int, default 1
        Number of hidden layers.
    epochs : int, default 20
        Maximum passes over the training events.
    lr : float, default 1e-3
        Adam learning rate (``learning_rate_init``).
    batch_size : int, default 256
        Events per gradient step.
    alpha : float, default 1e-4
        L2 penalty.
    patience : int, default 3
        Stop after this many epochs without a better validation NLL.
    progress : bool, default True
        Show a progress bar (only on a terminal).

    Without ``valid`` the model trains all epochs and the learning curve records only the
    training loss (``train_loss``, nats per event, L2 penalty included).

    Memory: the sparse design matrix holds ``window`` entries of 12 bytes per event (about
    100 bytes per training token at ``window=8``), so this family suits corpora up to a few
    million tokens; the ``ngram`` and torch families scale further.
    """

    name: ClassVar[str] = "mlp"
    #: 2: the fit stage gives each order its own stream (``own_stream_per_order``)
    numerics_version: ClassVar[int] = 2
    #: initial weights and batch order come from ``seed`` alone
    own_stream_per_order: ClassVar[bool] = True
    warm_imports: ClassVar[tuple[str, ...]] = ("scipy.sparse", "sklearn.neural_network")
    example_params: ClassVar[dict[str, Any]] = {"window": 2, "hidden": 8, "epochs": 2}

    window: int
    hidden: int
    layers: int
    epochs: int
    lr: float
    batch_size: int
    alpha: float
    patience: int
    progress: bool
    coefs_: list[np.ndarray]
    intercepts_: list[np.ndarray]

    def __init__(
        self,
        *,
        window: int = 8,
        hidden: int = 64,
        layers: int = 1,
        epochs: int = 20,
        lr: float = 1e-3,
        batch_size: int = 256,
        alpha: float = 1e-4,
        patience: int = 3,
        progress: bool = True,
    ) -> None:
        super().__init__(
            window=window,
            hidden=hidden,
            layers=layers,
            epochs=epochs,
            lr=lr,
            batch_size=batch_size,
            alpha=alpha,
            patience=patience,
            progress=progress,
        )

    def _validate_params(self) -> None:
        owner = f"family {self.name!r}"
        check_int(owner, "window", self.window, 1, 127)
        check_int(owner, "hidden", self.hidden, 1)
        check_int(owner, "layers", self.layers, 1, 16)
        check_int(owner, "epochs", self.epochs, 1)
        check_float(owner, "lr", self.lr, 0.0, 1.0, low_open=True)
        check_int(owner, "batch_size", self.batch_size, 1)
        check_float(owner, "alpha", self.alpha, 0.0)
        check_int(owner, "patience", self.patience, 1)
        if not isinstance(self.progress, bool):
            raise invalid(owner, "progress", self.progress, "true or false")

    # ------------------------------------------------------------------ features
    def _features(self, units: SequenceSet) -> tuple[scipy.sparse.csr_matrix, np.ndarray, Any]:
        """Sparse one-hot windows ``(n_events, window * (V + 1))``, outcomes, event offsets."""
        units = SequenceSet(units.tokens, units.offsets, vocab_size=self.vocab_size_)
        symbol_at_lag, outcomes, event_offsets = unit_events(units)
        n_symbols = self.vocab_size_ + 1
        # (n_events, window): column j holds the feature index of the symbol j + 1 back.
        n_features = self.window * n_symbols
        columns = np.empty((len(outcomes), self.window), dtype=index_dtype(n_features))
        for lag in range(1, self.window + 1):
            # In the columns' dtype: an int32 symbol plus (lag - 1) * n_symbols may pass 2**31.
            symbols = symbol_at_lag(lag).astype(columns.dtype, copy=False)
            columns[:, lag - 1] = symbols + (lag - 1) * n_symbols
        return _one_hot(columns, n_features), outcomes, event_offsets

    # ------------------------------------------------------------------ learning
    def fit(self, train: SequenceSet, valid: SequenceSet | None = None, seed: int = 0) -> MLP:
        """Train with Adam ``partial_fit`` epochs; early stopping on ``valid``'s NLL."""
        # One BLAS thread: per-batch matrices are tiny, so threads only add synchronization,
        # which costs 10x when fit stages already share the cores (measured on 2 cores).
        with threadpool_limits(limits=1, user_api="blas"):
            return self._fit(train, valid, seed)

    def _fit(self, train: SequenceSet, valid: SequenceSet | None, seed: int) -> MLP:
        self._validate_params()
        if len(train) == 0:
            raise DataError(f"family {self.name!r}: the training split has no units")
        self.vocab_size_ = train.effective_vocab_size()
        features, outcomes, _ = self._features(train)
        valid_data = None
        if valid is not None and len(valid):
            self._check_units(valid)
            valid_features, valid_outcomes, _ = self._features(valid)
            valid_data = (valid_features, valid_outcomes, len(valid.tokens))
        from sklearn.neural_network import MLPClassifier

        classifier = MLPClassifier(
            hidden_layer_sizes=(self.hidden,) * self.layers,
            learning_rate_init=self.lr,
            batch_size=self.batch_size,
            alpha=self.alpha,
            random_state=seed,
            shuffle=True,
        )
        classes = np.arange(self.vocab_size_ + 1)
        rng = np.random.default_rng(seed)
        best_bits, since_best = math.inf, 0
        self.learning_curve_ = []
        self.steps_ = 0  # minibatch updates, for the report's budget
        bar = progress_bar(
            total=self.epochs * len(outcomes),
            unit="event",
            desc=f"mlp fit (seed {seed})",
            enabled=bool(self.progress),
        )
        with bar:
            for epoch in range(1, self.epochs + 1):
                order = rng.permutation(len(outcomes))
                train_loss = self._epoch(classifier, features, outcomes, order, classes, bar)
                record: dict[str, float] = {"epoch": epoch, "train_loss": train_loss}
                if valid_data is None:
                    self.coefs_ = [w.copy() for w in classifier.coefs_]
                    self.intercepts_ = [b.copy() for b in classifier.intercepts_]
                    self.learning_curve_.append(record)
                    continue
                nats = -self._observed_logprobs(
                    valid_data[0], valid_data[1], classifier.coefs_, classifier.intercepts_
                ).sum()
                record["valid_bits_per_token"] = float(nats / math.log(2) / max(valid_data[2], 1))
                self.learning_curve_.append(record)
                if record["valid_bits_per_token"] < best_bits:
                    best_bits, since_best = record["valid_bits_per_token"], 0
                    self.coefs_ = [w.copy() for w in classifier.coefs_]
                    self.intercepts_ = [b.copy() for b in classifier.intercepts_]
                else:
                    since_best += 1
                    if since_best >= self.patience:
                        break
        return self

    def _epoch(
        self,
        classifier: MLPClassifier,
        features: scipy.sparse.csr_matrix,
        outcomes: np.ndarray,
        order: np.ndarray,
        classes: np.ndarray,
        bar: Any,
    ) -> float:
        """One pass over the events in ``order``; returns the mean training loss (nats)."""
        total = 0.0
        for start in range(0, len(order), _CHUNK_EVENTS):
            chunk = order[start : start + _CHUNK_EVENTS]
            # sklearn warns (and clips) when a call has fewer events than a batch.
            classifier.batch_size = min(self.batch_size, len(chunk))
            classifier.partial_fit(features[chunk], outcomes[chunk], classes=classes)
            self.steps_ += math.ceil(len(chunk) / classifier.batch_size)
            total += classifier.loss_ * len(chunk)
            bar.update(len(chunk))
        return float(total / len(order))

    def n_parameters(self) -> int | None:
        self._check_fitted()
        return int(sum(w.size for w in self.coefs_) + sum(b.size for b in self.intercepts_))

    # ------------------------------------------------------------------- scoring
    def _probs(
        self,
        features: scipy.sparse.csr_matrix,
        coefs: Sequence[np.ndarray] | None = None,
        intercepts: Sequence[np.ndarray] | None = None,
    ) -> Iterator[tuple[slice, np.ndarray]]:
        """Yield ``(rows, probs)`` chunks: ``probs`` is ``(n_rows, V + 1)``, floored, sums to 1."""
        coefs = self.coefs_ if coefs is None else coefs
        intercepts = self.intercepts_ if intercepts is None else intercepts
        # Bound each chunk's (rows, V + 1) float64 block to about 32 MB.
        step = max(1, min(_CHUNK_EVENTS, (1 << 22) // (self.vocab_size_ + 1)))
        for start in range(0, features.shape[0], step):
            rows = slice(start, start + step)
            probs = forward_probs(features[rows], coefs, intercepts)
            np.maximum(probs, PROBABILITY_FLOOR, out=probs)
            probs /= probs.sum(axis=1, keepdims=True)
            yield rows, probs

    def _observed_logprobs(
        self,
        features: scipy.sparse.csr_matrix,
        outcomes: np.ndarray,
        coefs: Sequence[np.ndarray] | None = None,
        intercepts: Sequence[np.ndarray] | None = None,
    ) -> np.ndarray:
        out = np.empty(len(outcomes), dtype=np.float64)
        for rows, probs in self._probs(features, coefs, intercepts):
            picked = outcomes[rows]
            out[rows] = np.log(probs[np.arange(len(picked)), picked])
        return out

    def logprobs(self, units: SequenceSet) -> Ragged:
        """Row ``i``: ``len(units[i]) + 1`` natural-log probabilities, end marker last."""
        self._check_fitted()
        self._check_units(units)
        features, outcomes, event_offsets = self._features(units)
        with threadpool_limits(limits=1, user_api="blas"):
            return Ragged(self._observed_logprobs(features, outcomes), event_offsets)

    def next_token_probs(self, contexts: Sequence[np.ndarray]) -> np.ndarray:
        """(n_contexts, vocab_size + 1) full distribution after each context (from unit start)."""
        self._check_fitted()
        n_symbols = self.vocab_size_ + 1
        # (n_contexts, window): the last `window` symbols, most recent first, begin-padded.
        lagged = np.full((len(contexts), self.window), self.vocab_size_, dtype=np.int64)
        for row, context in enumerate(contexts):
            recent = np.asarray(context, dtype=np.int64)[::-1][: self.window]
            lagged[row, : len(recent)] = recent
        columns = lagged + np.arange(self.window) * n_symbols
        features = _one_hot(columns, self.window * n_symbols)
        return np.concatenate([probs for _, probs in self._probs(features)], axis=0)

    # ---------------------------------------------------------------- persistence
    def _get_state(self) -> dict[str, np.ndarray]:
        state = {f"coef_{i}": w for i, w in enumerate(self.coefs_)}
        state.update({f"intercept_{i}": b for i, b in enumerate(self.intercepts_)})
        return state

    def _set_state(self, state: dict[str, np.ndarray]) -> None:
        n_layers = sum(key.startswith("coef_") for key in state)
        self.coefs_ = [state[f"coef_{i}"] for i in range(n_layers)]
        self.intercepts_ = [state[f"intercept_{i}"] for i in range(n_layers)]


def _one_hot(columns: np.ndarray, n_features: int) -> scipy.sparse.csr_matrix:
    """CSR matrix with a 1 at ``columns[e, j]`` for every row ``e`` (one per window slot)."""
    import scipy.sparse  # when a model fits or scores, not when the family is registered

    n_rows, per_row = columns.shape
    # int32 indices halve the index memory; scipy needs int64 past 2**31 entries.
    dtype = index_dtype(max(n_rows * per_row, n_features))
    indptr = np.arange(0, n_rows * per_row + 1, per_row, dtype=dtype)
    data = np.ones(n_rows * per_row, dtype=np.float64)
    indices = columns.ravel().astype(dtype, copy=False)
    return scipy.sparse.csr_matrix((data, indices, indptr), shape=(n_rows, n_features))


def forward_probs(
    features: Any, coefs: Sequence[np.ndarray], intercepts: Sequence[np.ndarray]
) -> np.ndarray:
    """``MLPClassifier``'s forward pass (ReLU hidden layers; softmax, or logistic for 2 classes).

    Returns ``(n_rows, n_classes)`` probabilities.
    """
    activation = features
    for weights, bias in zip(coefs[:-1], intercepts[:-1], strict=True):
        activation = np.maximum(activation @ weights + bias, 0.0)
    logits = np.asarray(activation @ coefs[-1] + intercepts[-1])
    if logits.shape[1] == 1:  # two classes: sklearn keeps one logistic output
        positive = 1.0 / (1.0 + np.exp(-logits[:, 0]))
        return np.column_stack([1.0 - positive, positive])
    logits -= logits.max(axis=1, keepdims=True)
    np.exp(logits, out=logits)
    logits /= logits.sum(axis=1, keepdims=True)
    return logits
