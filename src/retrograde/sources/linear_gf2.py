"""``linear_gf2``: units ``x ‖ y`` with ``x`` uniform in {0,1}^n and ``y = A x`` over GF(2).

``A`` is a random invertible ``n × n`` matrix ``A = P L U Q`` (see
:func:`retrograde.sources._gf2.random_invertible`): ``L`` and ``U`` are unit triangular, so
``A`` is invertible by construction, and ``P``, ``Q`` are random permutations. ``nonzeros``
is the number of off-diagonal ones in each row of ``L`` and of ``U`` (fewer where the row
has no room), so ``nnz(L) = n + sum_i min(nonzeros, i)`` and likewise for ``U``;
``nnz(A)`` is then between ``n`` and ``min(n*n, n*(1+nonzeros)**2)``, exactly ``n`` (a
permutation matrix) when ``nonzeros = 0``. The actual counts of ``A`` and ``A^-1`` are in
:meth:`LinearGF2Source.metadata`.

Read forwards, each ``y`` bit is the parity of the ``x`` bits in one row of ``A``; read
backwards, a model must recover ``x = A^-1 y``, whose rows are usually much denser.
Floor: ``n ln 2`` nats per unit (only ``x`` is random; the end marker costs 0).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .._validation import check_int
from ..sequences import SequenceSet
from . import _gf2, registry
from ._base import CalibrationSource

__all__ = ["LinearGF2Source"]

MAX_BITS = 1024


@registry.register("linear_gf2")
class LinearGF2Source(CalibrationSource):
    """Units ``x ‖ A x`` over GF(2); token ids are the bits 0 and 1.

    Parameters
    ----------
    n_bits : int, 1 <= n <= 1024
        Length of ``x`` and of ``y``; a unit has ``2 n`` tokens.
    nonzeros : int, 0 <= nonzeros <= n - 1
        Off-diagonal ones per row of each triangular factor of ``A`` (module docstring).
    matrix_seed : int >= 0
        Fixes ``A`` (independent of the unit seed: every split and run share one matrix).

    Examples
    --------
    >>> source = LinearGF2Source(n_bits=4, nonzeros=1, matrix_seed=0)
    >>> units = source.generate(3, seed=0)
    >>> units.lengths.tolist(), source.spans(8)
    ([8, 8, 8], {'x': (0, 4), 'y': (4, 8)})
    """

    name = "linear_gf2"

    def __init__(self, *, n_bits: int = 32, nonzeros: int = 2, matrix_seed: int = 0) -> None:
        self.n_bits = n_bits
        self.nonzeros = nonzeros
        self.matrix_seed = matrix_seed
        self._validate_params()
        self.vocab_size = 2
        rng = np.random.default_rng([self.matrix_seed, 0x67663200])
        #: (n, n) uint8 0/1, invertible over GF(2)
        self.matrix_, self.factors_ = _gf2.random_invertible(self.n_bits, self.nonzeros, rng)
        #: (n, n) uint8 0/1 with matrix_ @ inverse_ = I mod 2
        self.inverse_ = _gf2.inverse(self.matrix_)

    def _validate_params(self) -> None:
        check_int(self._owner, "n_bits", self.n_bits, 1, MAX_BITS)
        check_int(self._owner, "nonzeros", self.nonzeros, 0, self.n_bits - 1)
        check_int(self._owner, "matrix_seed", self.matrix_seed, 0)

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
            "nonzeros_lower_factor": nnz_lower,
            "nonzeros_upper_factor": nnz_upper,
            "floor_nats_per_unit": self.n_bits * math.log(2),
            "floor_bits_per_token": 0.5,
            "end_marker": "included; costs 0 nats because every unit has the same length",
        }
