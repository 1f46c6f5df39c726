"""Candidate usefulness rules, compared by ``benchmarks/experiments/run.py``.

Each rule maps the surrogate's scores over the candidates (and their features) to a
usefulness u >= 0; ``draw_batch`` mixes it with the floor: q = (1 - eps) u / sum u + eps / n.

Background: for the difference estimator with a fixed control variate g, the variance of
one draw's term is sum_j E[(L_j - g_j)^2] / q_j - (...)^2, minimised by q_j proportional to
sqrt(E[(L_j - g_j)^2]) (the standard optimal importance-sampling proposal, e.g. Owen,
"Monte Carlo theory, methods and examples", 2013, §9.1). The other rules trade some of
that for labels that improve g elsewhere in the pool (epistemic spread) or are flatter /
sharper versions of it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from leadline.service.estimation import SurrogateScores, usefulness

__all__ = ["USEFULNESS_RULES"]


def _core(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
    return np.asarray(usefulness(scores), dtype=float)


def _sqrt_second_moment(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
    return np.sqrt(np.maximum(scores.residual_second_moment, 0.0))


def _expected_loss(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
    return np.maximum(scores.expected_loss, 0.0)


def _with_spread(weight: float) -> Callable[[SurrogateScores, np.ndarray], np.ndarray]:
    # Extra weight on the epistemic part: a label where the ensemble disagrees also
    # improves g for similar items (its value for the rest of the pool).
    def rule(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
        return np.sqrt(np.maximum(scores.residual_second_moment, 0.0) + weight * scores.spread**2)

    return rule


def _power(exponent: float) -> Callable[[SurrogateScores, np.ndarray], np.ndarray]:
    def rule(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
        return np.maximum(scores.residual_second_moment, 0.0) ** exponent

    return rule


def _spread_and_loss(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
    # sqrt(E[(L-g)^2]) plus the expected loss: keeps sampling where the losses are
    # (guards against a surrogate that is confidently wrong about a costly region).
    root = np.sqrt(np.maximum(scores.residual_second_moment, 0.0))
    g = np.maximum(scores.expected_loss, 0.0)
    return root / max(root.mean(), 1e-12) + g / max(g.mean(), 1e-12)


def _smoothed(share: float) -> Callable[[SurrogateScores, np.ndarray], np.ndarray]:
    # sqrt(E[(L-g)^2] + share * mean): items the surrogate calls certain keep a floor in
    # the square-root scale, a hedge against an overconfident E[(L-g)^2].
    def rule(scores: SurrogateScores, features: np.ndarray) -> np.ndarray:
        second = np.maximum(scores.residual_second_moment, 0.0)
        return np.sqrt(second + share * second.mean())

    return rule


USEFULNESS_RULES: dict[str, Callable[[SurrogateScores, np.ndarray], np.ndarray]] = {
    "core": _core,
    "sqrt_second_moment": _sqrt_second_moment,
    "expected_loss": _expected_loss,
    "spread_x3": _with_spread(3.0),
    "spread_x10": _with_spread(10.0),
    "second_moment_pow_0.25": _power(0.25),
    "second_moment_pow_0.75": _power(0.75),
    "root_plus_loss": _spread_and_loss,
    "smoothed_0.1": _smoothed(0.1),
    "smoothed_1": _smoothed(1.0),
}
