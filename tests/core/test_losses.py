"""Loss definitions against scikit-learn's metrics, and the normal / t helpers against scipy."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy import integrate, stats
from sklearn.datasets import load_diabetes, load_digits
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.metrics import (
    brier_score_loss,
    log_loss,
    mean_absolute_error,
    mean_squared_error,
    zero_one_loss,
)

from leadline.service.estimation import (
    CROSS_ENTROPY_CLIP,
    LossKind,
    LossSpec,
    normal_cdf,
    normal_quantile,
)
from leadline.service.estimation.normal import student_t_quantile


@pytest.fixture(scope="module")
def digits_pool():
    features, labels = load_digits(return_X_y=True)
    # Strong regularisation keeps every probability above the cross-entropy clip, so the
    # clipped definition and scikit-learn's unclipped log_loss must agree exactly.
    model = LogisticRegression(C=0.002, max_iter=2000).fit(features[:600], labels[:600])
    probabilities = model.predict_proba(features)
    assert probabilities.min() > CROSS_ENTROPY_CLIP
    return probabilities, labels


@pytest.fixture(scope="module")
def diabetes_pool():
    features, target = load_diabetes(return_X_y=True)
    predictions = LinearRegression().fit(features[:200], target[:200]).predict(features)
    return predictions, target


def _spec(kind: LossKind, **extra) -> LossSpec:
    return LossSpec(kind=kind, num_classes=10, **extra)


def test_zero_one_loss_matches_sklearn_zero_one_loss(digits_pool):
    probabilities, labels = digits_pool
    ours = _spec(LossKind.ZERO_ONE).losses(probabilities, labels).mean()
    # Source: sklearn.metrics.zero_one_loss on argmax predictions.
    assert ours == pytest.approx(zero_one_loss(labels, probabilities.argmax(axis=1)), abs=1e-15)


def test_cross_entropy_matches_sklearn_log_loss(digits_pool):
    probabilities, labels = digits_pool
    ours = _spec(LossKind.CROSS_ENTROPY).losses(probabilities, labels).mean()
    # Source: sklearn.metrics.log_loss (natural logarithm, mean over items).
    assert ours == pytest.approx(log_loss(labels, probabilities, labels=range(10)), rel=1e-12)


def test_brier_matches_sklearn_multiclass_brier_score(digits_pool):
    probabilities, labels = digits_pool
    ours = _spec(LossKind.BRIER).losses(probabilities, labels).mean()
    # Source: sklearn.metrics.brier_score_loss, multiclass form sum_k (p_k - y_k)^2 in [0, 2].
    reference = brier_score_loss(labels, probabilities, labels=list(range(10)), scale_by_half=False)
    assert ours == pytest.approx(reference, rel=1e-12)


def test_cost_matrix_with_unit_off_diagonal_costs_is_zero_one_loss(digits_pool):
    probabilities, labels = digits_pool
    costs = 1.0 - np.eye(10)
    ours = _spec(LossKind.COST_MATRIX, cost_matrix=costs).losses(probabilities, labels).mean()
    # Source: a 0-1 cost matrix reduces to sklearn.metrics.zero_one_loss (textbook identity).
    assert ours == pytest.approx(zero_one_loss(labels, probabilities.argmax(axis=1)), abs=1e-15)


def test_cost_matrix_reads_row_predicted_column_true():
    costs = np.array([[0.0, 5.0], [1.0, 0.0]])
    spec = LossSpec(kind=LossKind.COST_MATRIX, num_classes=2, cost_matrix=costs)
    outputs = np.array([[0.9, 0.1], [0.2, 0.8]])
    np.testing.assert_array_equal(spec.losses(outputs, [1, 0]), [5.0, 1.0])
    assert spec.bound == 5.0


def test_regression_losses_match_sklearn_when_the_cap_is_not_reached(diabetes_pool):
    predictions, target = diabetes_pool
    squared = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=1e9)
    absolute = LossSpec(kind=LossKind.ABSOLUTE_ERROR, loss_cap=1e9)
    # Source: sklearn.metrics.mean_squared_error / mean_absolute_error.
    assert squared.losses(predictions, target).mean() == pytest.approx(
        mean_squared_error(target, predictions), rel=1e-12
    )
    assert absolute.losses(predictions, target).mean() == pytest.approx(
        mean_absolute_error(target, predictions), rel=1e-12
    )


def test_regression_losses_are_clipped_at_the_cap(diabetes_pool):
    predictions, target = diabetes_pool
    spec = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=2000.0)
    losses = spec.losses(predictions, target)
    assert losses.max() == 2000.0
    np.testing.assert_allclose(losses, np.minimum((predictions - target) ** 2, 2000.0))


@pytest.mark.parametrize(
    ("kind", "bound"),
    [
        (LossKind.ZERO_ONE, 1.0),
        (LossKind.CROSS_ENTROPY, -math.log(1e-6)),
        (LossKind.BRIER, 2.0),
    ],
)
def test_classification_bounds(kind, bound):
    assert _spec(kind).bound == pytest.approx(bound)


def test_expected_losses_under_a_point_mass_equal_the_loss(digits_pool):
    probabilities, labels = digits_pool
    onehot = np.eye(10)[labels]
    for kind in (LossKind.ZERO_ONE, LossKind.CROSS_ENTROPY, LossKind.BRIER):
        spec = _spec(kind)
        first, second = spec.expected_losses(probabilities, onehot)
        losses = spec.losses(probabilities, labels)
        np.testing.assert_allclose(first, losses, atol=1e-12)
        np.testing.assert_allclose(second, losses**2, atol=1e-10)


@pytest.mark.parametrize("kind", [LossKind.SQUARED_ERROR, LossKind.ABSOLUTE_ERROR])
def test_regression_expected_losses_match_numerical_integration(kind):
    spec = LossSpec(kind=kind, loss_cap=3.0)
    means = np.array([0.0, 0.4, -1.5, 2.5])
    variances = np.array([1.0, 0.05, 2.0, 0.7])
    first, second = spec.expected_losses(np.zeros(4), (means, variances))
    for i in range(4):
        density = stats.norm(means[i], math.sqrt(variances[i])).pdf

        def loss(value: float) -> float:
            raw = value**2 if kind is LossKind.SQUARED_ERROR else abs(value)
            return min(raw, 3.0)

        # Source: scipy.integrate.quad of the clipped loss against scipy.stats.norm's pdf.
        # Tolerance 1e-6: the core's normal CDF has relative error < 1.2e-7.
        points = [-3.0, -math.sqrt(3.0), 0.0, math.sqrt(3.0), 3.0]
        ref1 = integrate.quad(lambda v, pdf=density: loss(v) * pdf(v), -40, 40, points=points)[0]
        ref2 = integrate.quad(lambda v, pdf=density: loss(v) ** 2 * pdf(v), -40, 40, points=points)[
            0
        ]
        assert first[i] == pytest.approx(ref1, abs=1e-6)
        assert second[i] == pytest.approx(ref2, abs=1e-5)


@pytest.mark.parametrize("p", [1e-6, 0.001, 0.025, 0.05, 0.1, 0.5, 0.9, 0.95, 0.975, 0.999])
def test_normal_quantile_matches_scipy(p):
    # Source: scipy.stats.norm.ppf.
    assert normal_quantile(p) == pytest.approx(stats.norm.ppf(p), abs=1e-12)


def test_normal_cdf_matches_scipy():
    x = np.linspace(-8, 8, 1601)
    # Source: scipy.stats.norm.cdf; the erfc fit used is good to 1.2e-7 relative.
    np.testing.assert_allclose(normal_cdf(x), stats.norm.cdf(x), atol=1e-7)


@pytest.mark.parametrize("df", [1, 2, 3, 5, 10, 49, 200, 1000])
@pytest.mark.parametrize("p", [0.001, 0.05, 0.5, 0.9, 0.95, 0.995])
def test_student_t_quantile_matches_scipy(df, p):
    # Source: scipy.stats.t.ppf.
    assert student_t_quantile(p, df) == pytest.approx(stats.t.ppf(p, df), abs=1e-8)


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: LossSpec(kind=LossKind.ZERO_ONE, num_classes=1), "num_classes = 1"),
        (lambda: LossSpec(kind=LossKind.SQUARED_ERROR), "loss_cap = 0.0: must be finite"),
        (lambda: LossSpec(kind=LossKind.ABSOLUTE_ERROR, loss_cap=float("inf")), "loss_cap = inf"),
        (
            lambda: LossSpec(kind=LossKind.COST_MATRIX, num_classes=2, cost_matrix=np.eye(3)),
            "cost_matrix has shape (3, 3): must be (2, 2)",
        ),
        (
            lambda: LossSpec(
                kind=LossKind.COST_MATRIX, num_classes=2, cost_matrix=-np.ones((2, 2))
            ),
            "entries must be >= 0",
        ),
    ],
)
def test_bad_loss_specs_raise_value_error_naming_field_value_and_rule(build, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        build()


@pytest.mark.parametrize(
    ("outputs", "labels", "message"),
    [
        (np.array([[0.5, 0.6]]), [0], "outputs[0] sums to 1.1: probabilities must sum to 1"),
        (np.array([[np.nan, 1.0]]), [0], "must be finite"),
        (np.array([[0.5, 0.5, 0.0]]), [0], "outputs has 3 columns, pool has 2 classes"),
        (np.array([[0.5, 0.5]]), [2], "labels[0] = 2.0: must be a class index in [0, 2)"),
        (np.array([[0.5, 0.5]]), [0.5], "must be a class index"),
        (np.array([[0.5, 0.5]]), [0, 1], "labels has 2 entries: must match outputs (1)"),
        (np.array([0.5, 0.5]), [0], "outputs has shape (2,): must have 2 dimension(s)"),
    ],
)
def test_bad_loss_inputs_raise_value_error_naming_field_value_and_rule(outputs, labels, message):
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=2)
    with pytest.raises(ValueError, match=re.escape(message)):
        spec.losses(outputs, labels)
