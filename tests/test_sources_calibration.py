"""The floor convention makes ``excess = model NLL - floor`` meaningful with a real family."""

import math

import numpy as np
import pytest

from retrograde import families, orders, sources
from retrograde.stats import unit_nll


def _excess(source, order_name, train, test):
    order = orders.make(order_name)
    model = families.make("ngram", order=source.order + 1).fit(order.apply_set(train))
    return unit_nll(model.logprobs(order.apply_set(test))) - source.nll(test)


def test_a_well_specified_ngram_has_the_same_excess_over_the_markov_floor_in_both_orders():
    source = sources.make("markov", vocab_size=3, order=2, length=32, concentration=0.5)
    train, test = source.generate(3000, seed=1), source.generate(1000, seed=2)
    forward = _excess(source, "forward", train, test)
    backward = _excess(source, "reverse", train, test)
    # The reversed chain is again an order-2 chain with the same entropy rate, so an n-gram
    # of order k + 1 is well specified in both orders: the paired difference is ~ 0.
    difference = backward - forward
    assert abs(difference.mean()) < 4 * difference.std(ddof=1) / math.sqrt(len(difference)) + 1e-3
    # The floor gives the end marker 0 nats (every unit has 32 tokens); a model that does not
    # know the length pays about -(32 ln(1 - 1/33) + ln(1/33)) = 4.48 nats for it, plus a
    # little estimation error (derived here from the convention; no outside source).
    end_marker_cost = -(32 * math.log(1 - 1 / 33) + math.log(1 / 33))
    assert forward.mean() == pytest.approx(end_marker_cost, abs=0.5)
    assert np.mean(forward > 0) > 0.95  # the truth is (almost always) better than the model
