"""TLS and mutual TLS between the client and a real server, with certificates made by
the openssl command line for this test only."""

from __future__ import annotations

import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

from leadline.client import Client, InvalidRequest, LocalServer, TlsConfig, Unavailable

from .conftest import TOKENS, run_cli


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def _issue(name: str, usage: str, cwd: Path) -> None:
    """A P-256 key and a certificate for 127.0.0.1 / localhost signed by ca.pem."""
    _openssl(
        "req",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:prime256v1",
        "-nodes",
        "-keyout",
        f"{name}.key",
        "-out",
        f"{name}.csr",
        "-subj",
        f"/CN={name}",
        cwd=cwd,
    )
    (cwd / f"{name}.ext").write_text(
        f"subjectAltName=DNS:localhost,IP:127.0.0.1\nextendedKeyUsage={usage}\n"
    )
    _openssl(
        "x509",
        "-req",
        "-in",
        f"{name}.csr",
        "-CA",
        "ca.pem",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        f"{name}.pem",
        "-days",
        "2",
        "-extfile",
        f"{name}.ext",
        cwd=cwd,
    )


@pytest.fixture(scope="module")
def certificates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("pki")
    _openssl(
        "req",
        "-x509",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:prime256v1",
        "-nodes",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
        "-days",
        "2",
        "-subj",
        "/CN=leadline test CA",
        cwd=folder,
    )
    _issue("server", "serverAuth", folder)
    _issue("client", "clientAuth", folder)
    return folder


@pytest.fixture(scope="module")
def mtls_server(
    certificates: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[LocalServer]:
    local = LocalServer(
        tmp_path_factory.mktemp("tls-server"),
        tokens={TOKENS["admin"]: ["admin"]},
        extra_args=[
            "--tls-cert",
            str(certificates / "server.pem"),
            "--tls-key",
            str(certificates / "server.key"),
            "--tls-client-ca",
            str(certificates / "ca.pem"),
        ],
    )
    local.start()
    try:
        yield local
    finally:
        local.stop()


def test_mutual_tls_client_can_call(mtls_server: LocalServer, certificates: Path) -> None:
    tls = TlsConfig.from_files(
        ca=certificates / "ca.pem",
        cert=certificates / "client.pem",
        key=certificates / "client.key",
    )
    assert "<hidden>" in repr(tls)
    assert "BEGIN" not in repr(tls)
    with Client(mtls_server.target, token=TOKENS["admin"], tls=tls) as client:
        assert client.health() == "SERVING"
        client.create_pool(
            "over-tls", task="classification", num_classes=2, feature_dim=1, loss="zero-one"
        )
        assert client.get_pool("over-tls").name == "pools/over-tls"


def test_cli_speaks_mutual_tls(mtls_server: LocalServer, certificates: Path) -> None:
    done = run_cli(
        "pool",
        "list",
        "--tls-ca",
        str(certificates / "ca.pem"),
        "--tls-cert",
        str(certificates / "client.pem"),
        "--tls-key",
        str(certificates / "client.key"),
        token=TOKENS["admin"],
        target=mtls_server.target,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("NAME")


@pytest.mark.parametrize(
    "tls",
    [
        None,  # plain text to a TLS port
        "no-client-certificate",
    ],
)
def test_clients_without_the_right_credentials_cannot_connect(
    mtls_server: LocalServer, certificates: Path, tls: str | None
) -> None:
    config = (
        TlsConfig.from_files(ca=certificates / "ca.pem") if tls == "no-client-certificate" else None
    )
    with (
        Client(mtls_server.target, token=TOKENS["admin"], tls=config, timeout=1.5) as client,
        pytest.raises(Unavailable),
    ):
        client.list_pools()


def test_half_a_client_key_pair_is_refused() -> None:
    with pytest.raises(InvalidRequest, match="client_certificate and client_key must be given"):
        TlsConfig(client_certificate=b"pem")
