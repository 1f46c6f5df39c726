"""Risk estimators over the draw ledger: UNBIASED, SURROGATE, BALANCED (and LURE weights).

UNBIASED: the mean of the difference-estimator terms a_m (see ``terms``); design-unbiased
for the scope risk when nothing arrived late, whatever the adaptive proposal and the
predictable control variate.

SURROGATE (plug-in): (sum of observed losses + sum of current g over unlabeled items) / N_D.
Lowest variance, biased by the surrogate's error on the unlabeled items. Its bias is
bounded by b = |C| + t se(C) (+ nonresponse and late-item allowances), with
C = UNBIASED - SURROGATE an unbiased estimate of minus its bias; interval
SURROGATE +- (z se + b).

BALANCED: SURROGATE + lambda C with lambda = b^2 / (b^2 + V) = 1 - V / (b^2 + V), where V is
UNBIASED's variance: the lambda minimising lambda^2 V + (1 - lambda)^2 b^2 (estimated mean
squared error) with the bias replaced by its upper confidence bound b. lambda = 1 below
``BALANCED_MIN_LABELS`` labels. Interval: center +- (t se + (1 - lambda) b), and the bias
left, (1 - lambda) b, is reported as ``bias_bound`` (carrying only (1 - lambda) |C| in the
interval under-covered on digits). The benchmark tunes the rule.

Fixed-time margins use Student's t with (in-scope draws - 1) degrees of freedom and
se = sqrt(max(empirical variance of the a_m / M, model-based variance)); see
docs/estimation.md for the model-based part and measured coverage.

Nonresponse: a PENDING or SKIPPED draw's loss is imputed by its draw-time prediction h_t.
The estimate is linear in that unknown loss with coefficient
c_t = 1[i_t in D] / (N_D M) (1 / q_t + (M - 1 - t)), so its worst effect is
c_t max(h_t, B - h_t); the sum over unresolved draws (``nonresponse_allowance``) widens both
sides of the fixed-time interval. The anytime bounds use 0 (lower) and B (upper) instead.

Late items (growing pools): items of D absent at draw m enter a_m through a label-free
score. The mean of the a_m can then differ from the risk by at most mean_m(late score) / N_D
downwards and mean_m(late_count B - late score) / N_D upwards; both are added to the
interval, in every mode, and the larger is included in ``bias_bound``.

LURE weights: "On Statistical Bias in Active Learning: How and When to Fix It", ICLR 2021.
"""

from __future__ import annotations

import enum
import logging
import math
from dataclasses import dataclass

import numpy as np

from ._checks import check_confidence, check_finite_array, describe
from .bounds import (
    betting_fixed_lower_bound,
    betting_lower_bound,
    betting_lower_path,
    empirical_bernstein_lower_path,
)
from .losses import loss_reach
from .normal import student_t_quantile
from .terms import (
    DRAW_PENDING,
    DRAW_SKIPPED,
    DrawTerms,
    PlugInSums,
    TermSums,
    check_terms,
    term_sums,
)

__all__ = [
    "BALANCED_MIN_LABELS",
    "EstimatorMode",
    "RiskEstimate",
    "anytime_path",
    "empirical_bernstein_path",
    "estimate_one_sided",
    "estimate_risk",
    "lure_weights",
]

_LOG = logging.getLogger(__name__)

#: Below this many labeled in-scope draws BALANCED is UNBIASED (lambda = 1): the estimate of
#: the plug-in's bias is too noisy to trust (prototype measurement).
BALANCED_MIN_LABELS: int = 20
#: k in BALANCED's bias bound b = |C| + k t se (module docstring). The fixed-time interval
#: no longer depends on it (it is the betting interval in every mode), so k only trades the
#: point estimate's variance against its bias; measured in the label-efficiency benchmark.
BALANCED_BIAS_ALLOWANCE: float = 0.5


class EstimatorMode(enum.Enum):
    """Which risk estimator answers (values: the proto enum's suffixes, lower-case)."""

    UNBIASED = "unbiased"
    SURROGATE = "surrogate"
    BALANCED = "balanced"


