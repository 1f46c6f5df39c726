"""The client's exceptions: one small hierarchy, each carrying the gRPC status code.

Every failed call raises a subclass of :class:`LeadlineError`. Catch the base class to
handle everything, or a subclass to react to one kind of failure::

    LeadlineError                 any failed call (``code``, ``details``, ``method``)
    ├── InvalidRequest            INVALID_ARGUMENT, OUT_OF_RANGE: fix the request
    ├── NotFound                  NOT_FOUND: unknown pool or assignment
    ├── AlreadyExists             ALREADY_EXISTS: pool id in use
    ├── AccessDenied              UNAUTHENTICATED, PERMISSION_DENIED: token or role
    ├── Conflict                  FAILED_PRECONDITION, ABORTED: state forbids the call
    ├── Overloaded                RESOURCE_EXHAUSTED: back-pressure or size limit
    └── Unavailable               UNAVAILABLE, DEADLINE_EXCEEDED: server unreachable or slow
"""

from __future__ import annotations

import grpc

__all__ = [
    "AccessDenied",
    "AlreadyExists",
    "Conflict",
    "InvalidRequest",
    "LeadlineError",
    "NotFound",
    "Overloaded",
    "Unavailable",
    "error_from_rpc",
]


class LeadlineError(Exception):
    """A call to the leadline server failed; ``code`` is the gRPC status code."""

    def __init__(
        self, message: str, *, code: grpc.StatusCode | None = None, method: str = ""
    ) -> None:
        super().__init__(message)
        self.code = code
        self.details = message
        self.method = method

    def __str__(self) -> str:
        code = self.code.name if self.code is not None else "CLIENT"
        where = f" in {self.method}" if self.method else ""
        return f"{code}{where}: {self.details}"


class InvalidRequest(LeadlineError):
    """The server refused a field of the request (INVALID_ARGUMENT or OUT_OF_RANGE)."""


class NotFound(LeadlineError):
    """The pool or assignment does not exist (NOT_FOUND)."""


class AlreadyExists(LeadlineError):
    """The pool id is already in use (ALREADY_EXISTS)."""


class AccessDenied(LeadlineError):
    """The token is missing or invalid, or lacks the role (UNAUTHENTICATED, PERMISSION_DENIED)."""


class Conflict(LeadlineError):
    """The resource's state forbids the call, e.g. an expired lease (FAILED_PRECONDITION)."""


class Overloaded(LeadlineError):
    """The server pushed back or a size limit was hit (RESOURCE_EXHAUSTED)."""


class Unavailable(LeadlineError):
    """The server could not be reached in time, retries included (UNAVAILABLE, DEADLINE)."""


_BY_CODE: dict[grpc.StatusCode, type[LeadlineError]] = {
    grpc.StatusCode.INVALID_ARGUMENT: InvalidRequest,
    grpc.StatusCode.OUT_OF_RANGE: InvalidRequest,
    grpc.StatusCode.NOT_FOUND: NotFound,
    grpc.StatusCode.ALREADY_EXISTS: AlreadyExists,
    grpc.StatusCode.UNAUTHENTICATED: AccessDenied,
    grpc.StatusCode.PERMISSION_DENIED: AccessDenied,
    grpc.StatusCode.FAILED_PRECONDITION: Conflict,
    grpc.StatusCode.ABORTED: Conflict,
    grpc.StatusCode.RESOURCE_EXHAUSTED: Overloaded,
    grpc.StatusCode.UNAVAILABLE: Unavailable,
    grpc.StatusCode.DEADLINE_EXCEEDED: Unavailable,
}


def error_from_rpc(error: grpc.RpcError, *, method: str = "") -> LeadlineError:
    """Map a failed gRPC call to the matching :class:`LeadlineError` subclass."""
    code = error.code() if isinstance(error, grpc.Call) else None
    details = (error.details() if isinstance(error, grpc.Call) else None) or str(error)
    cls = _BY_CODE.get(code, LeadlineError) if code is not None else LeadlineError
    return cls(details, code=code, method=method)
