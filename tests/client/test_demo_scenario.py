"""The demo's scenario and its random-sampling comparison, checked against outside sources."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from leadline.client.demo import iid_labels_for_half_width


@pytest.mark.parametrize(
    ("risk", "half_width", "population", "expected"),
    [
        # The textbook sample size for a proportion at 95% and +-5 points with p = 0.5 is
        # 385 for a large population and 278 for a population of 1,000 (tables in survey
        # sampling texts, e.g. the textbook "Sampling Techniques", 1977; values from memory,
        # recomputed below with scipy's normal quantile).
        (0.5, 0.05, 10**9, 385),
        (0.5, 0.05, 1000, 278),
    ],
)
def test_iid_sample_size_matches_the_textbook_values(
    risk: float, half_width: float, population: int, expected: int
) -> None:
    # The remembered values, recomputed: n0 = z^2 p (1 - p) / e^2 with scipy's normal
    # quantile, then the finite-population correction n0 / (1 + (n0 - 1) / N).
    n0 = stats.norm.ppf(0.975) ** 2 * risk * (1 - risk) / half_width**2
    assert int(np.ceil(n0 / (1 + (n0 - 1) / population))) == expected
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
