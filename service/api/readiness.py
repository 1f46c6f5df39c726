"""Start-up gate: data calls wait for the pools to load; health answers from the start.

The server listens before it loads its pools (seconds for a large data directory), so a
load balancer or an operator can watch the standard health service, which reports
NOT_SERVING until every pool is loaded. Meanwhile every leadline call is refused with
UNAVAILABLE and a message saying why (clients retry UNAVAILABLE); health and reflection
pass through.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

import grpc

from leadline.service.api.auth import _Handler, _refusal

__all__ = ["Readiness", "ReadinessInterceptor"]

# Methods of our own services; health (grpc.health.v1) and reflection are not gated.
_GATED_PREFIX = "/leadline."


class Readiness:
    """Whether the pools are loaded; until then, how far loading got (for the message)."""

    def __init__(self) -> None:
        self._ready = threading.Event()
        self._lock = threading.Lock()
        self._loaded = 0
        self._total: int | None = None

    @property
    def ready(self) -> bool:
        return self._ready.is_set()

    def progress(self, loaded: int, total: int) -> None:
        """Record that ``loaded`` of ``total`` pools are in memory."""
        with self._lock:
            self._loaded, self._total = loaded, total

    def set_ready(self) -> None:
        self._ready.set()

    def refusal(self) -> str:
        with self._lock:
            loaded, total = self._loaded, self._total
        done = "" if total is None else f" ({loaded} of {total} loaded)"
        return (
            f"the server is starting: it is loading its pools from the database{done}. "
            "Retry shortly; the health service (grpc.health.v1.Health) reports SERVING once "
            "every pool is loaded."
        )


class ReadinessInterceptor(grpc.ServerInterceptor):
    """UNAVAILABLE for every leadline method until :meth:`Readiness.set_ready`."""

    def __init__(self, readiness: Readiness) -> None:
        self._readiness = readiness

    def intercept_service(
        self,
        continuation: Callable[[grpc.HandlerCallDetails], _Handler | None],
        handler_call_details: grpc.HandlerCallDetails,
    ) -> _Handler | None:
        method: str = handler_call_details.method
        if self._readiness.ready or not method.startswith(_GATED_PREFIX):
            return continuation(handler_call_details)
        return _refusal(grpc.StatusCode.UNAVAILABLE, self._readiness.refusal())
