"""Confidence sequences on their own, the estimate's bookkeeping, and the gate."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest

from leadline.service.estimation import (
    DRAW_LABELED,
    DRAW_PENDING,
    BoundKind,
    DrawTerms,
    EstimatorMode,
    PlugInSums,
    Verdict,
    anytime_path,
    check_gate,
    estimate_risk,
    lure_weights,
)
from leadline.service.estimation.bounds import (
    BET_TRUNCATION,
    _base_bets,
    _excluded_edge,
    _fixed_bets,
    betting_fixed_lower_bound,
    betting_lower_bound,
    betting_lower_path,
    empirical_bernstein_lower_path,
)

from .simulate import pool_terms, run_draws


def _pool(seed: int = 0, n: int = 2000, error_rate: float = 0.12):
    """An invented pool: 0-1 losses with a mildly informative surrogate."""
    rng = np.random.default_rng(seed)
    g = np.clip(rng.beta(1.2, 8.0, size=n), 0.0, 1.0)
    losses = (rng.random(n) < np.clip(g * error_rate / g.mean(), 0, 1)).astype(float)
    return losses, g, g * (1 - g)


@pytest.mark.parametrize("mean", [0.05, 0.3, 0.7])
def test_betting_lower_sequence_holds_uniformly_for_iid_bernoulli(mean):
    """Time-uniform miss rate of the one-sided sequence stays below alpha = 0.1."""
    rng = np.random.default_rng(int(mean * 100))
    misses = 0
    reps = 300
    for _ in range(reps):
        x = (rng.random(150) < mean).astype(float)
        path = betting_lower_path(
            x, np.zeros(150), np.ones(150), alpha=0.1, support=(0.0, 1.0), center=x.mean()
        )
        misses += bool(np.any(path > mean))
    # Source: Ville's inequality bounds the miss rate by alpha ("Estimating means of
    # bounded random variables by betting", JRSS-B 2024, Theorem 1); the Monte-Carlo
    # standard error at 300 reps is 0.017, so 0.1 + 0.05 is a 3-sigma allowance.
    assert misses / reps <= 0.15


def test_betting_final_bound_refines_the_grid_path_and_is_not_smaller():
    rng = np.random.default_rng(1)
    x = rng.uniform(0.0, 1.0, size=200) ** 2
    lo, hi = np.zeros(200), np.ones(200)
    path = betting_lower_path(x, lo, hi, alpha=0.05, support=(0.0, 1.0), center=x.mean())
    final = betting_lower_bound(x, lo, hi, alpha=0.05, support=(0.0, 1.0))
    assert np.all(np.diff(path) >= 0)  # a running intersection only tightens
    assert path[-1] <= final <= x.mean()
    assert final - path[-1] < 0.01


@pytest.mark.parametrize("seed", range(6))
def test_bound_edges_sit_at_the_root_of_their_capital_margin(seed):
    """The final betting bounds are the root of their log-capital margin (log K(r) -
    log(1/alpha), written out here from the module docstring's formula), checked against
    scipy.optimize.brentq (an outside root finder) on that margin; the value returned is
    itself excluded (margin >= 0), as plain bisection's was."""
    from scipy.optimize import brentq

    rng = np.random.default_rng(seed)
    m = int(rng.integers(20, 1500))
    lo = -rng.uniform(0.0, 4.0, m)
    hi = rng.uniform(1.0, 5.0, m)
    x = np.clip(rng.normal(0.3, 0.8, m), lo, hi)
    alpha, prior = 0.05, (0.3, 0.25)
    threshold = math.log(1.0 / alpha)

    def logs(r, bets):
        with np.errstate(divide="ignore"):
            cap = np.where(r - lo > 0.0, BET_TRUNCATION / (r - lo), np.inf)
        return np.log1p(np.minimum(bets, cap) * (x - r))

    fixed_bets = _fixed_bets(x, lo, hi, alpha, prior, np.ones(m))
    anytime_bets = _base_bets(x, lo, hi, alpha, prior)
    for bound, margin in (
        (betting_fixed_lower_bound, lambda r: np.sum(logs(r, fixed_bets)) - threshold),
        (betting_lower_bound, lambda r: np.max(np.cumsum(logs(r, anytime_bets))) - threshold),
    ):
        edge = bound(x, lo, hi, alpha=alpha, support=(0.0, 1.0), prior=prior)
        if margin(0.0) < 0.0:
            assert edge == 0.0  # nothing excluded
            continue
        reference = brentq(margin, 0.0, 1.0, xtol=1e-15, rtol=4 * np.finfo(float).eps)
        assert margin(edge) >= 0.0
        assert edge == pytest.approx(reference, rel=1e-12, abs=1e-14)


@pytest.mark.parametrize("root", [1e-9, 0.123456789, 0.5, 1.0 - 1e-9])
def test_edge_search_finds_the_root_of_smooth_and_kinked_margins(root):
    """Against scipy.optimize.brentq; a margin with a kink (slope 1 then 1e-6) must not
    slow the search below bisection's precision."""
    from scipy.optimize import brentq

    def smooth(r):
        return 40.0 * math.log((1.0 + root) / (1.0 + r))

    def kinked(r):
        return (root - r) * (1.0 if r < root else 1e-6)

    for margin in (smooth, kinked):
        edge = _excluded_edge(margin, (0.0, 1.0))
        reference = brentq(margin, 0.0, 1.0, xtol=1e-15, rtol=4 * np.finfo(float).eps)
        assert margin(edge) >= 0.0
        assert edge == pytest.approx(reference, rel=1e-12, abs=1e-15)


def test_empirical_bernstein_sequence_is_valid_and_wider_than_betting():
    rng = np.random.default_rng(2)
    misses = 0
    widths = []
    for _ in range(300):
        x = (rng.random(200) < 0.2).astype(float)
        lo, hi = np.zeros(200), np.ones(200)
        eb = empirical_bernstein_lower_path(x, lo, hi, alpha=0.1)
        bet = betting_lower_path(x, lo, hi, alpha=0.1, support=(0.0, 1.0), center=x.mean())
        misses += bool(np.any(eb > 0.2))
        widths.append((0.2 - eb[-1], 0.2 - bet[-1]))
    # Source: same paper, Theorem 2 (predictable plug-in empirical Bernstein) and its
    # reported ordering of widths; 3-sigma Monte-Carlo allowance as above.
    assert misses / 300 <= 0.15
    assert np.mean(widths, axis=0)[0] > np.mean(widths, axis=0)[1]


def test_anytime_path_ends_at_the_estimates_anytime_bounds():
    losses, g, s = _pool()
    rng = np.random.default_rng(3)
    picked, logs = run_draws(losses, g, s, draws=60, batch=20, floor=0.3, loss_bound=1.0, rng=rng)
    terms, sums = pool_terms(losses, g, s, picked, logs)
    low, high = anytime_path(terms, losses.shape[0], confidence=0.9, loss_bound=1.0)
    estimate = estimate_risk(
        terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=1.0
    )
    assert low.shape == high.shape == (60,)
    assert np.all(np.diff(low) >= 0)
    assert np.all(np.diff(high) <= 0)
    assert low[-1] <= estimate.anytime_lower <= estimate.risk <= estimate.anytime_upper
    assert estimate.anytime_upper <= high[-1]
    assert estimate.anytime_lower <= losses.mean() <= estimate.anytime_upper


def test_pending_draws_widen_both_kinds_of_bound():
    losses, g, s = _pool(4)
    rng = np.random.default_rng(4)
    picked, logs = run_draws(losses, g, s, draws=50, batch=25, floor=0.3, loss_bound=1.0, rng=rng)
    terms, sums = pool_terms(losses, g, s, picked, logs)
    status = terms.status.copy()
    status[-5:] = DRAW_PENDING
    loss = terms.loss.copy()
    loss[-5:] = np.nan
    pending = DrawTerms(**{**terms.__dict__, "status": status, "loss": loss})
    full = estimate_risk(terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=1.0)
    part = estimate_risk(pending, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=1.0)
    assert part.labels_pending == 5
    assert part.labels_used == 45
    assert part.nonresponse_allowance > 0
    assert full.nonresponse_allowance == 0
    assert part.anytime_lower <= full.anytime_lower + 1e-12
    assert part.anytime_upper >= full.anytime_upper - 1e-12
    assert abs(part.risk - full.risk) <= part.nonresponse_allowance


def test_modes_report_their_weights_and_bias_bounds():
    losses, g, s = _pool(5)
    rng = np.random.default_rng(5)
    picked, logs = run_draws(losses, g, s, draws=80, batch=20, floor=0.2, loss_bound=1.0, rng=rng)
    terms, sums = pool_terms(losses, g, s, picked, logs)
    unbiased = estimate_risk(
        terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=1.0
    )
    plug_in = estimate_risk(
        terms, sums, mode=EstimatorMode.SURROGATE, confidence=0.9, loss_bound=1.0
    )
    balanced = estimate_risk(
        terms, sums, mode=EstimatorMode.BALANCED, confidence=0.9, loss_bound=1.0
    )
    assert unbiased.unbiased_weight == 1.0
    assert unbiased.bias_bound == 0.0
    assert plug_in.unbiased_weight == 0.0
    assert plug_in.risk == pytest.approx(
        (sums.labeled_loss_sum + sums.unlabeled_expected_loss_sum) / sums.scope_size
    )
    assert plug_in.bias_bound >= abs(unbiased.risk - plug_in.risk)
    w = balanced.unbiased_weight
    assert 0.0 <= w <= 1.0
    assert balanced.risk == pytest.approx(plug_in.risk + w * (unbiased.risk - plug_in.risk))
    assert balanced.lower <= balanced.risk <= balanced.upper


def test_balanced_is_unbiased_below_twenty_labels():
    losses, g, s = _pool(6)
    rng = np.random.default_rng(6)
    picked, logs = run_draws(losses, g, s, draws=19, batch=19, floor=0.2, loss_bound=1.0, rng=rng)
    terms, sums = pool_terms(losses, g, s, picked, logs)
    balanced = estimate_risk(
        terms, sums, mode=EstimatorMode.BALANCED, confidence=0.9, loss_bound=1.0
    )
    unbiased = estimate_risk(
        terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.9, loss_bound=1.0
    )
    assert balanced.unbiased_weight == 1.0
    assert balanced.risk == pytest.approx(unbiased.risk)


def test_no_draws_gives_the_plug_in_with_trivial_bounds():
    empty = DrawTerms(*(np.zeros(0) for _ in range(10)))
    estimate = estimate_risk(
        empty,
        PlugInSums(10, 0.0, 2.0, 1.0),
        mode=EstimatorMode.BALANCED,
        confidence=0.9,
        loss_bound=1.0,
    )
    assert estimate.risk == pytest.approx(0.2)
    assert (estimate.lower, estimate.upper) == (0.0, 1.0)
    assert (estimate.anytime_lower, estimate.anytime_upper) == (0.0, 1.0)


@pytest.fixture(scope="module")
def drawn_pool():
    losses, g, s = _pool(7, n=3000, error_rate=0.1)
    rng = np.random.default_rng(7)
    picked, logs = run_draws(losses, g, s, draws=400, batch=50, floor=0.5, loss_bound=1.0, rng=rng)
    return losses, g, s, picked, logs


@pytest.mark.parametrize("bound", [BoundKind.ANYTIME, BoundKind.FIXED_TIME])
def test_gate_passes_fails_or_waits_by_the_one_sided_bound(drawn_pool, bound):
    losses, g, s, picked, logs = drawn_pool
    terms, sums = pool_terms(losses, g, s, picked, logs)
    risk = losses.mean()
    passing = check_gate(
        terms,
        sums,
        max_risk=risk + 0.1,
        confidence=0.95,
        bound=bound,
        mode=EstimatorMode.UNBIASED,
        loss_bound=1.0,
    )
    failing = check_gate(
        terms,
        sums,
        max_risk=max(risk - 0.06, 0.0),
        confidence=0.95,
        bound=bound,
        mode=EstimatorMode.UNBIASED,
        loss_bound=1.0,
    )
    waiting = check_gate(
        terms,
        sums,
        max_risk=risk,
        confidence=0.95,
        bound=bound,
        mode=EstimatorMode.UNBIASED,
        loss_bound=1.0,
    )
    assert passing.verdict is Verdict.PASS
    assert passing.more_labels_hint == 0
    assert failing.verdict is Verdict.FAIL
    assert failing.more_labels_hint == 0
    assert waiting.verdict is Verdict.UNDECIDED
    assert waiting.more_labels_hint >= 1
    assert passing.bound is bound
    assert "below max_risk" in passing.reason
    assert "above max_risk" in failing.reason
    assert "contain max_risk" in waiting.reason
    for decision in (passing, failing, waiting):
        assert decision.reason.endswith(".")
        assert decision.reason.count(". ") == 0


def test_gate_bounds_are_one_sided_at_the_asked_confidence(drawn_pool):
    losses, g, s, picked, logs = drawn_pool
    terms, sums = pool_terms(losses, g, s, picked, logs)
    gate = check_gate(
        terms,
        sums,
        max_risk=0.5,
        confidence=0.95,
        bound=BoundKind.FIXED_TIME,
        mode=EstimatorMode.UNBIASED,
        loss_bound=1.0,
    )
    two_sided_90 = estimate_risk(
        terms, sums, mode=EstimatorMode.UNBIASED, confidence=0.90, loss_bound=1.0
    )
    # A one-sided 95% bound is the edge of the two-sided 90% interval.
    assert gate.estimate.upper == pytest.approx(two_sided_90.upper, rel=1e-12)


def test_more_labels_hint_shrinks_as_labels_accumulate(drawn_pool):
    losses, g, s, picked, logs = drawn_pool
    risk = losses.mean()
    hints = []
    for m in (100, 200, 400):
        terms, sums = pool_terms(losses, g, s, picked, logs, upto=m)
        decision = check_gate(
            terms,
            sums,
            max_risk=risk + 0.02,
            confidence=0.9,
            bound=BoundKind.FIXED_TIME,
            mode=EstimatorMode.UNBIASED,
            loss_bound=1.0,
        )
        hints.append(decision.more_labels_hint if decision.verdict is Verdict.UNDECIDED else 0)
    assert hints[0] >= hints[-1]


def test_gate_defaults_to_the_anytime_bound(drawn_pool):
    losses, g, s, picked, logs = drawn_pool
    terms, sums = pool_terms(losses, g, s, picked, logs)
    decision = check_gate(terms, sums, max_risk=0.5, confidence=0.9, loss_bound=1.0)
    assert decision.bound is BoundKind.ANYTIME
    assert "anytime" in decision.reason


def _one_draw() -> DrawTerms:
    return DrawTerms(
        probability=np.array([0.1]),
        expected_loss=np.array([0.2]),
        remaining_expected_loss=np.array([2.0]),
        late_expected_loss=np.zeros(1),
        late_count=np.zeros(1, dtype=np.int64),
        in_scope=np.ones(1, dtype=bool),
        status=np.full(1, DRAW_LABELED),
        loss=np.array([1.0]),
        correction_low=np.array([-5.0]),
        correction_high=np.array([9.0]),
    )


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"probability": np.array([0.0])}, "probability[0] = 0.0: must be in (0, 1]"),
        ({"probability": np.array([np.nan])}, "probability[0] = nan: must be finite"),
        ({"loss": np.array([1.5])}, "loss[0] = 1.5: must be finite and in [0, 1.0]"),
        ({"status": np.array([7])}, "status[0] = 7: must be DRAW_LABELED (0)"),
        ({"expected_loss": np.array([0.2, 0.3])}, "expected_loss has 2 entries: must match"),
        ({"late_count": np.array([-1])}, "late_count[0] = -1.0: must be an integer >= 0"),
    ],
)
def test_bad_terms_raise_value_error_naming_field_value_and_rule(change, message):
    terms = DrawTerms(**{**_one_draw().__dict__, **change})
    with pytest.raises(ValueError, match=re.escape(message)):
        estimate_risk(
            terms,
            PlugInSums(20, 1.0, 2.0, 1.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=1.0,
        )


@pytest.mark.parametrize("confidence", [0.0, 1.0, 1.2, float("nan")])
def test_confidence_outside_the_open_unit_interval_is_rejected(confidence):
    with pytest.raises(ValueError, match=r"confidence = .*: must be in \(0, 1\)"):
        estimate_risk(
            _one_draw(),
            PlugInSums(20, 1.0, 2.0, 1.0),
            mode=EstimatorMode.UNBIASED,
            confidence=confidence,
            loss_bound=1.0,
        )
    # A gate's rule is narrower (leadline.v1.rules.gate_confidence_problem).
    with pytest.raises(
        ValueError, match=r"confidence = .*: a gate needs a confidence in \(0.5, 1\)"
    ):
        check_gate(
            _one_draw(),
            PlugInSums(20, 1.0, 2.0, 1.0),
            max_risk=0.1,
            confidence=confidence,
            loss_bound=1.0,
        )


@pytest.mark.parametrize(
    ("max_risk", "loss_bound"), [(0.0, 1.0), (-0.1, 1.0), (1.0, 1.0), (1.5, 1.0), (5.0, 2.0)]
)
def test_threshold_outside_the_loss_range_is_refused(max_risk, loss_bound):
    # The mean of losses in [0, B] lies in [0, B] (B = loss_bound): a threshold at or
    # above B passes every model, at or below 0 none (leadline.v1.rules).
    sums = PlugInSums(20, 1.0, 2.0, 1.0)
    with pytest.raises(
        ValueError, match=rf"max_risk = {max_risk:g}: must be in \(0, {loss_bound:g}\)"
    ):
        check_gate(_one_draw(), sums, max_risk=max_risk, confidence=0.9, loss_bound=loss_bound)
    inside = check_gate(
        _one_draw(), sums, max_risk=loss_bound / 2, confidence=0.9, loss_bound=loss_bound
    )
    assert inside.verdict in set(Verdict)


def test_other_bad_arguments_are_rejected():
    sums = PlugInSums(20, 1.0, 2.0, 1.0)
    with pytest.raises(
        ValueError, match=r"confidence = 0.5: a gate needs a confidence in \(0.5, 1\)"
    ):
        check_gate(_one_draw(), sums, max_risk=0.1, confidence=0.5, loss_bound=1.0)
    with pytest.raises(ValueError, match=r"max_risk = nan: must be in \(0, 1\)"):
        check_gate(_one_draw(), sums, max_risk=math.nan, confidence=0.9, loss_bound=1.0)
    with pytest.raises(ValueError, match=r"scope_size = 0: must be an integer >= 1"):
        estimate_risk(
            _one_draw(),
            PlugInSums(0, 0.0, 0.0, 0.0),
            mode=EstimatorMode.UNBIASED,
            confidence=0.9,
            loss_bound=1.0,
        )
    with pytest.raises(ValueError, match=r"mode = 'unbiased': must be an EstimatorMode member"):
        estimate_risk(_one_draw(), sums, mode="unbiased", confidence=0.9, loss_bound=1.0)
    with pytest.raises(ValueError, match=r"len\(probabilities\) = 3: must be <= pool_size \(2\)"):
        lure_weights(np.full(3, 0.5), 2)


def test_a_scope_no_draw_has_reached_gets_the_whole_range():
    losses, g, s = _pool(9)
    rng = np.random.default_rng(9)
    picked, logs = run_draws(losses, g, s, draws=40, batch=40, floor=0.3, loss_bound=1.0, rng=rng)
    terms, _ = pool_terms(losses, g, s, picked, logs)
    outside = DrawTerms(
        **{
            **terms.__dict__,
            "in_scope": np.zeros(40, dtype=bool),
            "remaining_expected_loss": np.full(40, 10.0),
        }
    )
    sums = PlugInSums(100, 0.0, 10.0, 5.0)
    for mode in EstimatorMode:
        estimate = estimate_risk(outside, sums, mode=mode, confidence=0.9, loss_bound=1.0)
        assert (estimate.lower, estimate.upper) == (0.0, 1.0), mode
        assert estimate.labels_used == 0
