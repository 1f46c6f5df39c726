"""Pool lifecycle: create, get, paginated list, delete (also across a restart); trace."""

from __future__ import annotations

import grpc
import pytest

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, classification_pool, item_batch, label_round


def test_list_pages_and_delete_survive_restart(harness: Harness, cancer_pool: Dataset) -> None:
    with harness.stubs() as stubs:
        for pool_id in ("gamma", "alpha", "beta"):
            created = stubs.call(
                stubs.pools.CreatePool,
                classification_pool(pool_id, cancer_pool, description=f"{pool_id} pool"),
            )
            assert created.default_mode == pb.ESTIMATOR_MODE_BALANCED
        stubs.call(stubs.ingest.IngestItems, item_batch("beta", cancer_pool, range(50)))
        first = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest(page_size=2))
        assert [p.name for p in first.pools] == ["pools/alpha", "pools/beta"]
        assert first.next_page_token
        second = stubs.call(
            stubs.pools.ListPools,
            pb.ListPoolsRequest(page_size=2, page_token=first.next_page_token),
        )
        assert [p.name for p in second.pools] == ["pools/gamma"]
        assert second.next_page_token == ""
        stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name="pools/beta"))
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/beta"))
        assert caught.value.code() == grpc.StatusCode.NOT_FOUND
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        listed = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
        assert [(p.name, p.description) for p in listed.pools] == [
            ("pools/alpha", "alpha pool"),
            ("pools/gamma", "gamma pool"),
        ]
        # The id is free again, and the new pool starts empty.
        stubs.call(stubs.pools.CreatePool, classification_pool("beta", cancer_pool))
        assert stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/beta")).item_count == 0


def test_estimate_trace_has_increasing_label_counts(harness: Harness, cancer_pool: Dataset) -> None:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("trace", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("trace", cancer_pool, range(300)))
        for _ in range(3):
            label_round(stubs, "trace", cancer_pool, 10)
        trace = stubs.call(
            stubs.estimates.GetEstimateTrace,
            pb.GetEstimateTraceRequest(pool="pools/trace", max_points=5),
        )
    used = [point.labels_used for point in trace.points]
    assert len(used) == 5
    assert used == sorted(used)
    assert used[-1] == 30
    assert used[0] >= 1
    # Bounds lie in [0, B]; the point estimate itself may leave it with very few labels
    # (a difference estimator is not clipped).
    assert all(0 <= p.lower <= p.upper <= p.loss_bound == 1 for p in trace.points)


def test_a_batch_checked_against_a_pool_that_was_created_again_is_refused(
    harness: Harness, cancer_pool: Dataset
) -> None:
    # The servicer checks a batch against the pool's settings, then the engine applies it:
    # a pool deleted and created again in between (another feature_dim) must refuse the
    # batch under its lock instead of taking rows of the wrong width.
    from leadline.service.api import validation
    from leadline.service.errors import FailedPrecondition

    assert harness.server is not None
    engine = harness.server.engine
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("again", cancer_pool))
        request = item_batch("again", cancer_pool, range(20))
        checked = validation.item_batch(request, engine.settings("again"), max_items=100)
        stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name="pools/again"))
        narrower = classification_pool("again", cancer_pool)
        narrower.pool.feature_dim = cancer_pool.features.shape[1] - 1
        stubs.call(stubs.pools.CreatePool, narrower)
    with pytest.raises(FailedPrecondition, match="was created again while the request"):
        engine.ingest("again", checked)
    assert engine.get_pool("again").item_count == 0
