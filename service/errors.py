"""Domain errors raised below the API layer.

The engine and the store raise these; :mod:`leadline.service.api.errors` maps each to one
gRPC status code in one place. Every message names the field (or the item), the value and
the rule, so a person can act on it::

    ServiceError              base class (never raised itself)
    ├── InvalidArgument       a field of the request breaks a rule
    ├── NotFound              unknown pool, segment or assignment
    ├── AlreadyExists         pool id in use
    ├── FailedPrecondition    the state forbids the call (expired lease, labeled item, ...)
    ├── PermissionDenied      the caller does not hold the assignment
    ├── ResourceExhausted     size limits and back-pressure
    └── Unavailable           the server is shutting down
"""

from __future__ import annotations

__all__ = [
    "AlreadyExists",
    "FailedPrecondition",
    "InvalidArgument",
    "NotFound",
    "PermissionDenied",
    "ResourceExhausted",
    "ServiceError",
    "Unavailable",
]


class ServiceError(Exception):
    """Base class of the errors a request can end with; ``field`` names the culprit."""

    def __init__(self, message: str, *, field: str = "") -> None:
        super().__init__(message)
        self.message = message
        self.field = field


class InvalidArgument(ServiceError):
    """A request field breaks a rule (INVALID_ARGUMENT)."""


class NotFound(ServiceError):
    """The pool, segment or assignment does not exist (NOT_FOUND)."""


class AlreadyExists(ServiceError):
    """The pool id is in use (ALREADY_EXISTS)."""


class FailedPrecondition(ServiceError):
    """The current state forbids the call (FAILED_PRECONDITION)."""


class PermissionDenied(ServiceError):
    """The caller may not act on this resource (PERMISSION_DENIED)."""


class ResourceExhausted(ServiceError):
    """A size limit or back-pressure refused the call (RESOURCE_EXHAUSTED)."""


class Unavailable(ServiceError):
    """The server is shutting down (UNAVAILABLE)."""
