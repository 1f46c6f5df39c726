"""Engine values -> protobuf messages."""

from __future__ import annotations

from leadline.service.api.vocabulary import (
    DRAW_STATUSES,
    VERDICTS,
    wire_bound,
    wire_loss,
    wire_mode,
    wire_task,
)
from leadline.service.engine import (
    AssignmentInfo,
    DrawInfo,
    EstimateResult,
    GateOutcome,
    ItemProblem,
    PoolInfo,
)
from leadline.service.estimation import LossKind
from leadline.v1 import leadline_pb2 as pb

__all__ = [
    "assignment_message",
    "draw_message",
    "estimate_message",
    "gate_message",
    "item_error",
    "pool_message",
]


def pool_message(info: PoolInfo) -> pb.Pool:
    settings = info.settings
    return pb.Pool(
        name=f"pools/{settings.pool_id}",
        task=wire_task(settings.task),
        num_classes=settings.num_classes,
        feature_dim=settings.feature_dim,
        loss=wire_loss(LossKind(settings.loss)),
        cost_matrix=list(settings.cost_matrix),
        loss_cap=settings.loss_cap,
        default_mode=wire_mode(settings.mode),
        item_count=info.item_count,
        labeled_count=info.labeled_count,
        create_time_ms=info.create_time_ms,
        description=settings.description,
        selection_floor=settings.selection_floor,
        default_lease_seconds=settings.default_lease_seconds,
        default_confidence=settings.default_confidence,
        refit_every_labels=settings.refit_every_labels,
        surrogate_version=info.surrogate_version,
        draw_count=info.draw_count,
        pending_count=info.pending_count,
        skipped_count=info.skipped_count,
        segments=list(info.segments),
        validation_count=info.validation_count,
        surrogate_label_count=info.surrogate_label_count,
        surrogate_validation_count=info.surrogate_validation_count,
    )


def item_error(problem: ItemProblem) -> pb.ItemError:
    return pb.ItemError(item_id=problem.item_id, reason=problem.reason, field=problem.field)


def assignment_message(info: AssignmentInfo) -> pb.Assignment:
    return pb.Assignment(
        assignment_id=info.assignment_id,
        item_id=info.item_id,
        payload_ref=info.payload_ref,
        lease_expire_time_ms=info.lease_expire_time_ms,
        selection_probability=info.selection_probability,
        draw_index=info.draw_index,
        segment=info.segment,
    )


def estimate_message(result: EstimateResult) -> pb.Estimate:
    e = result.estimate
    return pb.Estimate(
        risk=e.risk,
        std_error=e.std_error,
        lower=e.lower,
        upper=e.upper,
        anytime_lower=e.anytime_lower,
        anytime_upper=e.anytime_upper,
        bias_bound=e.bias_bound,
        mode=wire_mode(e.mode),
        confidence=e.confidence,
        items_in_scope=result.items_in_scope,
        labels_used=e.labels_used,
        labels_pending=e.labels_pending,
        labels_skipped=e.labels_skipped,
        surrogate_version=result.surrogate_version,
        nonresponse_allowance=e.nonresponse_allowance,
        items_unreached=result.items_unreached,
        unbiased_weight=e.unbiased_weight,
        loss_bound=e.loss_bound,
    )


def gate_message(outcome: GateOutcome) -> pb.GateResult:
    decision = outcome.decision
    estimate = estimate_message(
        EstimateResult(
            estimate=decision.estimate,
            items_in_scope=outcome.items_in_scope,
            items_unreached=outcome.items_unreached,
            surrogate_version=outcome.surrogate_version,
        )
    )
    return pb.GateResult(
        verdict=VERDICTS[decision.verdict],
        estimate=estimate,
        more_labels_hint=decision.more_labels_hint,
        reason=decision.reason,
        bound=wire_bound(decision.bound),
    )


def draw_message(info: DrawInfo, *, classification: bool) -> pb.Draw:
    message = pb.Draw(
        draw_index=info.draw_index,
        item_id=info.item_id,
        selection_probability=info.selection_probability,
        surrogate_version=info.surrogate_version,
        expected_loss=info.expected_loss,
        status=DRAW_STATUSES[info.status],
        labeler=info.labeler,
        draw_time_ms=info.draw_time_ms,
        label_time_ms=info.label_time_ms,
        skip_reason=info.skip_reason,
        segment=info.segment,
        remaining_count=info.remaining_count,
    )
    if info.label is not None:
        if classification:
            message.class_label = int(info.label)
        else:
            message.value = info.label
    if info.loss is not None:
        message.loss = info.loss
    return message
