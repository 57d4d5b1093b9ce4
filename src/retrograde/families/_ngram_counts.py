"""Vectorized n-gram counting and interpolated modified Kneser–Ney tables.

Everything here is a pure function on arrays; :mod:`retrograde.families.ngram` wraps it as a
family. Notation (``V`` = vocabulary size, ``N`` = n-gram order):

- An *event* is one prediction: every token of a unit, then the end marker. A unit of
  length ``L`` gives ``L + 1`` events.
- Context symbols are token ids ``0..V-1`` plus the begin marker ``V`` (padding before the
  unit starts). Outcomes are token ids plus the end marker ``V``. Both alphabets have
  ``V + 1`` symbols, so ``n_symbols == V + 1``.
- A context of length ``j`` is the ``j`` symbols before the event. Contexts get integer
  ids level by level, never as wide keys: the context of length ``j`` is the pair
  (id of its length ``j-1`` suffix, the symbol ``j`` back), keyed as
  ``suffix_id * n_symbols + symbol`` and ranked among the distinct keys. Keys therefore
  stay below ``n_contexts * n_symbols`` whatever ``N`` is (no 64-bit overflow at ``N = 10``).
- A ``k``-gram type is (id of its length ``k-1`` context, outcome), keyed
  ``context_id * n_symbols + outcome``; each level keeps its distinct keys sorted, so
  look-ups are ``np.searchsorted``.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from itertools import chain
from typing import Any

import numpy as np

from ..sequences import index_dtype
from ._bitset_rank import bitset_rank
from ._packed_sort import packed_fits, packed_rank

__all__ = [
    "FALLBACK_DISCOUNT",
    "KneserNeyTables",
    "count_tables",
    "distinct_counts",
    "gather",
    "interpolated_probs",
    "lookup",
    "modified_kn_discounts",
    "rank_keys",
    "rank_pairs",
]

#: Single discount used when a level has no singletons (``n1 == 0``), so eq. 26 is
#: undefined. 0.5 is the usual middle value (common practice, no source).
FALLBACK_DISCOUNT = 0.5

# Dense rank tables (one int32 slot per possible key) are faster than sorting when the key
# space is small, as it is for characters or bytes; above this many keys we sort instead.
_DENSE_KEYS = 1 << 25
# Above that, a bitset of the key space (space / 4 bytes) ranks keys without sorting when
# the space is at most this many keys per event (benchmarks/README.md).
_BITSET_KEYS_PER_EVENT = 32
_DENSE_KEYS_PER_EVENT = 8
# Key tables above this many entries (8 bytes each) no longer fit in a typical L2 cache.
_CACHE_KEYS = 1 << 16
#: largest window key space ranked by one sort of int64 windows (keys below 2**63)
_WINDOW_LIMIT = 1 << 63


#: events per step when gathering: numpy converts int32 indices to int64 (intp) first, and
#: a full-size converted copy at 25 M events would double the memory peak
_GATHER_CHUNK = 1 << 20


def gather(values: np.ndarray, index: np.ndarray, offset: int = 0) -> np.ndarray:
    """``values[index + offset]`` computed in chunks, so no full-size int64 copy of ``index``."""
    out = np.empty(len(index), dtype=values.dtype)
    for start in range(0, len(index), _GATHER_CHUNK):
        chunk = index[start : start + _GATHER_CHUNK].astype(np.intp)
        if offset:
            chunk += offset
        np.take(values, chunk, out=out[start : start + _GATHER_CHUNK])
    return out


def rank_pairs(
    high: np.ndarray, low: np.ndarray, n_low: int, *, overwrite_high: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Ids of the pairs ``(high, low)`` among their distinct values, in key order.

    Returns ``(ids, keys)``: ``keys`` are the sorted distinct ``high * n_low + low`` (int64)
    and ``ids[e]`` is the index of pair ``e``'s key in ``keys`` (int32 when it fits).
    ``overwrite_high=True`` lets the keys reuse ``high``'s memory when its dtype fits.

    Examples
    --------
    >>> ids, keys = rank_pairs(np.array([1, 0, 1]), np.array([2, 2, 2]), 3)
    >>> ids.tolist(), keys.tolist()
    ([1, 0, 1], [2, 5])
    """
    n_high = int(high.max()) + 1 if len(high) else 1
    if n_high * n_low >= 1 << 62:
        raise OverflowError(f"n-gram key space {n_high} x {n_low} does not fit in 63 bits")
    space = n_high * n_low
    dtype = index_dtype(space)
    if overwrite_high and high.dtype == dtype:
        keys = high
        keys *= n_low
        keys += low
    else:
        keys = _pair_keys(high, low, n_low, dtype)
    return rank_keys(keys, space, overwrite=True)


