"""``linear_gf2``: units ``x ‖ y`` with ``x`` uniform in {0,1}^n and ``y = A x`` over GF(2).

``A`` is a random invertible ``n × n`` matrix built one of two ways (``structure``):

* ``"lu"`` (default): ``A = P L U Q`` (see :func:`retrograde.sources._gf2.random_invertible`):
  ``L`` and ``U`` are unit triangular, so ``A`` is invertible by construction, and ``P``,
  ``Q`` are random permutations. ``nonzeros`` is the number of off-diagonal ones in each
  row of ``L`` and of ``U`` (fewer where the row has no room), so
  ``nnz(L) = n + sum_i min(nonzeros, i)`` and likewise for ``U``; ``nnz(A)`` is then
  between ``n`` and ``min(n*n, n*(1+nonzeros)**2)``, exactly ``n`` (a permutation matrix)
  when ``nonzeros = 0``. Rows of ``A`` can hold up to ``(1 + nonzeros)**2`` ones.
* ``"banded"``: ``A = P B Q`` with ``B`` the unit upper triangular band matrix with
  ``nonzeros`` superdiagonals (:func:`retrograde.sources._gf2.banded_upper`), so every row
  of ``A`` holds at most ``1 + nonzeros`` ones. With ``nonzeros = 1`` the inverse of ``B``
  is the full upper triangle: each ``y`` bit is the parity of two ``x`` bits while ``x``
  needs up to all of ``y``.

The actual counts of ``A`` and ``A^-1`` are in :meth:`LinearGF2Source.metadata`, and
:meth:`LinearGF2Source.parity_weights` gives, for any order, how many earlier bits each
position's parity needs.

Read forwards, each ``y`` bit is the parity of the ``x`` bits in one row of ``A``; read
backwards, a model must recover ``x = A^-1 y``, whose rows are usually much denser.
Floor: ``n ln 2`` nats per unit (only ``x`` is random; the end marker costs 0).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..validation import check_choice, check_int
from . import _gf2
from ._base import CalibrationSource

__all__ = ["LinearGF2Source"]

MAX_BITS = 1024
STRUCTURES = ("lu", "banded")


class LinearGF2Source(CalibrationSource):
    """Units ``x ‖ A x`` over GF(2); token ids are the bits 0 and 1.

    Parameters
    ----------
    n_bits : int, 1 <= n <= 1024
        Length of ``x`` and of ``y``; a unit has ``2 n`` tokens.
    nonzeros : int, 0 <= nonzeros <= n - 1
        Off-diagonal ones per row of each triangular factor of ``A`` (``"lu"``), or the
        number of superdiagonals of the band (``"banded"``); see the module docstring.
    matrix_seed : int >= 0
        Fixes ``A`` (independent of the unit seed: every split and run share one matrix).
    structure : {"lu", "banded"}
        How ``A`` is built (module docstring); ``"banded"`` keeps every row of ``A`` at
        ``1 + nonzeros`` ones or fewer.

    Examples
    --------
    >>> source = LinearGF2Source(n_bits=4, nonzeros=1, matrix_seed=0)
    >>> units = source.generate(3, seed=0)
    >>> units.lengths.tolist(), source.spans(8)
    ([8, 8, 8], {'x': (0, 4), 'y': (4, 8)})
    """

    name = "linear_gf2"

    def __init__(
        self, *, n_bits: int = 32, nonzeros: int = 2, matrix_seed: int = 0, structure: str = "lu"
    ) -> None:
        self.n_bits = n_bits
        self.nonzeros = nonzeros
        self.matrix_seed = matrix_seed
        self.structure = structure
        self._validate_params()
        self.vocab_size = 2
        rng = np.random.default_rng([self.matrix_seed, 0x67663200])
        build = _gf2.random_invertible if structure == "lu" else _gf2.random_banded
        #: (n, n) uint8 0/1, invertible over GF(2)
        self.matrix_, self.factors_ = build(self.n_bits, self.nonzeros, rng)
        #: (n, n) uint8 0/1 with matrix_ @ inverse_ = I mod 2
        self.inverse_ = _gf2.inverse(self.matrix_)

    def _validate_params(self) -> None:
        check_int(self._owner, "n_bits", self.n_bits, 1, MAX_BITS)
        check_int(self._owner, "nonzeros", self.nonzeros, 0, self.n_bits - 1)
        check_int(self._owner, "matrix_seed", self.matrix_seed, 0)
        check_choice(self._owner, "structure", self.structure, STRUCTURES)

    @property
    def unit_length(self) -> int:
        return 2 * int(self.n_bits)

    def generate(self, n_units: int, seed: int) -> SequenceSet:
        self._check_n_units(n_units, seed)
        rng = np.random.default_rng([seed, 0x756E6974])
        x = rng.integers(0, 2, size=(n_units, self.n_bits), dtype=np.uint8)  # (n_units, n)
        y = _gf2.matmul(x, self.matrix_.T)  # row-wise y = A x
        units = np.concatenate([x, y], axis=1).astype(np.int32)  # (n_units, 2n)
        return SequenceSet(
            units.reshape(-1),
            np.arange(n_units + 1, dtype=np.int64) * self.unit_length,
            vocab_size=2,
            doc_ids=np.arange(n_units, dtype=np.int64),
        )

    def nll(self, units: SequenceSet) -> np.ndarray:
        """``n ln 2`` per unit; refuses a unit whose ``y`` is not ``A x``."""
        matrix = self._as_matrix(units)
        x, y = matrix[:, : self.n_bits], matrix[:, self.n_bits :]
        wrong = np.flatnonzero(np.any(_gf2.matmul(x, self.matrix_.T) != y, axis=1))
        if len(wrong):
            raise self._impossible(int(wrong[0]), "its y is not A x")
        return np.full(len(units), self.n_bits * math.log(2))

    def spans(self, length: int) -> dict[str, tuple[int, int]]:
        """``x`` (the random half) and ``y`` (its image ``A x``)."""
        self._check_length(length)
        return {"x": (0, self.n_bits), "y": (self.n_bits, 2 * self.n_bits)}

    def parity_weights(self, positions: np.ndarray | None = None, cap: int = 6) -> list[int]:
        """How many earlier bits each position of a reordered unit is the parity of.

        ``positions`` is an order's position permutation for one unit (``unit[positions]``
        is the reordered unit, e.g. ``orders.make("reverse").positions(unit)``); ``None``
        means the natural order. Each bit of a unit is a linear function of ``x``; entry
        ``t`` is ``-1`` if bit ``t`` is not determined by the bits before it (it costs
        1 bit for every model), else the fewest earlier bits whose XOR it is, or ``cap + 1``
        if that needs more than ``cap`` (:func:`retrograde.sources._gf2.fewest_xor_terms`).
        A model that can only pick up parities of a few bits pays for the positions with
        large weights; comparing two orders' lists shows where a gap can come from. The
        work grows like ``C(2 n, ceil(cap / 2))`` per position, so keep ``n`` small.

        Examples
        --------
        >>> source = LinearGF2Source(n_bits=3, nonzeros=1, structure="banded", matrix_seed=0)
        >>> forward = source.parity_weights()
        >>> forward[:3], max(forward[3:]) <= 2
        ([-1, -1, -1], True)
        """
        length = self.unit_length
        n = int(self.n_bits)
        order = np.arange(length) if positions is None else np.asarray(positions, dtype=np.int64)
        if sorted(order.tolist()) != list(range(length)):
            raise ValueError(f"positions must be a permutation of 0..{length - 1}")
        weights = 1 << np.arange(n, dtype=object)  # bit j of a form <-> x_j
        forms = [1 << j for j in range(n)] + [int(row @ weights) for row in self.matrix_]
        return _gf2.fewest_xor_terms([forms[p] for p in order.tolist()], cap)

    def metadata(self) -> dict[str, Any]:
        nnz_lower = int(self.factors_["lower"].sum())
        nnz_upper = int(self.factors_["upper"].sum())
        return {
            "source": self.name,
            "params": self.get_params(),
            "vocab_size": 2,
            "unit_length": self.unit_length,
            "nonzeros_matrix": int(self.matrix_.sum()),
            "nonzeros_inverse": int(self.inverse_.sum()),
            "max_row_ones_matrix": int(self.matrix_.sum(axis=1).max()),
            "max_row_ones_inverse": int(self.inverse_.sum(axis=1).max()),
            "nonzeros_lower_factor": nnz_lower,
            "nonzeros_upper_factor": nnz_upper,
            "floor_nats_per_unit": self.n_bits * math.log(2),
            "floor_bits_per_token": 0.5,
            "end_marker": "included; costs 0 nats because every unit has the same length",
        }
