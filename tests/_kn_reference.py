"""An independent, slow reference for interpolated modified Kneser–Ney, written from the paper.

Chen & Goodman (1998), "An empirical study of smoothing techniques for language modeling",
TR-10-98: eq. 17 (interpolated Kneser–Ney), eq. 19 (modified KN: three discounts D1, D2,
D3+ and the matching gamma) and eq. 26 (discounts from counts-of-counts). Plain dicts and
tuples, one Python loop per event: nothing is shared with ``retrograde.families``.

Conventions that are the project's (documented in ``retrograde.families.ngram``) and are
followed here on purpose: a unit is padded with ``order - 1`` begin markers and ends with
the end marker, both the symbol ``V``; lower levels count continuations (distinct left
extensions of the next level's types); the lowest level interpolates with the uniform
distribution over the ``V + 1`` outcomes; eq. 26 falls back to the single discount
``Y = n1 / (n1 + 2 n2)`` (Ney, Essen & Kneser 1994) when a formula is undefined or leaves
``(0, r]``, and ``Y = 0.5`` when there are no singletons.
"""

from __future__ import annotations

import math
from collections import Counter, defaultdict


def grams(unit, order, vocab_size):
    """The order-grams (context symbols..., outcome) of one unit: every token, then the end."""
    padded = [vocab_size] * (order - 1) + [int(t) for t in unit] + [vocab_size]
    return [tuple(padded[t - order + 1 : t + 1]) for t in range(order - 1, len(padded))]


def _discounts(type_counts):
    """Eq. 26 with the documented fallback: (D1, D2, D3+)."""
    n = Counter(min(c, 5) for c in type_counts)
    n1, n2, n3, n4 = (n[r] for r in (1, 2, 3, 4))
    y = n1 / (n1 + 2 * n2) if n1 > 0 else 0.5
    formulas = [
        (1, 1 - 2 * y * n2 / n1 if n1 > 0 else None),
        (2, 2 - 3 * y * n3 / n2 if n2 > 0 else None),
        (3, 3 - 4 * y * n4 / n3 if n3 > 0 else None),
    ]
    return [d if d is not None and 0 < d <= r else y for r, d in formulas]


class ReferenceKneserNey:
    """Interpolated modified Kneser–Ney over token ids ``0..V-1`` (plus the markers ``V``)."""

    def __init__(self, train_units, order, vocab_size, fixed_discount=None):
        self.order, self.vocab_size = order, vocab_size
        self.n_symbols = vocab_size + 1
        counts = {order: Counter(g for unit in train_units for g in grams(unit, order, vocab_size))}
        for k in range(order - 1, 0, -1):
            # Continuation count: distinct (k+1)-gram types that end with this k-gram.
            counts[k] = Counter(gram[1:] for gram in counts[k + 1])
        self.counts = counts
        self.discounts = {
            k: [fixed_discount] * 3 if fixed_discount is not None else _discounts(c.values())
            for k, c in counts.items()
        }
        # Per context of each level: total count and the discounted mass (gamma's numerator).
        self.totals, self.released = {}, {}
        for k, level in counts.items():
            totals, released = defaultdict(float), defaultdict(float)
            for gram, count in level.items():
                context = gram[:-1]
                totals[context] += count
                released[context] += self.discounts[k][min(count, 3) - 1]
            self.totals[k], self.released[k] = dict(totals), dict(released)

    def prob(self, context, outcome):
        """p(outcome | the last ``order - 1`` symbols of ``context``), eqs. 17 and 19."""
        p = 1.0 / self.n_symbols
        for k in range(1, self.order + 1):
            history = tuple(context[len(context) - (k - 1) :]) if k > 1 else ()
            total = self.totals[k].get(history)
            if total is None:
                continue  # context never seen at this level: p_k = p_{k-1}
            count = self.counts[k].get((*history, outcome), 0)
            discount = self.discounts[k][min(count, 3) - 1] if count else 0.0
            gamma = self.released[k][history] / total
            p = max(count - discount, 0.0) / total + gamma * p
        return p

    def logprobs(self, unit):
        """Natural-log probability of each token of ``unit``, then of the end marker."""
        return [
            math.log(self.prob(g[:-1], g[-1])) for g in grams(unit, self.order, self.vocab_size)
        ]