def rank_keys(
    keys: np.ndarray, space: int, *, overwrite: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """``(ids, distinct)`` of non-negative ``keys < space``, as ``np.unique(return_inverse)``.

    ``distinct`` is the sorted distinct keys (int64) and ``ids[e]`` the index of ``keys[e]``
    in it. The method depends on the space next to the number of keys ``n``: a dense rank
    table (linear, ~5 bytes per possible key), a bitset (linear, space / 4 bytes), else one
    sort of keys packed with their positions (:mod:`._packed_sort`), else ``argsort``.
    ``overwrite=True`` lets the last two reuse an int64 ``keys`` array's memory.

    >>> ids, distinct = rank_keys(np.array([9, 2, 9]), 10)
    >>> ids.tolist(), distinct.tolist()
    ([1, 0, 1], [2, 9])
    """
    # A dense table costs ~5 bytes per possible key whatever the number of events: with few
    # events and a large vocabulary (word tokens) it would dominate, so it also needs the
    # space to be small next to the events.
    if space <= _dense_limit(len(keys)):
        present = np.zeros(space, dtype=bool)
        for start in range(0, len(keys), _GATHER_CHUNK):
            present[keys[start : start + _GATHER_CHUNK].astype(np.intp)] = True
        distinct = np.flatnonzero(present)
        del present
        rank = np.empty(space, dtype=index_dtype(len(distinct)))
        rank[distinct] = np.arange(len(distinct))
        return gather(rank, keys), distinct.astype(np.int64)
    if space <= _BITSET_KEYS_PER_EVENT * len(keys):
        return bitset_rank(keys, space)  # linear; at most ~8 bytes per event of memory
    if packed_fits(space, len(keys)):
        return packed_rank(keys, space, overwrite=overwrite)
    order = np.argsort(keys)
    sorted_keys = keys[order]
    del keys
    is_new = np.empty(len(sorted_keys), dtype=bool)
    is_new[:1] = True
    np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=is_new[1:])
    ids = np.empty(len(order), dtype=index_dtype(len(order)))
    ids[order] = np.cumsum(is_new, dtype=ids.dtype) - 1
    return ids, sorted_keys[is_new].astype(np.int64)


def _dense_limit(n_keys: int) -> int:
    """Largest key space ranked with a dense table for ``n_keys`` keys."""
    return min(_DENSE_KEYS, max(1 << 16, _DENSE_KEYS_PER_EVENT * n_keys))


def _pair_keys(high: np.ndarray, low: np.ndarray, n_low: int, dtype: Any) -> np.ndarray:
    """``high * n_low + low`` computed in place (no full-size temporaries at 25 M events)."""
    keys = high.astype(dtype)
    keys *= n_low
    keys += low
    return keys


