"""Packed-sort ranking and the rank dispatcher give exactly ``np.unique(return_inverse=True)``.

``numpy.unique`` (sort-based) is the outside reference for every ranking check and
``np.argsort(kind="stable")`` for the order; the level tables are checked against a plain
Python reference built from tuples (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde.data import _sequences
from retrograde.families import _ngram_counts, _packed_sort
from retrograde.families._packed_sort import (
    index_bits,
    packed_fits,
    packed_rank,
    packed_sorted_blocks,
)


def _reference(keys: np.ndarray) -> tuple[list[int], list[int]]:
    distinct, inverse = np.unique(keys, return_inverse=True)
    return inverse.ravel().tolist(), distinct.tolist()


def _blocks(keys: np.ndarray, space: int) -> tuple[list[int], list[int]]:
    pieces = list(packed_sorted_blocks(keys, space))
    if not pieces:
        return [], []
    return (
        np.concatenate([k for k, _ in pieces]).tolist(),
        np.concatenate([p for _, p in pieces]).tolist(),
    )


@settings(max_examples=80, deadline=None)
@given(
    space_bits=st.integers(1, 62),
    raw=st.lists(st.integers(0, 2**63 - 1), min_size=0, max_size=200),
    dtype=st.sampled_from([np.int32, np.int64]),
)
def test_packed_rank_equals_numpy_unique_with_inverse(space_bits, raw, dtype):
    # The widest space that still fits 64 bits with the positions, at most 2**space_bits.
    space = 1 << min(space_bits, 64 - index_bits(len(raw)))
    if dtype == np.int32:
        space = min(space, 2**31)
    keys = np.array([value % space for value in raw], dtype=dtype)
    assert packed_fits(space, len(keys))  # wider spaces are refused (test below)
    ids, distinct = packed_rank(keys, space)
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)
    assert distinct.dtype == np.int64
    # The blocks are the keys in stable argsort order (numpy's stable sort, the reference).
    order = np.argsort(keys, kind="stable")
    assert _blocks(keys, space) == (keys[order].tolist(), order.tolist())


@pytest.mark.parametrize(
    ("keys", "space"),
    [
        ([], 1),
        ([0], 1),
        ([2**31 - 1], 2**31),  # int32's largest value
        ([2**31, 2**31 - 1, 2**31], 2**31 + 1),  # just past int32
        ([2**62 - 1, 0, 2**62 - 1], 2**62),  # 62 + 2 bits
        ([2**63 - 1], 2**63),  # one key: 63 bits + 1 index bit
        ([5, 5, 5, 5], 6),  # one distinct key
    ],
)
def test_packed_rank_edge_cases(keys, space):
    array = np.array(keys, dtype=np.int64)
    ids, distinct = packed_rank(array, space)
    if len(keys):
        assert (ids.tolist(), distinct.tolist()) == _reference(array)
    else:
        assert ids.tolist() == [] and distinct.tolist() == []


def test_packed_rank_refuses_keys_and_positions_wider_than_64_bits():
    assert packed_fits(2**62, 4) and not packed_fits(2**62 + 1, 4)
    with pytest.raises(OverflowError, match="do not fit 64 bits"):
        packed_rank(np.arange(5, dtype=np.int64), 2**62)


def test_index_bits_cover_every_position():
    for n in [0, 1, 2, 3, 4, 5, 2**20, 2**20 + 1, 2**31]:
        assert (1 << index_bits(n)) >= n and index_bits(n) >= 1


def test_blocks_carry_the_rank_across_block_boundaries(monkeypatch):
    # Runs of equal keys that straddle the edge of a block, and a block that starts
    # with a new key: the running count must continue from one block to the next.
    monkeypatch.setattr(_packed_sort, "_CHUNK", 4)
    rng = np.random.default_rng(0)
    for size in [1, 3, 4, 5, 8, 9, 31]:
        keys = rng.integers(0, 6, size) * 10**12
        ids, distinct = packed_rank(keys, 6 * 10**12)
        assert (ids.tolist(), distinct.tolist()) == _reference(keys)


def test_overwrite_reuses_an_int64_key_array():
    keys = np.array([9, 2, 9, 2**40], dtype=np.int64)
    expected = _reference(keys.copy())
    ids, distinct = packed_rank(keys, 2**41, overwrite=True)
    assert (ids.tolist(), distinct.tolist()) == expected


@pytest.mark.parametrize("path", ["dense", "bitset", "packed", "argsort"])
@settings(max_examples=25, deadline=None)
@given(raw=st.lists(st.integers(0, 2**40), min_size=1, max_size=300))
def test_rank_keys_gives_numpy_unique_on_every_path(path, raw):
    keys = np.array(raw, dtype=np.int64)
    space = int(keys.max()) + 1
    calls: list[str] = []
    # A context manager, not the fixture: hypothesis runs the body many times per fixture.
    with pytest.MonkeyPatch.context() as patch:

        def spy(name):
            function = getattr(_ngram_counts, name)
            patch.setattr(
                _ngram_counts, name, lambda *a, **k: calls.append(name) or function(*a, **k)
            )

        spy("bitset_rank")
        spy("packed_rank")
        if path == "dense":
            space = min(space, 1 << 16)
        else:
            patch.setattr(_ngram_counts, "_DENSE_KEYS", 0)
        if path == "bitset":
            space = min(space, 32 * len(keys))
        else:
            patch.setattr(_ngram_counts, "_BITSET_KEYS_PER_EVENT", 0)
        if path == "argsort":
            patch.setattr(_ngram_counts, "packed_fits", lambda space, n: False)
        keys %= space
        ids, distinct = _ngram_counts.rank_keys(keys.copy(), space)
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)
    expected_calls = {"dense": [], "bitset": ["bitset_rank"], "packed": ["packed_rank"]}
    assert calls == expected_calls.get(path, [])


def test_rank_keys_ids_widen_past_int32_positions(monkeypatch):
    # Sets of 2**31 keys and more take int64 ids; lowering the limit runs that path.
    monkeypatch.setattr(_sequences, "INT32_LIMIT", 8)
    keys = np.array([7, 3, 7, 2**45, 3, 0, 0, 1, 2, 2**45], dtype=np.int64)
    ids, distinct = packed_rank(keys, 2**46)
    assert ids.dtype == np.int64
    assert (ids.tolist(), distinct.tolist()) == _reference(keys)
