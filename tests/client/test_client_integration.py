"""The client library against a real server: every RPC, the errors, batching, labels."""

from __future__ import annotations

import grpc
import numpy as np
import pytest

from leadline.client import (
    AccessDenied,
    AlreadyExists,
    BoundKind,
    Client,
    EstimatorMode,
    InvalidRequest,
    LocalServer,
    NotFound,
    Skip,
    Verdict,
)
from leadline.v1 import leadline_pb2

from .conftest import TOKENS, Digits, digits_pool


def test_health_answers_without_a_token(server: LocalServer) -> None:
    with Client(server.target) as anonymous:
        assert anonymous.health() == "SERVING"


def test_pool_errors_arrive_as_typed_exceptions(admin: Client, labeled_digits: Digits) -> None:
    with pytest.raises(NotFound) as missing:
        admin.get_pool("no-such-pool")
    assert missing.value.code is grpc.StatusCode.NOT_FOUND
    assert missing.value.method == "GetPool"
    with pytest.raises(AlreadyExists):
        admin.create_pool(
            "digits", task="classification", num_classes=10, feature_dim=64, loss="zero-one"
        )
    existing = admin.create_pool(
        "digits",
        task="classification",
        num_classes=10,
        feature_dim=64,
        loss="zero-one",
        exist_ok=True,
    )
    assert existing.item_count == len(labeled_digits.item_ids)
    with pytest.raises(InvalidRequest) as bad:
        admin.create_pool(
            "bad-dim", task="classification", num_classes=2, feature_dim=0, loss="zero-one"
        )
    assert "feature_dim" in bad.value.details
    admin.delete_pool("never-existed", missing_ok=True)


@pytest.mark.usefixtures("labeled_digits")
def test_roles_limit_what_a_token_may_call(server: LocalServer) -> None:
    with Client(server.target, token=TOKENS["labeler"]) as labeler:
        with pytest.raises(AccessDenied) as denied:
            labeler.check_gate("digits", max_risk=0.5)
        assert denied.value.code is grpc.StatusCode.PERMISSION_DENIED


def test_ingest_splits_large_arrays_and_request_ids_make_it_repeatable(
    server: LocalServer, admin: Client
) -> None:
    data = digits_pool("batched")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    with Client(server.target, token=TOKENS["ingest"], max_batch_rows=300) as monitor:
        first = monitor.ingest(
            data.pool,
            data.item_ids,
            data.features,
            data.probabilities,
            segments=data.segments,
            request_id="nightly-run-1",
        )
        assert (first.accepted, first.duplicates, first.messages) == (1197, 0, 4)
        assert first.item_count == 1197
        repeat = monitor.ingest(
            data.pool,
            data.item_ids,
            data.features,
            data.probabilities,
            segments=data.segments,
            request_id="nightly-run-1",
        )
        assert (repeat.accepted, repeat.duplicates) == (1197, 0)  # answered, not re-applied
        resend = monitor.ingest(
            data.pool,
            data.item_ids[:10],
            data.features[:10],
            data.probabilities[:10],
            segments=data.segments[:10],
        )
        assert (resend.accepted, resend.duplicates) == (0, 10)
        # A bad row is refused by the server naming the field; nothing of it is kept.
        broken = data.probabilities[:2].copy()
        broken[1, 0] += 0.5
        with pytest.raises(InvalidRequest) as refused:
            monitor.ingest(data.pool, ["new-1", "new-2"], data.features[:2], broken)
        assert "model_outputs" in refused.value.details
    assert admin.get_pool(data.pool).item_count == 1197
    admin.delete_pool(data.pool)


