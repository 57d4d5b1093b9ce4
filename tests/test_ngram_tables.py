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

from _ngram_paths import JUMP_PATHS
from retrograde import SequenceSet
from retrograde.families import _ngram_counts
from retrograde.families._events import unit_event_blocks, unit_events
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
    symbol_at_lag, n_events = unit_event_blocks(sequence_set)
    passes = []
    tables = count_tables(
        symbol_at_lag,
        n_events,
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
    **JUMP_PATHS,
    # One symbol per jump and a limit that raw windows pass before shifted ones do.
    "shifted windows": {"_WINDOW_LIMIT": 10**7, "_jump_length": lambda *args: 1},
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


def test_tiny_blocks_give_the_same_tables_and_scores(monkeypatch):
    # Every helper that scans in blocks (ranking, distinct counts, prefix levels, context
    # blocks of the totals, the per-event arrays) carries state from block to block;
    # blocks of 3 put a boundary inside nearly every run of equal keys.
    from retrograde.families import _events, _packed_sort, make

    rng = np.random.default_rng(8)
    units = random_units(rng, 50, 120, max_length=12)
    train = SequenceSet.from_list(units, vocab_size=50)
    whole = {order: make("ngram", order=order).fit(train) for order in (1, 2, 4, 7)}
    for module, name in [
        (_ngram_counts, "_GATHER_CHUNK"),
        (_packed_sort, "_CHUNK"),
        (_events, "_BLOCK"),
    ]:
        monkeypatch.setattr(module, name, 3)
    # Jumps too (window limit), ranked by packed sort (no dense table, no bitset).
    monkeypatch.setattr(_ngram_counts, "_WINDOW_LIMIT", 10**6)
    monkeypatch.setattr(_ngram_counts, "_DENSE_KEYS", 0)
    monkeypatch.setattr(_ngram_counts, "_BITSET_KEYS_PER_EVENT", 0)
    for order, reference in whole.items():
        blocked = assert_tables_match(units, order, 50)
        model = make("ngram", order=order).fit(train)
        for j in range(1, order):
            np.testing.assert_array_equal(model.tables_.context_keys[j], blocked.context_keys[j])
        for k in range(1, order + 1):
            np.testing.assert_array_equal(model.tables_.totals[k], reference.tables_.totals[k])
            np.testing.assert_array_equal(model.tables_.gammas[k], reference.tables_.gammas[k])
        np.testing.assert_array_equal(
            model.logprobs(train).values, reference.logprobs(train).values
        )


@pytest.mark.parametrize("vocab_size", [5, 300, 70_000])
def test_scoring_in_context_order_gives_the_same_values_as_in_event_order(monkeypatch, vocab_size):
    # Above _SORT_SCORED_EVENTS events the scored events are sorted by their nearest
    # context symbols first; the values must be bit-identical to scoring them unsorted.
    from retrograde.families import make

    rng = np.random.default_rng(vocab_size)
    train = SequenceSet.from_list(random_units(rng, vocab_size, 400), vocab_size=vocab_size)
    test = SequenceSet.from_list(random_units(rng, vocab_size, 300), vocab_size=vocab_size)
    calls = []
    original = _ngram_counts._score_order

    def counted(*args):
        order = original(*args)
        calls.append(order is not None)
        return order

    monkeypatch.setattr(_ngram_counts, "_score_order", counted)
    for order in (1, 3, 6):
        model = make("ngram", order=order).fit(train)
        monkeypatch.setattr(_ngram_counts, "_SORT_SCORED_EVENTS", 10**9)
        unsorted = model.logprobs(test).values
        monkeypatch.setattr(_ngram_counts, "_SORT_SCORED_EVENTS", 0)
        np.testing.assert_array_equal(model.logprobs(test).values, unsorted)
    # The sorted path was taken (a permutation was returned) for orders above 1, which
    # have context symbols to sort by.
    assert calls == [False, False, False, True, False, True]


def test_lookup_finds_the_same_indices_ordered_or_not():
    rng = np.random.default_rng(2)
    table = np.unique(rng.integers(0, 10**12, 100_000))
    queries = np.concatenate([rng.choice(table, 3000), rng.integers(0, 10**12, 3000)])
    expected = [int(np.flatnonzero(table == q)[0]) if q in table else -1 for q in queries[:200]]
    for ordered in (False, True):
        found = _ngram_counts.lookup(table, queries, ordered=ordered)
        assert found.dtype == np.int64
        assert found[:200].tolist() == expected
        np.testing.assert_array_equal(found, _ngram_counts.lookup(table, queries))
        sorted_queries = np.sort(queries)
        assert np.array_equal(
            _ngram_counts.lookup(table, sorted_queries, ordered=ordered),
            _ngram_counts.lookup(table, sorted_queries),
        )


@pytest.mark.parametrize("block", [1, 2, 3, 1 << 20])
def test_unit_events_in_blocks_match_a_plain_reference(monkeypatch, block):
    from retrograde.families import _events

    monkeypatch.setattr(_events, "_BLOCK", block)
    units = [[4, 1], [], [2, 2, 2, 3, 0, 1], [3], [], []]
    symbol_at_lag, outcomes, offsets = unit_events(SequenceSet.from_list(units, vocab_size=5))
    begin = end = 5
    expected_outcomes = [t for unit in units for t in [*unit, end]]
    assert outcomes.tolist() == expected_outcomes
    assert offsets.tolist() == np.cumsum([0] + [len(u) + 1 for u in units]).tolist()
    for lag in range(1, 9):
        expected = [([begin] * lag + unit)[t] for unit in units for t in range(len(unit) + 1)]
        assert symbol_at_lag(lag).tolist() == expected
        for start in range(len(expected) + 1):
            for stop in range(start, len(expected) + 1):
                assert symbol_at_lag(lag, start, stop).tolist() == expected[start:stop]


@pytest.mark.parametrize(
    "units",
    [
        [[4, 1], [], [2, 2, 2, 3, 0, 1], [3], [], []],
        [[], [], []],  # no tokens at all
        [[0, 1, 2, 3, 4, 0, 1, 2, 3, 4, 0]],  # one unit longer than a block
    ],
)
def test_event_blocks_give_the_symbols_of_unit_events(units):
    sequence_set = SequenceSet.from_list(units, vocab_size=5)
    full, outcomes, offsets = unit_events(sequence_set)
    blocks, n_events = unit_event_blocks(sequence_set)
    assert n_events == int(offsets[-1]) == len(outcomes)
    for lag in range(0, 9):
        expected = full(lag).tolist()
        if lag == 0:
            assert expected == outcomes.tolist()
        for start in range(n_events + 1):
            for stop in range(start, n_events + 1):
                assert blocks(lag, start, stop).tolist() == expected[start:stop], (lag, start)


@pytest.mark.parametrize(
    ("vocab_size", "order"),
    [
        (6252, 5),  # 6253**5 = 9.6e18: above 2**63, below 2**64 (the Unicode benchmark)
        (7130, 5),  # 7131**5 = 1.85e19: just above 2**64, one level ranked per event first
        (511, 7),  # 512**7 = 2**63 exactly: int64 keys, largest divisor 512**6
        (1, 64),  # 2**64 exactly: uint64 windows of 64 binary digits
    ],
)
def test_windows_near_the_64_bit_limits_match_the_reference(vocab_size, order):
    # Symbols near both ends of the alphabet, so the largest windows are reached.
    rng = np.random.default_rng(vocab_size)
    high = np.unique([vocab_size - 1, max(vocab_size - 2, 0), 0])
    units = [rng.choice(high, rng.integers(0, 2 * order)) for _ in range(40)]
    units += random_units(rng, vocab_size, 40)
    if order > 10:
        units = units[:6]  # the tuple reference is slow at order 64
    tables = assert_tables_match(units, order, vocab_size)
    assert all(k.dtype == np.int64 for k in tables.type_keys[1:])


@pytest.mark.parametrize(
    ("order", "expected"),
    [
        # (window?, shift, length) of each step whose keys hold a far context id
        (5, [(True, 2, 2)]),  # windows (id_2, context_2 of e - 2, o)
        (6, [(False, 2, 2)]),  # ranking (id_2, context_2 of e - 2) to length 4; raw windows
        (8, [(False, 2, 2), (True, 3, 4)]),  # then windows (id_4, context_4 of e - 3, o):
        # symbol 4 is in both parts
        (10, [(False, 2, 2), (False, 4, 4)]),  # to length 4, to length 8; raw windows
    ],
)
def test_keys_with_a_far_context_id_match_the_reference(monkeypatch, order, expected):
    # Raw symbols need many ranking steps here; symbols shift + 1 ... of event e are the
    # context of event e - shift instead, as soon as (id, far id[, o]) fits the limit.
    rng = np.random.default_rng(order)
    units = random_units(rng, 300, 150, max_length=14)
    units += [np.array([299] * 12), np.array([0, 299] * 6)]  # the largest ids, repeated
    calls = []
    original = _ngram_counts._far_keys

    def spy(work, ids, far_ids, shift, n_far, *args, **kwargs):
        assert far_ids.max() < n_far
        calls.append((shift, kwargs.get("outcome", False)))
        return original(work, ids, far_ids, shift, n_far, *args, **kwargs)

    monkeypatch.setattr(_ngram_counts, "_far_keys", spy)
    monkeypatch.setattr(_ngram_counts, "_jump_length", lambda *args: 1)
    monkeypatch.setattr(_ngram_counts, "_WINDOW_LIMIT", 10**9)
    monkeypatch.setattr(_ngram_counts, "_DENSE_KEYS", 0)
    monkeypatch.setattr(_ngram_counts, "_BITSET_KEYS_PER_EVENT", 0)
    steps = []
    planner = _ngram_counts._plan_step
    monkeypatch.setattr(
        _ngram_counts,
        "_plan_step",
        lambda *args: steps.append(planner(*args)) or steps[-1],
    )
    assert_tables_match(units, order, 300)
    far_steps = [(step.window, *step.far) for step in steps if step.far is not None]
    assert far_steps == expected
    assert calls == [(shift, window) for window, shift, _ in expected]


def reference_logprobs(train_units, test_units, order, vocab_size, discount=None):
    """Log-probabilities by the previous implementation's float operations, one level at a time.

    Tables from :func:`reference_tables`; per level ``totals`` and the discounted mass by
    one ``np.bincount`` over all types, ``alpha = (c - D(c)) / total``, ``gamma = mass /
    total``; ``p = alpha + gamma * p`` while the context is seen (Chen & Goodman 1998,
    eqs. 17, 19 and 26). Scored event by event in arrays, unsorted.
    """
    n_symbols = vocab_size + 1
    context_keys, type_keys, type_counts = reference_tables(train_units, order, vocab_size)
    alphas, gammas = {}, {}
    for k in range(1, order + 1):
        keys = np.array(type_keys[k], dtype=np.int64)
        counts = np.array(type_counts[k], dtype=np.int64)
        if discount is None:
            n1, n2, n3, n4 = np.bincount(np.minimum(counts, 5), minlength=6)[1:5].astype(float)
            y = n1 / (n1 + 2 * n2) if n1 > 0 else 0.5
            formulas = [
                (1.0, 1 - 2 * y * n2 / n1 if n1 > 0 else np.nan),
                (2.0, 2 - 3 * y * n3 / n2 if n2 > 0 else np.nan),
                (3.0, 3 - 4 * y * n4 / n3 if n3 > 0 else np.nan),
            ]
            discounts = np.array([d if 0 < d <= r else y for r, d in formulas])
        else:
            discounts = np.full(3, discount)
        context = keys // n_symbols
        n_contexts = 1 if k == 1 else len(context_keys[k - 1])
        counts_f = counts.astype(np.float64)
        totals = np.bincount(context, weights=counts_f, minlength=n_contexts)
        per_type = discounts[np.minimum(counts, 3) - 1]
        mass = np.bincount(context, weights=per_type, minlength=n_contexts)
        alphas[k] = (counts_f - per_type) / totals[context]
        gammas[k] = mass / totals
    rows = []
    for unit in test_units:
        padded = [vocab_size] * (order - 1) + [int(t) for t in unit]
        for t in range(len(unit) + 1):
            context = padded[t : t + order - 1][::-1]
            rows.append((context, int(unit[t]) if t < len(unit) else vocab_size))
    probs = np.full(len(rows), 1.0 / n_symbols)
    ids = np.zeros(len(rows), dtype=np.int64)
    seen = np.ones(len(rows), dtype=bool)

    def find(table, keys):
        table = np.array(table, dtype=np.int64)
        where = np.searchsorted(table, keys).clip(0, max(len(table) - 1, 0))
        return np.where(len(table) > 0, np.where(table[where] == keys, where, -1), -1)

    for k in range(1, order + 1):
        if k > 1:
            lag = np.array([context[k - 2] for context, _ in rows], dtype=np.int64)
            found = find(context_keys[k - 1], ids * n_symbols + lag)
            seen &= found >= 0
            ids = np.where(seen, found, 0)
        outcome = np.array([o for _, o in rows], dtype=np.int64)
        where = find(type_keys[k], ids * n_symbols + outcome)
        alpha = np.where(where >= 0, alphas[k][np.maximum(where, 0)], 0.0)
        probs = np.where(seen, alpha + gammas[k][ids] * probs, probs)
    return np.log(probs)


@pytest.mark.parametrize("path", ["default", "tiny blocks", "sorted scoring", *PATHS])
@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    vocab_size=st.sampled_from([1, 3, 40, 300, 70_000]),
    order=st.integers(1, 7),
    seed=st.integers(0, 2**32 - 1),
    fixed=st.booleans(),
)
def test_log_probabilities_are_bit_identical_to_the_previous_computation(
    path, vocab_size, order, seed, fixed
):
    from retrograde.families import _events, _packed_sort, make
    from retrograde.families import ngram as ngram_module

    rng = np.random.default_rng(seed)
    train = random_units(rng, vocab_size, 80, max_length=12)
    test = random_units(rng, vocab_size, 40, max_length=12) + train[:20]
    discount = 0.4 if fixed else None
    with pytest.MonkeyPatch.context() as patch:
        if path == "tiny blocks":
            for module, name in [
                (_ngram_counts, "_GATHER_CHUNK"),
                (_packed_sort, "_CHUNK"),
                (_events, "_BLOCK"),
                (ngram_module, "_SCORE_TOKENS"),
            ]:
                patch.setattr(module, name, 3)
        elif path == "sorted scoring":
            patch.setattr(_ngram_counts, "_SORT_SCORED_EVENTS", 0)
        elif path != "default":
            for name, value in PATHS[path].items():
                patch.setattr(_ngram_counts, name, value)
        model = make("ngram", order=order, discount=discount)
        model.fit(SequenceSet.from_list(train, vocab_size=vocab_size))
        ours = model.logprobs(SequenceSet.from_list(test, vocab_size=vocab_size)).values
    expected = reference_logprobs(train, test, order, vocab_size, discount)
    assert np.array_equal(ours, expected)
