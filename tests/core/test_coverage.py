"""Monte-Carlo coverage of the fixed-time intervals and never-miss rate of the anytime bounds.

Scenario (bundled data, no downloads): scikit-learn's digits; the deployed model is a
logistic regression fitted on the first 200 images; a surrogate version fitted on the
labels of the next 200 images plays the role of the version in force during the draws
(fixed before any draw, hence predictable); the pool is the remaining 1 397 images. Each
repetition draws M = 100 items in batches of 10 with the default floor.

Claims checked (outside sources): the 90% fixed-time interval covers the true pool risk in
at least 0.87 of repetitions at M = 50 and M = 100 (Markov's inequality for the betting
capital at one look, and Ville's for the anytime bound's never-miss rate over every peek
from M = 10 on, >= 0.90: "Estimating means of bounded random variables by betting",
JRSS-B 2024). Both are finite-sample guarantees, so they may over-cover; with 400
repetitions the Monte-Carlo standard error of a rate near 0.9 is 0.015, and 0.87 is two
standard errors below nominal.

The second scenario is the one a normal approximation fails on: a near-perfect,
extremely confident classifier with 10 wrong items among 2 000 (make_classification,
sklearn), so most runs draw no mistake at all and the surrogate (the model's own
probabilities) calls every item safe. The valid interval must still cover, and a
single-look FIXED_TIME gate at the true risk must PASS (wrongly) in at most 10% of runs.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits, make_classification
from sklearn.linear_model import LogisticRegression

from leadline.service.estimation import (
    DEFAULT_FLOOR,
    BoundKind,
    EstimatorMode,
    LossKind,
    LossSpec,
    SurrogateSettings,
    Verdict,
    anytime_path,
    check_gate,
    cold_start_surrogate,
    empirical_bernstein_path,
    estimate_risk,
    fit_surrogate,
    usefulness,
)

from .simulate import pool_terms, run_draws


def _scenario(kind: LossKind):
    features, labels = load_digits(return_X_y=True)
    model = LogisticRegression(max_iter=500).fit(features[:200], labels[:200])
    outputs = model.predict_proba(features)
    spec = LossSpec(kind=kind, num_classes=10)
    surrogate = fit_surrogate(
        spec,
        features[200:400],
        outputs[200:400],
        labels[200:400],
        version=1,
        seed=0,
        settings=SurrogateSettings(ensemble_size=3),
    )
    pool = slice(400, None)
    scores = surrogate.score(features[pool], outputs[pool])
    losses = spec.losses(outputs[pool], labels[pool])
    return spec, losses, scores.expected_loss, scores.residual_second_moment


def _run(kind: LossKind, repetitions: int, seed: int, checkpoints=(50, 100)):
    spec, losses, g, s = _scenario(kind)
    risk = losses.mean()
    rng = np.random.default_rng(seed)
    covered = {(mode, m): 0 for mode in EstimatorMode for m in checkpoints}
    never_missed = 0
    never_missed_bernstein = 0
    for _ in range(repetitions):
        picked, logs = run_draws(
            losses,
            g,
            s,
            draws=max(checkpoints),
            batch=10,
            floor=DEFAULT_FLOOR,
            loss_bound=spec.bound,
            rng=rng,
        )
        for m in checkpoints:
            terms, sums = pool_terms(losses, g, s, picked, logs, upto=m)
            for mode in (EstimatorMode.UNBIASED, EstimatorMode.BALANCED):
                estimate = estimate_risk(
                    terms, sums, mode=mode, confidence=0.9, loss_bound=spec.bound
                )
                covered[mode, m] += estimate.lower <= risk <= estimate.upper
        terms, sums = pool_terms(losses, g, s, picked, logs)
        low, high = anytime_path(terms, losses.shape[0], confidence=0.9, loss_bound=spec.bound)
        never_missed += bool(np.all((low[9:] <= risk) & (risk <= high[9:])))
        low, high = empirical_bernstein_path(
            terms, losses.shape[0], confidence=0.9, loss_bound=spec.bound
        )
        never_missed_bernstein += bool(np.all((low[9:] <= risk) & (risk <= high[9:])))
    rates = {key: value / repetitions for key, value in covered.items()}
    return rates, never_missed / repetitions, never_missed_bernstein / repetitions


def _check(rates, never, never_bernstein):
    for (mode, m), rate in rates.items():
        if mode is EstimatorMode.SURROGATE:
            continue
        assert rate >= 0.87, f"{mode.name} at M={m}: coverage {rate:.3f}"
    assert never >= 0.90, f"betting never-miss rate {never:.3f}"
    assert never_bernstein >= 0.90, f"empirical-Bernstein never-miss rate {never_bernstein:.3f}"


def test_fixed_time_coverage_and_anytime_never_miss_on_digits():
    _check(*_run(LossKind.ZERO_ONE, repetitions=400, seed=20261202))


@pytest.mark.slow
@pytest.mark.parametrize("kind", [LossKind.ZERO_ONE, LossKind.BRIER])
def test_fixed_time_coverage_and_anytime_never_miss_on_digits_long(kind):
    _check(*_run(kind, repetitions=2000, seed=7))


def _rare_mistakes_pool():
    """2 000 items the model classifies at 0.999 confidence; 10 of them are wrong."""
    features, labels = make_classification(
        n_samples=6000,
        n_features=6,
        n_informative=4,
        n_redundant=0,
        n_clusters_per_class=1,
        class_sep=3.0,
        random_state=3,
    )
    model = LogisticRegression(max_iter=2000).fit(features[:2000], labels[:2000])
    predicted = model.predict(features[2000:])
    right = np.flatnonzero(predicted == labels[2000:])[:2000]
    outputs = np.full((2000, 2), 0.001)
    outputs[np.arange(2000), predicted[right]] = 0.999
    truth = labels[2000:][right].copy()
    flipped = np.random.default_rng(3).choice(2000, size=10, replace=False)
    truth[flipped] = 1 - truth[flipped]
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=2)
    scores = cold_start_surrogate(spec).score(features[2000:][right], outputs)
    return spec, spec.losses(outputs, truth), scores


def test_fixed_time_interval_and_gate_stay_honest_when_rare_mistakes_are_not_drawn():
    spec, losses, scores = _rare_mistakes_pool()
    risk = float(losses.mean())
    assert int(losses.sum()) == 10
    rng = np.random.default_rng(11)
    repetitions = 300
    covered = dict.fromkeys((25, 50, 100), 0)
    wrong_pass = 0
    g = scores.expected_loss
    s = scores.residual_second_moment
    u = usefulness(scores, loss_bound=spec.bound)
    for _ in range(repetitions):
        picked, logs = run_draws(
            losses,
            g,
            s,
            draws=100,
            batch=10,
            floor=DEFAULT_FLOOR,
            loss_bound=spec.bound,
            rng=rng,
            usefulness=u,
        )
        for m in covered:
            terms, sums = pool_terms(losses, g, s, picked, logs, upto=m)
            estimate = estimate_risk(
                terms, sums, mode=EstimatorMode.BALANCED, confidence=0.9, loss_bound=spec.bound
            )
            covered[m] += estimate.lower <= risk <= estimate.upper
        terms, sums = pool_terms(losses, g, s, picked, logs)
        gate = check_gate(
            terms,
            sums,
            max_risk=risk,
            confidence=0.9,
            bound=BoundKind.FIXED_TIME,
            loss_bound=spec.bound,
        )
        wrong_pass += gate.verdict is Verdict.PASS
    for m, count in covered.items():
        # Monte-Carlo standard error about 0.017 at 300 repetitions.
        assert count / repetitions >= 0.87, f"coverage at M={m}: {count / repetitions:.3f}"
    assert wrong_pass / repetitions <= 0.10 + 2 * 0.017, f"wrong PASS {wrong_pass}"
