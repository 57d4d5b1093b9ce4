"""``markov``: a random stationary Markov chain of order ``k`` over ``V`` symbols.

The chain's state is the last ``k`` symbols, encoded base ``V`` with the oldest symbol most
significant: ``state = sum_j x[t-k+j] * V**(k-1-j)``, so there are ``V**k`` states. Every
row of the ``(V**k, V)`` transition table is drawn from a symmetric Dirichlet with
concentration ``alpha``; all entries are then positive, so the chain is irreducible and
aperiodic and has one stationary distribution, computed exactly by a linear solve on the
lifted ``V**k``-state chain. A unit of ``length`` symbols starts with its first ``k``
symbols drawn from that stationary distribution, so every position is stationary.

The truth is symmetric: the time-reversed process is again a stationary Markov chain of
order ``k`` with the same entropy rate (:func:`time_reversed` builds it), so a model that
learns the forward chain can in principle learn the reversed one equally well.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..errors import ConfigError
from ..validation import check_float, check_int
from ._base import CalibrationSource

__all__ = [
    "MarkovSource",
    "entropy_rate",
    "lift",
    "sequence_nll",
    "stationary_distribution",
    "time_reversed",
]

#: the lifted chain is solved densely: (V**k)**2 float64 entries
MAX_STATES = 1024


def lift(transition: np.ndarray) -> np.ndarray:
    """(S, S) transition matrix of the lifted chain whose states are the last ``k`` symbols.

    ``transition`` is (S, V) with ``S = V**k``; state ``s`` followed by symbol ``v`` moves
    to state ``(s * V + v) mod S`` (the oldest symbol drops out).
    """
    n_states, vocab_size = transition.shape
    lifted = np.zeros((n_states, n_states))
    successors = (np.arange(n_states)[:, None] * vocab_size + np.arange(vocab_size)) % n_states
    np.add.at(lifted, (np.arange(n_states)[:, None], successors), transition)
    return lifted


def stationary_distribution(transition: np.ndarray) -> np.ndarray:
    """(S,) stationary distribution ``mu = mu P`` of the order-k chain ``transition`` (S, V).

    Solves ``(P_lifted^T - I) mu = 0`` with ``sum(mu) = 1`` replacing one equation; exact up
    to floating point for an irreducible chain.

    Examples
    --------
    >>> stationary_distribution(np.array([[0.8, 0.2], [0.3, 0.7]])).round(6).tolist()
    [0.6, 0.4]
    """
    lifted = lift(transition)
    n_states = len(lifted)
    system = lifted.T - np.eye(n_states)
    system[-1] = 1.0
    rhs = np.zeros(n_states)
    rhs[-1] = 1.0
    stationary = np.linalg.solve(system, rhs)
    return np.clip(stationary, 0.0, None) / np.clip(stationary, 0.0, None).sum()


def entropy_rate(transition: np.ndarray, stationary: np.ndarray) -> float:
    """Entropy rate in nats per symbol: ``-sum_s mu_s sum_v P_sv ln P_sv``.

    Cover & Thomas, *Elements of Information Theory* (2nd ed.), Theorem 4.2.4, applied to
    the lifted chain (its next symbol is a function of its next state).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        plogp = np.where(transition > 0, transition * np.log(transition), 0.0)
    return float(-(stationary @ plogp.sum(axis=1)))


