"""Acceptance: validation items (AddValidationItems) against a real server and SQLite file.

They are validated like ingest batches (exact codes and messages, nothing written when
refused), kept durably and idempotently, teach the surrogate before the first draw, and
never show up where pool items do: draws, item counts, segments and scopes, estimates.
"""

from __future__ import annotations

import contextlib
import math
import sqlite3
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import grpc
import numpy as np
import pytest

from leadline.service.store import DATABASE_FILE
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    label_round,
)

_POOL = "pools/tumours"
INVALID = grpc.StatusCode.INVALID_ARGUMENT


def validation_batch(
    pool_id: str, dataset: Dataset, rows: range | np.ndarray, *, prefix: str = "val", **columns: Any
) -> pb.ValidationBatch:
    """Rows of ``dataset`` as validation items with their true labels."""
    rows = np.asarray(rows)
    return pb.ValidationBatch(
        pool=f"pools/{pool_id}",
        item_ids=[f"{prefix}-{r}" for r in rows],
        features=dataset.features[rows].ravel().tolist(),
        model_outputs=dataset.outputs[rows].ravel().tolist(),
        class_labels=[int(dataset.labels[r]) for r in rows],
        **columns,
    )


def _stored_validation_rows(harness: Harness, pool_id: str) -> int:
    with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
        (count,) = connection.execute(
            "SELECT COUNT(*) FROM validation_items WHERE pool_id = ?", (pool_id,)
        ).fetchone()
    return int(count)


# ---------------------------------------------------------------------------------------
# bad requests
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    name: str
    build: Callable[[Dataset], pb.ValidationBatch]
    code: grpc.StatusCode
    message: str  # the exact status message


def _good(data: Dataset, **changes: Any) -> pb.ValidationBatch:
    batch = validation_batch("bad", data, range(3))
    for key, value in changes.items():
        batch.ClearField(key)
        if isinstance(value, list):
            getattr(batch, key).extend(value)
        else:
            setattr(batch, key, value)
    return batch


def _features(data: Dataset, row: int, column: int, value: float) -> list[float]:
    features = data.features[:3].astype(np.float64).copy()
    features[row, column] = value
    return features.ravel().tolist()


def _outputs(data: Dataset, row: int, values: list[float]) -> list[float]:
    outputs = data.outputs[:3].astype(np.float64).copy()
    outputs[row] = values
    return outputs.ravel().tolist()


def _regression(**changes: Any) -> pb.ValidationBatch:
    batch = pb.ValidationBatch(
        pool="pools/bad-regression",
        item_ids=["r-0", "r-1"],
        features=[0.1, 0.2, 0.3, 0.4],
        model_outputs=[1.5, 2.5],
        values=[1.0, 3.0],
    )
    for key, value in changes.items():
        batch.ClearField(key)
        getattr(batch, key).extend(value)
    return batch


