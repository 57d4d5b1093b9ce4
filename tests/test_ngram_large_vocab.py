"""The ngram family at vocabularies where ``id * (V + 1)`` passes 2**31.

Context ids are ranks among distinct contexts; a level's keys are ``id * (V + 1) + symbol``.
At V = 60,000 that passes 2**31 from the 35,792nd context on, so any int32 step in the key
arithmetic scores the model wrongly (it backs off, as if the context were unseen). These
tests compare against a slow reference written from the paper (``_kn_reference``) and
against NLTK, at vocabularies on both sides of the boundaries 2**31 / (V + 1).
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _kn_reference import ReferenceKneserNey, grams
from _ngram_paths import JUMP_PATHS
from retrograde import SequenceSet
from retrograde.data import _sequences
from retrograde.families import make


def mixed_units(rng, vocab_size, n_units, *, every_id=False, n_frequent=40):
    """Units mixing a few frequent ids (repeated n-grams) with ids drawn over all of [0, V).

    The rare ids give many distinct contexts, so context ids climb past 2**31 / (V + 1);
    ``every_id`` adds every id once (a shuffled run cut into units of 5), so even one-symbol
    contexts do. The frequent ids give counts above 1, so every discount and gamma is used.
    The largest id V - 1 always occurs.
    """
    frequent = rng.choice(vocab_size, n_frequent, replace=False)
    units = np.array_split(rng.permutation(vocab_size), vocab_size // 5) if every_id else []
    for _ in range(n_units):
        length = int(rng.integers(1, 9))
        use_frequent = rng.random(length) < 0.5
        unit = np.where(
            use_frequent, rng.choice(frequent, length), rng.integers(0, vocab_size, length)
        )
        units.append(unit)
    units.append(np.array([vocab_size - 1, int(frequent[0]), vocab_size - 1]))
    return units


def test_the_minimal_reproduction_scores_early_and_late_contexts_alike():
    # Units [a, perm[a]] for every a: every bigram context is seen once and behaves alike,
    # so log p(perm[a] | a) must not depend on a. Before the fix it was -1.4 for a = 100
    # and -12.1 for a = 40,000 (the key of context 40,000 wrapped past 2**31).
    vocab_size = 60_000
    perm = np.random.default_rng(0).permutation(vocab_size)
    units = SequenceSet.from_list([[a, perm[a]] for a in range(vocab_size)], vocab_size=vocab_size)
    scores = make("ngram", order=2, discount=0.5).fit(units).logprobs(units)
    assert scores[40_000][1] == pytest.approx(scores[100][1], rel=1e-12)
    assert scores[vocab_size - 1][0] == pytest.approx(scores[0][0], rel=1e-12)
    assert scores[40_000][1] > -1.5


@pytest.mark.parametrize(
    ("vocab_size", "order", "n_units", "every_id"),
    [
        # V + 1 one-symbol contexts (every id and the begin marker) have keys below (V + 1)**2:
        (46_339, 3, 8_000, True),  # 46,340**2 < 2**31: the control, no key can wrap
        (46_341, 3, 8_000, True),  # 46,342**2 > 2**31
        ((1 << 16) + 1, 3, 8_000, True),
        (1 << 20, 4, 6_000, False),
    ],
)
def test_scores_match_the_reference_from_the_paper_across_the_int32_boundary(
    vocab_size, order, n_units, every_id
):
    rng = np.random.default_rng(vocab_size)
    train = mixed_units(rng, vocab_size, n_units, every_id=every_id)
    fresh = mixed_units(rng, vocab_size, 200)
    model = make("ngram", order=order).fit(SequenceSet.from_list(train, vocab_size=vocab_size))
    # One-symbol contexts get ids up to their count; past 2**31 / (V + 1) their keys would
    # wrap in int32 (except in the control).
    wraps = len(model.tables_.context_keys[1]) * (vocab_size + 1) > 2**31
    assert wraps == (vocab_size != 46_339)
    # Scored in one batch of at least V / 4 events, as a test split of real size would be
    # (small batches take another look-up path).
    copies = max(1, -(-vocab_size // 4 // sum(len(u) + 1 for u in train)))
    scored = fresh + train * copies
    ours = model.logprobs(SequenceSet.from_list(scored, vocab_size=vocab_size))
    reference = ReferenceKneserNey(train, order, vocab_size)
    expected_discounts = [reference.discounts[k] for k in range(1, order + 1)]
    np.testing.assert_allclose(model.tables_.discounts[1:], expected_discounts, rtol=1e-12)
    sample = [*range(len(fresh)), *(len(fresh) + rng.choice(len(train), 400, replace=False))]
    for index in sample:
        expected = reference.logprobs(scored[index])
        np.testing.assert_allclose(ours[index], expected, rtol=1e-9, atol=1e-12)


def test_the_int64_index_path_gives_the_same_scores_as_the_int32_path(monkeypatch):
    # Sets of 2**31 events and more take int64 index arrays; lowering the limit runs that
    # path on a small set, which must give identical counts and scores.
    rng = np.random.default_rng(5)
    units = SequenceSet.from_list(mixed_units(rng, 70_000, 3_000, every_id=True), vocab_size=70_000)
    small = make("ngram", order=3).fit(units).logprobs(units).values
    monkeypatch.setattr(_sequences, "INT32_LIMIT", 64)
    wide = make("ngram", order=3).fit(units).logprobs(units).values
    np.testing.assert_array_equal(wide, small)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    log2_vocab=st.integers(19, 21),
    extra_distinct=st.integers(0, 2_000),
    order=st.integers(2, 4),
    seed=st.integers(0, 2**32 - 1),
)
def test_random_large_vocabulary_sets_score_as_the_reference_and_ignore_id_labels(
    log2_vocab, extra_distinct, order, seed
):
    rng = np.random.default_rng(seed)
    vocab_size = int(rng.integers(1 << (log2_vocab - 1), 1 << log2_vocab)) + 1
    # Enough distinct ids that one-symbol context keys pass 2**31, plus a random surplus.
    n_distinct = 2**31 // (vocab_size + 1) + 100 + extra_distinct
    alphabet = rng.choice(vocab_size, n_distinct, replace=False)
    alphabet[0] = vocab_size - 1  # the largest id is always in play
    units = np.array_split(rng.permutation(alphabet), n_distinct // 4)  # every id occurs
    units += [alphabet[rng.integers(0, n_distinct, rng.integers(1, 10))] for _ in range(2_500)]
    model = make("ngram", order=order).fit(SequenceSet.from_list(units, vocab_size=vocab_size))
    assert len(model.tables_.context_keys[1]) * (vocab_size + 1) > 2**31
    # Probe units first, then enough copies of the training units for a batch of V / 4
    # events (the size at which the dense look-up tables are used).
    probe = units[:60] + units[-60:] + [alphabet[rng.integers(0, n_distinct, 6)] for _ in range(50)]
    copies = max(1, -(-vocab_size // 4 // sum(len(u) + 1 for u in units)))
    scored = probe + units * copies
    ours = model.logprobs(SequenceSet.from_list(scored, vocab_size=vocab_size))
    reference = ReferenceKneserNey(units, order, vocab_size)
    for index, unit in enumerate(probe):
        np.testing.assert_allclose(ours[index], reference.logprobs(unit), rtol=1e-9, atol=1e-12)
    # Relabelling the ids by a permutation of [0, V) changes no probability.
    relabel = rng.permutation(vocab_size)
    relabelled = make("ngram", order=order).fit(
        SequenceSet.from_list([relabel[u] for u in units], vocab_size=vocab_size)
    )
    moved = relabelled.logprobs(
        SequenceSet.from_list([relabel[u] for u in scored], vocab_size=vocab_size)
    )
    np.testing.assert_allclose(moved.values, ours.values, rtol=1e-12, atol=1e-14)


@pytest.mark.slow
def test_fixed_discount_scores_agree_with_nltk_on_sixty_thousand_distinct_words():
    from nltk.lm import KneserNeyInterpolated

    # NLTK's conventions aligned as in test_ngram.py: its unigram level is the undiscounted
    # continuation distribution, equal to ours when every outcome continues some context,
    # so every id (and the end marker) occurs in training; it is fed exactly the n-grams
    # that end at a predicted outcome, with every lower-order suffix.
    vocab_size, order, discount = 60_000, 3, 0.4
    rng = np.random.default_rng(11)
    every_id = list(rng.permutation(vocab_size).reshape(-1, 5))
    zipf = np.minimum(rng.zipf(1.3, 12_000), vocab_size) - 1
    train = every_id + list(zipf.reshape(-1, 6))
    model = make("ngram", order=order, discount=discount)
    model.fit(SequenceSet.from_list(train, vocab_size=vocab_size))
    assert len(model.tables_.context_keys[1]) * (vocab_size + 1) > 2**31

    def word(symbol, is_context):
        return ("<s>" if is_context else "</s>") if symbol == vocab_size else str(symbol)

    sentences = [
        [
            tuple(word(s, i < k - 1) for i, s in enumerate(gram[-k:]))
            for gram in grams(unit, order, vocab_size)
            for k in range(1, order + 1)
        ]
        for unit in train
    ]
    reference = KneserNeyInterpolated(order, discount=discount)
    reference.fit(sentences, vocabulary_text=["<s>", "</s>"] + [str(v) for v in range(vocab_size)])
    # NLTK takes ~50 ms per score here, so a small probe: training units whose contexts
    # have ids past 2**31 / (V + 1) (those sort above 35,791), Zipf units, unseen units.
    high = [unit for unit in every_id if unit.min() > 40_000]
    probe = high[:8] + train[len(every_id) : len(every_id) + 4]
    probe += [rng.integers(0, vocab_size, 4) for _ in range(3)]
    ours = model.logprobs(SequenceSet.from_list(probe, vocab_size=vocab_size))
    for index, unit in enumerate(probe):
        expected = [
            math.log(reference.score(word(g[-1], False), tuple(word(s, True) for s in g[:-1])))
            for g in grams(unit, order, vocab_size)
        ]
        np.testing.assert_allclose(ours[index], expected, rtol=1e-9)


@pytest.mark.slow
@pytest.mark.parametrize("order", [5, 7])
def test_every_counting_and_scoring_path_agrees_past_the_int32_boundary(monkeypatch, order):
    # The fit's ways through count_tables (one window sort, ranked jumps by dense table,
    # packed sort or argsort, windows with a far context id) and scoring sorted by context
    # or in event order must give bit-identical log-probabilities at a vocabulary where
    # one-symbol context keys pass 2**31; the default path is checked against the
    # reference from the paper (Chen & Goodman 1998, eqs. 17, 19, 26).
    from retrograde.families import _ngram_counts
    from retrograde.families import ngram as ngram_module

    vocab_size = 46_341
    rng = np.random.default_rng(order)
    train = mixed_units(rng, vocab_size, 4_000, every_id=True, n_frequent=8)
    train_set = SequenceSet.from_list(train, vocab_size=vocab_size)
    scored = mixed_units(rng, vocab_size, 300) + train[-3_000:] + train[:3_000]
    scored_set = SequenceSet.from_list(scored, vocab_size=vocab_size)
    model = make("ngram", order=order).fit(train_set)
    assert len(model.tables_.context_keys[1]) * (vocab_size + 1) > 2**31
    assert len(model.tables_.context_keys[2]) * (vocab_size + 1) > 2**31
    default = model.logprobs(scored_set).values
    paths = {
        **JUMP_PATHS,
        # far context ids: in ranking steps (2**40), in the final window (2**50)
        "far ranking": {"_WINDOW_LIMIT": 1 << 40, "_jump_length": lambda *args: 1},
        "far windows": {"_WINDOW_LIMIT": 1 << 50, "_jump_length": lambda *args: 1},
        "unsorted scoring": {"_SORT_SCORED_EVENTS": 1 << 40},
    }
    far_keys = _ngram_counts._far_keys
    for path, changes in paths.items():
        far_calls: list[int] = []
        with monkeypatch.context() as patch:
            for name, value in changes.items():
                patch.setattr(_ngram_counts, name, value)
            patch.setattr(
                _ngram_counts,
                "_far_keys",
                lambda *args, calls=far_calls, **kwargs: (
                    calls.append(1) or far_keys(*args, **kwargs)
                ),
            )
            if path == "unsorted scoring":
                values = model.logprobs(scored_set).values
            else:
                patch.setattr(ngram_module, "_SCORE_TOKENS", 1 << 12)  # many small batches
                values = make("ngram", order=order).fit(train_set).logprobs(scored_set).values
        assert np.array_equal(values, default), path
        assert far_calls or not path.startswith("far"), path  # the far path was taken
    reference = ReferenceKneserNey(train, order, vocab_size)
    ours = model.logprobs(scored_set)
    for index in [*range(0, 300, 10), *range(300, len(scored), 97)]:
        expected = reference.logprobs(scored[index])
        np.testing.assert_allclose(ours[index], expected, rtol=1e-9, atol=1e-12)
