"""Acceptance: create a pool, ingest 2,000 digits, label in rounds, estimate and gate."""

from __future__ import annotations

import numpy as np
from sklearn.metrics import zero_one_loss

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    classification_pool,
    item_batch,
    label_round,
)


def test_full_loop_estimate_tracks_true_risk(harness_factory, digits_pool: Dataset) -> None:
    data = digits_pool
    # A fixed draw seed makes the draws, and so this statistical check, reproducible.
    harness: Harness = harness_factory(draw_seed=20261202)
    # True pool risk of the deployed model, from scikit-learn's zero_one_loss.
    true_risk = zero_one_loss(data.labels, data.outputs.argmax(axis=1))
    with harness.stubs() as stubs:
        created = stubs.call(stubs.pools.CreatePool, classification_pool("digits", data))
        assert created.name == "pools/digits"
        for start in range(0, 2000, 500):
            summary = stubs.call(
                stubs.ingest.IngestItems, item_batch("digits", data, range(start, start + 500))
            )
            assert summary.accepted == 500
            assert summary.rejected == 0
        assert summary.item_count == 2000
        labeled = 0
        for _ in range(10):
            labeled += label_round(stubs, "digits", data, 20)
            # The anytime bound is valid at every look (confidence sequence).
            look = stubs.call(
                stubs.estimates.GetEstimate,
                pb.GetEstimateRequest(pool="pools/digits", confidence=0.95),
            )
            assert look.anytime_lower <= true_risk <= look.anytime_upper, (look, true_risk)
        assert labeled == 200
        estimate = stubs.call(
            stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool="pools/digits", confidence=0.99)
        )
        assert estimate.items_in_scope == 2000
        assert estimate.labels_used == 200
        assert estimate.labels_pending == 0
        assert estimate.lower <= true_risk <= estimate.upper, (estimate, true_risk)
        assert estimate.anytime_lower <= true_risk <= estimate.anytime_upper
        for mode in (pb.ESTIMATOR_MODE_UNBIASED, pb.ESTIMATOR_MODE_SURROGATE):
            other = stubs.call(
                stubs.estimates.GetEstimate,
                pb.GetEstimateRequest(pool="pools/digits", confidence=0.99, mode=mode),
            )
            assert other.mode == mode
            assert other.lower <= true_risk <= other.upper, (other, true_risk)
        gate = stubs.call(
            stubs.estimates.CheckGate,
            pb.CheckGateRequest(pool="pools/digits", max_risk=0.99, confidence=0.95),
        )
        assert gate.verdict == pb.VERDICT_PASS
        assert gate.estimate.anytime_upper < 0.99
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/digits"))
        assert (pool.item_count, pool.labeled_count, pool.draw_count) == (2000, 200, 200)
        draws = stubs.call(
            stubs.estimates.ListDraws, pb.ListDrawsRequest(pool="pools/digits", page_size=1000)
        )
        assert len(draws.draws) == 200
        assert all(0 < d.selection_probability <= 1 for d in draws.draws)
        losses = np.array([d.loss for d in draws.draws])
        index = {item_id: i for i, item_id in enumerate(data.ids)}
        rows = np.array([index[d.item_id] for d in draws.draws])
        # Observed losses equal scikit-learn's zero_one_loss, item by item.
        predicted = data.outputs[rows].argmax(axis=1)
        expected = [
            zero_one_loss(data.labels[r : r + 1], predicted[i : i + 1]) for i, r in enumerate(rows)
        ]
        np.testing.assert_array_equal(losses, expected)
