"""Vectorized n-gram counting and interpolated modified Kneser–Ney tables.

Everything here is a pure function on arrays; :mod:`retrograde.families.ngram` wraps it as a
family. Notation (``V`` = vocabulary size, ``N`` = n-gram order):

- An *event* is one prediction: every token of a unit, then the end marker. A unit of
  length ``L`` gives ``L + 1`` events.
- Context symbols are token ids ``0..V-1`` plus the begin marker ``V`` (padding before the
  unit starts). Outcomes are token ids plus the end marker ``V``. Both alphabets have
  ``V + 1`` symbols, so ``n_symbols == V + 1``.
- A context of length ``j`` is the ``j`` symbols before the event, nearest first. Its id
  is its rank among the distinct contexts of that length in the lexicographic order of
  these tuples; in the tables it is the pair (id of its length ``j-1`` suffix, the symbol
  ``j`` back), keyed as ``suffix_id * n_symbols + symbol``. Keys therefore stay below
  ``n_contexts * n_symbols`` whatever ``N`` is (no 64-bit overflow at ``N = 10``).
- A ``k``-gram type is (id of its length ``k-1`` context, outcome), keyed
  ``context_id * n_symbols + outcome``; each level keeps its distinct keys sorted, so
  look-ups are ``np.searchsorted``.
- Counting (:func:`count_tables`) sorts one 64-bit *window* per event, its context
  symbols and outcome in mixed radix, and reads every level off the sorted distinct
  windows; long windows first replace leading symbols by per-event context ids
  (:func:`_plan_step`). Scoring (:func:`interpolated_probs`) puts the events in context
  order once so that every level's searches walk the tables forwards.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple, Protocol

import numpy as np

from ..data import index_dtype
from ._bitset_rank import bitset_rank
from ._packed_sort import packed_fits, packed_rank, packed_sorted_blocks

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


class SymbolsAtLag(Protocol):
    """Context symbols ``lag`` positions back of events ``start:stop`` (all events by default)."""

    def __call__(self, lag: int, start: int = 0, stop: int | None = None, /) -> np.ndarray: ...


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
#: above this many scored events, they are sorted by context first (:func:`_score_order`)
_SORT_SCORED_EVENTS = 1 << 14
#: largest window key space sorted as one 64-bit word per event (uint64 above 2**63)
_WINDOW_LIMIT = 1 << 64


#: events per step when gathering: numpy converts int32 indices to int64 (intp) first, and
#: a full-size converted copy at 25 M events would double the memory peak
_GATHER_CHUNK = 1 << 20


def gather(
    values: np.ndarray, index: np.ndarray, offset: int = 0, out: np.ndarray | None = None
) -> np.ndarray:
    """``values[index + offset]`` computed in chunks, so no full-size int64 copy of ``index``.

    ``out``, when given, is ``(len(index),)`` of ``values``' dtype and receives the result.
    """
    if out is None:
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
    keys: np.ndarray, space: int, *, overwrite: bool = False, out: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """``(ids, distinct)`` of non-negative ``keys < space``, as ``np.unique(return_inverse)``.

    ``distinct`` is the sorted distinct keys (int64) and ``ids[e]`` the index of ``keys[e]``
    in it. The method depends on the space next to the number of keys ``n``: a dense rank
    table (linear, ~5 bytes per possible key), a bitset (linear, space / 4 bytes), else one
    sort of keys packed with their positions (:mod:`._packed_sort`), else ``argsort``.
    ``overwrite=True`` lets the last two reuse an int64 ``keys`` array's memory; ``out``
    is memory for the ids, used when its dtype and length are those of the result.

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
        return gather(rank, keys, out=_fitting(out, len(keys), rank.dtype)), distinct.astype(
            np.int64
        )
    if space <= _BITSET_KEYS_PER_EVENT * len(keys):
        return bitset_rank(keys, space)  # linear; at most ~8 bytes per event of memory
    if packed_fits(space, len(keys)):
        ids = _fitting(out, len(keys), index_dtype(len(keys)))
        return packed_rank(keys, space, overwrite=overwrite, out=ids)
    order = np.argsort(keys)
    sorted_keys = keys[order]
    del keys
    is_new = np.empty(len(sorted_keys), dtype=bool)
    is_new[:1] = True
    np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=is_new[1:])
    ids = np.empty(len(order), dtype=index_dtype(len(order)))
    ids[order] = np.cumsum(is_new, dtype=ids.dtype) - 1
    return ids, sorted_keys[is_new].astype(np.int64)


