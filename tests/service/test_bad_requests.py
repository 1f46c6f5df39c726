"""Acceptance: a table of bad requests, each with its exact status code and a message naming
the field; the pool's counts are unchanged after each."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import grpc
import numpy as np
import pytest

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, Stubs, classification_pool, item_batch

_POOL = "pools/bad"
INVALID = grpc.StatusCode.INVALID_ARGUMENT


@dataclass(frozen=True)
class Case:
    name: str
    service: str
    method: str
    build: Callable[[dict[str, Any]], Any]  # context (dataset, held assignments) -> request
    code: grpc.StatusCode
    field: str  # must appear in the status message


def _batch(ctx: dict[str, Any], rows: range = range(100, 103), **changes: Any) -> pb.ItemBatch:
    batch = item_batch("bad", ctx["data"], rows)
    for key, value in changes.items():
        batch.ClearField(key)
        getattr(batch, key).extend(value) if isinstance(value, list) else setattr(batch, key, value)
    return batch


def _outputs_with(ctx: dict[str, Any], row: int, values: list[float]) -> list[float]:
    outputs = ctx["data"].outputs[100:103].astype(np.float64).copy()
    outputs[row] = values
    return outputs.ravel().tolist()


def _pool(**fields: Any) -> pb.Pool:
    base: dict[str, Any] = dict(
        task=pb.TASK_TYPE_CLASSIFICATION, num_classes=2, feature_dim=4, loss=pb.LOSS_KIND_ZERO_ONE
    )
    base.update(fields)
    return pb.Pool(**base)


def _submit(ctx: dict[str, Any], **outcome: Any) -> pb.SubmitLabelsRequest:
    return pb.SubmitLabelsRequest(
        pool=_POOL,
        labeler="vendor-a",
        labels=[pb.LabelSubmission(assignment_id=ctx["held"], **outcome)],
    )


CASES = [
    Case(
        "pool id with capitals",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="Bad_Id", pool=_pool()),
        INVALID,
        "pool_id",
    ),
    Case(
        "task unspecified",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="p1", pool=_pool(task=0)),
        INVALID,
        "pool.task",
    ),
    Case(
        "one class",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="p1", pool=_pool(num_classes=1)),
        INVALID,
        "pool.num_classes",
    ),
    Case(
        "feature_dim zero",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="p1", pool=_pool(feature_dim=0)),
        INVALID,
        "pool.feature_dim",
    ),
    Case(
        "regression with zero-one loss",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(
            pool_id="p1", pool=_pool(task=pb.TASK_TYPE_REGRESSION, num_classes=0, loss_cap=1.0)
        ),
        INVALID,
        "pool.loss",
    ),
    Case(
        "cost matrix of the wrong shape",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(
            pool_id="p1", pool=_pool(loss=pb.LOSS_KIND_COST_MATRIX, cost_matrix=[0, 1, 1])
        ),
        INVALID,
        "pool.cost_matrix",
    ),
    Case(
        "regression without loss cap",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(
            pool_id="p1",
            pool=_pool(
                task=pb.TASK_TYPE_REGRESSION, num_classes=0, loss=pb.LOSS_KIND_SQUARED_ERROR
            ),
        ),
        INVALID,
        "pool.loss_cap",
    ),
    Case(
        "selection floor above one",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="p1", pool=_pool(selection_floor=1.5)),
        INVALID,
        "pool.selection_floor",
    ),
    Case(
        "pool id in use",
        "pools",
        "CreatePool",
        lambda _c: pb.CreatePoolRequest(pool_id="bad", pool=_pool()),
        grpc.StatusCode.ALREADY_EXISTS,
        "pool_id",
    ),
    Case(
        "pool name without prefix",
        "pools",
        "GetPool",
        lambda _c: pb.GetPoolRequest(name="bad"),
        INVALID,
        "name",
    ),
    Case(
        "unknown pool",
        "pools",
        "GetPool",
        lambda _c: pb.GetPoolRequest(name="pools/absent"),
        grpc.StatusCode.NOT_FOUND,
        "pool",
    ),
    Case(
        "negative page size",
        "pools",
        "ListPools",
        lambda _c: pb.ListPoolsRequest(page_size=-1),
        INVALID,
        "page_size",
    ),
    Case(
        "forged page token",
        "pools",
        "ListPools",
        lambda _c: pb.ListPoolsRequest(page_token="%%%"),
        INVALID,
        "page_token",
    ),
    Case(
        "features of the wrong length",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, features=[0.5] * 7),
        INVALID,
        "features",
    ),
    Case(
        "NaN feature",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, features=[math.nan] + _batch(c).features[1:]),
        INVALID,
        "features",
    ),
    Case(
        "probabilities not summing to one",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, model_outputs=_outputs_with(c, 1, [0.5, 0.4])),
        INVALID,
        "model_outputs",
    ),
    Case(
        "probability above one",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, model_outputs=_outputs_with(c, 2, [1.5, -0.5])),
        INVALID,
        "model_outputs",
    ),
    Case(
        "segments for some items only",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, segments=["north", "south"]),
        INVALID,
        "segments",
    ),
    Case(
        "event times for some items only",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, event_time_ms=[1_700_000_000_000]),
        INVALID,
        "event_time_ms",
    ),
    Case(
        "id repeated in the batch",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, item_ids=["x-1", "x-2", "x-1"]),
        INVALID,
        "item_ids",
    ),
    Case(
        "empty item id",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, item_ids=["x-1", "", "x-3"]),
        INVALID,
        "item_ids",
    ),
    Case(
        "empty batch",
        "ingest",
        "IngestItems",
        lambda _c: pb.ItemBatch(pool=_POOL),
        INVALID,
        "item_ids",
    ),
    Case(
        "batch above the size limit",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, rows=range(0, 501)),
        grpc.StatusCode.RESOURCE_EXHAUSTED,
        "item_ids",
    ),
    Case(
        "ingest into unknown pool",
        "ingest",
        "IngestItems",
        lambda c: _batch(c, pool="pools/absent"),
        grpc.StatusCode.NOT_FOUND,
        "pool",
    ),
    Case(
        "acquire zero items",
        "labeling",
        "AcquireItems",
        lambda _c: pb.AcquireItemsRequest(pool=_POOL, count=0, labeler="vendor-a"),
        INVALID,
        "count",
    ),
    Case(
        "acquire without labeler",
        "labeling",
        "AcquireItems",
        lambda _c: pb.AcquireItemsRequest(pool=_POOL, count=1),
        INVALID,
        "labeler",
    ),
    Case(
        "lease above seven days",
        "labeling",
        "AcquireItems",
        lambda _c: pb.AcquireItemsRequest(
            pool=_POOL, count=1, labeler="vendor-a", lease_seconds=8 * 86400
        ),
        INVALID,
        "lease_seconds",
    ),
    Case(
        "class label out of range",
        "labeling",
        "SubmitLabels",
        lambda c: _submit(c, class_label=5),
        INVALID,
        "class_label",
    ),
    Case(
        "regression value on a classification pool",
        "labeling",
        "SubmitLabels",
        lambda c: _submit(c, value=0.5),
        INVALID,
        "class_label",
    ),
    Case(
        "submission without outcome",
        "labeling",
        "SubmitLabels",
        lambda c: _submit(c),
        INVALID,
        "labels[0]",
    ),
    Case(
        "unknown assignment",
        "labeling",
        "SubmitLabels",
        lambda _c: pb.SubmitLabelsRequest(
            pool=_POOL,
            labeler="vendor-a",
            labels=[pb.LabelSubmission(assignment_id="d999-000000000000", class_label=0)],
        ),
        grpc.StatusCode.NOT_FOUND,
        "assignment_id",
    ),
    Case(
        "different label for a labeled item",
        "labeling",
        "SubmitLabels",
        lambda c: pb.SubmitLabelsRequest(
            pool=_POOL,
            labeler="vendor-a",
            labels=[pb.LabelSubmission(assignment_id=c["done"], class_label=1 - c["done_label"])],
        ),
        grpc.StatusCode.FAILED_PRECONDITION,
        "labels[0]",
    ),
    Case(
        "release nothing",
        "labeling",
        "ReleaseItems",
        lambda _c: pb.ReleaseItemsRequest(pool=_POOL, labeler="vendor-a"),
        INVALID,
        "assignment_ids",
    ),
    Case(
        "confidence above one",
        "estimates",
        "GetEstimate",
        lambda _c: pb.GetEstimateRequest(pool=_POOL, confidence=1.5),
        INVALID,
        "confidence",
    ),
    Case(
        "unknown mode",
        "estimates",
        "GetEstimate",
        lambda _c: pb.GetEstimateRequest(pool=_POOL, mode=9),
        INVALID,
        "mode",
    ),
    Case(
        "unknown segment",
        "estimates",
        "GetEstimate",
        lambda _c: pb.GetEstimateRequest(pool=_POOL, segment="nowhere"),
        grpc.StatusCode.NOT_FOUND,
        "segment",
    ),
    Case(
        "empty window",
        "estimates",
        "GetEstimate",
        lambda _c: pb.GetEstimateRequest(pool=_POOL, start_time_ms=20, end_time_ms=10),
        INVALID,
        "start_time_ms",
    ),
    Case(
        "gate threshold NaN",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=math.nan),
        INVALID,
        "max_risk",
    ),
    Case(
        "gate threshold at the largest loss",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=1.0),
        INVALID,
        "max_risk",
    ),
    Case(
        "gate threshold above the largest loss",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=5.0),
        INVALID,
        "max_risk",
    ),
    Case(
        "gate threshold zero",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=0.0),
        INVALID,
        "max_risk",
    ),
    Case(
        "gate confidence below one half",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=0.2, confidence=0.3),
        INVALID,
        "confidence",
    ),
    Case(
        "unknown bound kind",
        "estimates",
        "CheckGate",
        lambda _c: pb.CheckGateRequest(pool=_POOL, max_risk=0.2, bound=7),
        INVALID,
        "bound",
    ),
    Case(
        "draw page too large",
        "estimates",
        "ListDraws",
        lambda _c: pb.ListDrawsRequest(pool=_POOL, page_size=20_000),
        INVALID,
        "page_size",
    ),
]


def _counts(stubs: Stubs) -> tuple[Any, ...]:
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    names = [p.name for p in stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest()).pools]
    return (
        pool.item_count,
        pool.labeled_count,
        pool.draw_count,
        pool.pending_count,
        pool.skipped_count,
        tuple(names),
    )


@pytest.fixture(scope="module")
def bad_setup(tmp_path_factory: pytest.TempPathFactory, cancer_pool: Dataset):
    from tests.service.helpers import write_tokens

    root = tmp_path_factory.mktemp("bad")
    harness = Harness(
        data_dir=root / "data",
        tokens=write_tokens(root / "tokens.toml"),
        settings={"max_batch_items": 500},
    )
    harness.start()
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("bad", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("bad", data, range(100)))
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=2, labeler="vendor-a"),
        ).assignments
        index = {item_id: i for i, item_id in enumerate(data.ids)}
        done_label = int(data.labels[index[held[1].item_id]])
        stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor-a",
                labels=[
                    pb.LabelSubmission(assignment_id=held[1].assignment_id, class_label=done_label)
                ],
            ),
        )
    context = {
        "data": data,
        "held": held[0].assignment_id,
        "done": held[1].assignment_id,
        "done_label": done_label,
    }
    yield harness, context
    harness.stop()


def test_table_has_at_least_25_cases() -> None:
    assert len(CASES) >= 25
    assert len({case.name for case in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=[case.name for case in CASES])
def test_bad_request_is_refused_with_code_and_field(bad_setup, case: Case) -> None:
    harness, context = bad_setup
    with harness.stubs() as stubs:
        before = _counts(stubs)
        method = getattr(getattr(stubs, case.service), case.method)
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(method, case.build(context))
        assert caught.value.code() == case.code, caught.value.details()
        assert case.field in caught.value.details(), caught.value.details()
        assert _counts(stubs) == before


@pytest.mark.parametrize("max_risk", [1.0, 1.5, 5.0, 0.0, -0.1, math.inf])
def test_gate_threshold_outside_the_loss_range_names_the_largest_loss(
    bad_setup, max_risk: float
) -> None:
    # A zero-one pool: each item's loss is 0 or 1, so its risk (a mean loss) lies in
    # [0, 1]; a threshold at or above 1 would pass every model, at or below 0 none.
    harness, _ = bad_setup
    with harness.stubs("reader") as stubs, pytest.raises(grpc.RpcError) as caught:
        stubs.call(stubs.estimates.CheckGate, pb.CheckGateRequest(pool=_POOL, max_risk=max_risk))
    assert caught.value.code() == INVALID
    assert caught.value.details().startswith(f"max_risk = {max_risk:g}: must be in (0, 1)")
