"""gRPC servicers: validate, call the engine, build the reply. No business logic here."""

from __future__ import annotations

import base64
import binascii
import hashlib
import logging
from collections.abc import Callable

import grpc
from google.protobuf.message import Message

from leadline.service import errors
from leadline.service.api import convert, validation
from leadline.service.api.auth import Authenticator
from leadline.service.api.errors import rpc_method
from leadline.service.config import ServerConfig
from leadline.service.engine import Engine, OutcomeResult, WriteCall
from leadline.v1 import leadline_pb2 as pb
from leadline.v1 import leadline_pb2_grpc as pb_grpc

__all__ = [
    "EstimateServicer",
    "IngestServicer",
    "LabelingServicer",
    "PoolServicer",
    "add_servicers",
]

_LOG = logging.getLogger(__name__)


_TOKEN_PREFIX = "leadline:"


def _encode_token(value: str) -> str:
    return base64.urlsafe_b64encode((_TOKEN_PREFIX + value).encode()).decode().rstrip("=")


def _decode_token(token: str, *, field: str = "page_token") -> str:
    try:
        padded = token + "=" * (-len(token) % 4)
        text = base64.b64decode(padded.encode(), altchars=b"-_", validate=True).decode()
        if not text.startswith(_TOKEN_PREFIX):
            raise ValueError(text)
        return text[len(_TOKEN_PREFIX) :]
    except (binascii.Error, UnicodeDecodeError, ValueError):
        raise errors.InvalidArgument(
            f"{field} = {token!r}: not a token this server issued; pass next_page_token unchanged.",
            field=field,
        ) from None


def _write_call(
    auth: Authenticator, context: grpc.ServicerContext, request: Message, request_id: str
) -> WriteCall:
    """The calling token's holder id, the request id and a digest of the whole request
    (deterministic serialization: the same request always gives the same digest)."""
    if not request_id:
        return WriteCall(holder=auth.holder(context))
    digest = hashlib.sha256(request.SerializeToString(deterministic=True)).hexdigest()[:32]
    return WriteCall(holder=auth.holder(context), request_id=request_id, digest=digest)


def _raise_if_nothing_applied(result: OutcomeResult) -> None:
    """A call where no submission was applied fails with its first problem's status."""
    if result.accepted == 0 and result.errors:
        first = result.errors[0]
        kind = getattr(errors, first.kind, None)
        if not (isinstance(kind, type) and issubclass(kind, errors.ServiceError)):
            kind = errors.FailedPrecondition
        more = result.rejected - 1
        reason = first.reason + (f" (and {more} more refused)" if more > 0 else "")
        raise kind(reason, field=first.field)


class PoolServicer(pb_grpc.PoolServiceServicer):
    def __init__(self, engine: Engine, auth: Authenticator) -> None:
        self._engine = engine
        self._auth = auth

    @rpc_method
    def CreatePool(self, request: pb.CreatePoolRequest, context: grpc.ServicerContext) -> pb.Pool:
        settings = validation.pool_settings(
            request.pool_id, request.pool, defaults=self._engine.config
        )
        request_id = validation.check_request_id(request.request_id)
        call = _write_call(self._auth, context, request, request_id)
        return convert.pool_message(self._engine.create_pool(settings, call=call))

    @rpc_method
    def GetPool(self, request: pb.GetPoolRequest, context: grpc.ServicerContext) -> pb.Pool:
        pool_id = validation.parse_pool_name(request.name, field="name")
        return convert.pool_message(self._engine.get_pool(pool_id))

    @rpc_method
    def ListPools(
        self, request: pb.ListPoolsRequest, context: grpc.ServicerContext
    ) -> pb.ListPoolsResponse:
        size = validation.check_page_size(request.page_size, default=50, maximum=1000)
        after = _decode_token(request.page_token) if request.page_token else ""
        infos, last = self._engine.list_pools(after=after, limit=size)
        return pb.ListPoolsResponse(
            pools=[convert.pool_message(info) for info in infos],
            next_page_token=_encode_token(last) if last else "",
        )

    @rpc_method
    def DeletePool(
        self, request: pb.DeletePoolRequest, context: grpc.ServicerContext
    ) -> pb.DeletePoolResponse:
        pool_id = validation.parse_pool_name(request.name, field="name")
        request_id = validation.check_request_id(request.request_id)
        call = _write_call(self._auth, context, request, request_id)
        self._engine.delete_pool(pool_id, call=call)
        return pb.DeletePoolResponse()


