"""The engine's public surface is pinned: the API layer and the server program against it."""

from __future__ import annotations

import leadline.service.engine as engine
from tests.surface import public_names

_PUBLIC = {
    # the engine and its background worker
    "Engine", "RefitWorker", "WriteCall",
    # what the API layer hands in
    "ItemBatch", "LabelInput", "PoolSettings", "Scope", "ValidationItems",
    # what comes back
    "AssignmentInfo", "DrawInfo", "EstimateResult", "GateOutcome", "IngestResult",
    "ItemProblem", "OutcomeResult", "PoolInfo", "PoolState",
}  # fmt: skip


def test_all_is_every_public_name_in_order() -> None:
    assert engine.__all__ == public_names(engine)


def test_all_lists_exactly_the_pinned_names() -> None:
    assert set(engine.__all__) == _PUBLIC
