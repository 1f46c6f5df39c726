"""TLS settings for the client channel."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import grpc

from leadline.client._errors import invalid_argument

__all__ = ["TlsConfig"]


@dataclass(frozen=True, kw_only=True)
class TlsConfig:
    """How the client checks the server and, for mutual TLS, proves who it is.

    ``root_certificates`` is the PEM of the CA that signed the server's certificate (None:
    the system's roots). ``client_certificate`` and ``client_key`` (PEM, both or neither)
    are sent when the server asks for a client certificate. ``server_name`` overrides the
    host name checked against the server's certificate.
    """

    root_certificates: bytes | None = None
    client_certificate: bytes | None = None
    client_key: bytes | None = None
    server_name: str | None = None

    def __post_init__(self) -> None:
        if (self.client_certificate is None) != (self.client_key is None):
            raise invalid_argument(
                "client_certificate and client_key must be given together (mutual TLS), "
                "got only one of them."
            )

    def __repr__(self) -> str:
        # Never print key material.
        return (
            f"TlsConfig(root_certificates={'<pem>' if self.root_certificates else None}, "
            f"client_certificate={'<pem>' if self.client_certificate else None}, "
            f"client_key={'<hidden>' if self.client_key else None}, "
            f"server_name={self.server_name!r})"
        )

    @classmethod
    def from_files(
        cls,
        *,
        ca: str | Path | None = None,
        cert: str | Path | None = None,
        key: str | Path | None = None,
        server_name: str | None = None,
    ) -> TlsConfig:
        """Read the PEM files; OSError if one cannot be read."""

        def read(path: str | Path | None) -> bytes | None:
            return Path(path).read_bytes() if path else None

        return cls(
            root_certificates=read(ca),
            client_certificate=read(cert),
            client_key=read(key),
            server_name=server_name,
        )

    def channel_credentials(self) -> grpc.ChannelCredentials:
        return grpc.ssl_channel_credentials(
            root_certificates=self.root_certificates,
            private_key=self.client_key,
            certificate_chain=self.client_certificate,
        )
