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
    ├── Unavailable               UNAVAILABLE: the server cannot be reached
    │   └── DeadlineExceeded      DEADLINE_EXCEEDED: no reply within the call's deadline
    └── PartiallyAccepted         the call succeeded for some items only (``response``)

Arguments the client refuses before sending anything raise :class:`InvalidRequest` too
(code INVALID_ARGUMENT, as the server would answer). Messages name the argument, the
value and the rule; connection failures name the target, what happened and what to do.
"""

from __future__ import annotations

from typing import Any

import grpc

__all__ = [
    "AccessDenied",
    "AlreadyExists",
    "Conflict",
    "DeadlineExceeded",
    "InvalidRequest",
    "LeadlineError",
    "NotFound",
    "Overloaded",
    "PartiallyAccepted",
    "Unavailable",
    "error_from_rpc",
    "invalid_argument",
    "unreachable",
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
    """The server could not be reached, retries included (UNAVAILABLE)."""


class DeadlineExceeded(Unavailable):
    """No reply within the call's deadline (DEADLINE_EXCEEDED): down, restarting or busy."""


class PartiallyAccepted(LeadlineError):
    """The server kept some items of the call and refused others (the call itself
    succeeded, so ``code`` is None). ``response`` is the server's reply: what was kept,
    how many were refused (``rejected``) and the first few reasons (``errors``)."""

    def __init__(self, message: str, *, response: Any, method: str = "") -> None:
        super().__init__(message, method=method)
        self.response = response

    def __str__(self) -> str:
        where = f" in {self.method}" if self.method else ""
        return f"PARTIALLY_ACCEPTED{where}: {self.details}"


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
    grpc.StatusCode.DEADLINE_EXCEEDED: DeadlineExceeded,
}


def error_from_rpc(
    error: grpc.RpcError, *, method: str = "", target: str = "", timeout: float | None = None
) -> LeadlineError:
    """Map a failed gRPC call to the matching :class:`LeadlineError` subclass."""
    code = error.code() if isinstance(error, grpc.Call) else None
    details = (error.details() if isinstance(error, grpc.Call) else None) or str(error)
    if code == grpc.StatusCode.DEADLINE_EXCEEDED:
        within = f" within {timeout:g} s" if timeout is not None else ""
        where = f" from {target}" if target else ""
        details = (
            f"no reply{where}{within}: the server was down, restarting or busy for that "
            "long, or the call was too large for the deadline. If the server is only slow, "
            "give the call more time (CLI --timeout; Python Client(timeout=...))."
        )
    cls = _BY_CODE.get(code, LeadlineError) if code is not None else LeadlineError
    return cls(details, code=code, method=method)


def invalid_argument(message: str, *, method: str = "") -> InvalidRequest:
    """An argument the client refuses before sending anything (code INVALID_ARGUMENT)."""
    return InvalidRequest(message, code=grpc.StatusCode.INVALID_ARGUMENT, method=method)


def _what_happened(details: str) -> tuple[str, str]:
    """(what happened, kind) read from gRPC's connection error text."""
    text = details.lower()
    if "connection refused" in text:
        return "connection refused: nothing listens on that address", "refused"
    if "resolv" in text or "lookup" in text or "dns" in text or "name not known" in text:
        return "the host name could not be resolved", "name"
    if "handshake" in text or "ssl" in text or "certificate" in text or "tls" in text:
        return "the TLS handshake failed", "tls"
    if "deadline" in text:
        return "no answer to the connection attempt in time", "silent"
    return f"the connection failed ({details})", "other"


def unreachable(
    target: str, details: str, *, tls: bool, wait: float, method: str = ""
) -> Unavailable:
    """The error for a server that never answered: target, what happened, what to do."""
    happened, kind = _what_happened(details)
    if kind == "refused":
        advice = (
            "Start a server there (`leadline serve --listen HOST:PORT ...`), or point the "
            "client at the address the server listens on (CLI --target or LEADLINE_TARGET; "
            "Python Client(target))."
        )
    elif kind == "name":
        advice = "Check the host name (CLI --target or LEADLINE_TARGET; Python Client(target))."
    elif kind == "tls":
        advice = (
            "If the server does not use TLS, drop --tls (Python: tls=None); if it does, "
            "give its CA with --tls-ca and, when the certificate names another host, "
            "--tls-server-name."
            if tls
            else "The server may expect something else on that port."
        )
    else:
        advice = (
            "Check that a leadline server runs there and is reachable from here (a "
            "firewall may drop the connection)."
            if tls
            else "If the server uses TLS, pass --tls or --tls-ca (Python: tls=...); "
            "otherwise check that a leadline server runs there and is reachable from here."
        )
    return Unavailable(
        f"cannot reach a leadline server at {target} (tried for up to {wait:g} s): {happened}. "
        f"{advice}",
        code=grpc.StatusCode.UNAVAILABLE,
        method=method,
    )
