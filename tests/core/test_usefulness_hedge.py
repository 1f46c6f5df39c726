"""The hedged usefulness rule: formula by hand, plain rule without a bound, bad input.

The rule is our own (no outside source): these tests pin its definition, worked by hand.
The plain form sqrt(E[(L - g)^2]) is the variance-optimal importance-sampling proposal for
a difference estimator ("Model Assisted Survey Sampling", Springer, 1992).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import log_loss

from leadline.service.estimation import (
    LossKind,
    LossSpec,
    SurrogateScores,
    cold_start_surrogate,
    usefulness,
    worst_squared_deviation,
)
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
    [(0.0, "loss_bound = 0.0: must be finite and > 0"), (np.inf, "loss_bound = inf")],
)
def test_bad_bound_is_rejected(bound: float, message: str):
    with pytest.raises(ValueError, match=message):
        usefulness(_scores([0.1], [0.01]), loss_bound=bound)


def test_worst_deviation_from_loss_table_matches_sklearn_log_loss():
    # Each item's possible losses are its cross-entropy under each label, computed here by
    # scikit-learn's log_loss (the outside reference); the worst squared deviation from g
    # is the largest of (loss - g)^2 over those labels.
    spec = LossSpec(kind=LossKind.CROSS_ENTROPY, num_classes=3)
    outputs = np.array([[0.98, 0.01, 0.01], [0.4, 0.35, 0.25]])
    g = np.array([0.05, 1.0])
    got = worst_squared_deviation(spec, outputs, g)
    for i in range(2):
        per_label = [log_loss([label], outputs[i : i + 1], labels=[0, 1, 2]) for label in range(3)]
        assert got[i] == pytest.approx(max((loss - g[i]) ** 2 for loss in per_label))


def test_loss_table_hedge_sizes_a_confident_mistake_by_its_own_probability():
    # A 0.99-confident item's mistake costs -log(0.01) ~ 4.6, far below the clip's 13.8:
    # the loss-table hedge gives it sqrt(a) * (4.6 - g), the bound form sqrt(a) * (13.8 - g).
    spec = LossSpec(kind=LossKind.CROSS_ENTROPY, num_classes=2)
    outputs = np.array([[0.99, 0.01]])
    scores = cold_start_surrogate(spec).score(np.zeros((1, 1)), outputs)
    assert scores.worst_squared_deviation is not None
    g = scores.expected_loss[0]
    hedged = usefulness(scores, loss_bound=spec.bound)[0]
    by_table = np.sqrt(
        scores.residual_second_moment[0] + WORST_CASE_WEIGHT * (-np.log(0.01) - g) ** 2
    )
    assert hedged == pytest.approx(by_table, rel=1e-9)
    bound_form = usefulness(
        SurrogateScores(scores.expected_loss, scores.residual_second_moment, scores.spread),
        loss_bound=spec.bound,
    )[0]
    assert bound_form > 2 * hedged


def test_worst_deviation_outside_the_squared_bound_is_rejected():
    scores = SurrogateScores(
        expected_loss=np.array([0.1]),
        residual_second_moment=np.array([0.01]),
        spread=np.zeros(1),
        worst_squared_deviation=np.array([1.5]),
    )
    with pytest.raises(ValueError, match=r"worst_squared_deviation range \[1.5, 1.5\]"):
        usefulness(scores, loss_bound=1.0)
