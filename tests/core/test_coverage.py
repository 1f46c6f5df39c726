"""Monte-Carlo coverage of the fixed-time intervals and never-miss rate of the anytime bounds.

Scenario (bundled data, no downloads): scikit-learn's digits; the deployed model is a
logistic regression fitted on the first 200 images; a surrogate version fitted on the
labels of the next 200 images plays the role of the version in force during the draws
(fixed before any draw, hence predictable); the pool is the remaining 1 397 images. Each
repetition draws M = 100 items in batches of 10 with the default floor.

Claims checked (outside sources): the 90% fixed-time interval covers the true pool risk in
[0.87, 0.95] of repetitions at M = 50 and M = 100 (martingale central limit theorem,
"Martingale Limit Theory and Its Application", 1980), and the anytime bound's never-miss
rate over every peek from M = 10 on is >= 0.90 (Ville's inequality for the betting
capital, "Estimating means of bounded random variables by betting", JRSS-B 2024). With 400
repetitions the Monte-Carlo standard error of a rate near 0.9 is 0.015, so a correct method
near nominal sits well inside the band.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression

from leadline.service.estimation import (
    DEFAULT_FLOOR,
    EstimatorMode,
    LossKind,
    LossSpec,
    SurrogateSettings,
    anytime_path,
    empirical_bernstein_path,
    estimate_risk,
    fit_surrogate,
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
        assert 0.87 <= rate <= 0.95, f"{mode.name} at M={m}: coverage {rate:.3f}"
    assert never >= 0.90, f"betting never-miss rate {never:.3f}"
    assert never_bernstein >= 0.90, f"empirical-Bernstein never-miss rate {never_bernstein:.3f}"


def test_fixed_time_coverage_and_anytime_never_miss_on_digits():
    _check(*_run(LossKind.ZERO_ONE, repetitions=400, seed=20261202))


@pytest.mark.slow
@pytest.mark.parametrize("kind", [LossKind.ZERO_ONE, LossKind.BRIER])
def test_fixed_time_coverage_and_anytime_never_miss_on_digits_long(kind):
    _check(*_run(kind, repetitions=2000, seed=7))