CASES = [
    Case(
        "pool name without prefix",
        lambda d: _good(d, pool="bad"),
        INVALID,
        "pool = 'bad': must be 'pools/{pool_id}' with pool_id matching [a-z][a-z0-9-]{0,62}.",
    ),
    Case(
        "unknown pool",
        lambda d: _good(d, pool="pools/absent"),
        grpc.StatusCode.NOT_FOUND,
        "pool = 'pools/absent': no such pool.",
    ),
    Case(
        "no items",
        lambda _d: pb.ValidationBatch(pool="pools/bad"),
        INVALID,
        "item_ids is empty: a batch needs at least one item.",
    ),
    Case(
        "id repeated within the batch",
        lambda d: _good(d, item_ids=["v-a", "v-b", "v-a"]),
        INVALID,
        "item_ids[2] = 'v-a': repeated within the batch; each id may appear once per batch.",
    ),
    Case(
        "id with a control character",
        lambda d: _good(d, item_ids=["v-a", "v\nb", "v-c"]),
        INVALID,
        "item_ids[1] = 'v\\nb': an item id is 1-256 printable characters.",
    ),
    Case(
        "features of the wrong length",
        lambda d: _good(d, features=[0.5] * 89),
        INVALID,
        "features has 89 values: expected n * feature_dim = 3 * 30 = 90 (row-major).",
    ),
    Case(
        "NaN feature",
        lambda d: _good(d, features=_features(d, 1, 4, math.nan)),
        INVALID,
        "features of item 'val-1' (row 1): every value must be finite (no NaN or infinity).",
    ),
    Case(
        "outputs of the wrong length",
        lambda d: _good(d, model_outputs=[0.5] * 5),
        INVALID,
        "model_outputs has 5 values: expected n * num_classes = 3 * 2 = 6 probabilities.",
    ),
    Case(
        "probability above one",
        lambda d: _good(d, model_outputs=_outputs(d, 2, [1.5, -0.5])),
        INVALID,
        "model_outputs of item 'val-2' (row 2): probabilities must be in [0, 1].",
    ),
    Case(
        "probabilities not summing to one",
        lambda d: _good(d, model_outputs=_outputs(d, 0, [0.5, 0.25])),
        INVALID,
        "model_outputs of item 'val-0' (row 0) sum to 0.75: each row must sum to 1 within 0.001.",
    ),
    Case(
        "no class labels",
        lambda d: _good(d, class_labels=[]),
        INVALID,
        "class_labels has 0 entries for 3 item ids: a classification pool needs one class "
        "label per item.",
    ),
    Case(
        "one class label short",
        lambda d: _good(d, class_labels=[0, 1]),
        INVALID,
        "class_labels has 2 entries for 3 item ids: a classification pool needs one class "
        "label per item.",
    ),
    Case(
        "class label beyond the classes",
        lambda d: _good(d, class_labels=[0, 1, 2]),
        INVALID,
        "class_labels[2] = 2 (item 'val-2'): must be in 0..1.",
    ),
    Case(
        "negative class label",
        lambda d: _good(d, class_labels=[-1, 1, 0]),
        INVALID,
        "class_labels[0] = -1 (item 'val-0'): must be in 0..1.",
    ),
    Case(
        "values sent to a classification pool",
        lambda d: _good(d, values=[0.0, 1.0, 1.0]),
        INVALID,
        "values has 3 entries: pool 'pools/bad' is a classification pool; send the labels as "
        "class_labels and leave values empty.",
    ),
    Case(
        "segments for some items only",
        lambda d: _good(d, segments=["clinic-a", "clinic-b"]),
        INVALID,
        "segments has 2 entries for 3 item ids: optional columns are all-or-nothing (give "
        "none or one per item).",
    ),
    Case(
        "request id too long",
        lambda d: _good(d, request_id="r" * 129),
        INVALID,
        "request_id = 'rrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrrr...': must be 1-128 printable "
        "characters.",
    ),
    Case(
        "class labels sent to a regression pool",
        lambda _d: _regression(class_labels=[0, 1]),
        INVALID,
        "class_labels has 2 entries: pool 'pools/bad-regression' is a regression pool; send "
        "the targets as values and leave class_labels empty.",
    ),
    Case(
        "no values for a regression pool",
        lambda _d: _regression(values=[]),
        INVALID,
        "values has 0 entries for 2 item ids: a regression pool needs one target value per item.",
    ),
    Case(
        "infinite target",
        lambda _d: _regression(values=[1.0, math.inf]),
        INVALID,
        "values[1] = inf (item 'r-1'): must be finite.",
    ),
]


@pytest.fixture
def bad_pools(harness: Harness, cancer_pool: Dataset) -> Harness:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("bad", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("bad", cancer_pool, range(50)))
        regression = pb.Pool(
            task=pb.TASK_TYPE_REGRESSION,
            feature_dim=2,
            loss=pb.LOSS_KIND_SQUARED_ERROR,
            loss_cap=10.0,
        )
        stubs.call(
            stubs.pools.CreatePool,
            pb.CreatePoolRequest(pool_id="bad-regression", pool=regression),
        )
    return harness


def test_bad_validation_batches_are_refused_whole_with_exact_messages(
    bad_pools: Harness, cancer_pool: Dataset
) -> None:
    assert len(CASES) >= 12
    with bad_pools.stubs("ingest") as stubs:
        before = {
            name: stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=name))
            for name in ("pools/bad", "pools/bad-regression")
        }
        for case in CASES:
            with pytest.raises(grpc.RpcError) as caught:
                stubs.call(stubs.ingest.AddValidationItems, case.build(cancer_pool))
            assert (caught.value.code(), caught.value.details()) == (case.code, case.message), (
                case.name
            )
            for name, pool in before.items():
                now = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=name))
                assert now == pool, case.name  # nothing kept, nothing counted
        # A good batch then goes through: the refusals left no half-written state behind.
        good = stubs.call(stubs.ingest.AddValidationItems, _good(cancer_pool))
        assert (good.accepted, good.item_count) == (3, 3)
    assert _stored_validation_rows(bad_pools, "bad") == 3
    assert _stored_validation_rows(bad_pools, "bad-regression") == 0


