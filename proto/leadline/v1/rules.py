"""Value rules of the v1 contract that the server, the estimation core and the client share.

A rule that more than one side applies lives here once, as a function that returns the
problem in words (or None), so every side refuses the same values with the same sentence;
each caller raises its own error type (the server INVALID_ARGUMENT, the core ValueError,
the client InvalidRequest). Pure Python: no protobuf, no gRPC, no numpy, so the estimation
core may import it without breaking its purity.
"""

from __future__ import annotations

import math
import numbers

__all__ = ["gate_confidence_problem", "max_risk_problem"]


def _shown(value: float) -> str:
    return f"{value:g}"


def max_risk_problem(
    max_risk: object, *, loss_bound: float | None = None, name: str = "max_risk"
) -> str | None:
    """Why ``max_risk`` cannot be a gate's threshold, or None when it can.

    A gate asks whether the risk, the mean loss over the items in scope, lies below
    ``max_risk``. Every item's loss lies in [0, B] (B = ``loss_bound``, the largest loss
    one item can have in the pool), so the risk does too: a threshold at or above B
    passes every model and one at or below 0 passes none. Either is a typo, never a
    release policy, so the threshold must lie in the open interval (0, B). Without
    ``loss_bound`` (a client that has not read the pool) only 0 < max_risk < inf is
    checked; the server checks the rest. ``name`` is how the caller's user spells the
    value (a field, a flag).
    """
    if isinstance(max_risk, bool) or not isinstance(max_risk, numbers.Real):
        return f"{name} = {max_risk!r}: must be a number."
    value = float(max_risk)
    if loss_bound is None:
        if not (math.isfinite(value) and value > 0):
            return (
                f"{name} = {_shown(value)}: must be a finite risk > 0 and below the pool's "
                "largest possible loss (a risk is a mean loss)."
            )
        return None
    bound = float(loss_bound)
    if not (math.isfinite(value) and 0 < value < bound):
        return (
            f"{name} = {_shown(value)}: must be in (0, {_shown(bound)}). The risk is a mean "
            f"loss and no item's loss in this pool exceeds {_shown(bound)}, so a threshold "
            f"at or above {_shown(bound)} would pass every model, and one at or below 0 none."
        )
    return None


def gate_confidence_problem(confidence: object, *, name: str = "confidence") -> str | None:
    """Why ``confidence`` cannot be a gate's confidence, or None when it can.

    A gate compares each side of the estimate with ``max_risk`` on its own, so each bound
    is one-sided at the confidence: below 0.5 the lower bound would lie above the upper
    one. The confidence must lie in (0.5, 1).
    """
    if isinstance(confidence, bool) or not isinstance(confidence, numbers.Real):
        return f"{name} = {confidence!r}: must be a number."
    value = float(confidence)
    if not (math.isfinite(value) and 0.5 < value < 1):
        return (
            f"{name} = {_shown(value)}: a gate needs a confidence in (0.5, 1) (each of its "
            "bounds is one-sided at it)."
        )
    return None
