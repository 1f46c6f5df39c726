"""The draw ledger: one status with explicit maps to the core and the wire, a record that
survives the store unchanged, and terms built from what each draw logged.

The outside references: the wire contract's own DrawStatus enum (leadline.proto, read
from the compiled descriptor) and the core's documented DRAW_* codes (docs/core-api.md);
the terms are checked against the core's ``draw_batch`` output for the same draws, and
the estimate of a fully labeled pool against the plain mean loss (numpy), its exact risk.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from leadline.service.api.vocabulary import DRAW_STATUSES
from leadline.service.draws import DrawRecord, DrawStatus
from leadline.service.engine.ledger import CORE_STATUS, DrawLedger, core_status, select
from leadline.service.estimation import (
    DRAW_LABELED,
    DRAW_PENDING,
    DRAW_SKIPPED,
    EstimatorMode,
    Reliance,
    SurrogateScores,
    draw_batch,
    estimate_risk,
    usefulness,
)
from leadline.service.store import Database
from leadline.service.store import records as store
from leadline.v1 import leadline_pb2 as pb


def test_every_status_maps_to_the_wire_status_of_the_same_name() -> None:
    assert set(DRAW_STATUSES) == set(DrawStatus)
    for status, wire in DRAW_STATUSES.items():
        assert pb.DrawStatus.Name(wire) == f"DRAW_STATUS_{status.name}"
    # Every wire status but UNSPECIFIED has a domain status.
    assert {pb.DrawStatus.Name(w) for w in DRAW_STATUSES.values()} == {
        name
        for name in pb.DrawStatus.DESCRIPTOR.values_by_name
        if name != "DRAW_STATUS_UNSPECIFIED"
    }


def test_core_codes_say_labeled_skipped_or_outcome_unknown() -> None:
    # docs/core-api.md: DRAW_LABELED, DRAW_PENDING (outcome unknown), DRAW_SKIPPED.
    assert CORE_STATUS == {
        DrawStatus.ASSIGNED: DRAW_PENDING,
        DrawStatus.LABELED: DRAW_LABELED,
        DrawStatus.SKIPPED: DRAW_SKIPPED,
        DrawStatus.WAITING: DRAW_PENDING,
    }
    statuses = np.array([int(s) for s in DrawStatus] * 2, dtype=np.int8)
    expected = [CORE_STATUS[DrawStatus(int(s))] for s in statuses]
    assert core_status(statuses).tolist() == expected


def _pool(n: int, seed: int) -> tuple[np.ndarray, SurrogateScores]:
    rng = np.random.default_rng(seed)
    g = rng.uniform(0.05, 0.6, size=n)
    losses = (rng.uniform(size=n) < g).astype(float)
    scores = SurrogateScores(g, g * (1 - g), np.zeros(n), np.maximum(g, 1 - g) ** 2)
    return losses, scores


def test_a_record_survives_the_store_unchanged(tmp_path: Path) -> None:
    losses, scores = _pool(50, seed=1)
    ledger = DrawLedger()
    selection = select(
        scores, 4, reliance=Reliance(floor=0.3), loss_bound=1.0, rng=np.random.default_rng(2),
        groups=np.arange(50) % 3, num_groups=3,
    )  # fmt: skip
    rows = selection.positions
    records = ledger.record(
        selection, rows=rows, surrogate_version=2, arrival_mark=50, draw_time_ms=7,
        labeler="vendor-a", holder="h1", lease_expire_ms=99, assignment_id=lambda i: f"a{i}",
    )  # fmt: skip
    ledger.set_labels(np.array([1]), np.array([1.0]), losses[rows[1:2]], time_ms=11)
    ledger.skip(2, "blurry", time_ms=12)
    ledger.release(3, time_ms=8)
    database = Database(tmp_path)
    try:
        database.write(store.insert_pool(store.PoolRow("p", {}, 0, 0)))
        database.write(store.insert_draws("p", records))
        database.write(store.update_draws("p", [ledger.at(i) for i in range(4)]))
        loaded = store.load_draws(database.reader(), "p")
    finally:
        database.close()
    assert [r.status for r in loaded] == [
        DrawStatus.ASSIGNED, DrawStatus.LABELED, DrawStatus.SKIPPED, DrawStatus.WAITING,
    ]  # fmt: skip
    for index, record in enumerate(loaded):
        kept = ledger.at(index)
        for name in DrawRecord.__dataclass_fields__:
            if name == "remaining_by_segment":
                np.testing.assert_array_equal(
                    record.remaining_by_segment, kept.remaining_by_segment
                )
            else:
                assert getattr(record, name) == getattr(kept, name), name
    assert loaded[3].lease_expire_ms == 8  # the release ended the lease
    assert loaded[1].loss == losses[rows[1]]


def test_terms_are_what_the_core_logged_for_each_draw() -> None:
    losses, scores = _pool(40, seed=3)
    ledger = DrawLedger()
    selection = select(
        scores, 6, reliance=Reliance(floor=0.3), loss_bound=1.0, rng=np.random.default_rng(4)
    )
    # The same draws straight from the core (same generator seed and inputs).
    batch = draw_batch(
        usefulness(scores, loss_bound=1.0),
        scores.expected_loss,
        6,
        floor=0.3,
        loss_bound=1.0,
        rng=np.random.default_rng(4),
        max_deviation=np.sqrt(scores.worst_squared_deviation),
    )
    np.testing.assert_array_equal(selection.positions, batch.positions)
    ledger.record(selection, rows=selection.positions, surrogate_version=0, arrival_mark=40)
    terms = ledger.terms(item_count=40, cold_expected_loss=np.zeros(40), loss_bound=1.0)
    np.testing.assert_array_equal(terms.probability, batch.probabilities)
    np.testing.assert_array_equal(terms.remaining_expected_loss, batch.remaining_expected_loss)
    np.testing.assert_array_equal(terms.correction_low, batch.correction_low)
    np.testing.assert_array_equal(terms.correction_high, batch.correction_high)
    np.testing.assert_array_equal(terms.remaining_count, batch.remaining_counts)
    np.testing.assert_array_equal(terms.expected_loss, scores.expected_loss[batch.positions])
    assert terms.status.tolist() == [DRAW_PENDING] * 6
    assert not terms.late_count.any()


@pytest.mark.parametrize("mode", list(EstimatorMode))
def test_a_fully_labeled_pool_through_the_ledger_gives_its_mean_loss(mode: EstimatorMode) -> None:
    n = 30
    losses, scores = _pool(n, seed=5)
    ledger = DrawLedger()
    left = np.arange(n)
    rng = np.random.default_rng(6)
    while left.size:
        k = min(7, left.size)
        part = SurrogateScores(
            scores.expected_loss[left],
            scores.residual_second_moment[left],
            scores.spread[left],
            scores.worst_squared_deviation[left],  # type: ignore[index]
        )
        selection = select(part, k, reliance=Reliance(floor=0.3), loss_bound=1.0, rng=rng)
        rows = left[selection.positions]
        start = len(ledger)
        ledger.record(selection, rows=rows, surrogate_version=0, arrival_mark=n)
        ledger.set_labels(np.arange(start, start + k), losses[rows], losses[rows])
        left = np.setdiff1d(left, rows)
    terms = ledger.terms(item_count=n, cold_expected_loss=np.zeros(n), loss_bound=1.0)
    sums = ledger.plug_in_sums(
        unlabeled=np.zeros(n, dtype=bool),
        expected_loss=scores.expected_loss,
        second_moment=scores.residual_second_moment,
    )
    estimate = estimate_risk(terms, sums, mode=mode, confidence=0.9, loss_bound=1.0)
    assert estimate.risk == pytest.approx(float(np.mean(losses)), abs=1e-12)
    assert estimate.lower == estimate.upper == estimate.risk
