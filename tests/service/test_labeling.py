"""Leases, re-offers, retries, skips and duplicate items, over a real server."""

from __future__ import annotations

import time

import grpc
import numpy as np
import pytest

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, Stubs, classification_pool, item_batch

_POOL = "pools/lab"


@pytest.fixture
def lab(harness: Harness, cancer_pool: Dataset) -> Harness:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("lab", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("lab", cancer_pool, range(200)))
    return harness


def _acquire(stubs: Stubs, count: int, **fields: object) -> list[pb.Assignment]:
    request = pb.AcquireItemsRequest(pool=_POOL, count=count, labeler="vendor-a", **fields)
    return list(stubs.call(stubs.labeling.AcquireItems, request).assignments)


def _label(data: Dataset, assignment: pb.Assignment, *, flip: bool = False) -> pb.LabelSubmission:
    index = data.ids.index(assignment.item_id)
    label = int(data.labels[index])
    return pb.LabelSubmission(
        assignment_id=assignment.assignment_id, class_label=1 - label if flip else label
    )


def _pool(stubs: Stubs) -> pb.Pool:
    return stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))


def test_expired_lease_is_refused_and_item_is_reoffered_without_new_draw(
    lab: Harness, cancer_pool: Dataset
) -> None:
    with lab.stubs() as stubs:
        first = _acquire(stubs, 2, lease_seconds=1)
        assert all(a.lease_expire_time_ms - time.time() * 1000 <= 1100 for a in first)
        time.sleep(1.2)
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL, labeler="vendor-a", labels=[_label(cancer_pool, first[0])]
                ),
            )
        assert caught.value.code() == grpc.StatusCode.FAILED_PRECONDITION
        assert "lease" in caught.value.details()
        assert _pool(stubs).pending_count == 2
        # Both expired draws come back first, to another labeler, under new assignment ids.
        again = list(
            stubs.call(
                stubs.labeling.AcquireItems,
                pb.AcquireItemsRequest(pool=_POOL, count=3, labeler="vendor-b"),
            ).assignments
        )
        assert [a.draw_index for a in again[:2]] == [a.draw_index for a in first]
        assert [a.item_id for a in again[:2]] == [a.item_id for a in first]
        assert {a.assignment_id for a in again}.isdisjoint(a.assignment_id for a in first)
        assert again[2].draw_index == 2
        assert _pool(stubs).draw_count == 3


def test_acquire_retry_with_request_id_returns_same_assignments(lab: Harness) -> None:
    with lab.stubs() as stubs:
        first = _acquire(stubs, 4, request_id="5b0f7c1e-2f4b-4d55-9a57-0d8f1f0e6a11")
        retry = _acquire(stubs, 4, request_id="5b0f7c1e-2f4b-4d55-9a57-0d8f1f0e6a11")
        assert retry == first
        assert _pool(stubs).draw_count == 4


def test_submit_is_idempotent_and_conflicting_label_is_refused(
    lab: Harness, cancer_pool: Dataset
) -> None:
    with lab.stubs() as stubs:
        held = _acquire(stubs, 2)
        request = pb.SubmitLabelsRequest(
            pool=_POOL, labeler="vendor-a", labels=[_label(cancer_pool, held[0])]
        )
        assert stubs.call(stubs.labeling.SubmitLabels, request).accepted == 1
        # Same label again: a no-op that still reports success.
        assert stubs.call(stubs.labeling.SubmitLabels, request).accepted == 1
        assert _pool(stubs).labeled_count == 1
        mixed = pb.SubmitLabelsRequest(
            pool=_POOL,
            labeler="vendor-a",
            labels=[_label(cancer_pool, held[0], flip=True), _label(cancer_pool, held[1])],
        )
        reply = stubs.call(stubs.labeling.SubmitLabels, mixed)
        # The conflicting one is listed, the other is kept.
        assert reply.accepted == 1
        assert [e.item_id for e in reply.errors] == [held[0].item_id]
        assert "already labeled" in reply.errors[0].reason
        assert _pool(stubs).labeled_count == 2


def test_skip_is_recorded_as_nonresponse_with_reason(lab: Harness) -> None:
    with lab.stubs() as stubs:
        held = _acquire(stubs, 1)
        stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor-a",
                labels=[
                    pb.LabelSubmission(assignment_id=held[0].assignment_id, skip_reason="glare")
                ],
            ),
        )
        pool = _pool(stubs)
        assert (pool.skipped_count, pool.labeled_count, pool.pending_count) == (1, 0, 0)
        draw = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL)).draws[0]
        assert (draw.status, draw.skip_reason) == (pb.DRAW_STATUS_SKIPPED, "glare")
        estimate = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
        assert estimate.labels_skipped == 1
        assert estimate.nonresponse_allowance > 0


def test_released_item_is_reoffered_first(lab: Harness) -> None:
    with lab.stubs() as stubs:
        held = _acquire(stubs, 3)
        out = stubs.call(
            stubs.labeling.ReleaseItems,
            pb.ReleaseItemsRequest(
                pool=_POOL, labeler="vendor-a", assignment_ids=[held[1].assignment_id]
            ),
        )
        assert out.released == 1
        again = _acquire(stubs, 1)
        assert again[0].draw_index == held[1].draw_index
        assert _pool(stubs).draw_count == 3


def test_duplicate_items_are_noops_and_conflicts_are_listed(
    lab: Harness, cancer_pool: Dataset
) -> None:
    with lab.stubs() as stubs:
        same = stubs.call(stubs.ingest.IngestItems, item_batch("lab", cancer_pool, range(190, 210)))
        assert (same.accepted, same.duplicates, same.rejected) == (10, 10, 0)
        changed = item_batch("lab", cancer_pool, range(0, 3))
        features = np.asarray(changed.features).reshape(3, -1)
        features[1, 0] += 1.0
        changed.ClearField("features")
        changed.features.extend(features.ravel().tolist())
        reply = stubs.call(stubs.ingest.IngestItems, changed)
        assert (reply.accepted, reply.duplicates, reply.rejected) == (0, 2, 1)
        assert reply.errors[0].item_id == cancer_pool.ids[1]
        assert reply.errors[0].field == "features"
        assert reply.item_count == 210


def test_ingest_retry_with_request_id_is_answered_from_first_result(
    lab: Harness, cancer_pool: Dataset
) -> None:
    with lab.stubs() as stubs:
        batch = item_batch("lab", cancer_pool, range(300, 320))
        batch.request_id = "0c0a4b4e-93a3-4d0e-8d7c-3b8e1d9b2f55"
        first = stubs.call(stubs.ingest.IngestItems, batch)
        retry = stubs.call(stubs.ingest.IngestItems, batch)
        assert first == retry
        assert (first.accepted, first.item_count) == (20, 220)


def test_same_draw_seed_replays_the_same_draws(harness_factory, cancer_pool: Dataset) -> None:
    picked = []
    for _ in range(2):
        harness = harness_factory(draw_seed=99)
        with harness.stubs() as stubs:
            stubs.call(stubs.pools.CreatePool, classification_pool("lab", cancer_pool))
            stubs.call(stubs.ingest.IngestItems, item_batch("lab", cancer_pool, range(200)))
            held = _acquire(stubs, 6) + _acquire(stubs, 4)
        picked.append([(a.item_id, a.selection_probability, a.draw_index) for a in held])
    assert picked[0] == picked[1]
    assert len({item for item, _, _ in picked[0]}) == 10
