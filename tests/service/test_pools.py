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
