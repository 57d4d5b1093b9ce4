"""``count_tables`` builds exactly the tables of a plain level-by-level count, on every path.

The reference ranks one level at a time with ``np.unique(return_inverse=True)`` (numpy,
the outside reference) and takes continuation counts by sets of Python tuples (common
practice, no source). The model under test replaces several levels by one sort of
windows or of multi-symbol jumps; the tables, and so every log-probability, must not
change by a bit.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from retrograde import SequenceSet
from retrograde.families import _ngram_counts
from retrograde.families._events import unit_events
from retrograde.families._ngram_counts import _prefix_levels, count_tables


def reference_tables(units, order, vocab_size):
    """(context_keys, type_keys, type_counts) by one np.unique per level and tuple sets."""
    n_symbols = vocab_size + 1
    windows = []  # (context nearest first, outcome) of every event
    for unit in units:
        padded = [vocab_size] * (order - 1) + [int(t) for t in unit]
        for t in range(len(unit) + 1):
            context = tuple(padded[t : t + order - 1][::-1])
            windows.append((context, int(unit[t]) if t < len(unit) else vocab_size))
    context_keys = [[]]
    ids = np.zeros(len(windows), dtype=np.int64)
    for j in range(1, order):
        lag_j = np.array([context[j - 1] for context, _ in windows], dtype=np.int64)
        distinct, ids = np.unique(ids * n_symbols + lag_j, return_inverse=True)
        context_keys.append(distinct.tolist())
        ids = ids.ravel()
    top = Counter((ids * n_symbols + np.array([o for _, o in windows])).tolist())
    type_keys = {order: sorted(top)}
    type_counts = {order: [top[k] for k in sorted(top)]}
    # Continuation counts: distinct (k+1)-gram types (as symbol tuples) sharing a k-suffix.
    gram_types = {context + (outcome,) for context, outcome in windows}
    for k in range(order - 1, 0, -1):
        suffixes = Counter(
            gram[: k - 1] + (gram[-1],) for gram in {g[:k] + (g[-1],) for g in gram_types}
        )
        gram_types_k = sorted(suffixes)
        rank = {}  # context tuple (nearest first) -> id at its level
        for j in range(1, k):
            prefixes = sorted({w[0][:j] for w in windows})
            rank.update({p: i for i, p in enumerate(prefixes)})
        keys = [(rank[g[:-1]] if k > 1 else 0) * n_symbols + g[-1] for g in gram_types_k]
        pairs = sorted(zip(keys, (suffixes[g] for g in gram_types_k), strict=True))
        type_keys[k] = [key for key, _ in pairs]
        type_counts[k] = [count for _, count in pairs]
    return context_keys, type_keys, type_counts


def assert_tables_match(units, order, vocab_size):
    sequence_set = SequenceSet.from_list(units, vocab_size=vocab_size)
    symbol_at_lag, outcomes, _ = unit_events(sequence_set)
    passes = []
    tables = count_tables(
        symbol_at_lag,
        outcomes,
        order=order,
        n_symbols=vocab_size + 1,
        on_level=lambda: passes.append(1),
    )
    assert len(passes) == order
    context_keys, type_keys, type_counts = reference_tables(units, order, vocab_size)
    for j in range(1, order):
        assert tables.context_keys[j].dtype == np.int64
        assert tables.context_keys[j].tolist() == context_keys[j], f"context level {j}"
    for k in range(1, order + 1):
        assert tables.type_keys[k].tolist() == type_keys[k], f"type level {k}"
        assert tables.type_counts[k].tolist() == type_counts[k], f"counts level {k}"
    return tables


def random_units(rng, vocab_size, n_units, max_length=9):
    # Half the tokens from a few frequent ids, so contexts repeat and counts exceed 1.
    frequent = rng.integers(0, vocab_size, 3)
    units = []
    for _ in range(n_units):
        length = int(rng.integers(0, max_length))
        unit = np.where(
            rng.random(length) < 0.5,
            rng.choice(frequent, length),
            rng.integers(0, vocab_size, length),
        )
        units.append(unit)
    return units


# Each case forces one way through count_tables: the whole window in one int64; jumps
# ranked with a dense table; jumps by packed sort; the argsort fallback.
PATHS = {
    "window": {},
    "dense jumps": {"_WINDOW_LIMIT": 40},
    "packed jumps": {"_WINDOW_LIMIT": 40, "_DENSE_KEYS": 0, "_BITSET_KEYS_PER_EVENT": 0},
    "argsort jumps": {
        "_WINDOW_LIMIT": 40,
        "_DENSE_KEYS": 0,
        "_BITSET_KEYS_PER_EVENT": 0,
        "packed_fits": lambda space, n: False,
    },
}


@pytest.mark.parametrize("path", list(PATHS))
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    vocab_size=st.sampled_from([1, 2, 3, 7, 300, 70_000, 1 << 20]),
    order=st.integers(1, 6),
    n_units=st.integers(1, 40),
    seed=st.integers(0, 2**32 - 1),
)
def test_tables_equal_the_level_by_level_reference(path, vocab_size, order, n_units, seed):
    units = random_units(np.random.default_rng(seed), vocab_size, n_units)
    with pytest.MonkeyPatch.context() as patch:
        for name, value in PATHS[path].items():
            patch.setattr(_ngram_counts, name, value)
        assert_tables_match(units, order, vocab_size)


def test_ten_gram_windows_on_a_huge_vocabulary_need_jumps():
    # (2**20 + 1)**10 is far above 2**63: the first levels are ranked per event before
    # the remaining symbols fit one int64 window.
    rng = np.random.default_rng(3)
    units = random_units(rng, 1 << 20, 60, max_length=14)
    assert_tables_match(units, 10, 1 << 20)


def test_a_single_empty_unit_has_one_event_per_level():
    tables = assert_tables_match([np.array([], dtype=np.int64)], 4, 5)
    assert tables.type_counts[4].tolist() == [1]


def test_prefix_levels_split_radix_keys_into_levels():
    # Keys (base, digit, digit) in radix 4; level 1 keys are base * 4 + first digit, level
    # 2 keys the level-1 id * 4 + second digit.
    tuples = [(0, 3, 1), (2, 0, 0), (2, 0, 3), (2, 1, 2)]
    keys = np.array([b * 16 + d1 * 4 + d2 for b, d1, d2 in tuples])
    first, second = _prefix_levels(keys, 4, 2)
    assert first.tolist() == [0 * 4 + 3, 2 * 4 + 0, 2 * 4 + 1]
    assert second.tolist() == [0 * 4 + 1, 1 * 4 + 0, 1 * 4 + 3, 2 * 4 + 2]
