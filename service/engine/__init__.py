"""Per-pool orchestration between the API layer, the store and the estimation core."""

from leadline.service.engine.engine import Engine
from leadline.service.engine.pool import PoolSettings, PoolState
from leadline.service.engine.refit import RefitWorker
from leadline.service.engine.results import (
    AssignmentInfo,
    DrawInfo,
    EstimateResult,
    GateOutcome,
    IngestResult,
    ItemBatch,
    ItemProblem,
    LabelInput,
    OutcomeResult,
    PoolInfo,
    ValidationItems,
)
from leadline.service.engine.scopes import Scope
from leadline.service.engine.writes import WriteCall

__all__ = [
    "AssignmentInfo",
    "DrawInfo",
    "Engine",
    "EstimateResult",
    "GateOutcome",
    "IngestResult",
    "ItemBatch",
    "ItemProblem",
    "LabelInput",
    "OutcomeResult",
    "PoolInfo",
    "PoolSettings",
    "PoolState",
    "RefitWorker",
    "Scope",
    "ValidationItems",
    "WriteCall",
]
