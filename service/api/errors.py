"""The one place where domain errors become gRPC status codes."""

from __future__ import annotations

import functools
import logging
from collections.abc import Callable
from typing import Any, TypeVar

import grpc

from leadline.service.errors import (
    AlreadyExists,
    FailedPrecondition,
    InvalidArgument,
    NotFound,
    PermissionDenied,
    ResourceExhausted,
    ServiceError,
    Unavailable,
)

__all__ = ["STATUS_CODES", "status_code", "rpc_method"]

_LOG = logging.getLogger(__name__)

STATUS_CODES: dict[type[ServiceError], grpc.StatusCode] = {
    InvalidArgument: grpc.StatusCode.INVALID_ARGUMENT,
    NotFound: grpc.StatusCode.NOT_FOUND,
    AlreadyExists: grpc.StatusCode.ALREADY_EXISTS,
    FailedPrecondition: grpc.StatusCode.FAILED_PRECONDITION,
    PermissionDenied: grpc.StatusCode.PERMISSION_DENIED,
    ResourceExhausted: grpc.StatusCode.RESOURCE_EXHAUSTED,
    Unavailable: grpc.StatusCode.UNAVAILABLE,
}
_BY_NAME = {cls.__name__: code for cls, code in STATUS_CODES.items()}


def status_code(error: ServiceError | str) -> grpc.StatusCode:
    """The status code of a domain error (or of its class name, as in ItemProblem.kind)."""
    name = error if isinstance(error, str) else type(error).__name__
    return _BY_NAME.get(name, grpc.StatusCode.INTERNAL)


F = TypeVar("F", bound=Callable[..., Any])


def rpc_method(method: F) -> F:
    """Servicer method decorator: domain errors leave as their status code and message;
    anything else is logged with its traceback and leaves as INTERNAL."""

    @functools.wraps(method)
    def wrapper(self: Any, request: Any, context: grpc.ServicerContext) -> Any:
        try:
            return method(self, request, context)
        except ServiceError as error:
            context.abort(status_code(error), error.message)
        except Exception:
            _LOG.exception("unexpected failure in %s", method.__name__)
            context.abort(grpc.StatusCode.INTERNAL, "internal error; see the server log.")

    return wrapper  # type: ignore[return-value]
