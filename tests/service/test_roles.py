"""Acceptance: each role calls only its services; a labeler holds only its own assignments."""

from __future__ import annotations

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    TOKENS,
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
)

_POOL = "pools/roles"

# (service attribute, method, request) for one call per method.
_CALLS = {
    "CreatePool": ("pools", lambda: pb.CreatePoolRequest(pool_id="other", pool=pb.Pool())),
    "GetPool": ("pools", lambda: pb.GetPoolRequest(name=_POOL)),
    "ListPools": ("pools", lambda: pb.ListPoolsRequest()),
    "DeletePool": ("pools", lambda: pb.DeletePoolRequest(name="pools/absent")),
    "IngestItems": ("ingest", lambda: pb.ItemBatch(pool=_POOL)),
    "AddValidationItems": ("ingest", lambda: pb.ValidationBatch(pool=_POOL)),
    "AcquireItems": (
        "labeling",
        lambda: pb.AcquireItemsRequest(pool=_POOL, count=1, labeler="vendor-a"),
    ),
    "SubmitLabels": ("labeling", lambda: pb.SubmitLabelsRequest(pool=_POOL)),
    "ReleaseItems": ("labeling", lambda: pb.ReleaseItemsRequest(pool=_POOL)),
    "GetEstimate": ("estimates", lambda: pb.GetEstimateRequest(pool=_POOL)),
    "CheckGate": ("estimates", lambda: pb.CheckGateRequest(pool=_POOL, max_risk=0.5)),
    "ListDraws": ("estimates", lambda: pb.ListDrawsRequest(pool=_POOL)),
    "GetEstimateTrace": ("estimates", lambda: pb.GetEstimateTraceRequest(pool=_POOL)),
}
_ALLOWED = {
    # AddValidationItems: ingest or admin (shared/API.md, "Validation items").
    "admin": {"CreatePool", "DeletePool", "AddValidationItems", "GetPool", "ListPools"},
    "ingest": {"IngestItems", "AddValidationItems", "GetPool", "ListPools"},
    "labeler": {"AcquireItems", "SubmitLabels", "ReleaseItems", "GetPool", "ListPools"},
    "reader": {
        "GetEstimate",
        "CheckGate",
        "ListDraws",
        "GetEstimateTrace",
        "GetPool",
        "ListPools",
    },
}


@pytest.fixture
def roles_pool(harness: Harness, cancer_pool: Dataset) -> Harness:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("roles", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("roles", cancer_pool, range(100)))
    return harness


def _code(stubs: Stubs, name: str, metadata: tuple[tuple[str, str], ...]) -> grpc.StatusCode:
    service, build = _CALLS[name]
    try:
        getattr(getattr(stubs, service), name)(build(), metadata=metadata, timeout=10)
    except grpc.RpcError as error:
        return error.code()
    return grpc.StatusCode.OK


@pytest.mark.parametrize("name", sorted(_CALLS))
def test_call_without_token_is_unauthenticated(roles_pool: Harness, name: str) -> None:
    with roles_pool.stubs() as stubs:
        assert _code(stubs, name, ()) == grpc.StatusCode.UNAUTHENTICATED
        bogus = (("authorization", "Bearer not-a-real-token"),)
        assert _code(stubs, name, bogus) == grpc.StatusCode.UNAUTHENTICATED


@pytest.mark.parametrize("role", sorted(_ALLOWED))
def test_each_role_calls_only_its_services(roles_pool: Harness, role: str) -> None:
    metadata = (("authorization", f"Bearer {TOKENS[role]}"),)
    with roles_pool.stubs() as stubs:
        for name in sorted(_CALLS):
            code = _code(stubs, name, metadata)
            if name in _ALLOWED[role]:
                # Past the role check: the call itself may still fail on its (empty) fields.
                assert code not in (
                    grpc.StatusCode.PERMISSION_DENIED,
                    grpc.StatusCode.UNAUTHENTICATED,
                ), (role, name, code)
            else:
                assert code == grpc.StatusCode.PERMISSION_DENIED, (role, name, code)


def test_health_answers_without_token(roles_pool: Harness) -> None:
    with roles_pool.stubs() as stubs:
        health = health_pb2_grpc.HealthStub(stubs.channel)
        for service in ("", "leadline.v1.EstimateService"):
            reply = health.Check(health_pb2.HealthCheckRequest(service=service), timeout=5)
            assert reply.status == health_pb2.HealthCheckResponse.SERVING


@pytest.mark.usefixtures("cancer_pool")
def test_labeler_cannot_submit_or_release_another_labelers_assignment(roles_pool: Harness) -> None:
    with roles_pool.stubs("labeler") as stubs:
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=2, labeler="vendor-a"),
        ).assignments
        assert len(held) == 2
        submission = pb.LabelSubmission(assignment_id=held[0].assignment_id, class_label=1)
        # Another token (a second vendor), even when it claims the same labeler name.
        for labeler in ("vendor-b", "vendor-a"):
            with pytest.raises(grpc.RpcError) as caught:
                stubs.call(
                    stubs.labeling.SubmitLabels,
                    pb.SubmitLabelsRequest(pool=_POOL, labeler=labeler, labels=[submission]),
                    who="labeler2",
                )
            assert caught.value.code() == grpc.StatusCode.PERMISSION_DENIED
            assert "assignment_id" in caught.value.details()
        # Same token, another labeler name.
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(
                stubs.labeling.ReleaseItems,
                pb.ReleaseItemsRequest(
                    pool=_POOL, labeler="vendor-b", assignment_ids=[held[1].assignment_id]
                ),
            )
        assert caught.value.code() == grpc.StatusCode.PERMISSION_DENIED
        # The holder itself can.
        reply = stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(pool=_POOL, labeler="vendor-a", labels=[submission]),
        )
        assert reply.accepted == 1
