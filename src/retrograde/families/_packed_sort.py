"""Order and rank integer keys with one uint64 sort of ``key << index_bits | index``.

numpy sorts 64-bit integers with vectorized kernels (x86-simd-sort on AVX-512 / AVX2)
but its ``argsort`` is several times slower: measured on 17 M keys, 0.17 s for
``ndarray.sort`` against 1.36 s for ``argsort`` (``benchmarks/README.md``). Packing each
key with its position into one uint64 lets the plain sort carry the position along: the
high bits of the sorted words are the keys in order, the low bits the permutation. Equal
keys keep their positions in increasing order, so the result is that of a *stable*
argsort. This needs ``bits(space - 1) + bits(n - 1) <= 64``; :func:`packed_fits` says
whether it does, and callers fall back to ``argsort`` when it does not.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from ..data import index_dtype

__all__ = ["index_bits", "packed_fits", "packed_rank", "packed_sorted_blocks"]

#: words per step when packing and unpacking, so the temporaries stay small at 25 M keys
_CHUNK = 1 << 20


def index_bits(n: int) -> int:
    """Bits needed for the positions ``0..n-1`` (at least 1).

    >>> index_bits(0), index_bits(2), index_bits(3), index_bits(2**25)
    (1, 1, 2, 25)
    """
    return max(n - 1, 1).bit_length()


def packed_fits(space: int, n: int) -> bool:
    """Whether ``n`` keys in ``[0, space)`` and their positions fit one uint64 each.

    >>> packed_fits(2**39, 2**25), packed_fits(2**39 + 1, 2**25)
    (True, False)
    """
    return max(space - 1, 0).bit_length() + index_bits(n) <= 64


def _packed_sorted(keys: np.ndarray, space: int, overwrite: bool) -> tuple[np.ndarray, int]:
    """(n,) sorted uint64 words ``key << bits | position`` and ``bits``.

    ``overwrite=True`` lets the words reuse an int64 / uint64 ``keys`` array's memory.
    """
    if not packed_fits(space, len(keys)):
        raise OverflowError(f"{len(keys)} keys below {space} do not fit 64 bits with positions")
    bits = index_bits(len(keys))
    if overwrite and keys.dtype in (np.int64, np.uint64):
        words = keys.view(np.uint64)
    else:
        words = keys.astype(np.uint64)
    np.left_shift(words, np.uint64(bits), out=words)
    for start in range(0, len(words), _CHUNK):
        block = words[start : start + _CHUNK]
        block |= np.arange(start, start + len(block), dtype=np.uint64)
    words.sort()
    return words, bits


def packed_sorted_blocks(
    keys: np.ndarray, space: int, *, overwrite: bool = False
) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """The keys in sorted order as blocks ``(sorted_keys, positions)``, both ``(block,)`` int64.

    Concatenated, ``positions`` is a stable ``argsort(keys)`` and ``sorted_keys`` is
    ``keys[positions]``; blocks of about a million keep the temporaries small.

    >>> blocks = list(packed_sorted_blocks(np.array([5, 1, 5, 0]), 6))
    >>> [(k.tolist(), p.tolist()) for k, p in blocks]
    [([0, 1, 5, 5], [3, 1, 0, 2])]
    """
    words, bits = _packed_sorted(keys, space, overwrite)
    mask = np.uint64((1 << bits) - 1)
    for start in range(0, len(words), _CHUNK):
        block = words[start : start + _CHUNK]
        yield (block >> np.uint64(bits)).view(np.int64), (block & mask).view(np.int64)


def packed_rank(
    keys: np.ndarray, space: int, *, overwrite: bool = False, out: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """``(ids, distinct)`` of non-negative ``keys < space``, as ``np.unique(return_inverse)``.

    ``distinct`` is the sorted distinct keys (int64); ``ids[e]`` is the index of ``keys[e]``
    in it (int32 when ``len(keys)`` fits). ``overwrite=True`` lets the sort reuse an int64
    ``keys`` array's memory (its values are lost); ``out`` is memory for the ids, of that
    dtype and ``(len(keys),)``.

    >>> ids, distinct = packed_rank(np.array([70, 3, 70, 64]), 100)
    >>> ids.tolist(), distinct.tolist()
    ([2, 0, 2, 1], [3, 64, 70])
    """
    ids = np.empty(len(keys), dtype=index_dtype(len(keys))) if out is None else out
    pieces = [np.zeros(0, dtype=np.int64)]
    # Running state across blocks: distinct keys so far and the last key seen.
    n_distinct = 0
    last = -1  # below every key
    for sorted_keys, positions in packed_sorted_blocks(keys, space, overwrite=overwrite):
        is_new = np.empty(len(sorted_keys), dtype=bool)
        is_new[0] = sorted_keys[0] != last
        np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=is_new[1:])
        # (block,) rank of each sorted key: distinct keys before it, itself included, - 1.
        ranks = np.cumsum(is_new, dtype=ids.dtype)
        ranks += n_distinct - 1
        ids[positions] = ranks
        pieces.append(sorted_keys[is_new])
        n_distinct = int(ranks[-1]) + 1
        last = int(sorted_keys[-1])
    return ids, np.concatenate(pieces)
