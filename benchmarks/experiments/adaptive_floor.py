"""An adaptive defensive floor: tried in the selection-rule experiments, not adopted.

The idea: raise the floor for the next batch when the labeled draws so far show the
usefulness is not paying. Measured in one run against the fixed floor 0.3 (150 paired
repetitions per scenario, see NOTES.md) it did not win: it moved the regression and
cost-matrix pools the wrong way. Kept here so the experiment can be rerun
(``HarnessConfig(adaptive_floor=True)``); the core and the server use the fixed floor.
"""

from __future__ import annotations

import numpy as np

from leadline.service.estimation._checks import check_finite_array, check_fraction, describe

__all__ = ["ADAPTIVE_FLOOR_MIN_DRAWS", "FLOOR_STEPS", "adaptive_floor", "floor_costs"]

#: Floors the adaptive rule may raise the configured floor to (see ``adaptive_floor``).
FLOOR_STEPS: tuple[float, ...] = (0.1, 0.2, 0.3, 0.5, 0.7, 0.9)
#: Labeled draws (made with a floor below 1) needed before ``adaptive_floor`` moves.
ADAPTIVE_FLOOR_MIN_DRAWS: int = 10


def adaptive_floor(
    residuals: np.ndarray,
    probabilities: np.ndarray,
    floors: np.ndarray,
    remaining_counts: np.ndarray,
    *,
    minimum: float,
) -> float:
    """The floor for the next batch, chosen from the labeled draws so far.

    One draw's correction (L - h) / q has conditional second moment
    S(q) = sum_j r_j^2 / q_j over the candidates (r = L - h). Each past labeled draw t,
    made with probability q_t, gives the unbiased one-term estimate r_t^2 / (q_t q'_t) of
    S(q') for any other proposal q' over the same candidates ("Monte Carlo theory, methods
    and examples", 2013, ch. 9: reweighting draws made under one density to another).
    For the floor-eps mixture q'_t = (1 - eps) s_t + eps / n_t, where
    s_t = (q_t - eps_t / n_t) / (1 - eps_t) is the drawn item's usefulness share, recovered
    exactly from its logged probability, floor eps_t and candidate count n_t. The rule
    returns the eps in {minimum} + {FLOOR_STEPS above it} with the smallest estimated
    mean_t S, so a usefulness that does not pay (the surrogate's predicted spread does not
    track the realised residuals) moves the draws towards uniform, and never below the
    configured ``minimum``. It looks only at past draws, so the next proposal stays
    predictable and every estimator built on it keeps its guarantees.

    Arrays are the labeled draws' (same length); draws made with floor 1 carry no share
    and are ignored. Fewer than ``ADAPTIVE_FLOOR_MIN_DRAWS`` usable draws: ``minimum``.
    Raises ValueError (field, value, rule) on NaN/inf, mismatched lengths, probabilities
    outside (0, 1], floors outside (0, 1], counts < 1, or ``minimum`` outside (0, 1].
    """
    minimum = check_fraction("minimum", minimum, low_open=True, high_open=False)
    r = check_finite_array("residuals", residuals, ndim=1)
    q = check_finite_array("probabilities", probabilities, ndim=1)
    eps = check_finite_array("floors", floors, ndim=1)
    n = check_finite_array("remaining_counts", remaining_counts, ndim=1)
    for name, array in (("probabilities", q), ("floors", eps), ("remaining_counts", n)):
        if array.shape[0] != r.shape[0]:
            raise ValueError(
                f"{name} has {array.shape[0]} entries, must match residuals ({r.shape[0]})."
            )
    if r.size:
        if q.min() <= 0.0 or q.max() > 1.0:
            raise ValueError(
                f"probabilities range [{describe(q.min())}, {describe(q.max())}], "
                "must be in (0, 1]."
            )
        if eps.min() <= 0.0 or eps.max() > 1.0:
            raise ValueError(
                f"floors range [{describe(eps.min())}, {describe(eps.max())}], must be in (0, 1]."
            )
        if n.min() < 1.0:
            raise ValueError(f"remaining_counts min = {describe(n.min())}, must be >= 1.")
    usable = eps < 1.0
    if int(usable.sum()) < ADAPTIVE_FLOOR_MIN_DRAWS:
        return minimum
    choices = [minimum, *(f for f in FLOOR_STEPS if f > minimum)]
    costs = floor_costs(r[usable], q[usable], eps[usable], n[usable], choices)
    # Ties (e.g. every residual 0) keep the smallest floor: the configured one.
    return float(choices[int(np.argmin(costs))])


def floor_costs(
    residuals: np.ndarray,
    probabilities: np.ndarray,
    floors: np.ndarray,
    remaining_counts: np.ndarray,
    choices: list[float],
) -> np.ndarray:
    """mean_t r_t^2 / (q_t q'_t) for each floor in ``choices`` (``adaptive_floor``'s
    estimate of the correction's second moment; inputs already validated, floors < 1)."""
    share = np.clip((probabilities - floors / remaining_counts) / (1.0 - floors), 0.0, 1.0)
    weight = residuals**2 / probabilities
    return np.array(
        [float(np.mean(weight / ((1.0 - f) * share + f / remaining_counts))) for f in choices]
    )
