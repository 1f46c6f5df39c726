"""How far the next draws rely on the surrogate: a predictable guard against a surrogate
that does not beat a constant.

The difference estimator and the usefulness proposal pay off only where the surrogate's
predictions are better than knowing nothing: a control variate g that errs more than a
constant adds variance (Var(L - g) > Var(L)), and a proposal q that favours items whose
residuals are not larger than the rest weights the draws by 1/q for nothing. Random
sampling has neither cost. Before each batch of draws this module looks at the labeled
draws made so far (only at them, so the choice is fixed before the next draw and every
estimator keeps its guarantees) and chooses

* the control variate h = c + beta (g - c): g shrunk towards the constant c, the
  importance-weighted (Hajek) mean of the observed losses, with beta the weighted
  regression coefficient of L on g clipped to [0, 1] (the power tuning of
  "PPI++: Efficient Prediction-Powered Inference", 2023, for the same reason: a
  coefficient fitted to the data never does worse than both extremes by much);
* the floor epsilon of the defensive mixture q = (1 - epsilon) u / sum u + epsilon / |U|,
  between the configured minimum and 1 (uniform draws): the value minimising the
  estimated second moment of one correction term, sum_j r_j^2 / q_eps(j), estimated from
  the past draws by reweighting ("Monte Carlo theory, methods and examples", 2013, ch. 9).

Every past labeled draw t contributes its loss L_t, the surrogate's draw-time prediction
g_t (fitted before the label existed, so an honest out-of-sample prediction), its
probability q_t among n_t candidates, the drawn item's usefulness share
sigma_t = n_t u_t / sum u (its probability relative to uniform under the usefulness
component) and the floor used. With p_t = n_t q_t every population average over the
candidates is estimated by sum_t f_t / p_t / sum_t 1 / p_t.

Below ``MIN_DRAWS`` labeled draws the guard keeps full reliance (beta = 1, the minimum
floor): the estimates are too noisy to act on and the defensive floor already bounds the
damage to a factor 1 / epsilon.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._checks import check_finite_array, check_fraction, describe
from .surrogate import SurrogateScores

__all__ = ["MIN_DRAWS", "Reliance", "choose_reliance"]

#: Labeled draws needed before the guard moves away from full reliance (our choice: two
#: batches of ten; measured in the label-efficiency benchmark).
MIN_DRAWS: int = 20

# Candidate floors between the minimum and uniform draws.
_FLOOR_GRID = 41


@dataclass(frozen=True)
class Reliance:
    """The control variate h = constant + coefficient (g - constant) and the floor for the
    next draws. ``Reliance(floor=eps)`` is full reliance: h = g."""

    coefficient: float = 1.0
    constant: float = 0.0
    floor: float = 0.3

    def __post_init__(self) -> None:
        if not (0.0 <= self.coefficient <= 1.0):
            raise ValueError(f"coefficient = {describe(self.coefficient)}, must be in [0, 1].")
        if not (np.isfinite(self.constant) and self.constant >= 0.0):
            raise ValueError(f"constant = {describe(self.constant)}, must be finite and >= 0.")
        check_fraction("floor", self.floor, low_open=True, high_open=False)

    @property
    def is_full(self) -> bool:
        return self.coefficient == 1.0

    def control_variate(self, expected_loss: np.ndarray) -> np.ndarray:
        """h = c + beta (g - c) (a convex combination: stays inside [0, B])."""
        g = np.asarray(expected_loss, dtype=np.float64)
        if self.is_full:
            return g
        return self.constant + self.coefficient * (g - self.constant)

    def apply(self, scores: SurrogateScores, *, loss_bound: float) -> SurrogateScores:
        """The scores as seen through h: expected loss h, residual second moment
        E[(L - h)^2] = E[(L - g)^2] + (g - h)^2, and the worst squared deviation
        (|L - g| + |g - h|)^2 capped at B^2 (a bound on |L - h| that holds for every loss
        the item can take)."""
        if self.is_full:
            return scores
        g = scores.expected_loss
        h = np.clip(self.control_variate(g), 0.0, loss_bound)
        shift = (g - h) ** 2
        worst = scores.worst_squared_deviation
        if worst is not None:
            worst = np.minimum(
                (np.sqrt(np.maximum(worst, 0.0)) + np.abs(g - h)) ** 2, loss_bound**2
            )
        return SurrogateScores(
            expected_loss=h,
            residual_second_moment=scores.residual_second_moment + shift,
            spread=scores.spread,
            worst_squared_deviation=worst,
        )


def choose_reliance(
    *,
    losses: np.ndarray,
    surrogate_expected_loss: np.ndarray,
    probabilities: np.ndarray,
    remaining_counts: np.ndarray,
    usefulness_shares: np.ndarray,
    minimum_floor: float,
    min_draws: int = MIN_DRAWS,
) -> Reliance:
    """The reliance for the next draws from the labeled draws so far (arrays of the same
    length, in any order; see the module docstring for each). Fewer than ``min_draws``
    draws: full reliance at ``minimum_floor``.

    Raises ValueError (field, value, rule) on NaN/inf, mismatched lengths, probabilities
    outside (0, 1], counts < 1, negative shares or ``minimum_floor`` outside (0, 1].
    """
    minimum = check_fraction("minimum_floor", minimum_floor, low_open=True, high_open=False)
    loss = check_finite_array("losses", losses, ndim=1)
    arrays = {
        "surrogate_expected_loss": check_finite_array(
            "surrogate_expected_loss", surrogate_expected_loss, ndim=1
        ),
        "probabilities": check_finite_array("probabilities", probabilities, ndim=1),
        "remaining_counts": check_finite_array("remaining_counts", remaining_counts, ndim=1),
        "usefulness_shares": check_finite_array("usefulness_shares", usefulness_shares, ndim=1),
    }
    for name, array in arrays.items():
        if array.shape != loss.shape:
            raise ValueError(
                f"{name} has {array.shape[0]} entries, must match losses ({loss.shape[0]})."
            )
    g = arrays["surrogate_expected_loss"]
    q = arrays["probabilities"]
    n = arrays["remaining_counts"]
    share = arrays["usefulness_shares"]
    if q.size and (q.min() <= 0.0 or q.max() > 1.0):
        raise ValueError(
            f"probabilities range [{describe(q.min())}, {describe(q.max())}], must be in (0, 1]."
        )
    if n.size and n.min() < 1.0:
        raise ValueError(f"remaining_counts min = {describe(n.min())}, must be >= 1.")
    if share.size and share.min() < 0.0:
        raise ValueError(f"usefulness_shares min = {describe(share.min())}, must be >= 0.")
    if loss.shape[0] < max(int(min_draws), 1):
        return Reliance(floor=minimum)

    weight = 1.0 / (n * q)  # 1 / p_t: reweights each draw to the candidates it came from
    total = float(weight.sum())
    constant = float(np.dot(weight, loss) / total)
    centred_g = g - constant
    spread = float(np.dot(weight, centred_g**2))
    if spread > 0.0:
        coefficient = float(np.dot(weight, (loss - constant) * centred_g) / spread)
        coefficient = min(max(coefficient, 0.0), 1.0)
    else:
        coefficient = 0.0
    residual = loss - constant - coefficient * centred_g

    # Estimated sum_j r_j^2 / p_eps(j) (up to the common factor) for each candidate floor:
    # convex in eps, so a grid finds its minimum.
    floors = np.linspace(minimum, 1.0, _FLOOR_GRID)
    relative = (1.0 - floors[:, None]) * share[None, :] + floors[:, None]
    second = (weight * residual**2)[None, :] / np.maximum(relative, 1e-300)
    floor = float(floors[int(np.argmin(second.sum(axis=1)))])
    return Reliance(coefficient=coefficient, constant=max(constant, 0.0), floor=floor)
