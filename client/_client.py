"""The typed leadline client: one method per RPC of the v1 contract.

Every call carries a deadline and the bearer token. Until the server has answered once,
a call fails within a few seconds when nothing answers at the target (with what happened
and what to do); after that every call waits for the channel to be ready, so a server
that restarts is waited for, up to the deadline. Calls that fail with UNAVAILABLE are
retried with exponential backoff by gRPC itself (service config); every write carries a
request id fixed before the first attempt, so a retry is answered from the first result
on the server and never applied twice.
"""

from __future__ import annotations

import json
import logging
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, TypeVar

import grpc
import numpy as np
from grpc_health.v1 import health_pb2, health_pb2_grpc

from leadline.client._batching import (
    IngestColumns,
    ValidationColumns,
    build_batches,
    build_validation_batches,
)
from leadline.client._enums import parse_enum
from leadline.client._errors import (
    LeadlineError,
    PartiallyAccepted,
    error_from_rpc,
    invalid_argument,
    unreachable,
)
from leadline.client._results import Estimate, GateResult
from leadline.client._tls import TlsConfig
from leadline.v1 import leadline_pb2, leadline_pb2_grpc
from leadline.v1.rules import max_risk_problem

__all__ = ["Client", "IngestResult", "Skip", "pool_name"]

_LOG = logging.getLogger(__name__)

_SERVICES = (
    "leadline.v1.PoolService",
    "leadline.v1.IngestService",
    "leadline.v1.LabelingService",
    "leadline.v1.EstimateService",
    "grpc.health.v1.Health",
)
# gRPC caps maxAttempts at 5. Together with wait_for_ready (each attempt waits for the
# channel to reconnect, within the call's deadline) this rides out a server restart.
_RETRY_POLICY = {
    "maxAttempts": 5,
    "initialBackoff": "0.2s",
    "maxBackoff": "3s",
    "backoffMultiplier": 2,
    "retryableStatusCodes": ["UNAVAILABLE"],
}
SERVICE_CONFIG = json.dumps(
    {
        "methodConfig": [
            {"name": [{"service": service} for service in _SERVICES], "retryPolicy": _RETRY_POLICY}
        ]
    }
)
_MIB = 1 << 20
_CHANNEL_OPTIONS: list[tuple[str, Any]] = [
    ("grpc.enable_retries", 1),
    ("grpc.service_config", SERVICE_CONFIG),
    # A request larger than the per-call retry buffer is never retried: keep the buffer
    # above the largest ingest message we build.
    ("grpc.per_rpc_retry_buffer_size", 16 * _MIB),
    ("grpc.retry_buffer_size", 64 * _MIB),
    ("grpc.max_receive_message_length", 64 * _MIB),
    # Reconnect quickly after a restart (gRPC's default backoff grows to 120 s).
    ("grpc.initial_reconnect_backoff_ms", 200),
    ("grpc.min_reconnect_backoff_ms", 200),
    ("grpc.max_reconnect_backoff_ms", 2000),
]
_T = TypeVar("_T")


def pool_name(pool: str) -> str:
    """'pools/{id}' for a pool id or a pool name; InvalidRequest for an empty value."""
    if not isinstance(pool, str):
        raise invalid_argument(f"pool = {pool!r}: must be a pool id or 'pools/{{pool_id}}'.")
    pool = pool.strip()
    if not pool or pool == "pools/":
        raise invalid_argument(f"pool = {pool!r}: must be a pool id or 'pools/{{pool_id}}'.")
    return pool if pool.startswith("pools/") else f"pools/{pool}"


def _check_target(target: str) -> str:
    """HOST:PORT (or a gRPC target with a scheme, e.g. 'unix:/path', 'dns:///host:port')."""
    if not isinstance(target, str) or not target.strip():
        raise invalid_argument(f"target = {target!r}: must be HOST:PORT, e.g. localhost:50051.")
    target = target.strip()
    host, sep, port = target.rpartition(":")
    has_scheme = target.startswith(("unix:", "unix-abstract:", "dns:", "ipv4:", "ipv6:"))
    if not has_scheme and not (sep and host and port.isdigit() and int(port) <= 65535):
        raise invalid_argument(
            f"target = {target!r}: must be HOST:PORT with PORT in 0..65535, e.g. "
            "localhost:50051 (gRPC would otherwise guess port 443)."
        )
    return target


