"""Small hardening items: page tokens, token-file permissions, keyed holder ids, TLS pairs."""

from __future__ import annotations

import base64
import contextlib
import hashlib
import hmac
import shutil
import sqlite3
import subprocess
from collections.abc import Callable
from pathlib import Path

import grpc
import pytest

from leadline.service.config import ServerConfig
from leadline.service.server import main, start_server
from leadline.service.store import DATABASE_FILE
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    TOKENS,
    Dataset,
    Harness,
    classification_pool,
    item_batch,
    write_tokens,
)

_POOL = "pools/tumours"


def _token(text: str) -> str:
    return base64.urlsafe_b64encode(text.encode()).decode().rstrip("=")


@pytest.mark.parametrize("text", ["leadline:²", "leadline:٣", "leadline:" + "9" * 40, "leadline:"])
def test_a_malformed_list_draws_page_token_is_invalid_argument(
    harness: Harness, cancer_pool: Dataset, text: str
) -> None:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        token = _token(text)
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL, page_token=token))
    # Before: '²' passed str.isdigit() and int() failed: INTERNAL.
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert f"page_token = {token!r}: not a token this server issued" in caught.value.details()


def test_a_token_file_other_users_can_read_is_refused_unless_allowed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    tokens = write_tokens(tmp_path / "tokens.toml")
    tokens.chmod(0o644)
    args = ["--data-dir", str(tmp_path / "d"), "--listen", "127.0.0.1:0", "--tokens", str(tokens)]
    assert main(args) == 3
    error = capsys.readouterr().err
    assert f"tokens file {str(tokens)!r}: mode 0644 lets every user" in error
    assert f"chmod 600 {tokens}" in error
    assert "--allow-readable-tokens" in error
    config = ServerConfig(
        data_dir=tmp_path / "d", listen="127.0.0.1:0", tokens=tokens, allow_readable_tokens=True
    )
    start_server(config).stop()
    tokens.chmod(0o640)  # group-readable (the server's group) is fine
    start_server(ServerConfig(data_dir=tmp_path / "d", listen="127.0.0.1:0", tokens=tokens)).stop()


def _holders(harness: Harness) -> set[str]:
    path = harness.data_dir / DATABASE_FILE
    with contextlib.closing(sqlite3.connect(path)) as connection:
        return {row[0] for row in connection.execute("SELECT holder FROM draws")}


def test_holder_ids_are_keyed_with_the_directorys_secret(
    harness: Harness, cancer_pool: Dataset
) -> None:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", cancer_pool, range(100)))
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=3, labeler="vendor"),
            who="labeler",
        ).assignments
    key = bytes.fromhex((harness.data_dir / "leadline.key").read_text().strip())
    token = TOKENS["labeler"].encode()
    # Before: the unsalted 16-hex-digit SHA-256 prefix of the token.
    unkeyed = hashlib.sha256(token).hexdigest()[:16]
    assert _holders(harness) == {hmac.new(key, token, hashlib.sha256).hexdigest()[:32]}
    assert unkeyed not in _holders(harness)

    # A data directory written by an older server (unkeyed ids): converted at start-up for
    # the tokens in the file, so the labeler can still submit what it holds.
    harness.stop()
    with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
        connection.execute("UPDATE draws SET holder = ?", (unkeyed,))
        connection.commit()
    harness.start()
    assert _holders(harness) == {hmac.new(key, token, hashlib.sha256).hexdigest()[:32]}
    with harness.stubs("labeler") as stubs:
        reply = stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor",
                labels=[
                    pb.LabelSubmission(assignment_id=a.assignment_id, class_label=1) for a in held
                ],
            ),
        )
    assert (reply.accepted, reply.rejected) == (3, 0)


def _openssl(folder: Path) -> Callable[..., None]:
    if shutil.which("openssl") is None:
        pytest.skip("the TLS test makes its certificates with the openssl command")

    def run(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=folder, check=True, capture_output=True, timeout=60)

    return run


def test_a_key_that_does_not_match_the_certificate_is_reported_as_such(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    openssl = _openssl(tmp_path)
    for name in ("one", "two"):
        openssl(
            "req",
            "-x509",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:prime256v1",
            "-nodes",
            "-keyout",
            f"{name}.key",
            "-out",
            f"{name}.pem",
            "-days",
            "1",
            "-subj",
            "/CN=localhost",
        )
    (tmp_path / "not-pem.key").write_text("not a key\n")
    tokens = write_tokens(tmp_path / "tokens.toml")
    base = ["--data-dir", str(tmp_path / "d"), "--listen", "127.0.0.1:0", "--tokens", str(tokens)]
    tls = ["--tls-cert", str(tmp_path / "one.pem"), "--tls-key", str(tmp_path / "two.key")]
    assert main(base + tls) == 3
    error = capsys.readouterr().err
    # Before: "listen = '127.0.0.1:0': cannot bind (...)".
    assert "the key does not belong to the certificate" in error
    assert "cannot bind" not in error
    tls[-1] = str(tmp_path / "not-pem.key")
    assert main(base + tls) == 3
    assert "not a usable PEM certificate chain and private key" in capsys.readouterr().err
    tls[-1] = str(tmp_path / "one.key")
    config = ServerConfig(
        data_dir=tmp_path / "d",
        listen="127.0.0.1:0",
        tokens=tokens,
        tls_cert=tmp_path / "one.pem",
        tls_key=tmp_path / "one.key",
    )
    start_server(config).stop()  # the matching pair starts
