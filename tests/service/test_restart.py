"""Acceptance: stop and restart on the same data dir; everything is back, estimates identical."""

from __future__ import annotations

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    label_round,
    wait_for_refits,
)

_POOL = "pools/tumours"


def _snapshot(stubs: Stubs) -> dict[str, object]:
    """Everything a client can see about the pool."""
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    draws = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL, page_size=1000))
    estimates = []
    for mode in (
        pb.ESTIMATOR_MODE_UNBIASED,
        pb.ESTIMATOR_MODE_SURROGATE,
        pb.ESTIMATOR_MODE_BALANCED,
    ):
        for scope in (
            {},
            {"segment": "clinic-east"},
            {"start_time_ms": 1_700_000_100_000, "end_time_ms": 1_700_000_400_000},
        ):
            estimates.append(
                stubs.call(
                    stubs.estimates.GetEstimate,
                    pb.GetEstimateRequest(pool=_POOL, mode=mode, **scope),
                )
            )
    gate = stubs.call(stubs.estimates.CheckGate, pb.CheckGateRequest(pool=_POOL, max_risk=0.3))
    listed = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
    return {
        "pool": pool.SerializeToString(deterministic=True),
        "draws": [d.SerializeToString(deterministic=True) for d in draws.draws],
        "estimates": [e.SerializeToString(deterministic=True) for e in estimates],
        "gate": gate.SerializeToString(deterministic=True),
        "pools": [p.name for p in listed.pools],
    }


def test_restart_restores_everything_and_estimates_are_identical(
    harness_factory, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    harness: Harness = harness_factory(refit_every_labels=10)
    segments = ["clinic-east" if i % 3 else "clinic-west" for i in range(len(data.ids))]
    times = [1_700_000_000_000 + 1000 * i for i in range(len(data.ids))]
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.pools.CreatePool, classification_pool("spare", data))
        rows = range(len(data.ids))
        everything = item_batch(
            "tumours",
            data,
            rows,
            segments=segments,
            event_time_ms=times,
            payload_refs=[f"s3://scans/{i}" for i in rows],
        )
        stubs.call(stubs.ingest.IngestItems, everything)
        labeled = sum(label_round(stubs, "tumours", data, 10) for _ in range(3))
        assert labeled == 30
        # One skipped, one released (waiting), two assigned under a live lease.
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=4, labeler="vendor-a", lease_seconds=3600),
        ).assignments
        stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor-a",
                labels=[
                    pb.LabelSubmission(
                        assignment_id=held[0].assignment_id, skip_reason="image unreadable"
                    )
                ],
            ),
        )
        stubs.call(
            stubs.labeling.ReleaseItems,
            pb.ReleaseItemsRequest(
                pool=_POOL, labeler="vendor-a", assignment_ids=[held[1].assignment_id]
            ),
        )
        wait_for_refits(stubs, _POOL, labeled, min_version=2)
        before = _snapshot(stubs)
    pool_before = pb.Pool.FromString(before["pool"])  # type: ignore[arg-type]
    assert (pool_before.labeled_count, pool_before.skipped_count, pool_before.pending_count) == (
        30,
        1,
        3,
    )
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        after = _snapshot(stubs)
        assert after == before
        # Every item came back bit for bit: re-sending them all finds only duplicates.
        resent = stubs.call(stubs.ingest.IngestItems, everything)
        assert (resent.accepted, resent.duplicates, resent.rejected) == (0, len(data.ids), 0)
        # The live lease is still held: vendor-a can label it after the restart.
        index = {item_id: i for i, item_id in enumerate(data.ids)}
        result = stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor-a",
                labels=[
                    pb.LabelSubmission(
                        assignment_id=held[2].assignment_id,
                        class_label=int(data.labels[index[held[2].item_id]]),
                    )
                ],
            ),
        )
        assert result.accepted == 1
        # The released item is re-offered first, without a new draw.
        again = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=1, labeler="vendor-b"),
        ).assignments
        assert [a.item_id for a in again] == [held[1].item_id]
        assert again[0].draw_index == held[1].draw_index