def distinct_counts(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct values of ``keys`` and how often each occurs (sorts ``keys`` in place)."""
    keys.sort()
    starts = np.flatnonzero(np.concatenate([[True], keys[1:] != keys[:-1]]))
    return keys[starts], np.diff(np.append(starts, len(keys))).astype(np.int64)


def lookup(sorted_keys: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """(len(keys),) int64 index of each key in ``sorted_keys``, or ``-1`` where it is absent.

    A dense table (one slot per possible key) replaces the binary search when the key space
    is small next to the number of queries: random binary searches miss the cache. The
    result is int64 on every path: callers build the next level's keys as
    ``id * n_symbols + symbol``, which passes 2**31 once ``id`` passes ``2**31 / n_symbols``
    (46,340 ids at a vocabulary of 46,340), and numpy keeps an int32 array's dtype.
    """
    if len(sorted_keys) == 0:
        return np.full(len(keys), -1, dtype=np.int64)
    space = int(sorted_keys[-1]) + 1
    if space <= min(_DENSE_KEYS, max(1 << 16, 4 * len(keys))):
        table = np.full(space + 1, -1, dtype=index_dtype(len(sorted_keys)))
        table[sorted_keys] = np.arange(len(sorted_keys))
        # keys >= space are absent (slot ``space``)
        return table[np.minimum(keys, space)].astype(np.int64, copy=False)
    if len(sorted_keys) > _CACHE_KEYS and len(keys) > 1024:
        # Sorted queries let each binary search start where the last one ended, which
        # keeps a table larger than the CPU cache from missing on every step.
        order = np.argsort(keys)
        where = np.empty(len(keys), dtype=np.intp)
        where[order] = np.searchsorted(sorted_keys, keys[order])
    else:
        where = np.searchsorted(sorted_keys, keys)
    np.minimum(where, len(sorted_keys) - 1, out=where)
    return np.where(sorted_keys[where] == keys, where, -1)


def modified_kn_discounts(counts: np.ndarray) -> np.ndarray:
    """(3,) discounts ``D1, D2, D3+`` from counts-of-counts (Chen & Goodman 1998, eq. 26).

    ``Y = n1 / (n1 + 2 n2)``, ``D1 = 1 - 2 Y n2 / n1``, ``D2 = 2 - 3 Y n3 / n2``,
    ``D3+ = 3 - 4 Y n4 / n3``, where ``n_r`` counts the n-gram types seen exactly ``r``
    times. **Fallback**: when a formula's counts-of-counts are zero or it falls outside
    ``(0, r]`` (small vocabularies such as bits or characters have no rare low-order
    types), that discount becomes the single absolute discount ``Y`` (Ney, Essen & Kneser
    1994), and ``Y`` itself becomes :data:`FALLBACK_DISCOUNT` when ``n1 == 0``. Every
    discount thus lies in ``(0, r]``, so every seen context keeps mass for lower orders.

    Examples
    --------
    >>> modified_kn_discounts(np.array([1, 1, 1, 1, 2, 2, 3, 4])).round(4).tolist()
    [0.5, 1.25, 1.0]
    """
    n1, n2, n3, n4 = np.bincount(np.minimum(counts, 5), minlength=6)[1:5].astype(np.float64)
    y = n1 / (n1 + 2 * n2) if n1 > 0 else FALLBACK_DISCOUNT
    formulas = [
        (1.0, 1 - 2 * y * n2 / n1 if n1 > 0 else np.nan),
        (2.0, 2 - 3 * y * n3 / n2 if n2 > 0 else np.nan),
        (3.0, 3 - 4 * y * n4 / n3 if n3 > 0 else np.nan),
    ]
    return np.array([d if 0 < d <= r else y for r, d in formulas], dtype=np.float64)


@dataclass
class KneserNeyTables:
    """Everything a fitted model needs to score; level ``k`` (1..N) predicts from ``k-1`` symbols.

    ``context_keys[j]`` (j = 1..N-1) are the sorted keys of the length-``j`` contexts (index 0
    is an empty placeholder: the empty context has id 0). ``type_keys[k]`` / ``type_counts[k]``
    (k = 1..N, index 0 unused) are the ``k``-gram types and their counts: raw counts at
    ``k = N``, continuation counts (distinct left extensions) below. ``discounts`` is
    ``(N + 1, 3)``, row ``k`` for level ``k``.
    """

    order: int
    n_symbols: int
    context_keys: list[np.ndarray]
    type_keys: list[np.ndarray]
    type_counts: list[np.ndarray]
    discounts: np.ndarray

    def __post_init__(self) -> None:
        # Derived per level: alpha for each type, (total, gamma) for each context.
        self.alphas: list[np.ndarray] = [np.zeros(0)]
        self.gammas: list[np.ndarray] = [np.zeros(0)]
        for k in range(1, self.order + 1):
            counts = self.type_counts[k].astype(np.float64)
            context = self.type_keys[k] // self.n_symbols
            n_contexts = 1 if k == 1 else len(self.context_keys[k - 1])
            totals = np.bincount(context, weights=counts, minlength=n_contexts)
            per_type = self.discounts[k][np.minimum(self.type_counts[k], 3) - 1]
            discounted = np.bincount(context, weights=per_type, minlength=n_contexts)
            self.alphas.append((counts - per_type) / totals[context])
            self.gammas.append(discounted / totals)


def count_tables(
    symbol_at_lag: Callable[[int], np.ndarray],
    outcomes: np.ndarray,
    *,
    order: int,
    n_symbols: int,
    fixed_discount: float | None = None,
    on_level: Callable[[], object] | None = None,
) -> KneserNeyTables:
    """Count every level and derive modified-KN discounts.

    ``symbol_at_lag(j)`` returns the ``(n_events,)`` context symbol ``j`` positions back
    (the begin marker before the unit starts); ``outcomes`` is ``(n_events,)``.
    ``on_level()`` is called ``order`` times, once per level counted (progress).

    An event's *window* is its context symbols nearest first, then its outcome:
    ``(s_1, ..., s_{N-1}, o)``. Context ids are ranks in the lexicographic order of these
    tuples, so every level is a prefix of the window. When the whole window fits one int64
    in mixed radix ``n_symbols``, one sort of the windows gives every level: the sorted
    distinct windows are the ``N``-gram types, their distinct prefixes the contexts
    (:func:`_prefix_levels`). Otherwise the leading symbols are first replaced by the id of
    their prefix, ranked per event several symbols at a time (as many as one packed
    sort or a dense table takes, :func:`_jump_length`), until the rest fits.
    """
    n_events = len(outcomes)
    context_keys: list[np.ndarray] = [np.zeros(0, dtype=np.int64)] * order
    # (n_events,) id of each event's context of length ``level``; None: all 0 (empty context)
    ids: np.ndarray | None = None
    n_ids = 1
    level = 0
    while level < order - 1 and n_ids * n_symbols ** (order - level) > _WINDOW_LIMIT:
        if n_ids * n_symbols >= 1 << 62:
            raise OverflowError(f"n-gram key space {n_ids} x {n_symbols} does not fit in 63 bits")
        step = _jump_length(n_ids, n_symbols, n_events, order - 1 - level)
        lags = range(level + 1, level + step + 1)
        space = n_ids * n_symbols**step
        keys = _append_symbols(ids, n_symbols, (symbol_at_lag(lag) for lag in lags), space)
        del ids
        ids, distinct = rank_keys(keys, space, overwrite=True)
        del keys
        context_keys[level + 1 : level + step + 1] = _prefix_levels(distinct, n_symbols, step)
        level += step
        n_ids = len(distinct)
        for _ in lags:
            if on_level is not None:
                on_level()
    symbols = (symbol_at_lag(lag) for lag in range(level + 1, order))
    space = n_ids * n_symbols ** (order - level)
    if space > 1 << 63:
        raise OverflowError(f"n-gram key space {n_ids} x {n_symbols} does not fit in 63 bits")
    windows = _append_symbols(ids, n_symbols, chain(symbols, [outcomes]), space)
    del ids
    windows, top_counts = distinct_counts(windows)
    levels = _prefix_levels(windows, n_symbols, order - level)
    del windows
    context_keys[level + 1 : order] = levels[:-1]
    type_keys = [np.zeros(0, dtype=np.int64)] * (order + 1)
    type_counts = [np.zeros(0, dtype=np.int64)] * (order + 1)
    type_keys[order], type_counts[order] = levels[-1], top_counts
    for _ in range(level, order):
        if on_level is not None:
            on_level()
    for k in range(order - 1, 0, -1):
        # Continuation count of a k-gram: how many distinct (k+1)-gram types end with it.
        longer = type_keys[k + 1]
        longer_context = longer // n_symbols
        shorter_context = context_keys[k][longer_context] // n_symbols
        suffix_keys = shorter_context * n_symbols + longer % n_symbols
        type_keys[k], type_counts[k] = distinct_counts(suffix_keys)
    discounts = np.zeros((order + 1, 3))
    for k in range(1, order + 1):
        if fixed_discount is None:
            discounts[k] = modified_kn_discounts(type_counts[k])
        else:
            discounts[k] = fixed_discount
    return KneserNeyTables(order, n_symbols, context_keys, type_keys, type_counts, discounts)


def _jump_length(n_ids: int, n_symbols: int, n_events: int, most: int) -> int:
    """How many context symbols (1..``most``) to rank per event in one step.

    As many as one pass ranks cheaply: a dense table or a packed sort (no ``argsort``).
    """
    step = 1
    while step < most:
        space = n_ids * n_symbols ** (step + 1)
        if space > _dense_limit(n_events) and not packed_fits(space, n_events):
            break
        step += 1
    return step


def _append_symbols(
    ids: np.ndarray | None, n_symbols: int, symbols: Iterable[np.ndarray], space: int
) -> np.ndarray:
    """``(n_events,)`` keys ``((ids * n_symbols + s_a) * n_symbols + s_b) ...``.

    ``ids`` None stands for all zeros. The keys are int32 only when every key is below
    ``space <= 2**31`` (``index_dtype``); each symbol array is consumed as it comes, so at
    most one of them is alive.
    """
    dtype = index_dtype(space)
    keys: np.ndarray | None = None if ids is None else ids.astype(dtype)
    for column in symbols:
        if keys is None:
            keys = column.astype(dtype)
        else:
            keys *= n_symbols
            keys += column
        del column
    assert keys is not None
    return keys


def _prefix_levels(keys: np.ndarray, n_symbols: int, depth: int) -> list[np.ndarray]:
    """Keys of ``depth`` consecutive levels from sorted distinct keys of their last level.

    ``keys`` is ``(D,)`` sorted distinct ``base * n_symbols**depth + digits``, with ``base``
    the id of a prefix at the level before the first. Level ``i`` (1..depth) holds the
    distinct ``keys // n_symbols**(depth - i)``; its key for the table is (id of its own
    prefix one level down) ``* n_symbols +`` its last digit. Returns ``depth`` sorted int64
    arrays; the last has ``D`` entries.

    Three keys ``(base, digit, digit)`` in radix 3: (1, 2, 0), (1, 2, 2), (2, 0, 1). Level 1
    holds (1, 2) and (2, 0), keyed 1 * 3 + 2 and 2 * 3 + 0; level 2 their ids 0, 0, 1 with
    the last digits:

    >>> [k.tolist() for k in _prefix_levels(np.array([15, 17, 19]), 3, 2)]
    [[5, 6], [0, 2, 4]]
    """
    keys = keys.astype(np.int64, copy=False)
    parent = keys // np.int64(n_symbols) ** depth  # (D,) base ids: ids one level down
    levels = []
    for i in range(1, depth + 1):
        prefix = keys // np.int64(n_symbols) ** (depth - i) if i < depth else keys
        is_new = np.empty(len(prefix), dtype=bool)
        is_new[:1] = True
        np.not_equal(prefix[1:], prefix[:-1], out=is_new[1:])
        levels.append(parent[is_new] * n_symbols + prefix[is_new] % n_symbols)
        # Ids of each entry's prefix at this level: the parents of the next level.
        parent = np.cumsum(is_new, dtype=np.int64) - 1
    return levels


def interpolated_probs(
    tables: KneserNeyTables, symbol_at_lag: Callable[[int], np.ndarray], outcomes: np.ndarray
) -> np.ndarray:
    """(n_events,) interpolated modified-KN probability of each outcome.

    ``p_0 = 1 / n_symbols`` (uniform over tokens and the end marker); for ``k = 1..N``,
    ``p_k = max(c - D(c), 0) / c(h) + gamma(h) p_{k-1}`` when the length ``k-1`` context
    ``h`` was seen in training, else ``p_k = p_{k-1}`` (Chen & Goodman 1998, eqs. 17 and 19).
    """
    n_symbols = tables.n_symbols
    probs = np.full(len(outcomes), 1.0 / n_symbols)
    # Ids and keys stay int64 throughout: ``id * n_symbols`` passes 2**31 at large
    # vocabularies, and an int32 operand would wrap silently (numpy keeps array dtypes).
    context_ids = np.zeros(len(outcomes), dtype=np.int64)
    for k in range(1, tables.order + 1):
        if k > 1:
            # Extend the context by one symbol; once unseen (-1), it stays unseen.
            keys = np.maximum(context_ids, 0) * n_symbols + symbol_at_lag(k - 1).astype(np.int64)
            found = lookup(tables.context_keys[k - 1], keys)
            context_ids = np.where(context_ids >= 0, found, np.int64(-1))
        seen = context_ids >= 0
        seen_ids = context_ids[seen]
        where = lookup(tables.type_keys[k], seen_ids * n_symbols + outcomes[seen].astype(np.int64))
        alpha = np.where(where >= 0, tables.alphas[k][np.maximum(where, 0)], 0.0)
        probs[seen] = alpha + tables.gammas[k][seen_ids] * probs[seen]
    return probs
