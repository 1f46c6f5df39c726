"""Surrogate: cold start, warm-started LightGBM fits, validation rows, determinism, persistence."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from sklearn.datasets import load_diabetes, load_digits
from sklearn.linear_model import LinearRegression, LogisticRegression

from leadline.service.estimation import (
    LossKind,
    LossSpec,
    Surrogate,
    SurrogateSettings,
    ValidationRows,
    cold_start_surrogate,
    fit_surrogate,
)

_FAST = SurrogateSettings(ensemble_size=3, num_rounds=20)


@pytest.fixture(scope="module")
def digits():
    features, labels = load_digits(return_X_y=True)
    model = LogisticRegression(max_iter=500).fit(features[:200], labels[:200])
    return features[200:], model.predict_proba(features[200:]), labels[200:]


@pytest.fixture(scope="module")
def diabetes():
    features, target = load_diabetes(return_X_y=True)
    predictions = LinearRegression().fit(features[:150], target[:150]).predict(features)
    return features[150:], predictions[150:], target[150:]


def test_cold_start_is_the_models_own_expected_loss(digits):
    features, outputs, _ = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    scores = cold_start_surrogate(spec).score(features, outputs)
    # Under its own distribution the model errs with probability 1 - max_k p_k; the 0-1
    # loss is Bernoulli, so E[(L - g)^2] = g (1 - g) (textbook Bernoulli variance).
    g = 1.0 - outputs.max(axis=1)
    np.testing.assert_allclose(scores.expected_loss, g, atol=1e-12)
    np.testing.assert_allclose(scores.residual_second_moment, g * (1 - g), atol=1e-12)
    assert np.all(scores.spread == 0)


def test_regression_cold_start_is_the_documented_constant_prior(diabetes):
    features, predictions, _ = diabetes
    spec = LossSpec(kind=LossKind.ABSOLUTE_ERROR, loss_cap=80.0)
    scores = cold_start_surrogate(spec).score(features, predictions)
    np.testing.assert_allclose(scores.expected_loss, 40.0)
    np.testing.assert_allclose(scores.residual_second_moment, 1600.0)


def test_fit_is_deterministic_given_the_seed_and_survives_a_byte_round_trip(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.CROSS_ENTROPY, num_classes=10)
    first = fit_surrogate(
        spec, features[:80], outputs[:80], labels[:80], version=3, seed=7, settings=_FAST
    )
    second = fit_surrogate(
        spec, features[:80], outputs[:80], labels[:80], version=3, seed=7, settings=_FAST
    )
    a = first.score(features, outputs)
    b = second.score(features, outputs)
    np.testing.assert_array_equal(a.expected_loss, b.expected_loss)
    restored = Surrogate.from_bytes(spec, first.to_bytes())
    c = restored.score(features, outputs)
    np.testing.assert_array_equal(a.expected_loss, c.expected_loss)
    np.testing.assert_array_equal(a.residual_second_moment, c.residual_second_moment)
    assert (restored.version, restored.label_count) == (3, 80)
    assert b"pickle" not in first.to_bytes()[:200]


def test_labels_make_the_surrogate_predict_losses_better_than_the_cold_start(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    losses = spec.losses(outputs, labels)
    fitted = fit_surrogate(
        spec, features[:400], outputs[:400], labels[:400], version=1, seed=0, settings=_FAST
    )
    held = slice(400, None)
    cold = cold_start_surrogate(spec).score(features[held], outputs[held]).expected_loss
    warm = fitted.score(features[held], outputs[held])
    # Held-out mean squared error of the loss prediction (Brier score of the error event).
    assert np.mean((warm.expected_loss - losses[held]) ** 2) < np.mean((cold - losses[held]) ** 2)
    assert np.all(warm.residual_second_moment >= 0)
    assert np.all((warm.expected_loss >= 0) & (warm.expected_loss <= 1))
    assert warm.spread.max() > 0  # the bootstrap members disagree somewhere


def test_classes_never_labeled_keep_the_models_own_probabilities(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.BRIER, num_classes=10)
    keep = np.isin(labels, [0, 1, 2])
    fitted = fit_surrogate(
        spec,
        features[keep][:60],
        outputs[keep][:60],
        labels[keep][:60],
        version=1,
        seed=1,
        settings=_FAST,
    )
    pi = fitted.class_probabilities(features, outputs)
    # Unseen classes keep the start distribution softmax(log p / T).
    logits = np.log(np.clip(outputs, 1e-6, 1.0)) / fitted.temperature
    start = np.exp(logits - logits.max(axis=1, keepdims=True))
    start /= start.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(pi[:, 3:], start[:, 3:], atol=1e-12)
    np.testing.assert_allclose(pi.sum(axis=1), 1.0, atol=1e-12)


@pytest.mark.parametrize("kind", [LossKind.SQUARED_ERROR, LossKind.ABSOLUTE_ERROR])
def test_regression_fit_scores_every_item_within_the_cap(diabetes, kind):
    features, predictions, target = diabetes
    cap = 6000.0 if kind is LossKind.SQUARED_ERROR else 120.0
    spec = LossSpec(kind=kind, loss_cap=cap)
    fitted = fit_surrogate(
        spec, features[:120], predictions[:120], target[:120], version=1, seed=0, settings=_FAST
    )
    scores = fitted.score(features, predictions)
    assert np.all((scores.expected_loss >= 0) & (scores.expected_loss <= cap))
    assert np.all(scores.residual_second_moment >= 0)
    losses = spec.losses(predictions, target)
    # The fitted surrogate's mean loss lands nearer the truth than the constant cap / 2 prior.
    assert abs(scores.expected_loss.mean() - losses.mean()) < abs(cap / 2 - losses.mean())
    restored = Surrogate.from_bytes(spec, fitted.to_bytes()).score(features, predictions)
    np.testing.assert_array_equal(restored.expected_loss, scores.expected_loss)


def test_regression_keeps_the_cold_start_below_the_minimum_label_count(diabetes):
    features, predictions, target = diabetes
    spec = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=5000.0)
    few = fit_surrogate(spec, features[:9], predictions[:9], target[:9], version=4, seed=0)
    assert few.is_cold_start
    assert few.version == 4
    assert few.label_count == 9
    enough = fit_surrogate(
        spec, features[:10], predictions[:10], target[:10], version=5, seed=0, settings=_FAST
    )
    assert not enough.is_cold_start


def test_no_labels_gives_the_cold_start_under_the_new_version(digits):
    features, outputs, _ = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    fitted = fit_surrogate(spec, features[:0], outputs[:0], np.zeros(0), version=2, seed=0)
    assert fitted.is_cold_start
    assert fitted.version == 2
    cold = cold_start_surrogate(spec).score(features, outputs)
    np.testing.assert_array_equal(fitted.score(features, outputs).expected_loss, cold.expected_loss)


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: SurrogateSettings(ensemble_size=0), "ensemble_size = 0: must be an integer >= 1"),
        (lambda: SurrogateSettings(num_threads=4), "num_threads = 4: must be 1 or 2"),
        (lambda: SurrogateSettings(learning_rate=0.0), "learning_rate = 0.0: must be in (0, 1]"),
    ],
)
def test_bad_settings_raise_value_error(build, message):
    with pytest.raises(ValueError, match=re.escape(message)):
        build()


def test_bad_surrogate_inputs_raise_value_error(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    fitted = fit_surrogate(
        spec, features[:40], outputs[:40], labels[:40], version=1, seed=0, settings=_FAST
    )
    with pytest.raises(ValueError, match=r"features has 3 columns, surrogate was fitted on 64"):
        fitted.score(features[:, :3], outputs)
    with pytest.raises(ValueError, match=r"version = -1: must be an integer >= 0"):
        fit_surrogate(spec, features[:4], outputs[:4], labels[:4], version=-1, seed=0)
    with pytest.raises(ValueError, match=r"surrogate was fitted for loss 'zero_one'"):
        Surrogate.from_bytes(LossSpec(kind=LossKind.BRIER, num_classes=10), fitted.to_bytes())
    with pytest.raises(ValueError, match=r"data is not a surrogate envelope"):
        Surrogate.from_bytes(spec, b"\x80not json")


# ---------------------------------------------------------------------------------------
# validation rows
# ---------------------------------------------------------------------------------------


def test_validation_rows_teach_the_surrogate_before_any_pool_label(digits):
    # sklearn digits: the fixture's outputs are held out (the model saw the first 200
    # images only), so rows 0-599 serve as a validation split and the rest as the pool.
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    losses = spec.losses(outputs, labels)
    validation = ValidationRows(features[:600], outputs[:600], labels[:600])
    pool = slice(600, None)
    taught = fit_surrogate(
        spec,
        features[:0],
        outputs[:0],
        labels[:0],
        version=1,
        seed=0,
        settings=_FAST,
        validation=validation,
    )
    assert not taught.is_cold_start
    assert (taught.label_count, taught.validation_count, taught.validation_used) == (0, 600, 600)
    cold = cold_start_surrogate(spec).score(features[pool], outputs[pool]).expected_loss
    warm = taught.score(features[pool], outputs[pool]).expected_loss
    # Mean squared error of the loss prediction on the pool (Brier score of the error event).
    assert np.mean((warm - losses[pool]) ** 2) < np.mean((cold - losses[pool]) ** 2)


def test_without_validation_rows_the_fit_is_exactly_the_pool_labels_one(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.BRIER, num_classes=10)
    arguments = (spec, features[:90], outputs[:90], labels[:90])
    plain = fit_surrogate(*arguments, version=1, seed=4, settings=_FAST)
    empty = ValidationRows(features[:0], outputs[:0], labels[:0])
    for validation in (None, empty):
        same = fit_surrogate(*arguments, version=1, seed=4, settings=_FAST, validation=validation)
        np.testing.assert_array_equal(
            same.score(features, outputs).expected_loss,
            plain.score(features, outputs).expected_loss,
        )
        assert same.validation_count == 0
    assert (
        plain.to_bytes() == fit_surrogate(*arguments, version=1, seed=4, settings=_FAST).to_bytes()
    )


def test_validation_rows_beyond_the_cap_are_a_seeded_subsample(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    settings = SurrogateSettings(ensemble_size=2, num_rounds=10, max_validation_rows=150)
    validation = ValidationRows(features[:500], outputs[:500], labels[:500])

    def fit(seed: int) -> Surrogate:
        return fit_surrogate(
            spec,
            features[500:520],
            outputs[500:520],
            labels[500:520],
            version=2,
            seed=seed,
            settings=settings,
            validation=validation,
        )

    first, again, other = fit(1), fit(1), fit(2)
    assert (first.label_count, first.validation_count, first.validation_used) == (20, 500, 150)
    scores = first.score(features, outputs).expected_loss
    np.testing.assert_array_equal(scores, again.score(features, outputs).expected_loss)
    assert not np.array_equal(scores, other.score(features, outputs).expected_loss)
    restored = Surrogate.from_bytes(spec, first.to_bytes())
    assert (restored.validation_count, restored.validation_used) == (500, 150)
    np.testing.assert_array_equal(restored.score(features, outputs).expected_loss, scores)


def test_pool_labels_come_to_dominate_validation_rows_that_disagree(digits):
    # Validation rows that say the model is never wrong (labels replaced by its own
    # prediction), against a pool where it errs: the surrogate's mean loss starts near 0
    # and moves to the pool's risk as pool labels outweigh the validation rows' total
    # weight. With every validation row weighing as much as a pool label it stays lower.
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)
    flattering = ValidationRows(features[:500], outputs[:500], outputs[:500].argmax(axis=1))
    pool = slice(500, None)
    risk = float(spec.losses(outputs[pool], labels[pool]).mean())

    def mean_loss(count: int, weight: float) -> float:
        rows = slice(500, 500 + count)
        fitted = fit_surrogate(
            spec,
            features[rows],
            outputs[rows],
            labels[rows],
            version=1,
            seed=0,
            settings=SurrogateSettings(ensemble_size=3, num_rounds=30, validation_weight=weight),
            validation=flattering,
        )
        return float(fitted.score(features[pool], outputs[pool]).expected_loss.mean())

    before = mean_loss(0, 100.0)
    after = mean_loss(800, 100.0)
    equal = mean_loss(800, math.inf)
    assert risk > 0.05  # the pool does have errors to find
    assert abs(after - risk) < 0.5 * abs(before - risk)
    assert abs(after - risk) < abs(equal - risk)


def test_validation_rows_let_a_regression_fit_start_without_pool_labels(diabetes):
    # sklearn diabetes: the fixture's predictions for rows 150+ are held out.
    features, predictions, target = diabetes
    spec = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=8000.0)
    fitted = fit_surrogate(
        spec,
        features[:0],
        predictions[:0],
        target[:0],
        version=1,
        seed=0,
        settings=_FAST,
        validation=ValidationRows(features[:150], predictions[:150], target[:150]),
    )
    assert not fitted.is_cold_start
    assert fitted.label_count == 0
    losses = spec.losses(predictions[150:], target[150:])
    scores = fitted.score(features[150:], predictions[150:])
    assert abs(scores.expected_loss.mean() - losses.mean()) < abs(4000.0 - losses.mean())


def test_bad_validation_rows_raise_value_error(digits):
    features, outputs, labels = digits
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=10)

    def fit(validation: ValidationRows) -> None:
        fit_surrogate(
            spec,
            features[:5],
            outputs[:5],
            labels[:5],
            version=1,
            seed=0,
            settings=_FAST,
            validation=validation,
        )

    with pytest.raises(ValueError, match=r"validation features has 3 columns, surrogate was"):
        fit(ValidationRows(features[:20, :3], outputs[:20], labels[:20]))
    with pytest.raises(ValueError, match=r"validation labels\[1\] = 10.0: must be a class index"):
        fit(ValidationRows(features[:2], outputs[:2], np.array([1, 10])))
    with pytest.raises(ValueError, match=r"validation outputs has 3 columns, pool has 10"):
        fit(ValidationRows(features[:2], outputs[:2, :3], labels[:2]))
    with pytest.raises(ValueError, match=r"validation_weight = 0.0: must be > 0"):
        SurrogateSettings(validation_weight=0.0)