@dataclass(frozen=True)
class RiskEstimate:
    """A risk estimate for one scope with its bounds (all in loss units, within [0, B]).

    ``lower``/``upper``: fixed-time interval at ``confidence`` (two-sided, alpha/2 each
    side), bias bound and nonresponse allowance included. ``anytime_lower``/``upper``:
    confidence sequence at ``confidence`` (two-sided) on the design-based terms, whatever
    the mode. In a ``GateDecision`` every bound is one-sided at ``confidence`` instead.
    ``risk`` is clipped to [0, B]; ``unclipped_risk`` is the estimator's own value (the
    one whose expectation is the scope risk in UNBIASED mode).
    """

    risk: float
    std_error: float
    lower: float
    upper: float
    anytime_lower: float
    anytime_upper: float
    bias_bound: float
    mode: EstimatorMode
    confidence: float
    labels_used: int
    labels_pending: int
    labels_skipped: int
    nonresponse_allowance: float
    unbiased_weight: float
    loss_bound: float
    unclipped_risk: float = math.nan


def lure_weights(probabilities: np.ndarray, pool_size: int) -> np.ndarray:
    """LURE weights v_m for M draws without replacement from a fixed pool of N items.

    With m counted from 1: v_m = 1 + (N - M)/(N - m) (1 / ((N - m + 1) q_m) - 1), so that
    (1/M) sum v_m L_{i_m} is unbiased for the pool risk and E[v_m] = 1 ("On Statistical
    Bias in Active Learning: How and When to Fix It", ICLR 2021). When M = N the last
    coefficient is 0/0 and taken as 0.
    """
    q = check_finite_array("probabilities", probabilities, ndim=1)
    if int(pool_size) != pool_size or pool_size < 1:
        raise ValueError(f"pool_size = {describe(pool_size)}: must be an integer >= 1.")
    n, m = int(pool_size), q.shape[0]
    if m > n:
        raise ValueError(f"len(probabilities) = {m}: must be <= pool_size ({n}).")
    if m and (q.min() <= 0.0 or q.max() > 1.0):
        raise ValueError(
            f"probabilities range [{describe(q.min())}, {describe(q.max())}]: must be in (0, 1]."
        )
    index = np.arange(1, m + 1, dtype=np.float64)
    left = n - index
    coefficient = np.where(left > 0, (n - m) / np.where(left > 0, left, 1.0), 0.0)
    return np.asarray(1.0 + coefficient * (1.0 / ((n - index + 1.0) * q) - 1.0))


# --------------------------------------------------------------------------------------
# anytime bounds


