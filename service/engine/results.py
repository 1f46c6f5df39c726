"""Plain values the engine takes and returns (no protobuf below the API layer)."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from leadline.service.draws import DrawStatus
from leadline.service.engine.pool import PoolSettings
from leadline.service.estimation import GateDecision, RiskEstimate

__all__ = [
    "AssignmentInfo",
    "DrawInfo",
    "EstimateResult",
    "GateOutcome",
    "IngestResult",
    "ItemBatch",
    "ItemProblem",
    "LabelInput",
    "OutcomeResult",
    "PoolInfo",
    "ValidationItems",
    "decode_assignments",
    "decode_ingest",
    "decode_outcome",
    "decode_pool_info",
    "encode",
]


@dataclass(frozen=True)
class ItemBatch:
    """A validated ingest batch: n rows, optional columns None when not given."""

    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, K) or (n,) float32
    payload_refs: list[str] | None = None
    segments: list[str] | None = None
    event_time_ms: np.ndarray | None = None


@dataclass(frozen=True)
class ValidationItems:
    """A validated AddValidationItems batch: n labeled rows from outside the pool."""

    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, K) or (n,) float32
    labels: np.ndarray  # (n,) float64: class indices (classification) or targets
    segments: list[str] | None = None


@dataclass(frozen=True)
class ItemProblem:
    """One item the call could not apply; ``kind`` is the domain error's class name."""

    item_id: str
    reason: str
    field: str
    kind: str


@dataclass(frozen=True)
class IngestResult:
    accepted: int
    duplicates: int
    rejected: int
    errors: tuple[ItemProblem, ...]
    item_count: int


@dataclass(frozen=True)
class AssignmentInfo:
    assignment_id: str
    item_id: str
    payload_ref: str
    lease_expire_time_ms: int
    selection_probability: float
    draw_index: int
    segment: str


@dataclass(frozen=True)
class LabelInput:
    """One submission: exactly one of class_label / value / skip_reason is set."""

    assignment_id: str
    class_label: int | None = None
    value: float | None = None
    skip_reason: str | None = None


@dataclass(frozen=True)
class OutcomeResult:
    """Result of SubmitLabels / ReleaseItems: how many applied, how many refused, and the
    first few per-item problems (``errors`` may be shorter than ``rejected``)."""

    accepted: int
    errors: tuple[ItemProblem, ...] = ()
    rejected: int = 0


@dataclass(frozen=True)
class PoolInfo:
    settings: PoolSettings
    create_time_ms: int
    item_count: int
    labeled_count: int
    surrogate_version: int
    draw_count: int
    pending_count: int
    skipped_count: int
    segments: tuple[str, ...] = field(default=())
    validation_count: int = 0
    # What the current surrogate was fitted on.
    surrogate_label_count: int = 0
    surrogate_validation_count: int = 0


@dataclass(frozen=True)
class EstimateResult:
    estimate: RiskEstimate
    items_in_scope: int
    items_unreached: int
    surrogate_version: int


@dataclass(frozen=True)
class GateOutcome:
    decision: GateDecision
    items_in_scope: int
    items_unreached: int
    surrogate_version: int


@dataclass(frozen=True)
class DrawInfo:
    draw_index: int
    item_id: str
    selection_probability: float
    surrogate_version: int
    expected_loss: float
    status: DrawStatus
    label: float | None
    loss: float | None
    labeler: str
    draw_time_ms: int
    label_time_ms: int
    skip_reason: str
    segment: str
    remaining_count: int


def encode(value: Any) -> bytes:
    """JSON bytes of a result (remembered for request_id replays)."""
    if isinstance(value, list):
        return json.dumps([asdict(v) for v in value]).encode()
    return json.dumps(asdict(value)).encode()


def _problems(items: list[dict[str, Any]]) -> tuple[ItemProblem, ...]:
    return tuple(ItemProblem(**item) for item in items)


def decode_ingest(data: bytes) -> IngestResult:
    raw = json.loads(data)
    raw["errors"] = _problems(raw["errors"])
    return IngestResult(**raw)


def decode_assignments(data: bytes) -> list[AssignmentInfo]:
    return [AssignmentInfo(**item) for item in json.loads(data)]


def decode_pool_info(data: bytes) -> PoolInfo:
    raw = json.loads(data)
    raw["settings"] = PoolSettings.from_json(raw["settings"])
    raw["segments"] = tuple(raw["segments"])
    return PoolInfo(**raw)


def decode_outcome(data: bytes) -> OutcomeResult:
    raw = json.loads(data)
    errors = _problems(raw["errors"])
    # Results remembered before the count existed: the listed errors are all we know.
    return OutcomeResult(
        accepted=raw["accepted"], errors=errors, rejected=raw.get("rejected", len(errors))
    )
