"""The normalization probe: full next-outcome distributions at a few test positions.

Every number in a gap table assumes the model scored a *distribution*: at each position the
probabilities of all ``vocab_size + 1`` outcomes (every token id and the end marker) sum
to 1. A model that returns the log-probability of the observed token alone can break that
without any sign (a trainer writing ``-1e-9`` everywhere reports 0 bits per token). So at a
small sample of test positions the fit stage also asks for the whole distribution and
checks that it sums to 1 and that it gives the observed outcome the value the model
reported for it. Built-in families answer from :meth:`Family.next_token_probs`; a
``command`` trainer writes the distributions itself (``docs/trainers.md``).

Positions are ``(unit, position)`` pairs, ``position`` in ``0..len(unit)``; ``len(unit)``
is the end marker. The sample depends only on the units and the seed.
"""

from __future__ import annotations

import numpy as np

from ..data import SequenceSet
from ..errors import FitError

__all__ = [
    "PROBE_FILE",
    "PROBE_OUTPUT",
    "PROBE_TOLERANCE",
    "check_probe",
    "probe_contexts",
    "probe_positions",
    "probe_size",
]

#: where the positions to probe are written for a trainer: ``{test}/probe.npy``, int64 (k, 2)
PROBE_FILE = "probe.npy"
#: what a trainer writes for them: ``{out}/probe_logprobs.npy``, float64 (k, vocab_size + 1)
PROBE_OUTPUT = "probe_logprobs.npy"
#: largest |log sum of probabilities| and |disagreement| accepted, in nats
PROBE_TOLERANCE = 1e-6
#: at most this many positions, and about this many outcomes scored in all
_MAX_POSITIONS = 16
_OUTCOME_BUDGET = 4_000_000


def probe_size(vocab_size: int) -> int:
    """How many positions to probe: 16, fewer when the vocabulary is huge (at least 2).

    >>> probe_size(257), probe_size(1_000_000)
    (16, 3)
    """
    return max(2, min(_MAX_POSITIONS, _OUTCOME_BUDGET // (int(vocab_size) + 1)))


def probe_positions(units: SequenceSet, n_positions: int, seed: int) -> np.ndarray:
    """(k, 2) int64 ``(unit, position)`` pairs drawn without replacement, sorted.

    Every event (each token and each end marker) is equally likely; ``k`` is
    ``n_positions`` or the number of events if smaller.

    >>> units = SequenceSet.from_list([[5, 6], [7]], vocab_size=8)
    >>> probe_positions(units, 10, seed=0).tolist()
    [[0, 0], [0, 1], [0, 2], [1, 0], [1, 1]]
    """
    n_events = int(len(units.tokens) + len(units))
    chosen = np.random.default_rng([int(seed), 0x70B3]).choice(
        n_events, min(int(n_positions), n_events), replace=False
    )
    chosen.sort()
    event_offsets = units.offsets + np.arange(len(units) + 1)
    unit = np.searchsorted(event_offsets, chosen, side="right") - 1
    return np.column_stack([unit, chosen - event_offsets[unit]]).astype(np.int64)


def probe_contexts(units: SequenceSet, positions: np.ndarray) -> list[np.ndarray]:
    """The context before each probed position: the unit's tokens up to it."""
    return [units[int(u)][: int(p)] for u, p in positions]


def check_probe(
    owner: str,
    units: SequenceSet,
    values: np.ndarray,
    positions: np.ndarray,
    distributions: np.ndarray,
) -> None:
    """Refuse (one :class:`FitError` line) a probe that is not a normalized distribution.

    ``values`` is the model's flat per-position log-probabilities of ``units`` (``len + 1``
    per unit); ``distributions`` is ``(k, vocab_size + 1)`` natural logs at ``positions``.
    """
    vocab_size = int(units.effective_vocab_size())
    expected = (len(positions), vocab_size + 1)
    distributions = np.asarray(distributions)
    if distributions.shape != expected or distributions.dtype.kind not in "fi":
        raise FitError(
            f"{owner}: the probe distributions have shape {distributions.shape} and dtype "
            f"{distributions.dtype}; expected float64 {expected}: one row of vocab_size + 1 "
            "natural-log probabilities (every token id, then the end marker) per probed position"
        )
    distributions = distributions.astype(np.float64)
    if np.isnan(distributions).any() or (distributions > PROBE_TOLERANCE).any():
        row = int(np.argwhere(np.isnan(distributions) | (distributions > PROBE_TOLERANCE))[0][0])
        raise FitError(
            f"{owner}: the probe distribution at {_where(positions, row)} holds NaN or a "
            "log-probability above 0; every entry must be a natural log of a probability"
        )
    # log sum exp per row; a row of -inf only gives NaN, which the check below refuses.
    top = distributions.max(axis=1) if len(distributions) else np.zeros(0)
    with np.errstate(invalid="ignore"):
        totals = top + np.log(np.exp(distributions - top[:, None]).sum(axis=1))
    bad = np.flatnonzero(~(np.abs(totals) <= PROBE_TOLERANCE))
    if len(bad):
        row = int(bad[0])
        raise FitError(
            f"{owner}: the probabilities at {_where(positions, row)} sum to "
            f"{float(np.exp(totals[row])):.6g}, not 1 (log sum {float(totals[row]):+.3g} nats); "
            "every position must score a distribution over all vocab_size + 1 outcomes"
        )
    unit, position = positions[:, 0], positions[:, 1]
    flat = units.offsets[unit] + unit + position  # index in the len + 1 scores per unit
    is_token = position < units.lengths[unit]
    outcome = np.full(len(positions), vocab_size, dtype=np.int64)  # the end marker
    outcome[is_token] = units.tokens[units.offsets[unit[is_token]] + position[is_token]]
    reported = np.asarray(values, dtype=np.float64)[flat]
    in_distribution = distributions[np.arange(len(positions)), outcome]
    bad = np.flatnonzero(~(np.abs(in_distribution - reported) <= PROBE_TOLERANCE))
    if len(bad):
        row = int(bad[0])
        raise FitError(
            f"{owner}: at {_where(positions, row)} the reported log-probability "
            f"{float(reported[row]):.9g} disagrees with the probe distribution's "
            f"{float(in_distribution[row]):.9g} for the same outcome; both must come from one model"
        )


def _where(positions: np.ndarray, row: int) -> str:
    unit, position = (int(v) for v in positions[row])
    return f"test unit {unit} position {position}"