def _anytime_side(
    ts: TermSums, scope_size: int, bound: float, *, upper: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """Terms and their predictable ranges for one side: unknown and late losses at their
    worst case (0 for the lower side, B for the upper side)."""
    fill = np.full(ts.count, bound if upper else 0.0)
    late = ts.late_count * bound if upper else np.zeros(ts.count)
    known, correction = term_sums(ts, fill, late=late)
    low = np.minimum(ts.low, 0.0)
    high = np.maximum(ts.high, 0.0)
    outside = (correction < low - 1e-9 * np.abs(low)) | (correction > high + 1e-9 * high)
    if np.any(outside):
        # The ledger's ranges do not cover an observed correction (e.g. h differs from the
        # g the draw used): widen rather than produce an invalid capital; log it.
        _LOG.warning("%d draw(s) outside their logged correction range", int(outside.sum()))
        low = np.minimum(low, correction)
        high = np.maximum(high, correction)
    x = (known + correction) / scope_size
    lo = (known + low) / scope_size
    hi = (known + high) / scope_size
    # The first term's value without its correction (the surrogate's guess) is known
    # before any draw: the bets' prior mean.
    return x, lo, hi, float(known[0] / scope_size)


def _path(
    ts: TermSums,
    scope_size: int,
    bound: float,
    alpha_side: float,
    center: float,
    *,
    method: str,
    final_only: bool,
) -> tuple[np.ndarray, np.ndarray]:
    lows: list[np.ndarray] = []
    highs: list[np.ndarray] = []
    # Bet sizing prior: variance (B/2)^2, the largest variance of one i.i.d. loss, so early
    # bets are scaled like those of plain sampling rather than by the (much wider) range.
    prior_var = (bound / 2.0) ** 2
    for upper in (False, True):
        x, lo, hi, first_guess = _anytime_side(ts, scope_size, bound, upper=upper)
        if upper:  # mirror: an upper bound on r is a lower bound on -r
            x, lo, hi = -x, -hi, -lo
            support, middle, prior = (-bound, 0.0), -center, (-first_guess, prior_var)
        else:
            support, middle, prior = (0.0, bound), center, (first_guess, prior_var)
        if method == "empirical_bernstein":
            path = empirical_bernstein_lower_path(x, lo, hi, alpha=alpha_side, prior=prior)
            values = path[-1:] if final_only else path
        elif final_only:
            values = np.array(
                [betting_lower_bound(x, lo, hi, alpha=alpha_side, support=support, prior=prior)]
            )
        else:
            values = betting_lower_path(
                x, lo, hi, alpha=alpha_side, support=support, center=middle, prior=prior
            )
        (highs if upper else lows).append(-values if upper else values)
    return np.clip(lows[0], 0.0, bound), np.clip(highs[0], 0.0, bound)


def _fixed_time_interval(
    ts: TermSums, scope_size: int, bound: float, alpha_side: float
) -> tuple[float, float]:
    """(lower, upper) of the fixed-time betting interval, each side at ``alpha_side``.

    The same terms and predictable ranges as the anytime bounds (unknown and late losses
    at their worst case), with bets tuned for one look after all M terms and scaled by the
    finite-population relative variances (``_relative_variance``)."""
    prior_var = (bound / 2.0) ** 2
    scale = _relative_variance(ts)
    sides = []
    for upper in (False, True):
        x, lo, hi, first_guess = _anytime_side(ts, scope_size, bound, upper=upper)
        if upper:
            x, lo, hi = -x, -hi, -lo
            support, prior = (-bound, 0.0), (-first_guess, prior_var)
        else:
            support, prior = (0.0, bound), (first_guess, prior_var)
        value = betting_fixed_lower_bound(
            x, lo, hi, alpha=alpha_side, support=support, prior=prior, scale=scale
        )
        sides.append(-value if upper else value)
    return min(max(sides[0], 0.0), bound), min(max(sides[1], 0.0), bound)


def _relative_variance(ts: TermSums) -> np.ndarray:
    """v_m = |U_m| (|U_m| - 1): each term's variance up to a common factor.

    For uniform draws without replacement from N items, Var(a_m) = |U_m| (|U_m| - 1)
    sigma^2 / N^2 (sigma^2 the pool's loss variance, divisor N - 1): a term made from a
    nearly exhausted remaining set is nearly exact, and the one made from the last item
    (|U_m| = 1) is the scope risk itself. Without logged counts every term counts alike.
    A term with |U_m| = 1 but items arriving later is not exact; it gets v = 1.
    """
    if ts.remaining_count is None:
        return np.ones(ts.count)
    n = ts.remaining_count
    v = n * (n - 1.0)
    return np.where((v == 0.0) & (ts.late_count > 0), 1.0, v)


def _term_weights(ts: TermSums) -> np.ndarray:
    """Weights w_m (summing to 1) of the point estimate sum_m w_m a_m: 1 / v_m normalised.

    The weights depend only on the candidate counts, which are fixed before each draw and
    do not depend on which items were drawn, so sum_m w_m a_m is exactly unbiased like the
    plain mean. For uniform draws from a fixed pool with no control variate they reproduce
    the sample mean exactly (the finite-population weights w_m = N (N - M) /
    (M |U_m| (|U_m| - 1)) sum to 1), and when the last item of the pool is drawn (a
    census) all weight goes to that exact term. Terms with v_m = 0 are exact: they share
    the weight.
    """
    v = _relative_variance(ts)
    if ts.count == 0:
        return v
    exact = v <= 0.0
    if np.any(exact):
        return exact / float(np.count_nonzero(exact))
    inverse = 1.0 / v
    return inverse / float(inverse.sum())


def _check_scope(scope_size: int) -> int:
    if isinstance(scope_size, bool) or int(scope_size) != scope_size or scope_size < 1:
        raise ValueError(f"scope_size = {describe(scope_size)}: must be an integer >= 1.")
    return int(scope_size)


def anytime_path(
    terms: DrawTerms, scope_size: int, *, confidence: float, loss_bound: float
) -> tuple[np.ndarray, np.ndarray]:
    """(lower[m], upper[m]) of the betting confidence sequence after each draw m.

    Two-sided at ``confidence`` ((1 - confidence)/2 per side) and time-uniform: with
    probability >= confidence the risk lies inside every interval of the path at once.
    Values are rounded outwards to a grid (the final value of ``estimate_risk`` is refined).
    """
    confidence = check_confidence(confidence)
    n = _check_scope(scope_size)
    ts = check_terms(terms, loss_bound=loss_bound)
    center = _point_unbiased(ts, n)
    return _path(
        ts,
        n,
        float(loss_bound),
        (1.0 - confidence) / 2.0,
        center,
        method="betting",
        final_only=False,
    )


def empirical_bernstein_path(
    terms: DrawTerms, scope_size: int, *, confidence: float, loss_bound: float
) -> tuple[np.ndarray, np.ndarray]:
    """Like ``anytime_path`` with the O(1)-per-term empirical-Bernstein confidence sequence
    (the fallback; wider than betting)."""
    confidence = check_confidence(confidence)
    n = _check_scope(scope_size)
    ts = check_terms(terms, loss_bound=loss_bound)
    return _path(
        ts,
        n,
        float(loss_bound),
        (1.0 - confidence) / 2.0,
        0.0,
        method="empirical_bernstein",
        final_only=False,
    )


# --------------------------------------------------------------------------------------
# point estimates and fixed-time intervals


def _point_unbiased(ts: TermSums, scope_size: int) -> float:
    if ts.count == 0:
        return float("nan")
    known, correction = term_sums(ts, ts.expected_loss, late=ts.late_expected)
    return float(np.dot(_term_weights(ts), known + correction) / scope_size)


@dataclass(frozen=True)
class _Design:
    """UNBIASED's point estimate and the pieces every mode needs."""

    risk: float
    variance: float  # of the mean of the a_m
    allowance: float  # nonresponse allowance for UNBIASED
    late_down: float  # risk may be below the terms' mean by this much
    late_up: float  # ... or above it by this much


def _calibration(ts: TermSums) -> float:
    """How much larger the realised squared residuals are than the surrogate predicted.

    Ratio of the importance-weighted sums sum (L - h)^2 / q and sum s / q over labeled
    in-scope draws (each estimates its pool total), at least 1; it corrects an
    overconfident surrogate's model-based variance.
    """
    use = ts.labeled & ts.in_scope
    if not np.any(use):
        return 1.0
    realised = float(np.sum((ts.loss[use] - ts.expected_loss[use]) ** 2 / ts.probability[use]))
    predicted = float(np.sum(ts.second_moment[use] / ts.probability[use]))
    if predicted <= 0.0:
        return 1.0
    return max(1.0, realised / predicted)


def _design(ts: TermSums, scope_size: int, bound: float) -> _Design:
    m = ts.count
    n = scope_size
    known, correction = term_sums(ts, ts.expected_loss, late=ts.late_expected)
    a = (known + correction) / n
    weights = _term_weights(ts)
    v = _relative_variance(ts)
    risk = float(np.dot(weights, a))
    model = np.where(ts.in_scope, ts.second_moment / (n * ts.probability) ** 2, 0.0)
    model_variance = float(np.dot(weights**2, model)) * _calibration(ts)
    empirical = 0.0
    if m >= 2:
        # Var(sum w a) = sum w^2 Var(a_m) with Var(a_m) = v_m tau^2 (martingale differences
        # are uncorrelated); tau^2 from the squared deviations scaled by 1 / v_m.
        used = v > 0.0
        if np.count_nonzero(used) >= 2:
            tau = float(np.sum((a[used] - risk) ** 2 / v[used])) / (np.count_nonzero(used) - 1)
            empirical = tau * float(np.dot(weights[used] ** 2, v[used]))
    unresolved = ts.in_scope & ((ts.status == DRAW_PENDING) | (ts.status == DRAW_SKIPPED))
    # An unknown loss enters its own correction (weight w_t / q_t) and the earlier-loss sum
    # of every later term (the later weights' total).
    later = np.concatenate([np.cumsum(weights[::-1])[::-1][1:], [0.0]]) if m else weights
    coefficient = (weights / ts.probability + later) / n
    worst = loss_reach(ts.expected_loss, bound)
    allowance = float(np.sum(np.where(unresolved, coefficient * worst, 0.0)))
    return _Design(
        risk=risk,
        variance=max(empirical, model_variance),
        allowance=allowance,
        late_down=float(np.dot(weights, ts.late_expected)) / n,
        late_up=float(np.dot(weights, np.maximum(ts.late_count * bound - ts.late_expected, 0.0)))
        / n,
    )


def _check_sums(sums: PlugInSums) -> None:
    _check_scope(sums.scope_size)
    for name in ("labeled_loss_sum", "unlabeled_expected_loss_sum", "unlabeled_second_moment_sum"):
        value = getattr(sums, name)
        if not (
            isinstance(value, (int, float, np.floating, np.integer))
            and math.isfinite(value)
            and value >= -1e-9
        ):
            raise ValueError(f"{name} = {describe(value)}: must be a finite number >= 0.")
    count = sums.unlabeled_count
    if count is not None and (
        isinstance(count, bool) or int(count) != count or not 0 <= count <= sums.scope_size
    ):
        raise ValueError(
            f"unlabeled_count = {describe(count)}: must be an integer in [0, scope_size "
            f"({sums.scope_size})]."
        )


def estimate_risk(
    terms: DrawTerms,
    sums: PlugInSums,
    *,
    mode: EstimatorMode,
    confidence: float,
    loss_bound: float,
) -> RiskEstimate:
    """Estimate the scope risk in ``mode`` with a fixed-time interval and an anytime-valid
    interval, both two-sided at ``confidence``. See the module docstring for the rules."""
    confidence = check_confidence(confidence)
    return _estimate(
        terms,
        sums,
        mode=mode,
        alpha_side=(1.0 - confidence) / 2.0,
        confidence=confidence,
        loss_bound=loss_bound,
    )


def estimate_one_sided(
    terms: DrawTerms,
    sums: PlugInSums,
    *,
    mode: EstimatorMode,
    confidence: float,
    loss_bound: float,
    anytime: bool = True,
) -> RiskEstimate:
    """As :func:`estimate_risk`, but every bound is one-sided at ``confidence`` (a gate
    compares each side with its threshold on its own). ``anytime=False`` skips the
    confidence sequence: ``anytime_lower`` / ``anytime_upper`` are then 0 and B."""
    confidence = check_confidence(confidence)
    return _estimate(
        terms,
        sums,
        mode=mode,
        alpha_side=1.0 - confidence,
        confidence=confidence,
        loss_bound=loss_bound,
        anytime=anytime,
    )


def _estimate(
    terms: DrawTerms,
    sums: PlugInSums,
    *,
    mode: EstimatorMode,
    alpha_side: float,
    confidence: float,
    loss_bound: float,
    anytime: bool = True,
) -> RiskEstimate:
    if not isinstance(mode, EstimatorMode):
        raise ValueError(f"mode = {describe(mode)}: must be an EstimatorMode member.")
    _check_sums(sums)
    ts = check_terms(terms, loss_bound=loss_bound)
    bound = float(loss_bound)
    n = int(sums.scope_size)
    # Design-based standard errors use Student's t with M - 1 degrees of freedom for the
    # plug-in's bias bound (common small-sample practice).
    in_scope_draws = int(np.sum(ts.in_scope))
    t = student_t_quantile(1.0 - alpha_side, max(in_scope_draws - 1, 1))
    labeled_in_scope = int(np.sum(ts.labeled & ts.in_scope))
    pending = int(np.sum((ts.status == DRAW_PENDING) & ts.in_scope))
    skipped = int(np.sum((ts.status == DRAW_SKIPPED) & ts.in_scope))
    plug_in = (sums.labeled_loss_sum + sums.unlabeled_expected_loss_sum) / n
    plug_in_se = math.sqrt(max(sums.unlabeled_second_moment_sum, 0.0)) / n
    weight_of_mode = {
        EstimatorMode.UNBIASED: 1.0,
        EstimatorMode.SURROGATE: 0.0,
        EstimatorMode.BALANCED: 1.0,
    }[mode]

    if sums.unlabeled_count == 0:
        # Census: every item in scope carries its label, so the risk is known exactly and
        # every mode and every bound returns it.
        exact = min(max(sums.labeled_loss_sum / n, 0.0), bound)
        return RiskEstimate(
            risk=exact,
            unclipped_risk=exact,
            std_error=0.0,
            lower=exact,
            upper=exact,
            anytime_lower=exact,
            anytime_upper=exact,
            bias_bound=0.0,
            mode=mode,
            confidence=confidence,
            labels_used=labeled_in_scope,
            labels_pending=pending,
            labels_skipped=skipped,
            nonresponse_allowance=0.0,
            unbiased_weight=weight_of_mode,
            loss_bound=bound,
        )

    if ts.count == 0:
        # No draw yet: nothing design-based to say; the plug-in is the only guess.
        return RiskEstimate(
            risk=plug_in,
            std_error=bound / 2.0,
            lower=0.0,
            upper=bound,
            anytime_lower=0.0,
            anytime_upper=bound,
            bias_bound=bound,
            mode=mode,
            confidence=confidence,
            labels_used=0,
            labels_pending=0,
            labels_skipped=0,
            nonresponse_allowance=0.0,
            unbiased_weight=1.0 if mode is EstimatorMode.UNBIASED else 0.0,
            loss_bound=bound,
        )

    design = _design(ts, n, bound)
    unbiased_se = math.sqrt(design.variance)
    if in_scope_draws < 2:
        # Fewer than two draws landed in the scope: the variance cannot be estimated (it
        # reads 0 when none did).
        unbiased_se = bound
    late_bias = max(design.late_down, design.late_up)
    contrast = design.risk - plug_in
    # Upper confidence bound on |bias of the plug-in|.
    plug_in_bias = abs(contrast) + t * unbiased_se + design.allowance + late_bias

    if mode is EstimatorMode.UNBIASED:
        weight, risk, se = 1.0, design.risk, unbiased_se
        bias_bound = late_bias
        allowance = design.allowance
    elif mode is EstimatorMode.SURROGATE:
        weight, risk, se = 0.0, plug_in, plug_in_se
        bias_bound = plug_in_bias
        allowance = 0.0
    else:
        if labeled_in_scope < BALANCED_MIN_LABELS:
            weight = 1.0
        else:
            b = abs(contrast) + BALANCED_BIAS_ALLOWANCE * t * unbiased_se
            weight = b**2 / (b**2 + unbiased_se**2) if b > 0 else 0.0
        risk = plug_in + weight * contrast
        se = math.sqrt((weight * unbiased_se) ** 2 + ((1.0 - weight) * plug_in_se) ** 2)
        allowance = weight * design.allowance
        bias_bound = (1.0 - weight) * (abs(contrast) + t * unbiased_se) + late_bias

    # The fixed-time interval is the finite-sample betting interval on the design terms
    # (valid whatever the surrogate knows; unknown and late losses at their worst case),
    # widened to contain the mode's own point estimate (a superset of a valid interval is
    # valid); the anytime interval likewise, so no mode's estimate lies outside its bounds.
    lower, upper = _fixed_time_interval(ts, n, bound, alpha_side)
    clipped = min(max(risk, 0.0), bound)
    lower, upper = min(lower, clipped), max(upper, clipped)
    if anytime:
        low_path, high_path = _path(
            ts, n, bound, alpha_side, design.risk, method="betting", final_only=True
        )
        anytime_lower = min(float(low_path[-1]), clipped)
        anytime_upper = max(float(high_path[-1]), clipped)
    else:
        anytime_lower, anytime_upper = 0.0, bound
    return RiskEstimate(
        # The design-based sum can leave [0, B] with few labels (a negative correction
        # term); no risk lies outside the loss range, so the point estimate is clipped to
        # it (this only moves it towards the truth) and stays inside its own interval.
        risk=clipped,
        unclipped_risk=risk,
        std_error=se,
        lower=lower,
        upper=upper,
        anytime_lower=anytime_lower,
        anytime_upper=anytime_upper,
        bias_bound=bias_bound,
        mode=mode,
        confidence=confidence,
        labels_used=labeled_in_scope,
        labels_pending=pending,
        labels_skipped=skipped,
        nonresponse_allowance=allowance,
        unbiased_weight=weight,
        loss_bound=bound,
    )
