"""How far the next draws rely on the surrogate: a predictable guard against a surrogate
that does not beat a constant.

The difference estimator and the usefulness proposal pay off only where the surrogate's
predictions are better than knowing nothing: a control variate g that errs more than a
constant adds variance (Var(L - g) > Var(L)), and a proposal that favours items whose
residuals are not larger than the rest weights the draws by 1/q for nothing. Random
sampling has neither cost. At each refit the guard looks at the pool's labeled draws,
each scored honestly by a surrogate fitted without it (``cross_fitted_scores``), and
chooses for the draws until the next refit

* the control variate h = c + beta (g - c): g shrunk towards a constant c, with beta the
  importance-weighted regression coefficient of L on g clipped to [0, 1] (the power tuning
  of "PPI++: Efficient Prediction-Powered Inference", 2023: a coefficient fitted to the
  data, so a surrogate that carries no signal is switched off rather than obeyed);
* the floor epsilon of the defensive mixture q = (1 - epsilon) u / sum u + epsilon / |U|,
  between the configured minimum and 1 (uniform draws): the value minimising the
  estimated second moment of one correction term, sum_j r_j^2 / q_eps(j), estimated from
  the labeled draws by reweighting ("Monte Carlo theory, methods and examples", 2013,
  ch. 9), with u the hedged usefulness under h.

A labeled draw t was made with probability q_t among n_t candidates; p_t = n_t q_t is its
probability relative to uniform, and a population average over the candidates is
estimated by sum_t f_t / p_t / sum_t 1 / p_t. Both estimates start from ``PRIOR_DRAWS``
pseudo-draws that say "the surrogate is right" (coefficient 1, the constant at the
surrogate's own mean, the configured floor), so a handful of draws, or a rare loss not yet
seen, cannot throw a good surrogate away. Below ``MIN_DRAWS`` labeled draws the guard keeps
full reliance.

The choice uses labels that exist before the draws it governs, so every estimator keeps
its guarantees (the enumeration tests check exact unbiasedness through the guard).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ._checks import check_finite_array, check_fraction, describe
from .losses import LossSpec
from .selection import usefulness
from .surrogate import SurrogateScores, SurrogateSettings, ValidationRows, fit_surrogate

__all__ = [
    "MIN_DRAWS",
    "PRIOR_DRAWS",
    "Reliance",
    "choose_reliance",
    "cross_fitted_scores",
]

#: Labeled draws needed before the guard moves away from full reliance (our choice: two
#: batches of ten; measured in the label-efficiency benchmark).
MIN_DRAWS: int = 20
#: Weight, in draws, of the prior belief that the surrogate is right (our choice, measured
#: in the label-efficiency benchmark).
PRIOR_DRAWS: int = 20
#: Weight, in draws, of the prior that the configured floor is right: a larger floor must
#: lower the estimated second moment by more than this many draws' worth to be chosen.
FLOOR_PRIOR_DRAWS: float = 5.0
#: Folds of the cross-fit that scores each labeled item honestly.
CROSS_FIT_FOLDS: int = 2

_FLOOR_GRID = 36


@dataclass(frozen=True)
class Reliance:
    """The control variate h = constant + coefficient (g - constant) and the floor for the
    next draws. ``Reliance(floor=eps)`` is full reliance: h = g."""

    coefficient: float = 1.0
    constant: float = 0.0
    floor: float = 0.3

    def __post_init__(self) -> None:
        if not (0.0 <= self.coefficient <= 1.0):
            raise ValueError(f"coefficient = {describe(self.coefficient)}: must be in [0, 1].")
        if not (np.isfinite(self.constant) and self.constant >= 0.0):
            raise ValueError(f"constant = {describe(self.constant)}: must be finite and >= 0.")
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
        (|L - g| + |g - h|)^2 capped at B^2 (a bound on |L - h| for every loss the item
        can take)."""
        if self.is_full:
            return scores
        g = scores.expected_loss
        h = np.clip(self.control_variate(g), 0.0, loss_bound)
        worst = scores.worst_squared_deviation
        if worst is not None:
            reach = np.sqrt(np.maximum(worst, 0.0)) + np.abs(g - h)
            worst = np.minimum(reach**2, loss_bound**2)
        return SurrogateScores(
            expected_loss=h,
            residual_second_moment=scores.residual_second_moment + (g - h) ** 2,
            spread=scores.spread,
            worst_squared_deviation=worst,
        )

    def to_json(self) -> dict[str, float]:
        return {"coefficient": self.coefficient, "constant": self.constant, "floor": self.floor}