def _fitting(out: np.ndarray | None, length: int, dtype: Any) -> np.ndarray | None:
    """``out`` when it has ``length`` entries of ``dtype``, else None (allocate anew)."""
    if out is not None and len(out) == length and out.dtype == dtype:
        return out
    return None


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
    """Sorted distinct values of ``keys`` and how often each occurs (sorts ``keys`` in place).

    The counts are int32 when there are fewer than 2**31 keys (``index_dtype``).

    Two passes a block at a time (mark each value's last occurrence, then copy), so the
    only full-size temporary is one byte per key.

    >>> values, counts = distinct_counts(np.array([7, 2, 7, 7, 0]))
    >>> values.tolist(), counts.tolist()
    ([0, 2, 7], [1, 1, 3])
    """
    keys.sort()
    # (n,) whether each sorted key is the last of its value
    is_last = np.empty(len(keys), dtype=bool)
    for start in range(0, len(keys) - 1, _GATHER_CHUNK):
        stop = min(start + _GATHER_CHUNK, len(keys) - 1)
        np.not_equal(keys[start:stop], keys[start + 1 : stop + 1], out=is_last[start:stop])
    is_last[-1:] = True
    n_distinct = int(np.count_nonzero(is_last))
    values = np.empty(n_distinct, dtype=keys.dtype)
    counts = np.empty(n_distinct, dtype=index_dtype(len(keys)))  # int32 below 2**31 keys
    filled = 0
    previous_end = -1  # index of the last occurrence of the previous value
    for start in range(0, len(keys), _GATHER_CHUNK):
        block = is_last[start : start + _GATHER_CHUNK]
        ends = np.flatnonzero(block)
        if len(ends) == 0:
            continue
        ends += start
        values[filled : filled + len(ends)] = keys[ends]
        counts[filled : filled + len(ends)] = np.diff(ends, prepend=np.int64(previous_end))
        filled += len(ends)
        previous_end = int(ends[-1])
    return values, counts


