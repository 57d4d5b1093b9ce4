"""The bitset rank gives exactly ``np.unique(keys, return_inverse=True)``, in linear time.

``numpy.unique`` (sort-based) is the outside reference for every ranking check; Python's
``bin(x).count("1")`` for the population count.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde.families import _ngram_counts
from retrograde.families._bitset_rank import bitset_rank, popcount64


def _reference(keys: np.ndarray) -> tuple[list[int], list[int]]:
    distinct, inverse = np.unique(keys, return_inverse=True)
    return inverse.ravel().tolist(), distinct.tolist()


@settings(max_examples=60, deadline=None)
@given(
    space=st.integers(1, 5000),
    raw=st.lists(st.integers(0, 10**9), min_size=0, max_size=300),
)
def test_bitset_rank_equals_numpy_unique_with_inverse(space, raw):
    keys = np.array([value % space for value in raw], dtype=np.int64)
    ids, distinct = bitset_rank(keys, space)
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)
    assert distinct.dtype == np.int64


def test_bitset_rank_handles_word_boundaries_and_the_last_key():
    # Keys on both sides of every 64-bit word edge, and space - 1 itself.
    keys = np.array([0, 63, 64, 127, 128, 191, 199, 64, 0, 199], dtype=np.int32)
    ids, distinct = bitset_rank(keys, 200)
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)


def test_bitset_rank_spans_several_unpacking_blocks():
    # More words than one unpacking step (2**16 words = 2**22 keys of space).
    rng = np.random.default_rng(0)
    space = (1 << 23) + 77
    keys = rng.integers(0, space, 50_000)
    ids, distinct = bitset_rank(keys, space)
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)


def test_popcount64_counts_set_bits_like_python():
    values = [0, 1, 2**63, 2**64 - 1, 0x5555_5555_5555_5555, 12345678901234567890]
    counts = popcount64(np.array(values, dtype=np.uint64)).tolist()
    assert counts == [bin(value).count("1") for value in values]


def test_rank_pairs_uses_the_bitset_between_dense_and_sorted_spaces(monkeypatch):
    # A key space above the dense limit but within 32 keys per event takes the bitset
    # path; its ids and keys match numpy's unique of the pair keys.
    monkeypatch.setattr(_ngram_counts, "_DENSE_KEYS", 16)
    calls = []
    monkeypatch.setattr(
        _ngram_counts, "bitset_rank", lambda k, s: calls.append(s) or bitset_rank(k, s)
    )
    rng = np.random.default_rng(1)
    high = rng.integers(0, 40, 400).astype(np.int32)
    low = rng.integers(0, 7, 400).astype(np.int32)
    ids, keys = _ngram_counts.rank_pairs(high.copy(), low, 7)
    assert calls == [40 * 7]
    assert (ids.tolist(), keys.tolist()) == _reference(high.astype(np.int64) * 7 + low)


@pytest.mark.parametrize("n_events", [10, 1000])
def test_rank_pairs_sorts_when_the_space_is_sparse_for_the_events(monkeypatch, n_events):
    monkeypatch.setattr(_ngram_counts, "_DENSE_KEYS", 16)
    monkeypatch.setattr(_ngram_counts, "bitset_rank", None)  # must not be called
    high = np.arange(n_events, dtype=np.int32) * 97  # space = 97 * n * 100 > 32 * n
    low = np.full(n_events, 3, dtype=np.int32)
    ids, keys = _ngram_counts.rank_pairs(high, low, 100)
    assert (ids.tolist(), keys.tolist()) == _reference(high.astype(np.int64) * 100 + 3)