class IngestServicer(pb_grpc.IngestServiceServicer):
    def __init__(
        self,
        engine: Engine,
        config: ServerConfig,
        auth: Authenticator,
        *,
        on_validation: Callable[[], None] = lambda: None,
    ) -> None:
        self._engine = engine
        self._auth = auth
        self._max_items = config.max_batch_items
        self._on_validation = on_validation

    @rpc_method
    def IngestItems(self, request: pb.ItemBatch, context: grpc.ServicerContext) -> pb.IngestSummary:
        pool_id = validation.parse_pool_name(request.pool)
        request_id = validation.check_request_id(request.request_id)
        settings = self._engine.settings(pool_id)
        batch = validation.item_batch(request, settings, max_items=self._max_items)
        call = _write_call(self._auth, context, request, request_id)
        result = self._engine.ingest(pool_id, batch, call=call)
        return pb.IngestSummary(
            accepted=result.accepted,
            duplicates=result.duplicates,
            rejected=result.rejected,
            errors=[convert.item_error(problem) for problem in result.errors],
            item_count=result.item_count,
            errors_truncated=result.rejected > len(result.errors),
        )

    @rpc_method
    def AddValidationItems(
        self, request: pb.ValidationBatch, context: grpc.ServicerContext
    ) -> pb.IngestSummary:
        pool_id = validation.parse_pool_name(request.pool)
        request_id = validation.check_request_id(request.request_id)
        settings = self._engine.settings(pool_id)
        batch = validation.validation_batch(request, settings, max_items=self._max_items)
        call = _write_call(self._auth, context, request, request_id)
        result = self._engine.add_validation(pool_id, batch, call=call)
        if result.accepted:
            self._on_validation()  # the refit that covers them starts now
        return pb.IngestSummary(
            accepted=result.accepted,
            duplicates=result.duplicates,
            rejected=result.rejected,
            errors=[convert.item_error(problem) for problem in result.errors],
            item_count=result.item_count,
            errors_truncated=result.rejected > len(result.errors),
        )


class LabelingServicer(pb_grpc.LabelingServiceServicer):
    def __init__(
        self, engine: Engine, auth: Authenticator, *, on_labels: Callable[[], None]
    ) -> None:
        self._engine = engine
        self._auth = auth
        self._on_labels = on_labels

    @rpc_method
    def AcquireItems(
        self, request: pb.AcquireItemsRequest, context: grpc.ServicerContext
    ) -> pb.AcquireItemsResponse:
        pool_id = validation.parse_pool_name(request.pool)
        validation.check_acquire(request)
        call = _write_call(self._auth, context, request, request.request_id)
        assignments = self._engine.acquire(
            pool_id,
            count=request.count,
            labeler=request.labeler,
            holder=call.holder,
            lease_seconds=request.lease_seconds,
            call=call,
        )
        return pb.AcquireItemsResponse(
            assignments=[convert.assignment_message(a) for a in assignments]
        )

    @rpc_method
    def SubmitLabels(
        self, request: pb.SubmitLabelsRequest, context: grpc.ServicerContext
    ) -> pb.SubmitLabelsResponse:
        pool_id = validation.parse_pool_name(request.pool)
        labels = validation.check_labels(request)
        call = _write_call(self._auth, context, request, request.request_id)
        result = self._engine.submit(
            pool_id, labeler=request.labeler, holder=call.holder, labels=labels, call=call
        )
        if result.accepted:
            self._on_labels()
        _raise_if_nothing_applied(result)
        return pb.SubmitLabelsResponse(
            accepted=result.accepted,
            errors=[convert.item_error(p) for p in result.errors],
            rejected=result.rejected,
            errors_truncated=result.rejected > len(result.errors),
        )

    @rpc_method
    def ReleaseItems(
        self, request: pb.ReleaseItemsRequest, context: grpc.ServicerContext
    ) -> pb.ReleaseItemsResponse:
        pool_id = validation.parse_pool_name(request.pool)
        ids = validation.check_release(request)
        call = _write_call(self._auth, context, request, request.request_id)
        result = self._engine.release(
            pool_id, labeler=request.labeler, holder=call.holder, assignment_ids=ids, call=call
        )
        _raise_if_nothing_applied(result)
        return pb.ReleaseItemsResponse(
            released=result.accepted,
            errors=[convert.item_error(p) for p in result.errors],
            rejected=result.rejected,
            errors_truncated=result.rejected > len(result.errors),
        )


