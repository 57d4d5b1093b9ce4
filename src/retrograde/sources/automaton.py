"""``automaton``: successive rows of an elementary cellular automaton.

A unit is ``rows`` rows of ``width`` cells (0/1) laid end to end, row 0 first. Row 0 is
uniform random; row ``t+1`` applies the Wolfram rule to row ``t`` with a periodic boundary:
cell ``i`` becomes bit ``4 l + 2 c + r`` of the rule number, where ``l, c, r`` are cells
``i-1, i, i+1`` of the row before. Read forwards, each cell is a local function of cells
``width`` positions earlier; read backwards, a model must invert the rule, which in general
is a global problem. Floor: ``width ln 2`` nats per unit (only row 0 is random; the end
marker costs 0).

A rule is *left-permutive* when the new cell flips whenever ``l`` flips (for every ``c,
r``), so ``l`` can be solved from the new cell and ``c, r``: a right-to-left sweep inverts
it locally (rule 30 is left-permutive). *Right-permutive* is the mirror image. See
:func:`permutive` and ``docs/sources.md`` for the lists.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..validation import check_int
from ._base import CalibrationSource

__all__ = ["AutomatonSource", "evolve", "permutive", "step"]


def step(rows: np.ndarray, rule: int) -> np.ndarray:
    """One update of every row of ``rows`` (..., width), periodic boundary, uint8 out."""
    left = np.roll(rows, 1, axis=-1)  # cell i-1
    right = np.roll(rows, -1, axis=-1)  # cell i+1
    neighbourhood = 4 * left.astype(np.uint8) + 2 * rows.astype(np.uint8) + right
    return ((rule >> neighbourhood) & 1).astype(np.uint8)


def evolve(first_rows: np.ndarray, rule: int, n_rows: int) -> np.ndarray:
    """(n_units, n_rows, width) history from ``first_rows`` (n_units, width).

    Examples
    --------
    >>> evolve(np.array([[0, 0, 1, 0, 0]]), 90, 3)[0].tolist()
    [[0, 0, 1, 0, 0], [0, 1, 0, 1, 0], [1, 0, 0, 0, 1]]
    """
    first_rows = np.asarray(first_rows, dtype=np.uint8)
    history = np.empty((first_rows.shape[0], n_rows, first_rows.shape[1]), dtype=np.uint8)
    history[:, 0] = first_rows
    for t in range(1, n_rows):  # one vectorized update per row, not per cell
        history[:, t] = step(history[:, t - 1], rule)
    return history


def permutive(rule: int) -> tuple[bool, bool]:
    """``(left_permutive, right_permutive)`` of a Wolfram rule number.

    Examples
    --------
    >>> permutive(30), permutive(90), permutive(110)
    ((True, False), (True, True), (False, False))
    """
    table = (rule >> np.arange(8)) & 1  # table[4l + 2c + r]
    cells = np.arange(4)  # the other two cells, as 2c + r or 2l + c
    left = bool(np.all(table[cells] != table[4 + cells]))
    right = bool(np.all(table[2 * cells] != table[2 * cells + 1]))
    return left, right


class AutomatonSource(CalibrationSource):
    """Rows of an elementary cellular automaton; token ids are the cell values 0 and 1.

    Parameters
    ----------
    rule : int, 0 <= rule <= 255
        Wolfram rule number.
    width : int, 3 <= width <= 4096
        Cells per row (periodic boundary).
    rows : int, 2 <= rows <= 1024
        Rows per unit (row 0 random, the rest computed); a unit has ``rows * width`` tokens.
    """

    name = "automaton"

    def __init__(self, *, rule: int = 110, width: int = 16, rows: int = 4) -> None:
        self.rule = rule
        self.width = width
        self.rows = rows
        self._validate_params()
        self.vocab_size = 2

    def _validate_params(self) -> None:
        check_int(self._owner, "rule", self.rule, 0, 255)
        check_int(self._owner, "width", self.width, 3, 4096)
        check_int(self._owner, "rows", self.rows, 2, 1024)

    @property
    def unit_length(self) -> int:
        return int(self.rows) * int(self.width)

    def generate(self, n_units: int, seed: int) -> SequenceSet:
        self._check_n_units(n_units, seed)
        rng = np.random.default_rng([seed, 0x756E6974])
        first_rows = rng.integers(0, 2, size=(n_units, self.width), dtype=np.uint8)
        history = evolve(first_rows, self.rule, self.rows)  # (n_units, rows, width)
        return SequenceSet(
            history.reshape(-1).astype(np.int32),
            np.arange(n_units + 1, dtype=np.int64) * self.unit_length,
            vocab_size=2,
            doc_ids=np.arange(n_units, dtype=np.int64),
        )

    def nll(self, units: SequenceSet) -> np.ndarray:
        """``width ln 2`` per unit; refuses a unit whose rows do not follow the rule."""
        history = self._as_matrix(units).reshape(len(units), self.rows, self.width)
        follows = np.all(step(history[:, :-1], self.rule) == history[:, 1:], axis=(1, 2))
        wrong = np.flatnonzero(~follows)
        if len(wrong):
            raise self._impossible(int(wrong[0]), f"its rows do not follow rule {self.rule}")
        return np.full(len(units), self.width * math.log(2))

    def spans(self, length: int) -> dict[str, tuple[int, int]]:
        """``row0`` .. ``row{rows-1}``: the cells of each row."""
        self._check_length(length)
        return {f"row{t}": (t * self.width, (t + 1) * self.width) for t in range(self.rows)}

    def metadata(self) -> dict[str, Any]:
        left, right = permutive(self.rule)
        return {
            "source": self.name,
            "params": self.get_params(),
            "vocab_size": 2,
            "unit_length": self.unit_length,
            "left_permutive": left,
            "right_permutive": right,
            "floor_nats_per_unit": self.width * math.log(2),
            "floor_bits_per_token": 1.0 / self.rows,
            "end_marker": "included; costs 0 nats because every unit has the same length",
        }