def test_labeling_round_with_skip_and_release(server: LocalServer, admin: Client) -> None:
    data = digits_pool("vendor-round")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    admin.ingest(data.pool, data.item_ids, data.features, data.probabilities)
    with Client(server.target, token=TOKENS["labeler"]) as vendor:
        held = vendor.acquire(data.pool, 6, labeler="vendor-a")
        assert len(held) == 6
        assert all(a.selection_probability > 0 for a in held)
        assert len({a.item_id for a in held}) == 6
        index = {item_id: i for i, item_id in enumerate(data.item_ids)}
        answers: dict[str, int | Skip] = {
            a.assignment_id: int(data.labels[index[a.item_id]]) for a in held[:4]
        }
        answers[held[4].assignment_id] = Skip("image too faint")
        reply = vendor.submit_labels(data.pool, answers, labeler="vendor-a")
        assert (reply.accepted, list(reply.errors)) == (5, [])
        released = vendor.release(data.pool, [held[5].assignment_id], labeler="vendor-a")
        assert released.released == 1
        # Another labeler cannot submit what vendor-a held.
        other = vendor.acquire(data.pool, 1, labeler="vendor-b")
        with pytest.raises(AccessDenied) as stolen:
            vendor.submit_labels(data.pool, {other[0].assignment_id: 0}, labeler="vendor-a")
        assert "held by another labeler" in stolen.value.details
    pool = admin.get_pool(data.pool)
    assert (pool.labeled_count, pool.skipped_count) == (4, 1)
    draws = admin.list_draws(data.pool)
    assert [d.status for d in draws[:6]].count(leadline_pb2.DRAW_STATUS_SKIPPED) == 1
    admin.delete_pool(data.pool)


@pytest.mark.usefixtures("labeled_digits")
def test_estimates_trace_and_gate_are_consistent(admin: Client) -> None:
    est = admin.get_estimate("digits", confidence=0.9)
    assert est.labels_used == 200
    assert est.items_in_scope == 1197
    assert est.confidence == 0.9
    assert est.lower <= est.risk <= est.upper
    trace = admin.get_estimate_trace("digits", confidence=0.9, max_points=10)
    assert 2 <= len(trace) <= 10
    used = [point.labels_used for point in trace]
    assert used == sorted(used)
    assert used[-1] == 200
    for segment in ("scanner-a", "scanner-b"):
        part = admin.get_estimate("digits", segment=segment)
        assert 0 < part.items_in_scope < 1197
    gate = admin.check_gate("digits", max_risk=0.999, confidence=0.9, bound="fixed-time")
    assert gate.verdict is Verdict.PASS
    assert str(gate.verdict) == "pass"
    assert gate.bound is BoundKind.FIXED_TIME
    assert gate.estimate.mode is EstimatorMode.BALANCED
    # The verdict rests on the one-sided fixed-time upper bound.
    assert gate.upper == gate.estimate.upper < 0.999
    with pytest.raises(InvalidRequest, match="max_risk = nan: must be a finite risk > 0"):
        admin.check_gate("digits", max_risk=float("nan"))


@pytest.mark.usefixtures("labeled_digits")
def test_list_pools_follows_pages(admin: Client) -> None:
    names = [f"page-{i}" for i in range(5)]
    for name in names:
        admin.create_pool(
            name, task="regression", feature_dim=1, loss="absolute-error", loss_cap=1.0
        )
    listed = [pool.name for pool in admin.list_pools(page_size=2)]
    assert listed == sorted(listed)
    assert {f"pools/{n}" for n in names} | {"pools/digits"} <= set(listed)
    for name in names:
        admin.delete_pool(name)


@pytest.mark.usefixtures("server")
def test_regression_labels_are_sent_as_values(admin: Client) -> None:
    rng = np.random.default_rng(0)
    admin.create_pool(
        "regression-values", task="regression", feature_dim=2, loss="squared-error", loss_cap=100.0
    )
    admin.ingest(
        "regression-values", [f"r{i}" for i in range(50)], rng.normal(size=(50, 2)), np.zeros(50)
    )
    held = admin.acquire("regression-values", 3, labeler="v")
    reply = admin.submit_labels(
        "regression-values", [(a.assignment_id, 2.0) for a in held], labeler="v"
    )
    assert reply.accepted == 3
    labeled = [d for d in admin.list_draws("regression-values") if d.WhichOneof("label")]
    # Squared error of prediction 0 against the value 2.0.
    assert [(d.value, d.loss) for d in labeled] == [(2.0, 4.0)] * 3
    admin.delete_pool("regression-values")