class EstimateServicer(pb_grpc.EstimateServiceServicer):
    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    @rpc_method
    def GetEstimate(
        self, request: pb.GetEstimateRequest, context: grpc.ServicerContext
    ) -> pb.Estimate:
        pool_id = validation.parse_pool_name(request.pool)
        confidence = validation.check_confidence(request.confidence)
        mode = validation.check_mode(request.mode)
        scope = validation.check_scope(request.segment, request.start_time_ms, request.end_time_ms)
        result = self._engine.estimate(pool_id, scope, mode=mode, confidence=confidence)
        return convert.estimate_message(result)

    @rpc_method
    def CheckGate(
        self, request: pb.CheckGateRequest, context: grpc.ServicerContext
    ) -> pb.GateResult:
        pool_id = validation.parse_pool_name(request.pool)
        confidence = validation.check_confidence(request.confidence)
        mode = validation.check_mode(request.mode)
        bound = validation.check_bound(request.bound)
        scope = validation.check_scope(request.segment, request.start_time_ms, request.end_time_ms)
        max_risk = validation.check_max_risk(
            request.max_risk, loss_bound=self._engine.settings(pool_id).loss_bound
        )
        outcome = self._engine.check_gate(
            pool_id, scope, max_risk=max_risk, confidence=confidence, bound=bound, mode=mode
        )
        return convert.gate_message(outcome)

    @rpc_method
    def ListDraws(
        self, request: pb.ListDrawsRequest, context: grpc.ServicerContext
    ) -> pb.ListDrawsResponse:
        pool_id = validation.parse_pool_name(request.pool)
        size = validation.check_page_size(request.page_size, default=500, maximum=10_000)
        start = 0
        if request.page_token:
            text = _decode_token(request.page_token)
            # ASCII digits only: str.isdigit() also takes '²' or '٣', which int() refuses
            # or reads as another number.
            if not (text.isascii() and text.isdigit() and len(text) <= 18):
                raise errors.InvalidArgument(
                    f"page_token = {request.page_token!r}: not a token this server issued.",
                    field="page_token",
                )
            start = int(text)
        classification = self._engine.settings(pool_id).is_classification
        infos, next_start = self._engine.list_draws(pool_id, start=start, limit=size)
        return pb.ListDrawsResponse(
            draws=[convert.draw_message(i, classification=classification) for i in infos],
            next_page_token=_encode_token(str(next_start)) if next_start else "",
        )

    @rpc_method
    def GetEstimateTrace(
        self, request: pb.GetEstimateTraceRequest, context: grpc.ServicerContext
    ) -> pb.EstimateTrace:
        pool_id = validation.parse_pool_name(request.pool)
        confidence = validation.check_confidence(request.confidence)
        mode = validation.check_mode(request.mode)
        points = validation.check_page_size(
            request.max_points, default=50, maximum=1000, field="max_points"
        )
        scope = validation.check_scope(request.segment, 0, 0)
        results = self._engine.estimate_trace(
            pool_id, scope, mode=mode, confidence=confidence, max_points=points
        )
        return pb.EstimateTrace(points=[convert.estimate_message(r) for r in results])


def add_servicers(
    server: grpc.Server,
    engine: Engine,
    config: ServerConfig,
    auth: Authenticator,
    *,
    on_labels: Callable[[], None],
) -> list[str]:
    """Register the four services; return their full names (for health and reflection).

    ``on_labels`` wakes the refit worker; it is called after labels or validation items
    were accepted."""
    pb_grpc.add_PoolServiceServicer_to_server(PoolServicer(engine, auth), server)
    pb_grpc.add_IngestServiceServicer_to_server(
        IngestServicer(engine, config, auth, on_validation=on_labels), server
    )
    pb_grpc.add_LabelingServiceServicer_to_server(
        LabelingServicer(engine, auth, on_labels=on_labels), server
    )
    pb_grpc.add_EstimateServiceServicer_to_server(EstimateServicer(engine), server)
    return [service.full_name for service in pb.DESCRIPTOR.services_by_name.values()]