@dataclass(frozen=True)
class Skip:
    """A label outcome meaning "the labeler could not label this item", with the reason."""

    reason: str


@dataclass(frozen=True)
class IngestResult:
    """Totals over all messages one ``Client.ingest`` call sent."""

    accepted: int = 0
    duplicates: int = 0
    rejected: int = 0
    errors: list[leadline_pb2.ItemError] = field(default_factory=list)
    # items in the pool after the last message (add_validation: validation items)
    item_count: int = 0
    messages: int = 0  # ItemBatch messages sent
    # True when more rows were rejected than ``errors`` lists (at most 20 per message).
    errors_truncated: bool = False


Outcome = int | float | Skip | np.integer | np.floating


def _raise_if_partial(method: str, reply: Any, kept: int, what: str) -> None:
    """PartiallyAccepted when the reply says some items were refused."""
    # A server from before the `rejected` count lists the refused items only in errors.
    rejected = max(int(reply.rejected), len(reply.errors))
    if not rejected:
        return
    first = reply.errors[0].reason if reply.errors else "no reason given"
    listed = (
        f"the first {len(reply.errors)} are in response.errors"
        if reply.errors_truncated
        else "all are in response.errors"
    )
    raise PartiallyAccepted(
        f"{kept} {what} kept, {rejected} refused ({listed}); first: {first}",
        response=reply,
        method=method,
    )


