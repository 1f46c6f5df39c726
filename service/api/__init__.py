"""gRPC layer: servicers, authentication, request validation and status mapping."""

from leadline.service.api.auth import Authenticator, AuthInterceptor, load_tokens
from leadline.service.api.readiness import Readiness, ReadinessInterceptor
from leadline.service.api.servicers import add_servicers

__all__ = [
    "AuthInterceptor",
    "Authenticator",
    "Readiness",
    "ReadinessInterceptor",
    "add_servicers",
    "load_tokens",
]