def test_too_large_a_batch_is_resource_exhausted(harness_factory: Any) -> None:
    harness = harness_factory(max_batch_items=4)
    with harness.stubs() as stubs:
        pool = pb.Pool(task=pb.TASK_TYPE_REGRESSION, feature_dim=1, loss=5, loss_cap=1.0)
        stubs.call(stubs.pools.CreatePool, pb.CreatePoolRequest(pool_id="small", pool=pool))
        batch = pb.ValidationBatch(
            pool="pools/small",
            item_ids=[f"r{i}" for i in range(5)],
            features=[0.0] * 5,
            model_outputs=[0.0] * 5,
            values=[0.0] * 5,
        )
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(stubs.ingest.AddValidationItems, batch)
    assert caught.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert caught.value.details() == (
        "item_ids has 5 entries: at most 4 items per batch; split the batch."
    )


# ---------------------------------------------------------------------------------------
# accepted batches
# ---------------------------------------------------------------------------------------


def _wait_for(stubs: Stubs, predicate: Callable[[pb.Pool], bool], what: str) -> pb.Pool:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        if predicate(pool):
            return pool
        time.sleep(0.1)
    raise AssertionError(f"{what}: not within 60 s")


def test_duplicates_conflicts_and_request_ids_follow_the_ingest_rules(
    harness: Harness, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    with harness.stubs("ingest") as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data), who="admin")
        first = validation_batch("tumours", data, range(10), request_id="upload-1")
        reply = stubs.call(stubs.ingest.AddValidationItems, first)
        assert (reply.accepted, reply.duplicates, reply.rejected, reply.item_count) == (
            10,
            0,
            0,
            10,
        )
        # The same request id: the first answer, nothing applied twice.
        again = stubs.call(stubs.ingest.AddValidationItems, first)
        assert again == reply
        # Re-sent without a request id: duplicates. One id with another label: rejected
        # per item, the rest of the batch (two new rows) kept.
        changed = validation_batch("tumours", data, range(5, 12))
        changed.class_labels[2] = 1 - changed.class_labels[2]  # val-7
        reply = stubs.call(stubs.ingest.AddValidationItems, changed)
        assert (reply.accepted, reply.duplicates, reply.rejected, reply.item_count) == (
            2,
            4,
            1,
            12,
        )
        assert [(e.item_id, e.field) for e in reply.errors] == [("val-7", "class_labels")]
        assert reply.errors[0].reason == (
            "item_ids[2] = 'val-7': already among the pool's validation items with a "
            "different class_labels; an item id may not change content (use a new id)."
        )
        # Validation ids are their own namespace: a pool item may carry the same id.
        pool_items = stubs.call(
            stubs.ingest.IngestItems, pb.ItemBatch(**_as_items(validation_batch("x", data, [0])))
        )
        assert pool_items.accepted == 1
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.validation_count, pool.item_count) == (12, 1)
    # The admin role may upload too (the rows often come from whoever set the pool up).
    with harness.stubs("admin") as stubs:
        reply = stubs.call(
            stubs.ingest.AddValidationItems, validation_batch("tumours", data, range(12, 14))
        )
        assert reply.item_count == 14
    assert _stored_validation_rows(harness, "tumours") == 14


def _as_items(batch: pb.ValidationBatch) -> dict[str, Any]:
    return {
        "pool": _POOL,
        "item_ids": list(batch.item_ids),
        "features": list(batch.features),
        "model_outputs": list(batch.model_outputs),
    }


