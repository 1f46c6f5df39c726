"""The client's transport behaviour over a real gRPC channel to an in-process test server.

The server here is a real grpc.server on a loopback port whose IngestService / PoolService
answer as each test scripts it (fail n times, abort with a code): the only way to make a
real channel see UNAVAILABLE on demand. Behaviour against the real leadline server is
covered in test_integration.py and test_restart.py.
"""

from __future__ import annotations

import threading
import time
from collections import Counter
from collections.abc import Iterator
from concurrent import futures

import grpc
import numpy as np
import pytest

from leadline.client import (
    AccessDenied,
    AlreadyExists,
    Client,
    Conflict,
    DeadlineExceeded,
    InvalidRequest,
    LeadlineError,
    NotFound,
    Overloaded,
    Unavailable,
)
from leadline.v1 import leadline_pb2, leadline_pb2_grpc


class _ScriptedIngest(leadline_pb2_grpc.IngestServiceServicer):
    def __init__(self) -> None:
        self.fail_first = 0
        self.abort_code: grpc.StatusCode | None = None
        self.attempts: Counter[str] = Counter()
        self.metadata: list[dict[str, str]] = []
        self.time_remaining: list[float] = []
        self.delay = 0.0
        self.lock = threading.Lock()

    def IngestItems(self, request, context):  # noqa: N802 - gRPC method name
        with self.lock:
            self.attempts[request.request_id] += 1
            attempt = self.attempts[request.request_id]
        self.metadata.append(dict(context.invocation_metadata()))
        self.time_remaining.append(context.time_remaining())
        if self.delay:
            time.sleep(self.delay)
        if self.abort_code is not None:
            context.abort(self.abort_code, f"scripted {self.abort_code.name}")
        if attempt <= self.fail_first:
            context.abort(grpc.StatusCode.UNAVAILABLE, "scripted outage")
        return leadline_pb2.IngestSummary(
            accepted=len(request.item_ids), item_count=len(request.item_ids)
        )


@pytest.fixture
def scripted() -> Iterator[tuple[_ScriptedIngest, str]]:
    servicer = _ScriptedIngest()
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=4))
    leadline_pb2_grpc.add_IngestServiceServicer_to_server(servicer, server)
    port = server.add_insecure_port("127.0.0.1:0")
    server.start()
    try:
        yield servicer, f"127.0.0.1:{port}"
    finally:
        server.stop(grace=None)


def _ingest(client: Client, n: int = 3) -> int:
    result = client.ingest("p", [f"i{k}" for k in range(n)], np.zeros((n, 2)), np.ones((n, 1)))
    return result.accepted


def test_unavailable_is_retried_with_the_same_request_id(scripted) -> None:
    servicer, target = scripted
    servicer.fail_first = 2
    with Client(target, token="tok-1") as client:
        assert _ingest(client) == 3
    # One logical call, three attempts, all carrying the same request id.
    assert list(servicer.attempts.values()) == [3]


def test_retries_stop_after_five_attempts(scripted) -> None:
    servicer, target = scripted
    servicer.fail_first = 100
    with Client(target, token="tok-1") as client, pytest.raises(Unavailable) as caught:
        _ingest(client)
    # gRPC's retry policy allows at most five attempts (gRFC A6, "Retry Design").
    assert list(servicer.attempts.values()) == [5]
    assert caught.value.code is grpc.StatusCode.UNAVAILABLE
    assert caught.value.method == "IngestItems"


@pytest.mark.parametrize(
    ("code", "exception"),
    [
        (grpc.StatusCode.INVALID_ARGUMENT, InvalidRequest),
        (grpc.StatusCode.OUT_OF_RANGE, InvalidRequest),
        (grpc.StatusCode.NOT_FOUND, NotFound),
        (grpc.StatusCode.ALREADY_EXISTS, AlreadyExists),
        (grpc.StatusCode.UNAUTHENTICATED, AccessDenied),
        (grpc.StatusCode.PERMISSION_DENIED, AccessDenied),
        (grpc.StatusCode.FAILED_PRECONDITION, Conflict),
        (grpc.StatusCode.RESOURCE_EXHAUSTED, Overloaded),
        (grpc.StatusCode.INTERNAL, LeadlineError),
    ],
)
def test_status_codes_map_to_exceptions_and_are_not_retried(
    scripted, code: grpc.StatusCode, exception: type[LeadlineError]
) -> None:
    servicer, target = scripted
    servicer.abort_code = code
    with Client(target) as client, pytest.raises(exception) as caught:
        _ingest(client)
    assert type(caught.value) is exception
    assert caught.value.code is code
    assert caught.value.details == f"scripted {code.name}"
    assert list(servicer.attempts.values()) == [1]


def test_every_call_carries_the_token_and_a_deadline(scripted) -> None:
    servicer, target = scripted
    with Client(target, token="s3cret", ingest_timeout=7.0) as client:
        _ingest(client)
    with Client(target, token="s3cret", ingest_timeout=50.0) as client:
        _ingest(client)
    assert servicer.metadata[0]["authorization"] == "Bearer s3cret"
    short, long = servicer.time_remaining
    # The server sees the deadline the client set (clocks differ by a few milliseconds,
    # the 0.5 s slack covers that and a loaded machine).
    assert 0 < short <= 7.5
    assert 40 < long <= 50.5


def test_no_token_sends_no_authorization_header(scripted) -> None:
    servicer, target = scripted
    with Client(target) as client:
        _ingest(client)
    assert "authorization" not in servicer.metadata[0]


def test_unreachable_server_fails_at_the_deadline() -> None:
    # Port 9 on loopback (discard) is closed on this machine: nothing listens there.
    with Client("127.0.0.1:9", timeout=0.5) as client, pytest.raises(Unavailable) as caught:
        client.get_pool("p")
    assert caught.value.code in (grpc.StatusCode.DEADLINE_EXCEEDED, grpc.StatusCode.UNAVAILABLE)


def test_unreachable_server_gives_unavailable_after_retries_without_wait_for_ready() -> None:
    with (
        Client("127.0.0.1:9", timeout=20, wait_for_ready=False) as client,
        pytest.raises(Unavailable) as caught,
    ):
        client.get_pool("p")
    assert caught.value.code is grpc.StatusCode.UNAVAILABLE


def test_a_call_past_its_deadline_raises_deadline_exceeded_saying_so(scripted) -> None:
    servicer, target = scripted
    servicer.delay = 1.0
    with (
        Client(target, timeout=0.3, ingest_timeout=0.3) as client,
        pytest.raises(DeadlineExceeded) as caught,
    ):
        _ingest(client)
    # The class, the code and the words agree; it is still an Unavailable for handlers.
    assert isinstance(caught.value, Unavailable)
    assert caught.value.code is grpc.StatusCode.DEADLINE_EXCEEDED
    assert str(caught.value).startswith(
        f"DEADLINE_EXCEEDED in IngestItems: no reply from {target} within 0.3 s"
    )
