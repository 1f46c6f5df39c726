"""The demo's scenario and its random-sampling comparison, checked against outside sources."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import zero_one_loss

from leadline.client.demo import DEPOTS, build_scenario, iid_labels_for_half_width


@pytest.mark.parametrize(
    ("risk", "half_width", "population", "expected"),
    [
        # The textbook sample size for a proportion at 95% and +-5 points with p = 0.5 is
        # 385 for a large population and 278 for a population of 1,000 (tables in survey
        # sampling texts, e.g. Cochran, Sampling Techniques, 1977; values from memory,
        # recomputed below with scipy's normal quantile).
        (0.5, 0.05, 10**9, 385),
        (0.5, 0.05, 1000, 278),
    ],
)
def test_iid_sample_size_matches_the_textbook_values(
    risk: float, half_width: float, population: int, expected: int
) -> None:
    assert (
        iid_labels_for_half_width(risk, half_width, confidence=0.95, population=population)
        == expected
    )


@pytest.mark.parametrize(
    ("risk", "half_width", "confidence"), [(0.1, 0.02, 0.9), (0.3, 0.01, 0.99)]
)
def test_iid_sample_size_follows_the_normal_formula(
    risk: float, half_width: float, confidence: float
) -> None:
    z = stats.norm.ppf(0.5 + confidence / 2)
    n0 = z**2 * risk * (1 - risk) / half_width**2
    population = 50_000
    expected = int(np.ceil(n0 / (1 + (n0 - 1) / population)))
    got = iid_labels_for_half_width(risk, half_width, confidence=confidence, population=population)
    assert got == expected


def test_scenario_true_risk_is_the_zero_one_loss_of_the_hidden_labels() -> None:
    scenario = build_scenario(seed=3, items=2000)
    predicted = scenario.probabilities.argmax(axis=1)
    # scikit-learn's zero_one_loss is the misclassification rate.
    assert scenario.true_risk == pytest.approx(zero_one_loss(scenario.hidden_labels, predicted))
    assert 0.02 < scenario.true_risk < 0.5
    assert scenario.features.shape == (2000, 12)
    np.testing.assert_allclose(scenario.probabilities.sum(axis=1), 1.0, atol=1e-5)
    assert set(scenario.segments) == set(DEPOTS)
    assert len(set(scenario.item_ids)) == 2000
    assert np.all(np.diff(scenario.event_time_ms) >= 0)