def time_reversed(transition: np.ndarray, stationary: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The order-k chain of the same process read backwards: ``(transition, stationary)``.

    For ``k = 1`` this is ``P~_ij = mu_j P_ji / mu_i``. In general, for a block
    ``a_0 .. a_k`` with joint probability ``J = mu(a_0..a_{k-1}) P(a_k | a_0..a_{k-1})``,
    the reversed chain in state ``(a_k, .., a_1)`` (oldest first) emits ``a_0`` with
    probability ``J / mu(a_1..a_k)``; its stationary law is ``mu`` read backwards.
    """
    n_states, vocab_size = transition.shape
    order = round(math.log(n_states, vocab_size)) if n_states > 1 else 0
    digits = _digits(np.arange(n_states * vocab_size), vocab_size, order + 1)  # (S*V, k+1)
    block = digits[:, :-1] @ vocab_size ** np.arange(order - 1, -1, -1)  # a_0..a_{k-1}
    later = digits[:, 1:] @ vocab_size ** np.arange(order - 1, -1, -1)  # a_1..a_k
    reversed_state = digits[:, :0:-1] @ vocab_size ** np.arange(order - 1, -1, -1)  # a_k..a_1
    joint = stationary[block] * transition[block, digits[:, -1]]
    reversed_transition = np.zeros_like(transition)
    reversed_transition[reversed_state, digits[:, 0]] = joint / stationary[later]
    first_states = _digits(np.arange(n_states), vocab_size, order)
    reversed_stationary = stationary[
        first_states[:, ::-1] @ vocab_size ** np.arange(order - 1, -1, -1)
    ]
    return reversed_transition, reversed_stationary


def sequence_nll(units: np.ndarray, transition: np.ndarray, stationary: np.ndarray) -> np.ndarray:
    """(n_units,) nats of each row of ``units`` (n_units, length) under the chain.

    ``-ln mu(first k symbols) - sum_t ln P(x_t | previous k symbols)``; ``length >= k``.
    """
    n_states, vocab_size = transition.shape
    order = round(math.log(n_states, vocab_size)) if n_states > 1 else 0
    weights = vocab_size ** np.arange(order - 1, -1, -1)  # (k,) oldest symbol most significant
    first_state = units[:, :order] @ weights
    nats = -np.log(stationary[first_state])
    if units.shape[1] > order:
        # (n_units, length - k, k) sliding windows of the k symbols before each position
        windows = np.lib.stride_tricks.sliding_window_view(units[:, :-1], order, axis=1)
        states = windows @ weights
        nats = nats - np.log(transition[states, units[:, order:]]).sum(axis=1)
    return nats


def _digits(numbers: np.ndarray, base: int, width: int) -> np.ndarray:
    """(len(numbers), width) base-``base`` digits, most significant first."""
    powers = base ** np.arange(width - 1, -1, -1)
    return (numbers[:, None] // powers) % base


class MarkovSource(CalibrationSource):
    """A random stationary Markov chain of order ``order`` over ``vocab_size`` symbols.

    Parameters
    ----------
    vocab_size : int, 2 <= V <= 1024
        Number of symbols (token ids ``0 .. V-1``).
    order : int, 1 <= k <= 8, with ``V**k <= 1024``
        How many previous symbols the next one depends on.
    concentration : float, 0.05 <= alpha <= 1000
        Dirichlet concentration of each transition row: small values give nearly
        deterministic rows (low entropy), large ones nearly uniform rows.
    length : int, k <= length <= 100000
        Symbols per unit.
    chain_seed : int >= 0
        Fixes the transition table (independent of the unit seed, so every split and run
        share one chain).
    """

    name = "markov"

    def __init__(
        self,
        *,
        vocab_size: int = 4,
        order: int = 1,
        concentration: float = 1.0,
        length: int = 64,
        chain_seed: int = 0,
    ) -> None:
        self.vocab_size = vocab_size
        self.order = order
        self.concentration = concentration
        self.length = length
        self.chain_seed = chain_seed
        self._validate_params()
        rng = np.random.default_rng([self.chain_seed, 0x6D61726B])
        alpha = np.full(self.vocab_size, float(self.concentration))
        #: (V**k, V) row s: distribution of the next symbol after state s
        self.transition_ = rng.dirichlet(alpha, size=self.vocab_size**self.order)
        if not np.all(self.transition_ > 0):
            raise ConfigError(
                f"{self._owner}: concentration={self.concentration} gave a zero transition "
                "probability (the chain may not be irreducible); raise concentration"
            )
        #: (V**k,) stationary law of the state (the last k symbols)
        self.stationary_ = stationary_distribution(self.transition_)

    def _validate_params(self) -> None:
        check_int(self._owner, "vocab_size", self.vocab_size, 2, MAX_STATES)
        check_int(self._owner, "order", self.order, 1, 8)
        if self.vocab_size**self.order > MAX_STATES:
            raise ConfigError(
                f"{self._owner}: vocab_size**order = {self.vocab_size}**{self.order} = "
                f"{self.vocab_size**self.order} states is too many; allowed: at most "
                f"{MAX_STATES} (lower vocab_size or order)"
            )
        check_float(self._owner, "concentration", self.concentration, 0.05, 1000.0)
        check_int(self._owner, "length", self.length, self.order, 100_000)
        check_int(self._owner, "chain_seed", self.chain_seed, 0)

    @property
    def unit_length(self) -> int:
        return int(self.length)

    def entropy_rate(self) -> float:
        """Nats per symbol of the chain (its forward and reversed versions alike)."""
        return entropy_rate(self.transition_, self.stationary_)

    def expected_nll(self) -> float:
        """Mean floor in nats per unit: ``H(first k symbols) + (length - k) * entropy_rate``."""
        positive = self.stationary_[self.stationary_ > 0]
        start_entropy = float(-(positive * np.log(positive)).sum())
        return start_entropy + (self.length - self.order) * self.entropy_rate()

    def generate(self, n_units: int, seed: int) -> SequenceSet:
        self._check_n_units(n_units, seed)
        rng = np.random.default_rng([seed, 0x756E6974])
        uniforms = rng.random((n_units, self.length))  # one draw per symbol
        units = np.zeros((n_units, self.length), dtype=np.int64)
        first = np.searchsorted(np.cumsum(self.stationary_), uniforms[:, 0], side="right")
        first = np.minimum(first, len(self.stationary_) - 1)
        units[:, : self.order] = _digits(first, self.vocab_size, self.order)
        cumulative = np.cumsum(self.transition_, axis=1)  # (V**k, V)
        weights = self.vocab_size ** np.arange(self.order - 1, -1, -1)
        state = first
        for t in range(self.order, self.length):  # loop over positions, vectorized over units
            symbol = (cumulative[state] <= uniforms[:, t, None]).sum(axis=1)
            units[:, t] = np.minimum(symbol, self.vocab_size - 1)
            state = units[:, t - self.order + 1 : t + 1] @ weights
        return SequenceSet(
            units.reshape(-1).astype(np.int32),
            np.arange(n_units + 1, dtype=np.int64) * self.length,
            vocab_size=self.vocab_size,
            doc_ids=np.arange(n_units, dtype=np.int64),
        )

    def nll(self, units: SequenceSet) -> np.ndarray:
        return sequence_nll(self._as_matrix(units), self.transition_, self.stationary_)

    def spans(self, length: int) -> dict[str, tuple[int, int]]:
        """``first_half`` and ``second_half`` of the unit (the first takes the odd symbol)."""
        self._check_length(length)
        middle = (self.length + 1) // 2
        return {"first_half": (0, middle), "second_half": (middle, self.length)}

    def metadata(self) -> dict[str, Any]:
        rate = self.entropy_rate()
        return {
            "source": self.name,
            "params": self.get_params(),
            "vocab_size": self.vocab_size,
            "unit_length": self.length,
            "entropy_rate_nats": rate,
            "entropy_rate_bits": rate / math.log(2),
            "expected_floor_nats_per_unit": self.expected_nll(),
            "expected_floor_bits_per_token": self.expected_nll() / self.length / math.log(2),
            "end_marker": "included; costs 0 nats because every unit has the same length",
        }
