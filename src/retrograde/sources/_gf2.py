"""Linear algebra over GF(2) (arithmetic mod 2) on 0/1 numpy arrays.

Matrices are 2-D arrays of 0 and 1 (any integer or bool dtype in, ``uint8`` out).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "banded_upper",
    "fewest_xor_terms",
    "inverse",
    "matmul",
    "random_banded",
    "random_invertible",
    "unit_triangular",
]


def matmul(left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """``left @ right`` mod 2 as uint8.

    The product runs in float64 (BLAS); entries are sums of at most ``n`` ones, exact while
    ``n < 2**53``.

    Examples
    --------
    >>> matmul(np.array([[1, 1], [0, 1]]), np.array([[1, 1], [0, 1]])).tolist()
    [[1, 0], [0, 1]]
    """
    product = np.asarray(left, dtype=np.float64) @ np.asarray(right, dtype=np.float64)
    return (product % 2).astype(np.uint8)


def inverse(matrix: np.ndarray) -> np.ndarray:
    """The inverse over GF(2) by Gauss–Jordan elimination; ``ValueError`` if singular.

    Rows of the augmented matrix ``[A | I]`` are packed 8 bits per byte, so each pivot step
    is one vectorized XOR over ``(n, n/4)`` bytes.
    """
    matrix = np.asarray(matrix, dtype=np.uint8) & 1
    n = matrix.shape[0]
    if matrix.shape != (n, n):
        raise ValueError(f"expected a square matrix, got shape {matrix.shape}")
    augmented = np.packbits(np.concatenate([matrix, np.eye(n, dtype=np.uint8)], axis=1), axis=1)
    for column in range(n):
        byte, shift = divmod(column, 8)
        has_one = (augmented[:, byte] >> (7 - shift)) & 1  # (n,) bit `column` of every row
        candidates = np.flatnonzero(has_one[column:]) + column
        if len(candidates) == 0:
            raise ValueError("matrix is singular over GF(2)")
        pivot = candidates[0]
        if pivot != column:
            augmented[[column, pivot]] = augmented[[pivot, column]]
            has_one[[column, pivot]] = has_one[[pivot, column]]
        others = has_one.astype(bool)
        others[column] = False
        augmented[others] ^= augmented[column]
    return np.unpackbits(augmented, axis=1, count=2 * n)[:, n:]


def unit_triangular(n: int, nonzeros: int, rng: np.random.Generator, *, lower: bool) -> np.ndarray:
    """(n, n) unit-triangular 0/1 matrix with ``min(nonzeros, room)`` off-diagonal ones per row.

    ``room`` is the number of off-diagonal places the row has on its side of the diagonal
    (``i`` for row ``i`` of a lower factor, ``n - 1 - i`` of an upper one); the columns are
    drawn uniformly without replacement.
    """
    rows, columns = np.indices((n, n))
    allowed = columns < rows if lower else columns > rows
    keys = np.where(allowed, rng.random((n, n)), np.inf)  # (n, n) random ranks per row
    ranks = np.argsort(np.argsort(keys, axis=1, kind="stable"), axis=1, kind="stable")
    factor = (ranks < nonzeros) & allowed
    factor[np.arange(n), np.arange(n)] = True
    return factor.astype(np.uint8)


def random_invertible(
    n: int, nonzeros: int, rng: np.random.Generator
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """A random invertible ``A = P L U Q`` over GF(2) and its factors.

    ``L`` and ``U`` are unit lower and upper triangular (:func:`unit_triangular`), so their
    determinant is 1; ``P`` and ``Q`` permute rows and columns. Returns ``(A, factors)``
    with ``factors`` holding ``lower``, ``upper``, ``row_order`` and ``column_order``
    (``A = (L @ U)[row_order][:, column_order]``).
    """
    lower = unit_triangular(n, nonzeros, rng, lower=True)
    upper = unit_triangular(n, nonzeros, rng, lower=False)
    row_order = rng.permutation(n)
    column_order = rng.permutation(n)
    matrix = matmul(lower, upper)[row_order][:, column_order]
    factors = {
        "lower": lower,
        "upper": upper,
        "row_order": row_order,
        "column_order": column_order,
    }
    return matrix, factors


def banded_upper(n: int, bandwidth: int) -> np.ndarray:
    """(n, n) unit upper triangular 0/1 band matrix: ``B_ij = 1`` for ``0 <= j - i <= bandwidth``.

    With ``bandwidth = 1`` (``I + S``, ``S`` the shift), the inverse over GF(2) is the
    Neumann series ``I + S + S^2 + ... + S^(n-1)``: every entry on and above the diagonal is
    1, the densest inverse a matrix with two ones per row can have.

    Examples
    --------
    >>> banded_upper(3, 1).tolist()
    [[1, 1, 0], [0, 1, 1], [0, 0, 1]]
    >>> inverse(banded_upper(3, 1)).tolist()
    [[1, 1, 1], [0, 1, 1], [0, 0, 1]]
    """
    rows, columns = np.indices((n, n))
    return ((columns >= rows) & (columns - rows <= bandwidth)).astype(np.uint8)


def random_banded(
    n: int, bandwidth: int, rng: np.random.Generator
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """``A = P B Q`` with ``B`` = :func:`banded_upper` and random permutations ``P``, ``Q``.

    Returns ``(A, factors)`` in the layout of :func:`random_invertible`, with ``lower`` the
    identity and ``upper`` the band matrix, so ``A = (L @ U)[row_order][:, column_order]``
    holds for both constructions.
    """
    upper = banded_upper(n, bandwidth)
    row_order = rng.permutation(n)
    column_order = rng.permutation(n)
    factors = {
        "lower": np.eye(n, dtype=np.uint8),
        "upper": upper,
        "row_order": row_order,
        "column_order": column_order,
    }
    return upper[row_order][:, column_order], factors


def fewest_xor_terms(forms: Sequence[int], cap: int = 6) -> list[int]:
    """For each form, the fewest earlier forms whose XOR equals it.

    ``forms`` are vectors over GF(2) written as Python integers (bit ``j`` = coordinate
    ``j``), in reading order. Entry ``t`` of the result is

    * ``-1`` when ``forms[t]`` is not in the span of ``forms[:t]``: it is not determined
      by what came before;
    * ``k >= 1``, the smallest number of earlier forms whose XOR is ``forms[t]`` (``0`` for
      a zero form), when ``k <= cap``;
    * ``cap + 1`` when it is determined but needs more than ``cap`` terms.

    Meet in the middle: the XORs of all subsets of at most ``ceil(cap / 2)`` earlier forms
    are kept in a table with their smallest sizes, and ``forms[t]`` is split into two table
    entries; work grows like ``C(len(forms), ceil(cap / 2))``.

    Examples
    --------
    >>> fewest_xor_terms([0b01, 0b10, 0b11, 0b11])
    [-1, -1, 2, 1]
    """
    if cap < 1:
        raise ValueError(f"cap must be at least 1, got {cap}")
    half = (cap + 1) // 2
    sizes: dict[int, int] = {0: 0}  # XOR of a subset of the earlier forms -> fewest terms
    basis: dict[int, int] = {}  # leading bit -> reduced vector (Gaussian elimination)
    result = []
    for form in forms:
        residue = form
        while residue and residue.bit_length() - 1 in basis:
            residue ^= basis[residue.bit_length() - 1]
        if residue:
            result.append(-1)
            basis[residue.bit_length() - 1] = residue
        else:
            best = min(size + sizes.get(form ^ value, cap + 1) for value, size in sizes.items())
            result.append(min(best, cap + 1))
        # Subsets that contain this form: every known subset of fewer than `half` terms
        # plus this one (a snapshot, so the form joins each subset at most once).
        for value, size in [(v, k) for v, k in sizes.items() if k < half]:
            combined = value ^ form
            if size + 1 < sizes.get(combined, half + 1):
                sizes[combined] = size + 1
    return result
