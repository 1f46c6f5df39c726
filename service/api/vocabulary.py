"""Wire enums <-> domain values: the one table for each enum.

Requests arrive with the proto's enum numbers and leave with them; inside, the engine and
the core speak their own values (``LossKind``, ``EstimatorMode``, ...). Validation reads
these tables one way, conversion the other, so a new enum value is added here once.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TypeVar

from leadline.service.draws import DrawStatus
from leadline.service.estimation import BoundKind, EstimatorMode, LossKind, Verdict
from leadline.v1 import leadline_pb2 as pb

__all__ = [
    "BOUNDS",
    "DRAW_STATUSES",
    "LOSSES",
    "MODES",
    "TASKS",
    "VERDICTS",
    "wire_bound",
    "wire_loss",
    "wire_mode",
    "wire_task",
]

#: pool.task -> PoolSettings.task
TASKS: Mapping[pb.TaskType, str] = {
    pb.TASK_TYPE_CLASSIFICATION: "classification",
    pb.TASK_TYPE_REGRESSION: "regression",
}
LOSSES: Mapping[pb.LossKind, LossKind] = {
    pb.LOSS_KIND_ZERO_ONE: LossKind.ZERO_ONE,
    pb.LOSS_KIND_CROSS_ENTROPY: LossKind.CROSS_ENTROPY,
    pb.LOSS_KIND_BRIER: LossKind.BRIER,
    pb.LOSS_KIND_COST_MATRIX: LossKind.COST_MATRIX,
    pb.LOSS_KIND_SQUARED_ERROR: LossKind.SQUARED_ERROR,
    pb.LOSS_KIND_ABSOLUTE_ERROR: LossKind.ABSOLUTE_ERROR,
}
MODES: Mapping[pb.EstimatorMode, EstimatorMode] = {
    pb.ESTIMATOR_MODE_UNBIASED: EstimatorMode.UNBIASED,
    pb.ESTIMATOR_MODE_SURROGATE: EstimatorMode.SURROGATE,
    pb.ESTIMATOR_MODE_BALANCED: EstimatorMode.BALANCED,
}
BOUNDS: Mapping[pb.BoundKind, BoundKind] = {
    pb.BOUND_KIND_FIXED_TIME: BoundKind.FIXED_TIME,
    pb.BOUND_KIND_ANYTIME: BoundKind.ANYTIME,
}
VERDICTS: Mapping[Verdict, pb.Verdict] = {
    Verdict.PASS: pb.VERDICT_PASS,
    Verdict.FAIL: pb.VERDICT_FAIL,
    Verdict.UNDECIDED: pb.VERDICT_UNDECIDED,
}
DRAW_STATUSES: Mapping[DrawStatus, pb.DrawStatus] = {
    DrawStatus.ASSIGNED: pb.DRAW_STATUS_ASSIGNED,
    DrawStatus.LABELED: pb.DRAW_STATUS_LABELED,
    DrawStatus.SKIPPED: pb.DRAW_STATUS_SKIPPED,
    DrawStatus.WAITING: pb.DRAW_STATUS_WAITING,
}

_K = TypeVar("_K")
_V = TypeVar("_V")


def _inverse(table: Mapping[_K, _V]) -> dict[_V, _K]:
    return {value: key for key, value in table.items()}


_WIRE_TASKS = _inverse(TASKS)
_WIRE_LOSSES = _inverse(LOSSES)
_WIRE_MODES = _inverse(MODES)
_WIRE_BOUNDS = _inverse(BOUNDS)


def wire_task(task: str) -> pb.TaskType:
    return _WIRE_TASKS[task]


def wire_loss(loss: LossKind) -> pb.LossKind:
    return _WIRE_LOSSES[loss]


def wire_mode(mode: EstimatorMode) -> pb.EstimatorMode:
    return _WIRE_MODES[mode]


def wire_bound(bound: BoundKind) -> pb.BoundKind:
    return _WIRE_BOUNDS[bound]
