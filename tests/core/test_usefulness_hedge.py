"""The hedged usefulness rule: formula by hand, plain rule without a bound, bad input.

The rule is our own (no outside source): these tests pin its definition, worked by hand.
The plain form sqrt(E[(L - g)^2]) is the variance-optimal importance-sampling proposal for
a difference estimator ("Model Assisted Survey Sampling", Springer, 1992).
"""

from __future__ import annotations

import numpy as np
import pytest

from leadline.service.estimation import SurrogateScores, usefulness
from leadline.service.estimation.selection import WORST_CASE_WEIGHT


def _scores(g: list[float], second: list[float]) -> SurrogateScores:
    return SurrogateScores(
        expected_loss=np.array(g), residual_second_moment=np.array(second), spread=np.zeros(len(g))
    )


def test_hedged_usefulness_adds_weighted_worst_case_second_moment():
    # By hand: B = 1; item 0 has g = 0.1, worst (L - g)^2 = 0.9^2; item 1 has g = 0.7,
    # worst = 0.7^2 (a zero loss is farther than the bound).
    scores = _scores([0.1, 0.7], [0.04, 0.2])
    expected = np.sqrt(np.array([0.04, 0.2]) + WORST_CASE_WEIGHT * np.array([0.81, 0.49]))
    np.testing.assert_allclose(usefulness(scores, loss_bound=1.0), expected, rtol=1e-12)


def test_hedge_keeps_a_confident_item_above_zero():
    # A surrogate that calls an item certain (second moment 0, g = 0) still gives it
    # sqrt(a) B of usefulness, so it keeps more than the floor's share of the draws.
    u = usefulness(_scores([0.0], [0.0]), loss_bound=13.8)
    assert u[0] == pytest.approx(np.sqrt(WORST_CASE_WEIGHT) * 13.8)


def test_without_bound_the_rule_is_the_plain_square_root():
    scores = _scores([0.1, 0.5], [0.09, 0.25])
    np.testing.assert_allclose(usefulness(scores), [0.3, 0.5])


@pytest.mark.parametrize(
    ("bound", "message"),
    [(0.0, "loss_bound = 0.0, must be finite and > 0"), (np.inf, "loss_bound = inf")],
)
def test_bad_bound_is_rejected(bound: float, message: str):
    with pytest.raises(ValueError, match=message):
        usefulness(_scores([0.1], [0.01]), loss_bound=bound)
