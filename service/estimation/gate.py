"""Release gate: PASS / FAIL / UNDECIDED from a one-sided bound against max_risk.

PASS if the upper bound at ``confidence`` is below max_risk, FAIL if the lower bound is
above it, else UNDECIDED. The anytime bound (confidence sequence) is the default because a
gate is polled repeatedly: with it a PASS is wrong (true risk >= max_risk) in at most
1 - confidence of pools however often the gate is checked. The fixed-time bound is valid
only at one pre-chosen look.

``more_labels_hint`` is rough: the distance from the estimate to the deciding edge shrinks
like 1/sqrt(labels), so about labels (half_width / gap)^2 labels in total would decide.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

from leadline.v1.rules import gate_confidence_problem, max_risk_problem

from ._checks import describe
from .bounds import BoundKind
from .estimators import EstimatorMode, RiskEstimate, estimate_one_sided
from .terms import DrawTerms, PlugInSums

__all__ = ["MAX_LABELS_HINT", "GateDecision", "Verdict", "check_gate"]

#: Ceiling on ``more_labels_hint`` (when the estimate sits on max_risk).
MAX_LABELS_HINT: int = 1_000_000


class Verdict(enum.Enum):
    """A gate's answer (values: the proto enum's suffixes, lower-case)."""

    PASS = "pass"
    FAIL = "fail"
    UNDECIDED = "undecided"


@dataclass(frozen=True)
class GateDecision:
    verdict: Verdict
    estimate: RiskEstimate
    more_labels_hint: int
    reason: str
    bound: BoundKind


def check_gate(
    terms: DrawTerms,
    sums: PlugInSums,
    *,
    max_risk: float,
    confidence: float,
    bound: BoundKind = BoundKind.ANYTIME,
    mode: EstimatorMode = EstimatorMode.BALANCED,
    loss_bound: float,
) -> GateDecision:
    """Decide the gate; the estimate's bounds are one-sided at ``confidence`` each."""
    # One rule for the server and this core: a gate's confidence lies in (0.5, 1).
    problem = gate_confidence_problem(confidence)
    if problem is not None:
        raise ValueError(problem)
    if not isinstance(bound, BoundKind):
        raise ValueError(f"bound = {describe(bound)}: must be a BoundKind member.")
    # One rule for the server, this core and the client: max_risk in (0, loss_bound).
    problem = max_risk_problem(max_risk, loss_bound=loss_bound)
    if problem is not None:
        raise ValueError(problem)
    estimate = estimate_one_sided(
        terms,
        sums,
        mode=mode,
        confidence=confidence,
        loss_bound=loss_bound,
        anytime=bound is BoundKind.ANYTIME,
    )
    if bound is BoundKind.ANYTIME:
        lower, upper, label = estimate.anytime_lower, estimate.anytime_upper, "anytime"
    else:
        lower, upper, label = estimate.lower, estimate.upper, "fixed-time"
    labels = estimate.labels_used
    if upper < max_risk:
        verdict, hint = Verdict.PASS, 0
        reason = (
            f"The {label} upper bound {upper:.4g} at {confidence:.0%} confidence is below "
            f"max_risk {max_risk:.4g} after {labels} labels."
        )
    elif lower > max_risk:
        verdict, hint = Verdict.FAIL, 0
        reason = (
            f"The {label} lower bound {lower:.4g} at {confidence:.0%} confidence is above "
            f"max_risk {max_risk:.4g} after {labels} labels."
        )
    else:
        verdict = Verdict.UNDECIDED
        hint = _hint(estimate.risk, lower, upper, max_risk, labels)
        reason = (
            f"The {label} bounds [{lower:.4g}, {upper:.4g}] at {confidence:.0%} confidence "
            f"contain max_risk {max_risk:.4g}; roughly {hint} more labels may decide it."
        )
    return GateDecision(
        verdict=verdict, estimate=estimate, more_labels_hint=hint, reason=reason, bound=bound
    )


def _hint(risk: float, lower: float, upper: float, max_risk: float, labels: int) -> int:
    gap = abs(risk - max_risk)
    half_width = (upper - risk) if risk < max_risk else (risk - lower)
    if gap <= 0.0 or not math.isfinite(half_width):
        return MAX_LABELS_HINT
    current = max(labels, 1)
    total = current * (half_width / gap) ** 2
    return int(min(MAX_LABELS_HINT, max(1, math.ceil(total - current))))