class Client:
    """A connection to one leadline server.

    ``target`` is ``host:port``. ``token`` is sent as ``authorization: Bearer <token>``.
    ``tls`` is None or False for a plain channel (loopback or a trusted network only),
    True for TLS with the system's roots, or a :class:`TlsConfig`. ``timeout`` is the
    deadline in seconds of every call unless a method is given its own; ``ingest_timeout``
    is the deadline of each ingest message.

    Until the server has answered once, the first call checks within ``connect_timeout``
    seconds that a server answers at ``target`` and raises
    :class:`~leadline.client.Unavailable` (target, what happened, what to do) when none
    does, instead of waiting out the whole deadline. After that ``wait_for_ready`` makes
    calls wait for the server (up to the deadline) while it restarts, instead of failing
    at once. ``connect_timeout=None`` skips the first check (every call then waits up to
    its deadline, e.g. for a server that is still starting).

    Methods raise :class:`~leadline.client.LeadlineError` subclasses on failure, including
    :class:`~leadline.client.InvalidRequest` for arguments refused before anything is
    sent. Use as a context manager or call ``close()``.
    """

    def __init__(
        self,
        target: str,
        *,
        token: str | None = None,
        tls: TlsConfig | bool | None = None,
        timeout: float = 30.0,
        ingest_timeout: float = 120.0,
        wait_for_ready: bool = True,
        connect_timeout: float | None = 5.0,
        max_batch_rows: int = 5000,
        max_batch_bytes: int = _MIB,
    ) -> None:
        target = _check_target(target)
        for name, value in (
            ("timeout", timeout),
            ("ingest_timeout", ingest_timeout),
            ("connect_timeout", 1.0 if connect_timeout is None else connect_timeout),
        ):
            if isinstance(value, bool) or not (isinstance(value, int | float) and value > 0):
                raise invalid_argument(f"{name} = {value!r}: must be a number of seconds > 0.")
        self.target = target
        self.timeout = timeout
        self.ingest_timeout = ingest_timeout
        self.wait_for_ready = wait_for_ready
        self.connect_timeout = connect_timeout
        # Set once a call got any answer from a server (even a refusal): from then on a
        # failing connection means a restart to wait for, not a wrong address.
        self._reached = False
        self._tls = not (tls is None or tls is False)
        self.max_batch_rows = max_batch_rows
        self.max_batch_bytes = max_batch_bytes
        self._metadata: tuple[tuple[str, str], ...] = (
            (("authorization", f"Bearer {token}"),) if token else ()
        )
        options = list(_CHANNEL_OPTIONS)
        if tls is None or tls is False:
            self._channel = grpc.insecure_channel(target, options=options)
        else:
            config = TlsConfig() if tls is True else tls
            if config.server_name:
                options.append(("grpc.ssl_target_name_override", config.server_name))
            self._channel = grpc.secure_channel(
                target, config.channel_credentials(), options=options
            )
        self._pools = leadline_pb2_grpc.PoolServiceStub(self._channel)
        self._ingest = leadline_pb2_grpc.IngestServiceStub(self._channel)
        self._labeling = leadline_pb2_grpc.LabelingServiceStub(self._channel)
        self._estimates = leadline_pb2_grpc.EstimateServiceStub(self._channel)
        self._health = health_pb2_grpc.HealthStub(self._channel)

    def __repr__(self) -> str:
        auth = "token" if self._metadata else "no token"
        return f"Client(target={self.target!r}, {auth}, timeout={self.timeout})"

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the channel; further calls fail."""
        self._channel.close()

    def _check_reachable(self, method: str, deadline: float) -> None:
        """Before the first answer: one health check that fails fast when nobody answers.

        The health service needs no token; any answer at all (even UNIMPLEMENTED from a
        server without it) proves a server listens. Connection refused, an unknown host
        name or a failed TLS handshake come back as UNAVAILABLE within a few seconds
        (gRPC's own retries included); silence ends at ``connect_timeout``.
        """
        if self._reached or self.connect_timeout is None:
            return
        wait = min(self.connect_timeout, deadline)
        try:
            self._health.Check(health_pb2.HealthCheckRequest(), timeout=wait, wait_for_ready=False)
        except grpc.RpcError as error:
            code = error.code() if isinstance(error, grpc.Call) else None
            if code in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED):
                details = error.details() if isinstance(error, grpc.Call) else str(error)
                if code == grpc.StatusCode.DEADLINE_EXCEEDED:
                    details = "deadline"
                raise unreachable(
                    self.target,
                    details or "",
                    tls=self._tls,
                    wait=wait,
                    method=method,
                ) from None
        self._reached = True

    def _call(
        self,
        method: str,
        rpc: Callable[..., _T],
        request: Any,
        *,
        timeout: float | None,
        wait_for_ready: bool | None = None,
    ) -> _T:
        deadline = self.timeout if timeout is None else timeout
        self._check_reachable(method, deadline)
        try:
            return rpc(
                request,
                timeout=deadline,
                metadata=self._metadata,
                wait_for_ready=self.wait_for_ready if wait_for_ready is None else wait_for_ready,
            )
        except grpc.RpcError as error:
            raise error_from_rpc(
                error, method=method, target=self.target, timeout=deadline
            ) from None

    # -- health ---------------------------------------------------------------------------

    def health(self, *, service: str = "", timeout: float | None = None) -> str:
        """The health service's status for ``service`` ('' = the whole server): 'SERVING'..."""
        reply = self._call(
            "Health.Check",
            self._health.Check,
            health_pb2.HealthCheckRequest(service=service),
            timeout=timeout,
        )
        return str(health_pb2.HealthCheckResponse.ServingStatus.Name(reply.status))

    # -- pools ----------------------------------------------------------------------------

    def create_pool(
        self,
        pool_id: str,
        *,
        task: str | int,
        feature_dim: int,
        loss: str | int,
        num_classes: int = 0,
        cost_matrix: Sequence[Sequence[float]] | np.ndarray | None = None,
        loss_cap: float = 0.0,
        default_mode: str | int | None = None,
        description: str = "",
        selection_floor: float = 0.0,
        default_lease_seconds: int = 0,
        default_confidence: float = 0.0,
        refit_every_labels: int = 0,
        exist_ok: bool = False,
        request_id: str | None = None,
        timeout: float | None = None,
    ) -> leadline_pb2.Pool:
        """Create ``pools/{pool_id}``; the server validates every setting.

        ``task``: 'classification' or 'regression'; ``loss``: 'zero-one', 'cross-entropy',
        'brier', 'cost-matrix', 'squared-error', 'absolute-error'; ``default_mode``:
        'balanced' (server default), 'unbiased' or 'surrogate'. The call carries a
        ``request_id`` (default: a fresh uuid4, the same for every retry of this call), so
        a retry after a lost reply returns the pool it created instead of ALREADY_EXISTS.
        With ``exist_ok`` a pool created by someone else is returned as it is (its
        settings are not compared).
        """
        matrix: list[float] = (
            [] if cost_matrix is None else np.asarray(cost_matrix, dtype=float).ravel().tolist()
        )
        pool = leadline_pb2.Pool(
            task=parse_enum("TaskType", task, field="task"),
            num_classes=num_classes,
            feature_dim=feature_dim,
            loss=parse_enum("LossKind", loss, field="loss"),
            cost_matrix=matrix,
            loss_cap=loss_cap,
            default_mode=parse_enum("EstimatorMode", default_mode, field="default_mode"),
            description=description,
            selection_floor=selection_floor,
            default_lease_seconds=default_lease_seconds,
            default_confidence=default_confidence,
            refit_every_labels=refit_every_labels,
        )
        request = leadline_pb2.CreatePoolRequest(
            pool_id=pool_id, pool=pool, request_id=request_id or str(uuid.uuid4())
        )
        try:
            created: leadline_pb2.Pool = self._call(
                "CreatePool", self._pools.CreatePool, request, timeout=timeout
            )
        except LeadlineError as error:
            if exist_ok and error.code == grpc.StatusCode.ALREADY_EXISTS:
                return self.get_pool(pool_id, timeout=timeout)
            raise
        return created

    def get_pool(self, pool: str, *, timeout: float | None = None) -> leadline_pb2.Pool:
        """The pool's settings and counts (``pool``: id or 'pools/{id}')."""
        request = leadline_pb2.GetPoolRequest(name=pool_name(pool))
        found: leadline_pb2.Pool = self._call(
            "GetPool", self._pools.GetPool, request, timeout=timeout
        )
        return found

    def iter_pools(
        self, *, page_size: int = 0, timeout: float | None = None
    ) -> Iterator[leadline_pb2.Pool]:
        """Every pool, ordered by name, fetched page by page."""
        token = ""
        while True:
            request = leadline_pb2.ListPoolsRequest(page_size=page_size, page_token=token)
            page = self._call("ListPools", self._pools.ListPools, request, timeout=timeout)
            yield from page.pools
            token = page.next_page_token
            if not token:
                return

    def list_pools(
        self, *, page_size: int = 0, timeout: float | None = None
    ) -> list[leadline_pb2.Pool]:
        """Every pool, ordered by name."""
        return list(self.iter_pools(page_size=page_size, timeout=timeout))

    def delete_pool(
        self,
        pool: str,
        *,
        missing_ok: bool = False,
        request_id: str | None = None,
        timeout: float | None = None,
    ) -> None:
        """Delete the pool with all its items, draws and labels.

        The call carries a ``request_id`` (default: a fresh uuid4, the same for every retry
        of this call), so a retry after a lost reply succeeds instead of NOT_FOUND. With
        ``missing_ok`` a pool that does not exist (never did, or was deleted by someone
        else) is not an error either.
        """
        request = leadline_pb2.DeletePoolRequest(
            name=pool_name(pool), request_id=request_id or str(uuid.uuid4())
        )
        try:
            self._call("DeletePool", self._pools.DeletePool, request, timeout=timeout)
        except LeadlineError as error:
            if not (missing_ok and error.code == grpc.StatusCode.NOT_FOUND):
                raise

    # -- ingest ---------------------------------------------------------------------------

    def ingest(
        self,
        pool: str,
        item_ids: Sequence[str] | np.ndarray,
        features: np.ndarray | Sequence[Sequence[float]],
        outputs: np.ndarray | Sequence[float] | Sequence[Sequence[float]],
        *,
        payload_refs: Sequence[str] | np.ndarray | None = None,
        segments: Sequence[str] | np.ndarray | None = None,
        event_time_ms: Sequence[int] | np.ndarray | None = None,
        request_id: str | None = None,
        timeout: float | None = None,
    ) -> IngestResult:
        """Send n items: ``features`` (n, feature_dim), ``outputs`` (n, num_classes)
        probabilities or (n,) predictions, optional per-item columns.

        The rows go out in order as messages of at most ``max_batch_rows`` rows and about
        ``max_batch_bytes`` bytes, each with its own request id. Pass ``request_id`` to
        make the whole call repeatable: the same arguments and ``request_id`` give the same
        per-message ids, so a repeat after a crash applies nothing twice.

        Raises InvalidRequest for mismatched shapes before anything is sent. A message the
        server refuses raises; the messages before it stay accepted (the exception does not
        say how many: repeat with the same ``request_id`` to finish the job).
        """
        columns = IngestColumns.from_arrays(
            item_ids,
            features,
            outputs,
            payload_refs=payload_refs,
            segments=segments,
            event_time_ms=event_time_ms,
        )
        name = pool_name(pool)
        accepted = duplicates = rejected = item_count = messages = 0
        errors: list[leadline_pb2.ItemError] = []
        for batch in build_batches(
            name,
            columns,
            max_rows=self.max_batch_rows,
            max_bytes=self.max_batch_bytes,
            request_id=request_id,
        ):
            summary = self._call(
                "IngestItems",
                self._ingest.IngestItems,
                batch,
                timeout=self.ingest_timeout if timeout is None else timeout,
            )
            accepted += summary.accepted
            duplicates += summary.duplicates
            rejected += summary.rejected
            errors.extend(summary.errors)
            item_count = summary.item_count
            messages += 1
        return IngestResult(
            accepted,
            duplicates,
            rejected,
            errors,
            item_count,
            messages,
            errors_truncated=rejected > len(errors),
        )

    def add_validation(
        self,
        pool: str,
        item_ids: Sequence[str] | np.ndarray,
        features: np.ndarray | Sequence[Sequence[float]],
        outputs: np.ndarray | Sequence[float] | Sequence[Sequence[float]],
        labels: np.ndarray | Sequence[int] | Sequence[float],
        *,
        segments: Sequence[str] | np.ndarray | None = None,
        request_id: str | None = None,
        timeout: float | None = None,
    ) -> IngestResult:
        """Send n validation items: labeled rows from outside the pool that teach the
        surrogate before the first pool label (role ``ingest`` or ``admin``).

        ``features`` (n, feature_dim); ``outputs`` the model's *held-out* outputs for these
        rows ((n, num_classes) probabilities or (n,) predictions), e.g. from
        ``sklearn.model_selection.cross_val_predict(model, X, y, method="predict_proba")``
        or the model's predictions on its validation split; ``labels`` (n,) class indices
        or target values. They are never drawn and never enter an estimate or a count of
        pool items. Batched, retried and made repeatable by ``request_id`` exactly like
        :meth:`ingest`; the result's ``item_count`` is the pool's validation-item count
        after the last message. One GetPool call first learns the pool's task (class
        labels or values).
        """
        name = pool_name(pool)
        task = self.get_pool(name, timeout=timeout).task
        columns = ValidationColumns.from_arrays(
            item_ids,
            features,
            outputs,
            labels,
            classification=task == leadline_pb2.TASK_TYPE_CLASSIFICATION,
            segments=segments,
        )
        accepted = duplicates = rejected = item_count = messages = 0
        errors: list[leadline_pb2.ItemError] = []
        for batch in build_validation_batches(
            name,
            columns,
            max_rows=self.max_batch_rows,
            max_bytes=self.max_batch_bytes,
            request_id=request_id,
        ):
            summary = self._call(
                "AddValidationItems",
                self._ingest.AddValidationItems,
                batch,
                timeout=self.ingest_timeout if timeout is None else timeout,
            )
            accepted += summary.accepted
            duplicates += summary.duplicates
            rejected += summary.rejected
            errors.extend(summary.errors)
            item_count = summary.item_count
            messages += 1
        return IngestResult(
            accepted,
            duplicates,
            rejected,
            errors,
            item_count,
            messages,
            errors_truncated=rejected > len(errors),
        )

    # -- labeling -------------------------------------------------------------------------

    def acquire(
        self,
        pool: str,
        count: int,
        *,
        labeler: str,
        lease_seconds: int = 0,
        request_id: str | None = None,
        timeout: float | None = None,
    ) -> list[leadline_pb2.Assignment]:
        """Up to ``count`` items to label next, each held by ``labeler`` under a lease.

        Fewer come back when fewer unlabeled items are left. ``request_id`` (default: a
        fresh uuid4) makes a repeat return the same assignments.
        """
        request = leadline_pb2.AcquireItemsRequest(
            pool=pool_name(pool),
            count=count,
            labeler=labeler,
            lease_seconds=lease_seconds,
            request_id=request_id or str(uuid.uuid4()),
        )
        reply = self._call("AcquireItems", self._labeling.AcquireItems, request, timeout=timeout)
        return list(reply.assignments)

    def submit_labels(
        self,
        pool: str,
        labels: Mapping[str, Outcome] | Iterable[tuple[str, Outcome]],
        *,
        labeler: str,
        request_id: str | None = None,
        timeout: float | None = None,
        allow_partial: bool = False,
    ) -> leadline_pb2.SubmitLabelsResponse:
        """Submit outcomes for held assignments: ``{assignment_id: outcome}`` or pairs.

        An outcome is an int class label (classification), a float target value
        (regression) or :class:`Skip`. If the server refuses some of them (the rest are
        kept), :class:`PartiallyAccepted` is raised with the reply in ``response``;
        ``allow_partial=True`` returns the reply instead (check its ``rejected``).
        """
        pairs = labels.items() if isinstance(labels, Mapping) else labels
        request = leadline_pb2.SubmitLabelsRequest(
            pool=pool_name(pool), labeler=labeler, request_id=request_id or str(uuid.uuid4())
        )
        for assignment_id, outcome in pairs:
            request.labels.append(_submission(assignment_id, outcome))
        reply: leadline_pb2.SubmitLabelsResponse = self._call(
            "SubmitLabels", self._labeling.SubmitLabels, request, timeout=timeout
        )
        if not allow_partial:
            _raise_if_partial("SubmitLabels", reply, reply.accepted, "labels")
        return reply

    def release(
        self,
        pool: str,
        assignment_ids: Iterable[str],
        *,
        labeler: str,
        request_id: str | None = None,
        timeout: float | None = None,
        allow_partial: bool = False,
    ) -> leadline_pb2.ReleaseItemsResponse:
        """Give held assignments back unlabeled; they will be offered again.

        Raises :class:`PartiallyAccepted` when some were refused (unless ``allow_partial``).
        """
        request = leadline_pb2.ReleaseItemsRequest(
            pool=pool_name(pool),
            assignment_ids=list(assignment_ids),
            labeler=labeler,
            request_id=request_id or str(uuid.uuid4()),
        )
        reply: leadline_pb2.ReleaseItemsResponse = self._call(
            "ReleaseItems", self._labeling.ReleaseItems, request, timeout=timeout
        )
        if not allow_partial:
            _raise_if_partial("ReleaseItems", reply, reply.released, "assignments")
        return reply

    # -- estimates ------------------------------------------------------------------------

    def get_estimate(
        self,
        pool: str,
        *,
        confidence: float = 0.0,
        mode: str | int | None = None,
        segment: str = "",
        start_time_ms: int = 0,
        end_time_ms: int = 0,
        timeout: float | None = None,
    ) -> Estimate:
        """The risk estimate with its two-sided intervals; 0 / None / "" keep the pool's
        defaults."""
        request = leadline_pb2.GetEstimateRequest(
            pool=pool_name(pool),
            confidence=confidence,
            mode=parse_enum("EstimatorMode", mode, field="mode"),
            segment=segment,
            start_time_ms=start_time_ms,
            end_time_ms=end_time_ms,
        )
        reply = self._call("GetEstimate", self._estimates.GetEstimate, request, timeout=timeout)
        return Estimate.from_message(reply)

    def check_gate(
        self,
        pool: str,
        *,
        max_risk: float,
        confidence: float = 0.0,
        bound: str | int | None = None,
        mode: str | int | None = None,
        segment: str = "",
        start_time_ms: int = 0,
        end_time_ms: int = 0,
        timeout: float | None = None,
    ) -> GateResult:
        """PASS / FAIL / UNDECIDED for "risk < max_risk at confidence".

        ``bound``: 'anytime' (the server's default, safe to poll) or 'fixed-time'. The
        result's ``verdict`` is a :class:`~leadline.client.Verdict`; its bounds are
        one-sided at the confidence (see :class:`~leadline.client.GateResult`).
        ``max_risk`` must lie in (0, B), B the pool's largest possible loss.
        """
        problem = max_risk_problem(max_risk)
        if problem is not None:
            raise invalid_argument(problem, method="CheckGate")
        request = leadline_pb2.CheckGateRequest(
            pool=pool_name(pool),
            max_risk=max_risk,
            confidence=confidence,
            bound=parse_enum("BoundKind", bound, field="bound"),
            mode=parse_enum("EstimatorMode", mode, field="mode"),
            segment=segment,
            start_time_ms=start_time_ms,
            end_time_ms=end_time_ms,
        )
        reply = self._call("CheckGate", self._estimates.CheckGate, request, timeout=timeout)
        return GateResult.from_message(reply, max_risk=float(max_risk))

    def iter_draws(
        self, pool: str, *, page_size: int = 0, timeout: float | None = None
    ) -> Iterator[leadline_pb2.Draw]:
        """The pool's draws in draw order with their outcomes, fetched page by page."""
        token = ""
        while True:
            request = leadline_pb2.ListDrawsRequest(
                pool=pool_name(pool), page_size=page_size, page_token=token
            )
            page = self._call("ListDraws", self._estimates.ListDraws, request, timeout=timeout)
            yield from page.draws
            token = page.next_page_token
            if not token:
                return

    def list_draws(
        self, pool: str, *, page_size: int = 0, timeout: float | None = None
    ) -> list[leadline_pb2.Draw]:
        """Every draw of the pool, in draw order."""
        return list(self.iter_draws(pool, page_size=page_size, timeout=timeout))

    def get_estimate_trace(
        self,
        pool: str,
        *,
        confidence: float = 0.0,
        mode: str | int | None = None,
        max_points: int = 0,
        segment: str = "",
        timeout: float | None = None,
    ) -> list[Estimate]:
        """Estimates after the first k labeled draws for up to ``max_points`` values of k,
        each with two-sided intervals at ``confidence``."""
        request = leadline_pb2.GetEstimateTraceRequest(
            pool=pool_name(pool),
            confidence=confidence,
            mode=parse_enum("EstimatorMode", mode, field="mode"),
            max_points=max_points,
            segment=segment,
        )
        trace = self._call(
            "GetEstimateTrace", self._estimates.GetEstimateTrace, request, timeout=timeout
        )
        return [Estimate.from_message(point) for point in trace.points]


def _submission(assignment_id: str, outcome: Outcome) -> leadline_pb2.LabelSubmission:
    if isinstance(outcome, Skip):
        return leadline_pb2.LabelSubmission(assignment_id=assignment_id, skip_reason=outcome.reason)
    if isinstance(outcome, bool):
        raise invalid_argument(
            f"label for assignment {assignment_id!r} is {outcome!r}; give an int class "
            "label, a float value or Skip(reason)."
        )
    if isinstance(outcome, int | np.integer):
        return leadline_pb2.LabelSubmission(assignment_id=assignment_id, class_label=int(outcome))
    if isinstance(outcome, float | np.floating):
        return leadline_pb2.LabelSubmission(assignment_id=assignment_id, value=float(outcome))
    raise invalid_argument(
        f"label for assignment {assignment_id!r} is {outcome!r} ({type(outcome).__name__}); "
        "give an int class label, a float value or Skip(reason)."
    )
