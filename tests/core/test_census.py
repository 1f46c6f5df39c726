"""Census and near-census: a fully labeled scope has a known risk, and every mode says so.

Outside source: when every item of a finite population is observed the population mean is
known without error ("Sampling Techniques", 3rd ed., 1977, §2.5: the finite-population
correction 1 - M/N of the variance vanishes at M = N). The losses are checked against
scikit-learn's ``zero_one_loss`` / ``log_loss`` / ``mean_squared_error`` so the "truth" is
not the project's own arithmetic.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_diabetes, load_digits
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.metrics import log_loss, mean_squared_error, zero_one_loss

from leadline.service.estimation import (
    DEFAULT_FLOOR,
    DrawTerms,
    EstimatorMode,
    LossKind,
    LossSpec,
    PlugInSums,
    cold_start_surrogate,
    estimate_risk,
    usefulness,
)

from .simulate import pool_terms, run_draws


def _digits(size: int, kind: LossKind):
    x, y = load_digits(return_X_y=True)
    # Strong regularisation keeps every probability above the cross-entropy clip, so the
    # clipped loss and scikit-learn's unclipped log_loss agree.
    model = LogisticRegression(C=0.002, max_iter=2000).fit(x[:300], y[:300])
    outputs = model.predict_proba(x[300 : 300 + size])
    labels = y[300 : 300 + size]
    spec = LossSpec(kind=kind, num_classes=10)
    losses = spec.losses(outputs, labels)
    if kind is LossKind.ZERO_ONE:
        truth = zero_one_loss(labels, outputs.argmax(axis=1))
    else:
        assert outputs.min() > 1e-6
        truth = log_loss(labels, outputs, labels=np.arange(10))
    assert losses.mean() == pytest.approx(truth, rel=1e-6)
    return spec, losses, cold_start_surrogate(spec).score(x[300 : 300 + size], outputs)


def _diabetes(size: int):
    x, y = load_diabetes(return_X_y=True)
    model = LinearRegression().fit(x[:200], y[:200])
    outputs = model.predict(x[200 : 200 + size])
    cap = 1.0e5  # above every squared error here, so the capped loss is the plain one
    spec = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=cap)
    losses = spec.losses(outputs, y[200 : 200 + size])
    assert losses.mean() == pytest.approx(
        mean_squared_error(y[200 : 200 + size], outputs), rel=1e-9
    )
    return spec, losses, cold_start_surrogate(spec).score(x[200 : 200 + size], outputs)


_CASES = [
    ("zero-one, N = 10", lambda: _digits(10, LossKind.ZERO_ONE)),
    ("zero-one, N = 138", lambda: _digits(138, LossKind.ZERO_ONE)),
    ("cross-entropy, N = 57", lambda: _digits(57, LossKind.CROSS_ENTROPY)),
    ("squared error, N = 40", lambda: _diabetes(40)),
]


@pytest.mark.parametrize("build", [c[1] for c in _CASES], ids=[c[0] for c in _CASES])
@pytest.mark.parametrize("mode", list(EstimatorMode))
def test_labeling_every_item_returns_the_exact_risk_with_zero_width(build, mode):
    spec, losses, scores = build()
    n = losses.shape[0]
    rng = np.random.default_rng(n)
    picked, logs = run_draws(
        losses,
        scores.expected_loss,
        scores.residual_second_moment,
        draws=n,
        batch=7,
        floor=DEFAULT_FLOOR,
        loss_bound=spec.bound,
        rng=rng,
        usefulness=usefulness(scores, loss_bound=spec.bound),
    )
    terms, sums = pool_terms(
        losses, scores.expected_loss, scores.residual_second_moment, picked, logs
    )
    assert sums.unlabeled_count == 0
    estimate = estimate_risk(terms, sums, mode=mode, confidence=0.9, loss_bound=spec.bound)
    truth = float(losses.mean())
    for value in (
        estimate.risk,
        estimate.lower,
        estimate.upper,
        estimate.anytime_lower,
        estimate.anytime_upper,
    ):
        assert value == pytest.approx(truth, abs=1e-9 * max(1.0, spec.bound))
    assert estimate.std_error == 0.0
    assert estimate.bias_bound == 0.0
    # Without the census shortcut the finite-population weights alone make the point
    # estimate exact: the last draw's term is the risk itself.
    weighted = estimate_risk(
        terms,
        PlugInSums(n, sums.labeled_loss_sum, 0.0, 0.0),
        mode=EstimatorMode.UNBIASED,
        confidence=0.9,
        loss_bound=spec.bound,
    )
    assert weighted.unclipped_risk == pytest.approx(truth, abs=1e-9 * max(1.0, spec.bound))


def test_a_fully_labeled_segment_is_exact_while_the_pool_is_not():
    spec, losses, scores = _digits(60, LossKind.ZERO_ONE)
    segment = np.zeros(60, dtype=bool)
    segment[:12] = True
    # Draw the segment's 12 items and 8 others (in any order the design chose: here the
    # terms come from a full run, truncated after the segment is exhausted).
    rng = np.random.default_rng(4)
    picked, logs = run_draws(
        losses,
        scores.expected_loss,
        scores.residual_second_moment,
        draws=60,
        batch=5,
        floor=DEFAULT_FLOOR,
        loss_bound=spec.bound,
        rng=rng,
    )
    last = int(max(np.flatnonzero(segment[picked]))) + 1
    terms, _ = pool_terms(
        losses, scores.expected_loss, scores.residual_second_moment, picked, logs, upto=last
    )
    scoped = DrawTerms(**{**terms.__dict__, "in_scope": segment[picked[:last]]})
    sums = PlugInSums(12, float(losses[segment].sum()), 0.0, 0.0, unlabeled_count=0)
    estimate = estimate_risk(
        scoped, sums, mode=EstimatorMode.BALANCED, confidence=0.9, loss_bound=spec.bound
    )
    assert (
        estimate.risk
        == estimate.lower
        == estimate.upper
        == pytest.approx(losses[segment].mean(), abs=1e-12)
    )
    assert estimate.anytime_lower == estimate.anytime_upper == estimate.risk


def test_near_census_intervals_shrink_and_cover():
    """As the remaining set runs out the fixed-time interval narrows towards the truth."""
    spec, losses, scores = _digits(138, LossKind.ZERO_ONE)
    truth = float(losses.mean())
    widths = {100: [], 130: [], 137: []}
    rng = np.random.default_rng(8)
    for _ in range(40):
        picked, logs = run_draws(
            losses,
            scores.expected_loss,
            scores.residual_second_moment,
            draws=137,
            batch=10,
            floor=DEFAULT_FLOOR,
            loss_bound=spec.bound,
            rng=rng,
        )
        for m in widths:
            terms, sums = pool_terms(
                losses, scores.expected_loss, scores.residual_second_moment, picked, logs, upto=m
            )
            estimate = estimate_risk(
                terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=spec.bound
            )
            assert estimate.lower <= truth <= estimate.upper
            widths[m].append(estimate.upper - estimate.lower)
    assert np.mean(widths[137]) < np.mean(widths[130]) < np.mean(widths[100])


@pytest.mark.parametrize("mode", list(EstimatorMode))
def test_every_mode_keeps_its_point_estimate_inside_both_intervals(mode):
    """A plug-in far from the design terms (a surrogate that is badly off on the unlabeled
    items): the reported intervals still contain the mode's own estimate (each is a
    superset of a valid interval, so still valid)."""
    spec, losses, scores = _digits(138, LossKind.ZERO_ONE)
    rng = np.random.default_rng(2)
    picked, logs = run_draws(
        losses,
        scores.expected_loss,
        scores.residual_second_moment,
        draws=40,
        batch=10,
        floor=DEFAULT_FLOOR,
        loss_bound=spec.bound,
        rng=rng,
    )
    terms, sums = pool_terms(
        losses, scores.expected_loss, scores.residual_second_moment, picked, logs
    )
    off = PlugInSums(
        sums.scope_size,
        sums.labeled_loss_sum,
        0.9 * (sums.scope_size - 40),  # the surrogate says 0.9 everywhere unlabeled
        sums.unlabeled_second_moment_sum,
        unlabeled_count=sums.unlabeled_count,
    )
    estimate = estimate_risk(terms, off, mode=mode, confidence=0.9, loss_bound=spec.bound)
    assert estimate.lower <= estimate.risk <= estimate.upper
    assert estimate.anytime_lower <= estimate.risk <= estimate.anytime_upper
