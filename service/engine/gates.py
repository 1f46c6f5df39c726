"""What a gate's labels hint can promise, given the items the scope still has unlabeled.

The core's ``more_labels_hint`` extrapolates the current width as 1/sqrt(labels); it knows
nothing of how many items are left to label, so near the threshold it can ask for more
labels than the scope holds (a 6,001-item pool was told 23,402). Here the hint is capped
at the unlabeled items in scope, and when even labeling all of them may not decide the
gate, the reason says so instead of naming an impossible count.
"""

from __future__ import annotations

import dataclasses

from leadline.service.estimation import BoundKind, GateDecision, Verdict

__all__ = ["hint_within_scope"]


def hint_within_scope(
    decision: GateDecision, *, items_in_scope: int, max_risk: float
) -> GateDecision:
    """The decision with ``more_labels_hint`` at most the scope's unlabeled items.

    A hint equal to that count means "even labeling all of them may not decide it" (the
    proto's ``GateResult.more_labels_hint`` comment). PASS and FAIL pass through.
    """
    if decision.verdict is not Verdict.UNDECIDED:
        return decision
    estimate = decision.estimate
    unlabeled = max(items_in_scope - estimate.labels_used, 0)
    if decision.bound is BoundKind.ANYTIME:
        label, lower, upper = "anytime", estimate.anytime_lower, estimate.anytime_upper
    else:
        label, lower, upper = "fixed-time", estimate.lower, estimate.upper
    bounds = (
        f"The {label} bounds [{lower:.4g}, {upper:.4g}], each one-sided at "
        f"{estimate.confidence:.0%} confidence, contain max_risk {max_risk:.4g}"
    )
    if unlabeled == 0:
        hint, rest = 0, "every item in scope is labeled, so more labels cannot decide it."
    elif decision.more_labels_hint >= unlabeled:
        hint = unlabeled
        rest = f"even labeling all {unlabeled:,} unlabeled items in scope may not decide it."
    else:
        hint = decision.more_labels_hint
        rest = f"roughly {hint:,} more labels may decide it."
    return dataclasses.replace(decision, more_labels_hint=hint, reason=f"{bounds}; {rest}")
