"""Bearer tokens and roles: which token may call which service.

The token file is TOML with one table ``[tokens]`` mapping each token string to a list of
roles::

    [tokens]
    "s3cr3t-ingest" = ["ingest"]
    "s3cr3t-ops" = ["admin", "reader"]

Each service maps to one role (admin: CreatePool / DeletePool; ingest: IngestService;
labeler: LabelingService; reader: EstimateService), with one exception:
AddValidationItems takes ingest or admin (the rows often come from whoever set the pool
up). GetPool and ListPools are open to every role; the health service and reflection need
no token.
"""

from __future__ import annotations

import hashlib
import hmac
import logging
import os
import stat
import time
import tomllib
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import grpc

__all__ = [
    "ROLES",
    "ANONYMOUS",
    "AuthInterceptor",
    "Authenticator",
    "holder_id",
    "load_tokens",
    "required_roles",
]

_LOG = logging.getLogger(__name__)

ROLES = frozenset({"admin", "ingest", "labeler", "reader"})
ANONYMOUS = "anonymous"

_PACKAGE = "/leadline.v1."
_SERVICE_ROLES = {
    "IngestService": frozenset({"ingest"}),
    "LabelingService": frozenset({"labeler"}),
    "EstimateService": frozenset({"reader"}),
}
# Methods whose roles differ from their service's.
_METHOD_ROLES = {
    "IngestService/AddValidationItems": frozenset({"ingest", "admin"}),
}
_POOL_METHOD_ROLES = {
    "CreatePool": frozenset({"admin"}),
    "DeletePool": frozenset({"admin"}),
    "GetPool": ROLES,
    "ListPools": ROLES,
}


def required_roles(method: str) -> frozenset[str] | None:
    """Roles any one of which may call ``method`` (a full gRPC method path); None = open."""
    if not method.startswith(_PACKAGE):
        return None  # health, reflection
    path = method[len(_PACKAGE) :]
    if path in _METHOD_ROLES:
        return _METHOD_ROLES[path]
    service, _, name = path.partition("/")
    if service == "PoolService":
        return _POOL_METHOD_ROLES.get(name, frozenset({"admin"}))
    # Unknown leadline services are closed to everyone rather than open.
    return _SERVICE_ROLES.get(service, frozenset())


def load_tokens(path: Path, *, allow_readable: bool = False) -> dict[str, frozenset[str]]:
    """Read a token file; ValueError naming the token entry and the rule if malformed.

    A file other users may read is refused unless ``allow_readable`` (every token in it
    grants its roles to whoever reads it).
    """
    try:
        mode = stat.S_IMODE(os.stat(path).st_mode)
    except OSError as error:
        raise ValueError(f"tokens file {str(path)!r}: cannot read ({error}).") from None
    if mode & 0o004:
        if not allow_readable:
            raise ValueError(
                f"tokens file {str(path)!r}: mode {mode:04o} lets every user on this machine "
                f"read the tokens; run `chmod 600 {path}` (or 640 with the server's group), "
                "or pass --allow-readable-tokens where only the server can reach the file "
                "anyway (e.g. a container's mounted secret)."
            )
        _LOG.warning("tokens file %s has mode %04o (readable by other users)", path, mode)
    try:
        with open(path, "rb") as handle:
            document = tomllib.load(handle)
    except OSError as error:
        raise ValueError(f"tokens file {str(path)!r}: cannot read ({error}).") from None
    except tomllib.TOMLDecodeError as error:
        raise ValueError(f"tokens file {str(path)!r}: not valid TOML ({error}).") from None
    table = document.get("tokens")
    if not isinstance(table, dict) or not table:
        raise ValueError(f"tokens file {str(path)!r}: needs a non-empty [tokens] table.")
    tokens: dict[str, frozenset[str]] = {}
    for position, (token, roles) in enumerate(table.items()):
        where = f"tokens file {str(path)!r}, entry {position + 1}"
        if len(token) < 8 or not token.isprintable() or " " in token:
            raise ValueError(f"{where}: a token must be >= 8 printable characters without spaces.")
        if not isinstance(roles, list) or not roles:
            raise ValueError(f'{where}: roles must be a non-empty list, e.g. ["reader"].')
        unknown = [role for role in roles if role not in ROLES]
        if unknown:
            raise ValueError(f"{where}: unknown role {unknown[0]!r}; roles are {sorted(ROLES)}.")
        tokens[token] = frozenset(roles)
    return tokens


def holder_id(token: str, key: bytes) -> str:
    """The id under which a token's assignments and request ids are stored: HMAC-SHA256
    of the token keyed with the data directory's secret (``leadline.key``), 32 hex digits.
    Without the key, the database does not let anyone test a guessed token."""
    return hmac.new(key, token.encode(), hashlib.sha256).hexdigest()[:32]


