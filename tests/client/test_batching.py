"""Ingest arrays are cut into messages that respect the size budget, in order, once."""

from __future__ import annotations

import uuid

import numpy as np
import pytest

from leadline.client import InvalidRequest
from leadline.client._batching import IngestColumns, build_batches, plan_batches


def _columns(n: int, *, dim: int = 8, classes: int = 3, seed: int = 0) -> IngestColumns:
    rng = np.random.default_rng(seed)
    outputs = rng.dirichlet(np.ones(classes), size=n)
    return IngestColumns.from_arrays(
        [f"item-{i}" for i in range(n)],
        rng.normal(size=(n, dim)),
        outputs,
        segments=[f"segment-{i % 3}" for i in range(n)],
        payload_refs=[f"s3://bucket/key-{i}" for i in range(n)],
        event_time_ms=np.arange(n) + 1_700_000_000_000,
    )


@pytest.mark.parametrize(
    ("n", "dim", "max_rows", "max_bytes"),
    [(1, 4, 10, 4096), (1000, 8, 300, 1 << 20), (5000, 64, 5000, 64 * 1024), (777, 3, 1, 4096)],
)
def test_batches_cover_every_row_once_within_the_budget(
    n: int, dim: int, max_rows: int, max_bytes: int
) -> None:
    columns = _columns(n, dim=dim)
    batches = list(build_batches("pools/p", columns, max_rows=max_rows, max_bytes=max_bytes))
    ids = [item_id for batch in batches for item_id in batch.item_ids]
    assert ids == columns.item_ids
    for batch in batches:
        rows = len(batch.item_ids)
        assert 1 <= rows <= max_rows
        # The encoded message, as gRPC sends it, stays under the byte budget.
        assert batch.ByteSize() <= max_bytes
        assert len(batch.features) == rows * dim
        assert len(batch.model_outputs) == rows * 3
        assert len(batch.segments) == len(batch.payload_refs) == len(batch.event_time_ms) == rows
    features = np.concatenate([np.asarray(b.features, dtype=np.float32) for b in batches])
    np.testing.assert_array_equal(features, columns.features.ravel())


def test_batches_are_as_large_as_the_budget_allows() -> None:
    columns = _columns(4000, dim=32)
    batches = list(build_batches("pools/p", columns, max_rows=10_000, max_bytes=64 * 1024))
    # Every message but the last is at least half full: the planner does not cut early.
    assert all(batch.ByteSize() > 32 * 1024 for batch in batches[:-1])


def test_plan_batches_gives_an_oversized_row_a_batch_of_its_own() -> None:
    plan = plan_batches(np.array([10, 5000, 10, 10]), max_rows=100, max_bytes=1024)
    assert plan == [slice(0, 1), slice(1, 2), slice(2, 4)]


def test_request_ids_are_fresh_without_a_caller_id_and_stable_with_one() -> None:
    columns = _columns(1000)

    def ids(request_id: str | None) -> list[str]:
        batches = build_batches(
            "pools/p", columns, max_rows=100, max_bytes=1 << 20, request_id=request_id
        )
        return [batch.request_id for batch in batches]

    fresh_a, fresh_b = ids(None), ids(None)
    assert len(set(fresh_a + fresh_b)) == 20
    assert all(uuid.UUID(value).version == 4 for value in fresh_a)
    stable = ids("nightly-2026-12-01")
    assert stable == ids("nightly-2026-12-01")
    assert len(set(stable)) == 10
    assert set(stable).isdisjoint(ids("nightly-2026-12-02"))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (
            {"features": np.zeros((3, 2))},
            "features has shape (3, 2): must be (n, feature_dim) with n == len(item_ids) == 2.",
        ),
        (
            {"features": np.zeros(2)},
            "features has shape (2,): must be (n, feature_dim)",
        ),
        ({"outputs": np.zeros((2, 2, 2))}, "outputs has shape (2, 2, 2): must be (n, num_classes)"),
        ({"segments": ["a"]}, "segments has 1 entries: must have 2: one per item."),
        ({"payload_refs": ["a", "b", "c"]}, "payload_refs has 3 entries: must have 2"),
        ({"event_time_ms": [1]}, "event_time_ms has shape (1,): must be (2,): one per item."),
    ],
)
def test_mismatched_shapes_are_refused_naming_the_argument(kwargs: dict, message: str) -> None:
    arguments = {
        "item_ids": ["a", "b"],
        "features": np.zeros((2, 2)),
        "outputs": np.full((2, 2), 0.5),
    }
    arguments.update(kwargs)
    with pytest.raises(InvalidRequest) as caught:
        IngestColumns.from_arrays(**arguments)
    assert caught.value.details.startswith(message)


def test_regression_outputs_may_be_one_dimensional() -> None:
    columns = IngestColumns.from_arrays(["a", "b"], np.zeros((2, 3)), [1.5, -2.0])
    (batch,) = build_batches("pools/r", columns, max_rows=10, max_bytes=4096)
    assert list(batch.model_outputs) == [1.5, -2.0]
    assert not batch.segments
    assert not batch.event_time_ms
