"""Exact properties checked by enumerating every ordered draw sequence on tiny pools.

Outside source: the design-unbiasedness of the difference estimator under sequential
sampling (E[a_m | past] = pool risk for any adaptive proposal and predictable control
variate; "Model Assisted Survey Sampling", 1992, ch. 6, and "On Statistical Bias in Active
Learning: How and When to Fix It", ICLR 2021, Theorem 1 for g = 0) and the LURE weights'
mean of 1 (same ICLR 2021 paper, Lemma 1 / Theorem 2); the sample mean of a simple random
sample without replacement as the unbiased estimator of a finite-population mean
("Sampling Techniques", 3rd ed., 1977, Theorem 2.1). Enumeration makes the check exact, so
the tolerance is rounding only (1e-12).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from leadline.service.estimation import (
    DRAW_LABELED,
    DRAW_PENDING,
    DRAW_SKIPPED,
    DrawTerms,
    EstimatorMode,
    LossKind,
    LossSpec,
    PlugInSums,
    Reliance,
    SurrogateScores,
    SurrogateSettings,
    ValidationRows,
    choose_reliance,
    cold_start_surrogate,
    estimate_risk,
    fit_surrogate,
    lure_weights,
    selection_probabilities,
    usefulness,
)

_BOUND = 1.0
_FLOOR = 0.25


def _surrogate(step: int, history: list[int], losses: np.ndarray) -> np.ndarray:
    """A control variate that changes between draws and uses only earlier labels."""
    n = losses.shape[0]
    base = 0.15 + 0.6 * np.arange(n) / n
    if history:
        seen = float(np.mean(losses[history]))
        base = 0.5 * base + 0.5 * seen
    return np.clip(base + 0.05 * step, 0.0, _BOUND)


def _proposal(h: np.ndarray, remaining: list[int], history: list[int]) -> np.ndarray:
    """Adaptive defensive-mixture proposal over the remaining items (uses the past draws)."""
    u = np.sqrt(h[remaining] * (_BOUND - h[remaining])) + 0.1 * (len(history) % 2)
    if history:
        u = u * (1.0 + np.array([abs(j - history[-1]) for j in remaining]))
    return (1.0 - _FLOOR) * u / u.sum() + _FLOOR / len(remaining)


def _enumerate(losses: np.ndarray, draws: int, scope: np.ndarray, *, counts: bool = True):
    """Yield (probability, DrawTerms, sequence) for every ordered sequence of ``draws``.

    ``counts``: log each draw's candidate count (the estimator then uses its
    finite-population weights; without counts it weights the terms equally)."""
    n = losses.shape[0]
    for sequence in itertools.permutations(range(n), draws):
        probability = 1.0
        history: list[int] = []
        fields: dict[str, list[float]] = {
            k: [] for k in ("q", "h", "remaining", "low", "high", "count")
        }
        for step, item in enumerate(sequence):
            remaining = [j for j in range(n) if j not in history]
            h = _surrogate(step, history, losses)
            q = _proposal(h, remaining, history)
            q_item = q[remaining.index(item)]
            fields["count"].append(float(len(remaining)))
            probability *= q_item
            fields["q"].append(q_item)
            fields["h"].append(h[item])
            fields["remaining"].append(float(sum(h[j] for j in remaining if scope[j])))
            fields["low"].append(float(np.min(-h[remaining] / q)))
            fields["high"].append(float(np.max((_BOUND - h[remaining]) / q)))
            history.append(item)
        idx = np.array(sequence)
        terms = DrawTerms(
            probability=np.array(fields["q"]),
            expected_loss=np.array(fields["h"]),
            remaining_expected_loss=np.array(fields["remaining"]),
            late_expected_loss=np.zeros(draws),
            late_count=np.zeros(draws, dtype=np.int64),
            in_scope=scope[idx],
            status=np.full(draws, DRAW_LABELED),
            loss=losses[idx],
            correction_low=np.array(fields["low"]),
            correction_high=np.array(fields["high"]),
            remaining_count=np.array(fields["count"]) if counts else None,
        )
        yield probability, terms, sequence


def _sums(_losses: np.ndarray, scope: np.ndarray) -> PlugInSums:
    return PlugInSums(
        scope_size=int(scope.sum()),
        labeled_loss_sum=0.0,
        unlabeled_expected_loss_sum=0.0,
        unlabeled_second_moment_sum=0.0,
    )


_POOLS = [
    np.array([0.0, 1.0, 0.0, 0.0, 1.0]),
    np.array([0.9, 0.1, 0.35, 0.0, 0.7, 1.0]),
    np.array([0.2, 0.0, 0.0, 1.0, 0.55, 0.05, 0.8]),
]


@pytest.mark.parametrize("counts", [True, False], ids=["weighted", "equal"])
@pytest.mark.parametrize("losses", _POOLS, ids=["n5", "n6", "n7"])
@pytest.mark.parametrize("draws", [1, 2, 3])
def test_unbiased_estimate_is_exactly_unbiased_over_every_draw_sequence(losses, draws, counts):
    scope = np.ones(losses.shape[0], dtype=bool)
    total_probability = 0.0
    expectation = 0.0
    for probability, terms, _ in _enumerate(losses, draws, scope, counts=counts):
        estimate = estimate_risk(
            terms,
            _sums(losses, scope),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=_BOUND,
        )
        total_probability += probability
        expectation += probability * estimate.unclipped_risk
    assert total_probability == pytest.approx(1.0, abs=1e-12)
    assert abs(expectation - losses.mean()) < 1e-12


@pytest.mark.parametrize("draws", [1, 2, 3])
def test_segment_estimate_is_exactly_unbiased_for_the_segment_risk(draws):
    losses = _POOLS[2]
    scope = np.array([True, False, True, True, False, False, True])
    expectation = 0.0
    for probability, terms, _ in _enumerate(losses, draws, scope):
        estimate = estimate_risk(
            terms,
            _sums(losses, scope),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=_BOUND,
        )
        expectation += probability * estimate.unclipped_risk
    assert abs(expectation - losses[scope].mean()) < 1e-12


@pytest.mark.parametrize("losses", _POOLS, ids=["n5", "n6", "n7"])
@pytest.mark.parametrize("draws", [1, 2, 3])
def test_lure_is_unbiased_and_its_weights_average_one_at_every_step(losses, draws):
    n = losses.shape[0]
    scope = np.ones(n, dtype=bool)
    expectation = 0.0
    weight_means = np.zeros(draws)
    for probability, terms, sequence in _enumerate(losses, draws, scope):
        weights = lure_weights(terms.probability, n)
        expectation += probability * float(np.mean(weights * losses[list(sequence)]))
        weight_means += probability * weights
    assert abs(expectation - losses.mean()) < 1e-12
    np.testing.assert_allclose(weight_means, np.ones(draws), rtol=0, atol=1e-12)


def test_late_items_bias_stays_within_the_reported_bias_bound():
    """Items 5 and 6 arrive after every draw: they enter through a label-free score."""
    losses = _POOLS[2]
    present = np.array([True] * 5 + [False, False])
    late_score = np.array([0.5, 0.5])
    present_losses = losses[present]
    expectation = 0.0
    bias_bound = None
    for probability, terms, _ in _enumerate(present_losses, 2, np.ones(5, dtype=bool)):
        late = DrawTerms(
            **{
                **terms.__dict__,
                "late_expected_loss": np.full(2, late_score.sum()),
                "late_count": np.full(2, 2),
            }
        )
        sums = PlugInSums(7, 0.0, 0.0, 0.0)
        estimate = estimate_risk(
            late, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=_BOUND
        )
        expectation += probability * estimate.unclipped_risk
        bias_bound = estimate.bias_bound
    exact_bias = (late_score.sum() - losses[~present].sum()) / 7
    assert abs(expectation - losses.mean() - exact_bias) < 1e-12
    assert bias_bound is not None
    assert abs(exact_bias) <= bias_bound + 1e-12
    assert bias_bound <= 2 * _BOUND / 7 + 1e-12  # mean(late_count) * B / N_D


def test_oracle_surrogate_gives_the_exact_risk_from_one_label():
    """g = L exactly: every correction is 0, so one labeled draw returns the pool risk."""
    rng = np.random.default_rng(3)
    losses = rng.uniform(0.0, 1.0, size=50)
    for first in (0, 17, 49):
        terms = DrawTerms(
            probability=np.array([0.02]),
            expected_loss=losses[[first]],
            remaining_expected_loss=np.array([losses.sum()]),
            late_expected_loss=np.zeros(1),
            late_count=np.zeros(1, dtype=np.int64),
            in_scope=np.ones(1, dtype=bool),
            status=np.full(1, DRAW_LABELED),
            loss=losses[[first]],
            correction_low=np.array([-50.0]),
            correction_high=np.array([50.0]),
            residual_second_moment=np.zeros(1),
        )
        estimate = estimate_risk(
            terms,
            PlugInSums(50, 0.0, 0.0, 0.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=1.0,
        )
        assert estimate.risk == pytest.approx(losses.mean(), abs=1e-12)


@pytest.mark.parametrize("status", [DRAW_PENDING, DRAW_SKIPPED])
def test_nonresponse_allowance_covers_every_possible_missing_loss(status):
    """The estimate is linear in an unknown loss; the allowance is its worst-case reach."""
    losses = _POOLS[1]
    scope = np.ones(losses.shape[0], dtype=bool)
    _, terms, _ = next(iter(_enumerate(losses, 3, scope)))
    sums = _sums(losses, scope)
    missing = DrawTerms(
        **{
            **terms.__dict__,
            "status": np.array([DRAW_LABELED, status, DRAW_LABELED]),
            "loss": np.array([terms.loss[0], np.nan, terms.loss[2]]),
        }
    )
    imputed = estimate_risk(
        missing, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=_BOUND
    )
    reach = []
    for value in (0.0, 0.3, _BOUND):
        known = DrawTerms(
            **{**terms.__dict__, "loss": np.array([terms.loss[0], value, terms.loss[2]])}
        )
        full = estimate_risk(
            known, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=_BOUND
        )
        reach.append(abs(full.risk - imputed.risk))
        assert reach[-1] <= imputed.nonresponse_allowance * (1 + 1e-12)
        # The fixed-time interval includes the allowance on both sides.
        assert imputed.lower <= max(full.risk - imputed.std_error, 0.0)
        assert imputed.upper >= min(full.risk + imputed.std_error, _BOUND)
    # The extreme loss (0 or B, whichever is farther from h) attains the allowance exactly.
    assert max(reach) == pytest.approx(imputed.nonresponse_allowance, rel=1e-12)
    assert imputed.labels_pending + imputed.labels_skipped == 1


# ---------------------------------------------------------------------------------------
# A surrogate taught by validation rows and refitted on the pool labels drawn so far
# ---------------------------------------------------------------------------------------

_TINY = SurrogateSettings(ensemble_size=2, num_rounds=8, min_data_in_leaf=2, num_leaves=3)


def _validation_taught_pool(
    task: str,
) -> tuple[LossSpec, np.ndarray, np.ndarray, np.ndarray, ValidationRows]:
    """Six pool items and 40 validation rows of one invented problem (test data only)."""
    rng = np.random.default_rng(5)
    x = rng.normal(size=(46, 2))
    if task == "classification":
        spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=2)
        p = 1.0 / (1.0 + np.exp(-(1.5 * x[:, 0] - x[:, 1])))
        labels = (rng.random(46) < p).astype(np.int64)
        confident = np.clip(0.5 + 0.8 * (p - 0.5) + 0.1 * x[:, 1], 0.02, 0.98)
        outputs = np.column_stack([1.0 - confident, confident])
    else:
        spec = LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=4.0)
        labels = x[:, 0] + 0.5 * x[:, 1] ** 2 + rng.normal(scale=0.5, size=46)
        outputs = x[:, 0]
    validation = ValidationRows(features=x[6:], outputs=outputs[6:], labels=labels[6:])
    return spec, x[:6], outputs[:6], labels[:6], validation


@pytest.mark.parametrize("task", ["classification", "regression"])
@pytest.mark.parametrize("draws", [1, 2, 3])
def test_unbiased_with_a_validation_taught_surrogate_that_refits_on_pool_labels(task, draws):
    """Outside source as above: any predictable control variate keeps E[a_m | past] = R.
    The surrogate before draw m is a real LightGBM fit on the validation rows plus the
    labels of draws 0..m-1 (the server's refit), and the proposal is the core's hedged
    usefulness with the floor; enumeration makes the expectation exact."""
    spec, features, outputs, labels, validation = _validation_taught_pool(task)
    losses = spec.losses(outputs, labels)
    n = losses.shape[0]
    bound = spec.bound
    fits: dict[frozenset[int], np.ndarray] = {}

    def scores_after(history: list[int]):
        key = frozenset(history)
        if key not in fits:
            rows = sorted(key)
            model = fit_surrogate(
                spec,
                features[rows].reshape(len(rows), 2),
                outputs[rows],
                labels[rows],
                version=len(rows) + 1,
                seed=3,
                settings=_TINY,
                validation=validation,
            )
            fits[key] = model.score(features, outputs)
        return fits[key]

    expectation = total = 0.0
    for sequence in itertools.permutations(range(n), draws):
        probability = 1.0
        history: list[int] = []
        fields: dict[str, list[float]] = {k: [] for k in ("q", "h", "remaining", "low", "high")}
        for item in sequence:
            remaining = [j for j in range(n) if j not in history]
            scores = scores_after(history)
            h = np.clip(scores.expected_loss, 0.0, bound)
            sub = SurrogateScores(
                expected_loss=h[remaining],
                residual_second_moment=scores.residual_second_moment[remaining],
                spread=scores.spread[remaining],
            )
            q = selection_probabilities(usefulness(sub, loss_bound=bound), floor=_FLOOR)
            q_item = float(q[remaining.index(item)])
            probability *= q_item
            fields["q"].append(q_item)
            fields["h"].append(float(h[item]))
            fields["remaining"].append(float(h[remaining].sum()))
            fields["low"].append(float(np.min(-h[remaining] / q)))
            fields["high"].append(float(np.max((bound - h[remaining]) / q)))
            history.append(item)
        idx = np.array(sequence)
        terms = DrawTerms(
            probability=np.array(fields["q"]),
            expected_loss=np.array(fields["h"]),
            remaining_expected_loss=np.array(fields["remaining"]),
            late_expected_loss=np.zeros(draws),
            late_count=np.zeros(draws, dtype=np.int64),
            in_scope=np.ones(draws, dtype=bool),
            status=np.full(draws, DRAW_LABELED),
            loss=losses[idx],
            correction_low=np.array(fields["low"]),
            correction_high=np.array(fields["high"]),
        )
        estimate = estimate_risk(
            terms,
            PlugInSums(n, 0.0, 0.0, 0.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=bound,
        )
        total += probability
        expectation += probability * estimate.unclipped_risk
    assert total == pytest.approx(1.0, abs=1e-12)
    assert abs(expectation - losses.mean()) < 1e-12 * max(1.0, bound)
    # The validation rows really taught it: the first draw's surrogate is not the cold start.
    cold = cold_start_surrogate(spec).score(features, outputs).expected_loss
    assert not np.allclose(scores_after([]).expected_loss, cold)


@pytest.mark.parametrize("losses", _POOLS[:2], ids=["n5", "n6"])
def test_labeling_every_item_gives_the_exact_risk_on_every_draw_sequence(losses):
    """A census: the finite-population weights put everything on the last, exact term."""
    n = losses.shape[0]
    scope = np.ones(n, dtype=bool)
    for _, terms, _ in _enumerate(losses, n, scope):
        estimate = estimate_risk(
            terms,
            _sums(losses, scope),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=_BOUND,
        )
        assert abs(estimate.unclipped_risk - losses.mean()) < 1e-12


@pytest.mark.parametrize("draws", [1, 3, 5, 6])
def test_uniform_draws_without_a_control_variate_give_the_sample_mean(draws):
    """q = 1/|U_m| and h = 0: the weighted difference estimator is the sample mean, the
    textbook unbiased estimator of simple random sampling ("Sampling Techniques", 1977)."""
    losses = _POOLS[1]
    n = losses.shape[0]
    rng = np.random.default_rng(draws)
    for _ in range(5):
        order = rng.permutation(n)[:draws]
        remaining = n - np.arange(draws)
        zeros = np.zeros(draws)
        terms = DrawTerms(
            probability=1.0 / remaining,
            expected_loss=zeros,
            remaining_expected_loss=zeros,
            late_expected_loss=zeros,
            late_count=np.zeros(draws, dtype=np.int64),
            in_scope=np.ones(draws, dtype=bool),
            status=np.full(draws, DRAW_LABELED),
            loss=losses[order],
            correction_low=zeros,
            correction_high=_BOUND * remaining.astype(float),
            remaining_count=remaining,
        )
        estimate = estimate_risk(
            terms,
            PlugInSums(n, 0.0, 0.0, 0.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=_BOUND,
        )
        assert estimate.unclipped_risk == pytest.approx(losses[order].mean(), abs=1e-12)


def _scores(g: np.ndarray) -> SurrogateScores:
    """Scores whose predicted spread is the Bhatia-Davis bound of a loss in [0, 1]."""
    g = np.clip(g, 0.0, _BOUND)
    return SurrogateScores(g, g * (_BOUND - g), np.zeros_like(g), np.maximum(g, 1 - g) ** 2)


def _guarded_enumeration(losses: np.ndarray, draws: int):
    """Every sequence of a design whose control variate and floor come from
    ``choose_reliance`` on the draws before (min_draws = 1: it acts from the 2nd draw),
    with the honest scores of the labeled items taken from the surrogate of the moment."""
    n = losses.shape[0]
    for sequence in itertools.permutations(range(n), draws):
        probability = 1.0
        history: list[int] = []
        log: dict[str, list[float]] = {
            k: [] for k in ("q", "h", "remaining", "low", "high", "count")
        }
        changed = False
        for step, item in enumerate(sequence):
            remaining = [j for j in range(n) if j not in history]
            g = _surrogate(step, history, losses)
            reliance = choose_reliance(
                losses=losses[history],
                honest=_scores(g[history]),
                probabilities=np.array(log["q"]),
                remaining_counts=np.array(log["count"]),
                candidates=_scores(g[remaining]),
                loss_bound=_BOUND,
                minimum_floor=_FLOOR,
                min_draws=1,
            )
            changed = changed or reliance != Reliance(floor=_FLOOR)
            h = reliance.control_variate(g)
            u = usefulness(
                reliance.apply(_scores(g[remaining]), loss_bound=_BOUND), loss_bound=_BOUND
            )
            q = (1.0 - reliance.floor) * u / u.sum() + reliance.floor / len(remaining)
            position = remaining.index(item)
            probability *= q[position]
            log["q"].append(q[position])
            log["h"].append(h[item])
            log["remaining"].append(float(h[remaining].sum()))
            log["low"].append(float(np.min(-h[remaining] / q)))
            log["high"].append(float(np.max((_BOUND - h[remaining]) / q)))
            log["count"].append(float(len(remaining)))
            history.append(item)
        idx = np.array(sequence)
        terms = DrawTerms(
            probability=np.array(log["q"]),
            expected_loss=np.array(log["h"]),
            remaining_expected_loss=np.array(log["remaining"]),
            late_expected_loss=np.zeros(draws),
            late_count=np.zeros(draws, dtype=np.int64),
            in_scope=np.ones(draws, dtype=bool),
            status=np.full(draws, DRAW_LABELED),
            loss=losses[idx],
            correction_low=np.array(log["low"]),
            correction_high=np.array(log["high"]),
            remaining_count=np.array(log["count"]),
        )
        yield probability, terms, changed


@pytest.mark.parametrize("losses", _POOLS, ids=["n5", "n6", "n7"])
def test_reliance_guard_keeps_the_estimate_exactly_unbiased(losses):
    """The guard changes the control variate and floor between draws from past draws only."""
    expectation = 0.0
    total = 0.0
    moved = False
    for probability, terms, changed in _guarded_enumeration(losses, 3):
        estimate = estimate_risk(
            terms,
            PlugInSums(losses.shape[0], 0.0, 0.0, 0.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=_BOUND,
        )
        expectation += probability * estimate.unclipped_risk
        total += probability
        moved = moved or changed
    assert moved, "the guard never moved: the test would prove nothing"
    assert total == pytest.approx(1.0, abs=1e-12)
    assert abs(expectation - losses.mean()) < 1e-12


def test_reliance_guard_drops_a_surrogate_that_predicts_the_losses_backwards():
    """Honest predictions that run against the losses: coefficient 0 (the constant alone);
    honest predictions close to the losses: full reliance."""
    rng = np.random.default_rng(5)
    losses = rng.uniform(0.0, 1.0, size=200)
    candidates = _scores(rng.uniform(0.0, 1.0, size=1000))
    common = {
        "probabilities": np.full(200, 1e-3),
        "remaining_counts": np.full(200, 1000.0),
        "candidates": candidates,
        "loss_bound": _BOUND,
        "minimum_floor": 0.3,
    }
    backwards = choose_reliance(losses=losses, honest=_scores(1.0 - losses), **common)
    assert backwards.coefficient == 0.0
    assert backwards.constant == pytest.approx(losses.mean(), abs=0.02)
    good = choose_reliance(
        losses=losses, honest=_scores(losses + rng.normal(0.0, 0.02, size=200)), **common
    )
    assert good.coefficient == 1.0
    few = choose_reliance(
        losses=losses[:10],
        honest=_scores(1.0 - losses[:10]),
        **{**common, "probabilities": np.full(10, 1e-3), "remaining_counts": np.full(10, 1000.0)},
    )
    assert few == Reliance(floor=0.3)  # below MIN_DRAWS: full reliance


def test_reliance_guard_keeps_the_floor_where_the_usefulness_tracks_the_residuals():
    """Residual sizes that the predicted spread foretells: the proposal pays, the floor stays
    at its minimum; the same residuals with a spread that foretells nothing: the guard
    moves the floor up (towards uniform draws)."""
    rng = np.random.default_rng(9)

    def scores(g: np.ndarray, spread: np.ndarray) -> SurrogateScores:
        return SurrogateScores(g, spread**2, np.zeros_like(g), np.full_like(g, _BOUND))

    sd = rng.choice([0.01, 0.3], size=1200, p=[0.8, 0.2])
    g = np.full(1200, 0.5)
    losses = np.clip(g + rng.normal(0.0, sd), 0.0, _BOUND)
    common = {
        "losses": losses[:200],
        "probabilities": np.full(200, 1e-3),
        "remaining_counts": np.full(200, 1000.0),
        "loss_bound": _BOUND,
        "minimum_floor": 0.3,
    }
    tracking = choose_reliance(
        honest=scores(g[:200], sd[:200]), candidates=scores(g[200:], sd[200:]), **common
    )
    assert tracking.floor == 0.3
    blind = rng.permutation(sd)
    guessing = choose_reliance(
        honest=scores(g[:200], blind[:200]), candidates=scores(g[200:], blind[200:]), **common
    )
    assert guessing.floor > 0.5