def legacy_holder_id(token: str) -> str:
    """The unkeyed id older servers stored (16 hex digits of SHA-256 of the token)."""
    return hashlib.sha256(token.encode()).hexdigest()[:16]


class Authenticator:
    """Maps a call's ``authorization`` metadata to (holder id, roles).

    ``tokens=None`` means authentication is off (``--insecure-no-auth``): every call gets
    every role and the holder id ``anonymous``. ``holder_key`` is the data directory's
    secret (see :func:`holder_id`).
    """

    def __init__(
        self, tokens: Mapping[str, frozenset[str]] | None, *, holder_key: bytes = b""
    ) -> None:
        self._tokens = dict(tokens) if tokens is not None else None
        # Holder ids: a keyed digest of the token, never the token itself (logs, database).
        self._holders = {token: holder_id(token, holder_key) for token in self._tokens or {}}

    def legacy_renames(self) -> list[tuple[str, str]]:
        """(unkeyed id, keyed id) for every known token: what a data directory written by
        an older server needs renamed so open assignments stay with their holders."""
        return [(legacy_holder_id(token), held) for token, held in self._holders.items()]

    @property
    def enabled(self) -> bool:
        return self._tokens is not None

    def identify(self, metadata: Any) -> tuple[str, frozenset[str]] | None:
        """(holder, roles) for the metadata, or None if no valid token is present."""
        if self._tokens is None:
            return ANONYMOUS, ROLES
        value = ""
        for key, item in metadata or ():
            if key == "authorization":
                value = item if isinstance(item, str) else item.decode()
                break
        scheme, _, token = value.partition(" ")
        if scheme.lower() != "bearer" or not token:
            return None
        token = token.strip()
        for known, roles in self._tokens.items():
            # Constant-time compare so response timing does not leak token prefixes.
            if hmac.compare_digest(known.encode(), token.encode()):
                return self._holders[known], roles
        return None

    def holder(self, context: grpc.ServicerContext) -> str:
        """The holder id of the calling token (the interceptor already checked it)."""
        found = self.identify(context.invocation_metadata())
        return found[0] if found is not None else ANONYMOUS


if TYPE_CHECKING:  # generic only in typeshed's stubs
    _Handler = grpc.RpcMethodHandler[Any, Any]
else:
    _Handler = grpc.RpcMethodHandler


def _refusal(code: grpc.StatusCode, message: str) -> _Handler:
    def refuse(_request: Any, context: grpc.ServicerContext) -> Any:
        context.abort(code, message)

    return grpc.unary_unary_rpc_method_handler(refuse)


class AuthInterceptor(grpc.ServerInterceptor):
    """UNAUTHENTICATED without a valid token, PERMISSION_DENIED without the method's role.

    ``observe(method, code, seconds)`` (optional) is told about every unary call, refused
    ones included, for the request metrics.
    """

    def __init__(
        self,
        authenticator: Authenticator,
        *,
        observe: Callable[[str, grpc.StatusCode, float], None] | None = None,
    ) -> None:
        self._auth = authenticator
        self._observe = observe

    def intercept_service(
        self,
        continuation: Callable[[grpc.HandlerCallDetails], _Handler | None],
        handler_call_details: grpc.HandlerCallDetails,
    ) -> _Handler | None:
        method: str = handler_call_details.method
        roles = required_roles(method)
        refusal: _Handler | None = None
        if roles is not None:
            found = self._auth.identify(handler_call_details.invocation_metadata)
            if found is None:
                refusal = _refusal(
                    grpc.StatusCode.UNAUTHENTICATED,
                    "authorization: missing or unknown bearer token; send the metadata "
                    "'authorization: Bearer <token>'.",
                )
            elif not roles & found[1]:
                refusal = _refusal(
                    grpc.StatusCode.PERMISSION_DENIED,
                    f"{method}: needs role {' or '.join(sorted(roles)) or '(none)'}; this token "
                    f"has {', '.join(sorted(found[1]))}.",
                )
        handler = refusal if refusal is not None else continuation(handler_call_details)
        if self._observe is None or handler is None or handler.unary_unary is None:
            return handler
        return self._timed(method, handler)

    def _timed(self, method: str, handler: _Handler) -> _Handler:
        inner = handler.unary_unary
        observe = self._observe
        assert inner is not None
        assert observe is not None

        def behavior(request: Any, context: grpc.ServicerContext) -> Any:
            started = time.perf_counter()
            try:
                return inner(request, context)
            finally:
                # ServicerContext.code() exists since grpcio 1.38; typeshed's stubs lack it.
                code = context.code() or grpc.StatusCode.OK  # type: ignore[attr-defined]
                observe(method, code, time.perf_counter() - started)

        return grpc.unary_unary_rpc_method_handler(
            behavior,
            request_deserializer=handler.request_deserializer,
            response_serializer=handler.response_serializer,
        )
