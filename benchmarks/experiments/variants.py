"""Candidate usefulness rules, compared by ``benchmarks/experiments/run.py``.

Each rule maps the surrogate's scores over the candidates (and their label-free context)
to a usefulness u >= 0; ``draw_batch`` mixes it with the floor:
q = (1 - eps) u / sum u + eps / n.

Background: for the difference estimator with a fixed control variate g, the variance of
one draw's term is sum_j E[(L_j - g_j)^2] / q_j - (...)^2, minimised by q_j proportional to
sqrt(E[(L_j - g_j)^2]) (the optimal importance-sampling proposal applied to the residual,
e.g. "Monte Carlo theory, methods and examples", 2013, §9.1). That needs the surrogate's
E[(L - g)^2] to be right where it is small: an overconfident surrogate puts little
probability exactly where rare, costly mistakes hide. The rules below trade some of the
optimum for robustness to that (mixtures with a worst case, flatter powers) or for labels
that improve g elsewhere in the pool (epistemic spread).
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial

import numpy as np

from benchmarks.harness import RuleContext, UsefulnessRule
from leadline.service.estimation import (
    SurrogateScores,
    usefulness,
    worst_squared_deviation,
    worst_squared_deviation_of,
)

__all__ = ["USEFULNESS_RULES", "worst_case_second_moment"]


def _core(scores: SurrogateScores, context: RuleContext) -> np.ndarray:
    return np.asarray(usefulness(scores, loss_bound=context.spec.bound), dtype=float)


def _plain(scores: SurrogateScores, _context: RuleContext) -> np.ndarray:
    # The core's rule before the hedge: sqrt(E[(L - g)^2]).
    return np.asarray(usefulness(scores), dtype=float)


def _expected_loss(scores: SurrogateScores, _context: RuleContext) -> np.ndarray:
    return np.maximum(scores.expected_loss, 0.0)


def _second(scores: SurrogateScores) -> np.ndarray:
    return np.maximum(scores.residual_second_moment, 0.0)


def worst_case_second_moment(scores: SurrogateScores, context: RuleContext) -> np.ndarray:
    """max over possible labels of (L - g)^2: the core's ``worst_squared_deviation`` (loss
    table for classification, the ends of [0, B] for regression)."""
    return worst_squared_deviation(context.spec, context.outputs, scores.expected_loss)


# The factories below return ``functools.partial`` objects of module-level functions, so
# a rule can travel to a benchmark worker inside ``HarnessConfig.usefulness`` (pickled).


def _spread_rule(scores: SurrogateScores, _context: RuleContext, *, weight: float) -> np.ndarray:
    # Extra weight on the epistemic part: a label where the ensemble disagrees also
    # improves g for similar items (its value for the rest of the pool).
    return np.sqrt(_second(scores) + weight * scores.spread**2)


def _with_spread(weight: float) -> UsefulnessRule:
    return partial(_spread_rule, weight=weight)


def _power_rule(scores: SurrogateScores, _context: RuleContext, *, exponent: float) -> np.ndarray:
    return _second(scores) ** exponent


def _power(exponent: float) -> UsefulnessRule:
    return partial(_power_rule, exponent=exponent)


def _root_plus_loss(scores: SurrogateScores, _context: RuleContext) -> np.ndarray:
    # sqrt(E[(L-g)^2]) plus the expected loss, each normalised to mean 1.
    root = np.sqrt(_second(scores))
    g = np.maximum(scores.expected_loss, 0.0)
    return root / max(root.mean(), 1e-12) + g / max(g.mean(), 1e-12)


def _smoothed_rule(scores: SurrogateScores, _context: RuleContext, *, share: float) -> np.ndarray:
    # sqrt(E[(L-g)^2] + share * mean): a floor in the square-root scale.
    second = _second(scores)
    return np.sqrt(second + share * second.mean())


def _smoothed(share: float) -> UsefulnessRule:
    return partial(_smoothed_rule, share=share)


def _mixture_rule(
    scores: SurrogateScores, context: RuleContext, *, alpha: float | None, prior_labels: float
) -> np.ndarray:
    # The second moment under a mixture of the surrogate (weight 1 - a) and the worst case
    # (weight a): sqrt(E[(L-g)^2] + a * max (L-g)^2). A fixed a, or (alpha=None) the rule of
    # succession a = 1 / (labels + prior_labels): the chance of a kind of mistake not seen
    # among the labels so far.
    a = alpha if alpha is not None else 1.0 / (context.label_count + prior_labels)
    return np.sqrt(_second(scores) + a * worst_case_second_moment(scores, context))


def _mixture(alpha: float | None, *, prior_labels: float = 10.0) -> UsefulnessRule:
    return partial(_mixture_rule, alpha=alpha, prior_labels=prior_labels)


def _mixture_bound_rule(
    scores: SurrogateScores, context: RuleContext, *, alpha: float
) -> np.ndarray:
    # As _mixture, but the worst case from the loss bound alone, max(g, B - g)^2: needs
    # only g and B (no loss table); the core's rule before it used the loss table.
    worst = worst_squared_deviation_of(
        SurrogateScores(scores.expected_loss, scores.residual_second_moment, scores.spread),
        loss_bound=context.spec.bound,
    )
    return np.sqrt(_second(scores) + alpha * worst)


def _mixture_bound(alpha: float) -> UsefulnessRule:
    return partial(_mixture_bound_rule, alpha=alpha)


def _core_power_rule(
    scores: SurrogateScores, context: RuleContext, *, exponent: float
) -> np.ndarray:
    # The core's hedged rule raised to a power < 1: flatter where the surrogate's spread
    # tracks the residuals only loosely.
    return _core(scores, context) ** exponent


def _core_power(exponent: float) -> UsefulnessRule:
    return partial(_core_power_rule, exponent=exponent)


USEFULNESS_RULES: dict[str, Callable[[SurrogateScores, RuleContext], np.ndarray]] = {
    "core": _core,
    "plain_square_root": _plain,
    "expected_loss": _expected_loss,
    "spread_x3": _with_spread(3.0),
    "spread_x10": _with_spread(10.0),
    "second_moment_pow_0.25": _power(0.25),
    "second_moment_pow_0.75": _power(0.75),
    "root_plus_loss": _root_plus_loss,
    "smoothed_0.1": _smoothed(0.1),
    "smoothed_1": _smoothed(1.0),
    "mixture_0.01": _mixture(0.01),
    "mixture_0.03": _mixture(0.03),
    "mixture_succession": _mixture(None),
    "mixture_bound_0.01": _mixture_bound(0.01),
    "mixture_bound_0.003": _mixture_bound(0.003),
    "core_pow_0.5": _core_power(0.5),
    "core_pow_0.75": _core_power(0.75),
}