def test_validation_items_teach_the_first_draw_and_stay_out_of_everything_else(
    harness_factory: Any, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    harness: Harness = harness_factory(refit_every_labels=10)
    pool_rows = np.arange(300)
    validation_rows = np.arange(300, 569)
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(
            stubs.ingest.IngestItems,
            item_batch("tumours", data, pool_rows, segments=["clinic-east"] * pool_rows.shape[0]),
        )
        before = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
        reply = stubs.call(
            stubs.ingest.AddValidationItems,
            validation_batch(
                "tumours",
                data,
                validation_rows,
                segments=["clinic-north"] * validation_rows.shape[0],
            ),
        )
        assert reply.accepted == validation_rows.shape[0]
        # The very first draw already uses a surrogate fitted on the validation items.
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=5, labeler="vendor-a"),
        ).assignments
        draws = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL)).draws
        assert [d.surrogate_version for d in draws] == [1] * 5
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.surrogate_version, pool.surrogate_validation_count) == (1, 269)
        assert (pool.surrogate_label_count, pool.validation_count) == (0, 269)
        # Counts and segments are the pool's own.
        assert (pool.item_count, pool.draw_count, pool.labeled_count) == (300, 5, 0)
        assert list(pool.segments) == ["clinic-east"]
        drawn = {a.item_id for a in held}
        assert not drawn & {f"val-{r}" for r in validation_rows}
        # Label everything the pool offers: only pool items are ever drawn.
        stubs.call(
            stubs.labeling.ReleaseItems,
            pb.ReleaseItemsRequest(
                pool=_POOL, labeler="vendor-a", assignment_ids=[a.assignment_id for a in held]
            ),
        )
        labeled = 0
        while True:
            got = label_round(stubs, "tumours", data, 100)
            if not got:
                break
            labeled += got
        assert labeled == 300
        draws = stubs.call(
            stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL, page_size=1000)
        ).draws
        assert len(draws) == 300
        assert {d.item_id for d in draws} == {data.ids[r] for r in pool_rows}
        assert {d.segment for d in draws} == {"clinic-east"}
        # Every pool item labeled: every mode's estimate is the pool's exact risk, which
        # the validation items (other rows, another risk) cannot move.
        predicted = data.outputs[pool_rows].argmax(axis=1)
        exact = float(np.mean(predicted != data.labels[pool_rows]))  # zero-one loss
        for mode in (pb.ESTIMATOR_MODE_SURROGATE,):
            estimate = stubs.call(
                stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL, mode=mode)
            )
            assert estimate.items_in_scope == 300
            assert estimate.labels_used == 300
            assert estimate.risk == pytest.approx(exact, abs=1e-12)
        assert before.items_in_scope == 300
        # A validation item's segment is no scope of the pool.
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(
                stubs.estimates.GetEstimate,
                pb.GetEstimateRequest(pool=_POOL, segment="clinic-north"),
            )
        assert caught.value.code() == grpc.StatusCode.NOT_FOUND
        assert caught.value.details() == (
            "segment = 'clinic-north': no item of pool 'tumours' carries this segment tag."
        )
        # Refits keep using them beside the pool labels.
        pool = _wait_for(
            stubs,
            lambda p: p.surrogate_label_count == 300,
            "a refit on all 300 labels",
        )
        assert pool.surrogate_validation_count == 269


def test_deleting_the_pool_deletes_its_validation_items(
    harness: Harness, cancer_pool: Dataset
) -> None:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(
            stubs.ingest.AddValidationItems, validation_batch("tumours", cancer_pool, range(20))
        )
        assert _stored_validation_rows(harness, "tumours") == 20
        stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name=_POOL))
        assert _stored_validation_rows(harness, "tumours") == 0
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert pool.validation_count == 0
        # The old ids are free again.
        reply = stubs.call(
            stubs.ingest.AddValidationItems, validation_batch("tumours", cancer_pool, range(20))
        )
        assert (reply.accepted, reply.duplicates) == (20, 0)


def _snapshot(stubs: Stubs) -> dict[str, Any]:
    """Everything a reader sees about the pool, serialized deterministically."""
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    draws = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL, page_size=1000))
    estimates = [
        stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL, mode=mode))
        for mode in (
            pb.ESTIMATOR_MODE_UNBIASED,
            pb.ESTIMATOR_MODE_SURROGATE,
            pb.ESTIMATOR_MODE_BALANCED,
        )
    ]
    gate = stubs.call(stubs.estimates.CheckGate, pb.CheckGateRequest(pool=_POOL, max_risk=0.3))
    return {
        "pool": pool.SerializeToString(deterministic=True),
        "draws": [d.SerializeToString(deterministic=True) for d in draws.draws],
        "estimates": [e.SerializeToString(deterministic=True) for e in estimates],
        "gate": gate.SerializeToString(deterministic=True),
    }


def test_restart_keeps_validation_items_and_estimates_are_byte_identical(
    harness_factory: Any, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    harness: Harness = harness_factory(refit_every_labels=10)
    uploads = [
        validation_batch("tumours", data, range(300, 400)),
        validation_batch("tumours", data, range(400, 569)),
    ]
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(300)))
        for upload in uploads:
            stubs.call(stubs.ingest.AddValidationItems, upload)
        labeled = sum(label_round(stubs, "tumours", data, 10) for _ in range(2))
        pool = _wait_for(
            stubs,
            lambda p: p.surrogate_label_count == labeled and p.surrogate_validation_count == 269,
            "a refit on every label and validation item",
        )
        before = _snapshot(stubs)
    assert pool.validation_count == 269
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _snapshot(stubs) == before
        # Every validation item came back bit for bit: re-sending finds only duplicates.
        for upload in uploads:
            again = stubs.call(stubs.ingest.AddValidationItems, upload)
            assert (again.accepted, again.duplicates, again.rejected) == (
                0,
                len(upload.item_ids),
                0,
            )
        # Nothing new arrived, so nothing triggers a refit: the surrogate stays as it was.
        time.sleep(1.0)
        assert _snapshot(stubs) == before