def lookup(sorted_keys: np.ndarray, keys: np.ndarray, *, ordered: bool = False) -> np.ndarray:
    """(len(keys),) int64 index of each key in ``sorted_keys``, or ``-1`` where it is absent.

    ``ordered=True`` says the keys come mostly in increasing order already (the caller
    sorted the events), so they are searched as they are.

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
    if len(sorted_keys) > _CACHE_KEYS and len(keys) > 1024 and not ordered:
        # Sorted queries let each binary search start where the last one ended, which
        # keeps a table larger than the CPU cache from missing on every step.
        low, high = int(keys.min()), int(keys.max())
        if low >= 0 and packed_fits(high + 1, len(keys)):
            return _lookup_sorted(sorted_keys, keys, high + 1)
        order = np.argsort(keys)
        where = np.empty(len(keys), dtype=np.intp)
        where[order] = np.searchsorted(sorted_keys, keys[order])
    else:
        where = np.searchsorted(sorted_keys, keys)
    np.minimum(where, len(sorted_keys) - 1, out=where)
    return np.where(sorted_keys[where] == keys, where, -1)


def _lookup_sorted(sorted_keys: np.ndarray, keys: np.ndarray, space: int) -> np.ndarray:
    """:func:`lookup` of non-negative ``keys < space``, taken in sorted order a block at a time.

    The blocks come from one packed sort (:func:`packed_sorted_blocks`); the binary searches
    and the equality checks of a block then touch the table in increasing order.
    """
    where = np.empty(len(keys), dtype=np.int64)
    last = len(sorted_keys) - 1
    for block, positions in packed_sorted_blocks(keys, space):
        found = np.searchsorted(sorted_keys, block)
        np.minimum(found, last, out=found)
        where[positions] = np.where(sorted_keys[found] == block, found, -1)
    return where


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
    # (6,) how many types were seen 0, 1, ..., 4 and 5+ times, a block at a time
    seen = np.zeros(6, dtype=np.int64)
    for start in range(0, len(counts), _GATHER_CHUNK):
        seen += np.bincount(np.minimum(counts[start : start + _GATHER_CHUNK], 5), minlength=6)
    n1, n2, n3, n4 = seen[1:5].astype(np.float64)
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
        # Derived per level: (total, gamma) for each context. A type's alpha is computed
        # where it is scored (:meth:`alphas`), so no per-type float array is kept. A
        # total is a sum of integer counts, exact in float64 below 2**53: it is kept as an
        # integer (int32 when it fits), and converts back to the same float64 exactly.
        self.totals: list[np.ndarray] = [np.zeros(0, dtype=np.int64)]
        self.gammas: list[np.ndarray] = [np.zeros(0)]
        for k in range(1, self.order + 1):
            n_contexts = 1 if k == 1 else len(self.context_keys[k - 1])
            keys, counts = self.type_keys[k], self.type_counts[k]
            totals = np.empty(n_contexts, dtype=index_dtype(int(counts.sum(dtype=np.int64))))
            gammas = np.empty(n_contexts)
            # Blocks end where a context ends: every context's sums are then taken in one
            # bincount, in type order from 0.0, exactly as over the whole level at once.
            # (Every context has at least one type, so every slot is written.)
            for start, stop in _context_blocks(keys, self.n_symbols):
                context = keys[start:stop] // self.n_symbols
                first = int(context[0])
                context -= first
                span = int(context[-1]) + 1
                block_counts = counts[start:stop]
                per_type = self.discounts[k][np.minimum(block_counts, 3) - 1]
                block_totals = np.bincount(
                    context, weights=block_counts.astype(np.float64), minlength=span
                )
                discounted = np.bincount(context, weights=per_type, minlength=span)
                totals[first : first + span] = block_totals
                np.divide(discounted, block_totals, out=gammas[first : first + span])
            self.totals.append(totals)
            self.gammas.append(gammas)

    def alphas(self, k: int, where: np.ndarray, context_ids: np.ndarray) -> np.ndarray:
        """``max(c - D(c), 0) / c(h)`` of the level-``k`` types at ``where`` (``-1``: unseen, 0).

        ``context_ids`` are the types' context ids (``where`` and ``context_ids`` are
        ``(n,)``); the arithmetic is the same float64 operations for every type, so a type
        scores the same whatever else is scored with it.
        """
        if len(self.type_counts[k]) == 0:
            return np.zeros(len(where))
        # Computed at every place (index 0 where unseen) and zeroed where unseen: no
        # boolean gathers, and the same operations for every seen type.
        counts = self.type_counts[k][np.maximum(where, 0)]
        per_type = self.discounts[k][np.minimum(counts, 3) - 1]
        alpha = counts.astype(np.float64)
        alpha -= per_type
        alpha /= self.totals[k][context_ids]
        alpha[where < 0] = 0.0
        return alpha


def _context_blocks(keys: np.ndarray, n_symbols: int) -> list[tuple[int, int]]:
    """``(start, stop)`` blocks of about a million sorted type keys, cut between contexts."""
    blocks = []
    start = 0
    while start < len(keys):
        stop = start + _GATHER_CHUNK
        if stop < len(keys):
            # The first key of the next context (``keys // n_symbols`` one higher).
            next_context = int(keys[stop - 1]) // n_symbols + 1
            stop = int(np.searchsorted(keys, next_context * n_symbols))
        stop = min(stop, len(keys))
        blocks.append((start, stop))
        start = stop
    return blocks


def count_tables(
    symbol_at_lag: SymbolsAtLag,
    n_events: int,
    *,
    order: int,
    n_symbols: int,
    fixed_discount: float | None = None,
    on_level: Callable[[], object] | None = None,
) -> KneserNeyTables:
    """Count every level and derive modified-KN discounts.

    ``symbol_at_lag(j, start, stop)`` returns the context symbols ``j`` positions back of
    events ``start:stop`` (the begin marker before the unit starts), and their outcomes for
    ``j = 0``; there are ``n_events`` events. ``on_level()`` is called ``order`` times, once
    per level (progress).

    An event's *window* is its context symbols nearest first, then its outcome:
    ``(s_1, ..., s_{N-1}, o)``. Context ids are ranks in the lexicographic order of these
    tuples, so every level is a prefix of the window. When the whole window fits one 64-bit
    word in mixed radix ``n_symbols`` (uint64 above 2**63), one sort of the windows gives
    every level: the sorted distinct windows are the ``N``-gram types, their distinct
    prefixes the contexts (:func:`_prefix_levels`). Otherwise the leading symbols are first
    replaced by the id of their prefix, ranked per event several symbols at a time (as many
    as one packed sort or a dense table takes, :func:`_jump_length`), until the rest fits.
    Per event there are at most two ``(n_events,)`` arrays, reused by every step: the keys
    (64-bit) and the ids; everything else is computed a block of events at a time.
    """
    context_keys: list[np.ndarray] = [np.zeros(0, dtype=np.int64)] * order
    # (n_events,) id of each event's context of length ``level``; None: all 0 (empty context)
    ids: np.ndarray | None = None
    n_ids = 1
    level = 0
    # (n_events,) ids of the contexts of each length ranked so far (>= 2, the current one
    # included): possible far parts of later keys (:func:`_plan_step`)
    far_ids: dict[int, np.ndarray] = {}
    # (n_events,) 8-byte memory for the keys of every step, then the windows
    work = np.empty(n_events, dtype=np.int64)
    while True:
        step = _plan_step(level, n_ids, far_ids, context_keys, order, n_symbols, n_events)
        if step.window:
            break
        if step.far is None:
            lags = range(level + 1, step.level + 1)
            space = n_ids * n_symbols ** len(lags)
            keys = _append_symbols(work, ids, n_symbols, symbol_at_lag, lags, space)
        else:
            assert ids is not None
            shift, far = step.far
            space = n_ids * len(context_keys[far])
            n_far = len(context_keys[far])
            keys = _far_keys(work, ids, far_ids[far], shift, n_far, symbol_at_lag, n_symbols)
        reuse = None if ids is None or level in far_ids else ids
        ids, distinct = rank_keys(keys, space, overwrite=True, out=reuse)
        del keys, reuse
        if step.far is None:
            new_levels = _prefix_levels(distinct, n_symbols, step.level - level)
        else:
            new_levels = _far_levels(distinct, context_keys, *step.far, level, n_symbols)
        context_keys[level + 1 : step.level + 1] = new_levels
        del distinct, new_levels
        for _ in range(level, step.level):
            if on_level is not None:
                on_level()
        level = step.level
        n_ids = len(context_keys[level])
        if 2 <= level <= order - 2:
            far_ids[level] = ids
    if step.far is None:
        space = n_ids * n_symbols ** (order - level)
        if space > 1 << 64:
            raise OverflowError(f"n-gram key space {n_ids} x {n_symbols} does not fit in 64 bits")
        # the remaining context symbols, then the outcome (lag 0)
        window_lags = [*range(level + 1, order), 0]
        windows = _append_symbols(work, ids, n_symbols, symbol_at_lag, window_lags, space)
    else:
        assert ids is not None
        shift, far = step.far
        n_far = len(context_keys[far])
        windows = _far_keys(
            work, ids, far_ids[far], shift, n_far, symbol_at_lag, n_symbols, outcome=True
        )
    del ids, far_ids
    distinct_windows, top_counts = distinct_counts(windows)
    del windows, work
    if step.far is None:
        levels = _prefix_levels(distinct_windows, n_symbols, order - level)
    else:
        levels = _far_levels(
            distinct_windows, context_keys, *step.far, level, n_symbols, outcome=True
        )
    del distinct_windows
    context_keys[level + 1 : order] = levels[:-1]
    type_keys = [np.zeros(0, dtype=np.int64)] * (order + 1)
    type_counts = [np.zeros(0, dtype=np.int64)] * (order + 1)
    type_keys[order], type_counts[order] = levels[-1], top_counts
    del levels
    for _ in range(level, order):
        if on_level is not None:
            on_level()
    for k in range(order - 1, 0, -1):
        # Continuation count of a k-gram: how many distinct (k+1)-gram types end with it.
        longer = type_keys[k + 1]
        suffix_keys = np.empty(len(longer), dtype=np.int64)
        for start in range(0, len(longer), _GATHER_CHUNK):
            longer_context, outcome = np.divmod(longer[start : start + _GATHER_CHUNK], n_symbols)
            shorter_context = context_keys[k][longer_context] // n_symbols
            shorter_context *= n_symbols
            shorter_context += outcome
            suffix_keys[start : start + _GATHER_CHUNK] = shorter_context
        type_keys[k], type_counts[k] = distinct_counts(suffix_keys)
        del suffix_keys
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


class _Step(NamedTuple):
    """What :func:`count_tables` does next from the current context length.

    ``window``: build the windows (context ids, the rest, outcome) and finish; else rank
    per event the contexts of length ``level``. ``far`` is None when the rest is raw
    symbols, else ``(shift, length)``: the rest is the id of the length-``length`` context
    of the event ``shift`` places earlier (it holds symbols ``shift + 1 ..``).
    """

    window: bool
    level: int
    far: tuple[int, int] | None


def _plan_step(
    level: int,
    n_ids: int,
    far_ids: dict[int, np.ndarray],
    context_keys: list[np.ndarray],
    order: int,
    n_symbols: int,
    n_events: int,
) -> _Step:
    """The cheapest next step: a window if one fits 64 bits, else the longest ranking step.

    Event ``e``'s symbols ``shift + 1 .. shift + length`` are the context of length
    ``length`` of event ``e - shift`` (when both lie in one unit), so a key ``(id of the
    first level symbols, that context's id)`` takes ``n_ids * D_length`` values instead of
    ``n_ids * n_symbols**length``. With ``shift < level`` the two parts overlap; a repeated
    symbol changes neither the keys' order nor which keys are equal.
    """
    if level == order - 1 or n_ids * n_symbols ** (order - level) <= _WINDOW_LIMIT:
        return _Step(True, order - 1, None)
    sizes = {length: len(context_keys[length]) for length in far_ids}
    windows = [
        (n_ids * size * n_symbols, (order - 1 - length, length))
        for length, size in sizes.items()
        if 1 <= order - 1 - length <= level and n_ids * size * n_symbols <= _WINDOW_LIMIT
    ]
    if windows:
        return _Step(True, order - 1, min(windows)[1])
    if n_ids * n_symbols >= 1 << 62:
        raise OverflowError(f"n-gram key space {n_ids} x {n_symbols} does not fit in 63 bits")
    best = _Step(False, level + _jump_length(n_ids, n_symbols, n_events, order - 1 - level), None)
    for length, size in sizes.items():
        shift = min(level, order - 1 - length)
        space = n_ids * size
        cheap = space <= _dense_limit(n_events) or packed_fits(space, n_events)
        if shift >= 1 and shift + length > best.level and cheap:
            best = _Step(False, shift + length, (shift, length))
    return best


def _far_keys(
    work: np.ndarray,
    ids: np.ndarray,
    far_ids: np.ndarray,
    shift: int,
    n_far: int,
    symbol_at_lag: SymbolsAtLag,
    n_symbols: int,
    *,
    outcome: bool = False,
) -> np.ndarray:
    """``(n_events,)`` keys ``ids[e] * n_far + far_ids[e - shift]`` (then ``* n_symbols + o``).

    ``far_ids`` are ``(n_events,)`` context ids below ``n_far``. Event ``e - shift``'s
    context holds symbols ``shift + 1 ...`` of event ``e`` when ``e`` is at least ``shift``
    into its unit (its symbol ``shift`` back is not the begin marker); otherwise those
    symbols are all begin markers, the context of any unit's first event (event 0's).
    Written into ``work`` a block at a time.
    """
    space = (int(ids.max()) + 1 if len(ids) else 1) * n_far * (n_symbols if outcome else 1)
    begin = n_symbols - 1  # the begin marker's id in the context alphabet
    dtype = _key_dtype(space)
    keys = work.view(dtype)[: len(work)]
    for start in range(0, len(keys), _GATHER_CHUNK):
        stop = min(start + _GATHER_CHUNK, len(keys))
        block = keys[start:stop]
        block[...] = ids[start:stop]
        block *= n_far
        # far_ids[e - shift] for e in start:stop; where e < shift, any value (masked next)
        far = np.empty(stop - start, dtype=far_ids.dtype)
        missing = min(max(shift - start, 0), len(far))
        far[:missing] = 0
        far[missing:] = far_ids[start + missing - shift : stop - shift]
        far[symbol_at_lag(shift, start, stop) == begin] = far_ids[0]
        block += far.astype(dtype, copy=False)
        if outcome:
            block *= n_symbols
            block += symbol_at_lag(0, start, stop).astype(dtype, copy=False)
    return keys


def _far_levels(
    keys: np.ndarray,
    context_keys: list[np.ndarray],
    shift: int,
    length: int,
    level: int,
    n_symbols: int,
    *,
    outcome: bool = False,
) -> list[np.ndarray]:
    """Level keys from sorted distinct keys ``(id, far id[, o])`` of :func:`_far_keys`.

    ``id`` is a context of length ``level``, ``far id`` one of length ``length`` starting
    after symbol ``shift``. Level ``level + i`` is the prefix ``(id, ancestor of the far id
    at length level - shift + i)``: a context's parent drops its last (farthest) symbol, so
    ancestors are found walking ``context_keys`` down from ``length``, and the ancestor's
    last symbol is ``context_keys[j][ancestor] % n_symbols``. Returns the keys of levels
    ``level + 1 .. shift + length``, then (``outcome``) of the types one level up.
    """
    n_far = len(context_keys[length])
    overlap = level - shift
    radix = np.uint64(n_symbols)

    def decode(
        block: np.ndarray,
    ) -> tuple[np.ndarray, list[tuple[tuple[np.ndarray, ...], np.ndarray]]]:
        block = block.astype(np.uint64)
        rest, last = np.divmod(block, radix) if outcome else (block, block)
        base, ancestor = np.divmod(rest, np.uint64(n_far))
        base, ancestor = base.astype(np.int64), ancestor.astype(np.int64)
        columns: list[tuple[tuple[np.ndarray, ...], np.ndarray]] = []
        for j in range(length, overlap, -1):  # ancestors from length down to overlap + 1
            parent, digit = np.divmod(context_keys[j][ancestor], n_symbols)
            columns.append(((base, ancestor), digit))
            ancestor = parent
        columns.reverse()
        if outcome:
            columns.append(((block,), last.astype(np.int64)))
        return base, columns

    return _scan_levels(keys, decode, n_symbols, length - overlap + int(outcome))


def _append_symbols(
    work: np.ndarray,
    ids: np.ndarray | None,
    n_symbols: int,
    symbol_at_lag: SymbolsAtLag,
    lags: Sequence[int],
    space: int,
) -> np.ndarray:
    """``(n_events,)`` keys ``((ids * n_symbols + s_a) * n_symbols + s_b) ...``.

    ``s_a, s_b, ...`` are the symbols at ``lags`` (lag 0: the outcome); ``ids`` None stands
    for all zeros. Every key is below ``space``: the keys are int32 below 2**31, int64
    up to 2**63, else uint64 (:func:`_key_dtype`). Written into ``work``'s memory
    (``(n_events,)``, 8 bytes each) a block at a time, so no full-size symbol array exists.
    """
    dtype = _key_dtype(space)
    keys = work.view(dtype)[: len(work)]
    for start in range(0, len(keys), _GATHER_CHUNK):
        stop = min(start + _GATHER_CHUNK, len(keys))
        block = keys[start:stop]
        rest = list(lags)
        if ids is not None:
            block[...] = ids[start:stop]
        else:
            block[...] = symbol_at_lag(rest.pop(0), start, stop)
        for lag in rest:
            block *= n_symbols
            # Cast first: uint64 + int32 would be computed in float64.
            block += symbol_at_lag(lag, start, stop).astype(dtype, copy=False)
    return keys


def _key_dtype(space: int) -> Any:
    """Narrowest of int32, int64, uint64 that holds every key below ``space <= 2**64``."""
    if space <= 1 << 63:
        return index_dtype(space)
    return np.uint64


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
    # Prefixes are computed in uint64: keys may pass 2**63 (uint64 windows), and mixing
    # uint64 with int64 operands would give float64. Divisors stay below n_symbols**depth.
    radix = np.uint64(n_symbols)

    def decode(
        block: np.ndarray,
    ) -> tuple[np.ndarray, list[tuple[tuple[np.ndarray, ...], np.ndarray]]]:
        block = block.astype(np.uint64)
        columns: list[tuple[tuple[np.ndarray, ...], np.ndarray]] = []
        for i in range(1, depth + 1):
            prefix = block // radix ** np.uint64(depth - i) if i < depth else block
            columns.append(((prefix,), (prefix % radix).astype(np.int64)))
        # base * n_symbols + first digit is below 2**62: the base ids one level down
        base = (columns[0][0][0] // radix).astype(np.int64)
        return base, columns

    return _scan_levels(keys, decode, n_symbols, depth)


def _scan_levels(
    keys: np.ndarray,
    decode: Callable[
        [np.ndarray], tuple[np.ndarray, list[tuple[tuple[np.ndarray, ...], np.ndarray]]]
    ],
    n_symbols: int,
    depth: int,
) -> list[np.ndarray]:
    """Keys of ``depth`` consecutive levels from sorted distinct keys, a block at a time.

    ``decode(block)`` gives, for a block of ``keys``, the ids one level below the first
    and, per level, the arrays whose values together identify each entry's prefix at
    that level (equal prefixes are adjacent) and that prefix's last symbol. A level's key
    is (id of the prefix one level down) ``* n_symbols +`` last symbol; ids are ranks of
    the distinct prefixes, counted on from block to block.
    """
    pieces: list[list[np.ndarray]] = [[np.zeros(0, dtype=np.int64)] for _ in range(depth)]
    # Carried from block to block, per level: the last prefix seen, distinct prefixes so far.
    last: list[tuple[Any, ...] | None] = [None] * depth
    n_distinct = [0] * depth
    for start in range(0, len(keys), _GATHER_CHUNK):
        parent, columns = decode(keys[start : start + _GATHER_CHUNK])
        for i, (prefix, digit) in enumerate(columns):
            is_new = np.zeros(len(digit), dtype=bool)
            previous = last[i]
            is_new[0] = previous is None or any(
                part[0] != value for part, value in zip(prefix, previous, strict=True)
            )
            for part in prefix:
                is_new[1:] |= part[1:] != part[:-1]
            level_keys = parent[is_new]
            level_keys *= n_symbols
            level_keys += digit[is_new]
            pieces[i].append(level_keys)
            # Ids of each entry's prefix at this level: the parents of the next level.
            parent = np.cumsum(is_new, dtype=np.int64)
            parent += n_distinct[i] - 1
            n_distinct[i] += int(np.count_nonzero(is_new))
            last[i] = tuple(part[-1] for part in prefix)
    return [np.concatenate(level) for level in pieces]


def interpolated_probs(
    tables: KneserNeyTables, symbol_at_lag: Callable[[int], np.ndarray], outcomes: np.ndarray
) -> np.ndarray:
    """(n_events,) interpolated modified-KN probability of each outcome.

    ``p_0 = 1 / n_symbols`` (uniform over tokens and the end marker); for ``k = 1..N``,
    ``p_k = max(c - D(c), 0) / c(h) + gamma(h) p_{k-1}`` when the length ``k-1`` context
    ``h`` was seen in training, else ``p_k = p_{k-1}`` (Chen & Goodman 1998, eqs. 17 and 19).

    Many events are first put in the lexicographic order of their nearest context symbols
    (one packed sort, :func:`_score_order`): every level's look-ups then walk the tables
    mostly forwards, and the probabilities are put back in event order once, at the end.
    """
    n_symbols = tables.n_symbols
    # (n_events,) event index at each sorted place, None: events in their own order
    perm = _score_order(symbol_at_lag, n_symbols, tables.order - 1, len(outcomes))
    ordered = perm is not None
    probs = np.full(len(outcomes), 1.0 / n_symbols)
    # (n_active,) the places (sorted order) whose length k-1 context was seen in training
    # (None: all) and that context's id. An unseen context stays unseen when extended, so
    # the set shrinks. Ids and keys stay int64 throughout: ``id * n_symbols`` passes 2**31
    # at large vocabularies, and an int32 operand would wrap silently (numpy keeps dtypes).
    active: np.ndarray | None = None
    context_ids = np.zeros(len(outcomes), dtype=np.int64)
    for k in range(1, tables.order + 1):
        if k > 1:
            symbols = _at_places(symbol_at_lag(k - 1), perm, active)
            keys = context_ids * n_symbols + symbols
            del symbols
            found = lookup(tables.context_keys[k - 1], keys, ordered=ordered)
            seen = found >= 0
            if seen.all():
                context_ids = found
            else:
                active = np.flatnonzero(seen) if active is None else active[seen]
                context_ids = found[seen]
        keys = context_ids * n_symbols + _at_places(outcomes, perm, active)
        where = lookup(tables.type_keys[k], keys, ordered=ordered)
        alpha = tables.alphas(k, where, context_ids)
        gamma = tables.gammas[k][context_ids]
        if active is None:
            probs = alpha + gamma * probs
        else:
            probs[active] = alpha + gamma * probs[active]
    if perm is None:
        return probs
    in_event_order = np.empty(len(probs))
    in_event_order[perm] = probs
    return in_event_order


def _at_places(
    values: np.ndarray, perm: np.ndarray | None, active: np.ndarray | None
) -> np.ndarray:
    """``values`` (event order) at the sorted places ``active`` (None: at every place)."""
    if perm is not None:
        return values[perm if active is None else perm[active]]
    return values if active is None else values[active]


def _score_order(
    symbol_at_lag: Callable[[int], np.ndarray], n_symbols: int, n_lags: int, n_events: int
) -> np.ndarray | None:
    """(n_events,) events in the order of their symbols at lags 1, 2, ... (None: unsorted).

    As many leading lags as fit one packed sort with the positions; None when there are
    few events (searching them unsorted is cheaper) or not even one lag fits.
    """
    depth = 0
    while depth < n_lags and packed_fits(n_symbols ** (depth + 1), n_events):
        depth += 1
    if n_events <= _SORT_SCORED_EVENTS or depth == 0:
        return None
    keys = np.zeros(n_events, dtype=np.int64)
    for lag in range(1, depth + 1):
        keys *= n_symbols
        keys += symbol_at_lag(lag)
    perm = np.empty(n_events, dtype=np.int64)
    filled = 0
    for _, positions in packed_sorted_blocks(keys, n_symbols**depth, overwrite=True):
        perm[filled : filled + len(positions)] = positions
        filled += len(positions)
    return perm