def cross_fitted_scores(
    spec: LossSpec,
    features: object,
    outputs: object,
    labels: object,
    *,
    seed: int,
    settings: SurrogateSettings | None = None,
    folds: int = CROSS_FIT_FOLDS,
    validation: ValidationRows | None = None,
) -> SurrogateScores:
    """Each labeled row scored by a surrogate fitted on the other folds only (an honest,
    out-of-sample prediction of what the surrogate knows); ``validation`` rows, which are
    not pool items, teach every fold. Members per fold: at most 2."""
    base = settings or SurrogateSettings()
    settings = replace(base, ensemble_size=min(base.ensemble_size, 2))
    out = spec.check_outputs(outputs)
    y = spec.check_labels(labels, out.shape[0])
    x = check_finite_array("features", features, ndim=2)
    n = out.shape[0]
    rng = np.random.default_rng(seed)
    fold = np.empty(n, dtype=np.int64)
    fold[rng.permutation(n)] = np.arange(n) % max(int(folds), 2)
    expected = np.zeros(n)
    second = np.zeros(n)
    spread = np.zeros(n)
    worst = np.zeros(n)
    for k in range(max(int(folds), 2)):
        held = fold == k
        if not np.any(held):
            continue
        model = fit_surrogate(
            spec,
            x[~held],
            out[~held],
            y[~held],
            version=0,
            seed=seed + k,
            settings=settings,
            validation=validation,
        )
        part = model.score(x[held], out[held])
        expected[held] = part.expected_loss
        second[held] = part.residual_second_moment
        spread[held] = part.spread
        assert part.worst_squared_deviation is not None
        worst[held] = part.worst_squared_deviation
    return SurrogateScores(expected, second, spread, worst)


def choose_reliance(
    *,
    losses: np.ndarray,
    honest: SurrogateScores,
    probabilities: np.ndarray,
    remaining_counts: np.ndarray,
    candidates: SurrogateScores,
    loss_bound: float,
    minimum_floor: float,
    min_draws: int = MIN_DRAWS,
) -> Reliance:
    """The reliance for the draws until the next refit.

    ``losses``, ``honest`` (cross-fitted scores of the labeled items), ``probabilities``
    and ``remaining_counts`` (each labeled draw's q_t and n_t) are per labeled draw;
    ``candidates`` are the current surrogate's scores over the items the next draws choose
    from. Fewer than ``min_draws`` draws: full reliance at ``minimum_floor``.
    Raises ValueError (field, value, rule) on NaN/inf, mismatched lengths, probabilities
    outside (0, 1], counts < 1 or ``minimum_floor`` outside (0, 1].
    """
    minimum = check_fraction("minimum_floor", minimum_floor, low_open=True, high_open=False)
    loss = check_finite_array("losses", losses, ndim=1)
    g = check_finite_array("honest.expected_loss", honest.expected_loss, ndim=1)
    q = check_finite_array("probabilities", probabilities, ndim=1)
    n = check_finite_array("remaining_counts", remaining_counts, ndim=1)
    for name, array in (("honest.expected_loss", g), ("probabilities", q), ("remaining_counts", n)):
        if array.shape != loss.shape:
            raise ValueError(
                f"{name} has {array.shape[0]} entries: must match losses ({loss.shape[0]})."
            )
    if q.size and (q.min() <= 0.0 or q.max() > 1.0):
        raise ValueError(
            f"probabilities range [{describe(q.min())}, {describe(q.max())}]: must be in (0, 1]."
        )
    if n.size and n.min() < 1.0:
        raise ValueError(f"remaining_counts min = {describe(n.min())}: must be >= 1.")
    if loss.shape[0] < max(int(min_draws), 1) or candidates.expected_loss.shape[0] == 0:
        return Reliance(floor=minimum)

    # 1 / p_t reweights each draw to the candidates it came from; normalised to mean 1 so
    # that sums count draws.
    weight = 1.0 / (n * q)
    weight = weight / float(weight.mean())
    draws = float(weight.sum())
    prior = float(PRIOR_DRAWS)
    constant = (float(np.dot(weight, loss)) + prior * float(np.mean(candidates.expected_loss))) / (
        draws + prior
    )
    centred = g - constant
    spread = float(np.dot(weight, centred**2))
    anchor = prior * spread / draws
    coefficient = 1.0
    # The cross-fitted surrogates saw half the labels: if even they beat the constant, the
    # surrogate in force (fitted on all of them) is trusted whole; only a surrogate that
    # does not beat it is shrunk towards it.
    beats_constant = float(np.dot(weight, (loss - g) ** 2)) <= float(
        np.dot(weight, (loss - constant) ** 2)
    )
    if spread > 0.0 and not beats_constant:
        fitted = (float(np.dot(weight, (loss - constant) * centred)) + anchor) / (spread + anchor)
        coefficient = min(max(fitted, 0.0), 1.0)
    reliance = Reliance(coefficient=coefficient, constant=max(constant, 0.0), floor=minimum)

    # The proposal the next draws would use, and each labeled item's honest share of it.
    pool_u = usefulness(reliance.apply(candidates, loss_bound=loss_bound), loss_bound=loss_bound)
    mean_u = float(pool_u.mean())
    if mean_u <= 0.0:
        return replace(reliance, floor=1.0)
    share = (
        usefulness(reliance.apply(honest, loss_bound=loss_bound), loss_bound=loss_bound) / mean_u
    )
    residual = loss - reliance.control_variate(g)
    # Estimated mean over candidates of r^2 / p_eps (convex in eps; a grid finds the
    # minimum), with the prior's pseudo-draws at the minimum floor's own estimate.
    floors = np.linspace(minimum, 1.0, _FLOOR_GRID)
    relative = (1.0 - floors[:, None]) * share[None, :] + floors[:, None]
    second = (weight * residual**2)[None, :] / np.maximum(relative, 1e-300)
    totals = second.sum(axis=1)
    totals = totals + FLOOR_PRIOR_DRAWS * (totals[0] / draws) * (floors > minimum)
    return replace(reliance, floor=float(floors[int(np.argmin(totals))]))
