"""The process: `leadline serve` flags, listening line, SIGTERM, auth refusal, TLS, metrics."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc

from leadline.service.config import ServerConfig, load_config
from leadline.service.server import main, start_server
from leadline.v1 import leadline_pb2 as pb
from leadline.v1 import leadline_pb2_grpc as pb_grpc
from tests.service.helpers import TOKENS, Harness, Stubs, metadata, write_tokens


def _serve(args: list[str], env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "leadline.service", "serve", *args],
        stderr=subprocess.PIPE,
        stdout=subprocess.DEVNULL,
        text=True,
        env={**os.environ, **(env or {})},
    )


def _listening_line(process: subprocess.Popen[str]) -> str:
    assert process.stderr is not None
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        line = process.stderr.readline()
        if not line:
            break
        if line.startswith("leadline listening on "):
            return line.strip()
    raise AssertionError(f"no listening line; exit code {process.poll()}")


def test_serve_logs_real_port_and_exits_zero_on_sigterm(tmp_path: Path) -> None:
    tokens = write_tokens(tmp_path / "tokens.toml")
    process = _serve(
        [
            "--data-dir",
            str(tmp_path / "data"),
            "--listen",
            "127.0.0.1:0",
            "--tokens",
            str(tokens),
            "--log-format",
            "json",
        ]
    )
    try:
        line = _listening_line(process)
        host, port = line.removeprefix("leadline listening on ").rsplit(":", 1)
        assert host == "127.0.0.1"
        assert int(port) > 0
        with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
            pools = pb_grpc.PoolServiceStub(channel)
            created = pools.CreatePool(
                pb.CreatePoolRequest(
                    pool_id="proc",
                    pool=pb.Pool(
                        task=pb.TASK_TYPE_REGRESSION,
                        feature_dim=3,
                        loss=pb.LOSS_KIND_ABSOLUTE_ERROR,
                        loss_cap=10.0,
                    ),
                ),
                metadata=metadata("admin"),
                timeout=10,
            )
            assert created.name == "pools/proc"
        process.send_signal(signal.SIGTERM)
        assert process.wait(timeout=30) == 0
        assert process.stderr is not None
        # Structured logs: every other stderr line is one JSON object.
        records = [json.loads(line) for line in process.stderr.read().splitlines() if line]
        assert any(r["message"].startswith("stopped in") for r in records), records
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
        assert process.stderr is not None
        process.stderr.close()
    # Flushed and checkpointed: the WAL was folded into the main file.
    wal = tmp_path / "data" / "leadline.db-wal"
    assert not wal.exists() or wal.stat().st_size == 0


def test_serve_refuses_to_start_without_tokens(tmp_path: Path, capsys) -> None:
    code = main(["--data-dir", str(tmp_path / "data"), "--listen", "127.0.0.1:0"])
    assert code == 3
    assert "--tokens" in capsys.readouterr().err


def test_insecure_no_auth_only_on_loopback(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="insecure_no_auth"):
        start_server(
            ServerConfig(data_dir=tmp_path / "d", listen="0.0.0.0:0", insecure_no_auth=True)
        )
    running = start_server(
        ServerConfig(data_dir=tmp_path / "d", listen="127.0.0.1:0", insecure_no_auth=True)
    )
    try:
        with grpc.insecure_channel(f"127.0.0.1:{running.port}") as channel:
            listed = pb_grpc.PoolServiceStub(channel).ListPools(pb.ListPoolsRequest(), timeout=10)
            assert list(listed.pools) == []
    finally:
        running.stop()


def test_config_precedence_file_then_environment_then_flags(tmp_path: Path) -> None:
    config_file = tmp_path / "leadline.toml"
    config_file.write_text(
        '[server]\ndata_dir = "/var/lib/leadline"\nrefit_every_labels = 25\n'
        'selection_floor = 0.4\nlisten = "127.0.0.1:7000"\n'
    )
    config = load_config(
        config_file=config_file,
        environ={"LEADLINE_SELECTION_FLOOR": "0.5", "LEADLINE_LISTEN": "127.0.0.1:7001"},
        overrides={"listen": "127.0.0.1:7002", "data_dir": None},
    )
    assert config.data_dir == Path("/var/lib/leadline")
    assert config.refit_every_labels == 25
    assert config.selection_floor == 0.5
    assert config.listen == "127.0.0.1:7002"
    config_file.write_text('refit_evry_labels = 3\ndata_dir = "x"\n')
    with pytest.raises(ValueError, match="refit_evry_labels"):
        load_config(config_file=config_file, environ={})
    with pytest.raises(ValueError, match="selection_floor"):
        load_config(environ={"LEADLINE_DATA_DIR": "x", "LEADLINE_SELECTION_FLOOR": "2"})


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ('[tokens]\n"short" = ["admin"]\n', ">= 8 printable"),
        ('[tokens]\n"long-enough-token" = ["root"]\n', "unknown role 'root'"),
        ('[tokens]\n"long-enough-token" = []\n', "non-empty list"),
        ("[other]\n", "[tokens] table"),
    ],
)
def test_malformed_token_file_is_refused(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "tokens.toml"
    path.write_text(text)
    path.chmod(0o600)
    with pytest.raises(ValueError, match=message.replace("[", r"\[").replace("]", r"\]")):
        start_server(ServerConfig(data_dir=tmp_path / "d", listen="127.0.0.1:0", tokens=path))


def test_metrics_and_health(harness_factory) -> None:
    harness: Harness = harness_factory(metrics_listen="127.0.0.1:0")
    assert harness.server is not None
    with harness.stubs("reader") as stubs:
        with pytest.raises(grpc.RpcError):
            stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/nothing"))
        health = health_pb2_grpc.HealthStub(stubs.channel)
        assert (
            health.Check(health_pb2.HealthCheckRequest(), timeout=5).status
            == health_pb2.HealthCheckResponse.SERVING
        )
    url = f"http://127.0.0.1:{harness.server.metrics_port}/metrics"
    with urllib.request.urlopen(url, timeout=10) as response:
        body = response.read().decode()
    assert 'leadline_requests_total{method="GetPool",code="NOT_FOUND"} 1' in body
    assert "leadline_request_seconds_bucket" in body
    assert "# TYPE leadline_pool_items gauge" in body


def test_reflection_is_off_by_default_and_on_with_the_flag(harness_factory) -> None:
    from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc

    def services(harness: Harness) -> list[str] | grpc.StatusCode:
        with harness.stubs() as stubs:
            stub = reflection_pb2_grpc.ServerReflectionStub(stubs.channel)
            request = reflection_pb2.ServerReflectionRequest(list_services="")
            try:
                replies = list(stub.ServerReflectionInfo(iter([request]), timeout=10))
            except grpc.RpcError as error:
                return error.code()
            return [s.name for s in replies[0].list_services_response.service]

    assert services(harness_factory()) == grpc.StatusCode.UNIMPLEMENTED
    listed = services(harness_factory(enable_reflection=True))
    assert isinstance(listed, list)
    assert "leadline.v1.EstimateService" in listed


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def test_mutual_tls(tmp_path: Path) -> None:
    # Self-signed CA, a server certificate for 127.0.0.1 and a client certificate.
    _openssl(
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
        "-days",
        "1",
        "-subj",
        "/CN=test-ca",
        cwd=tmp_path,
    )
    (tmp_path / "san.cnf").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    for name in ("server", "client"):
        _openssl(
            "req",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            f"{name}.key",
            "-out",
            f"{name}.csr",
            "-subj",
            f"/CN={name}",
            cwd=tmp_path,
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
            "1",
            "-extfile",
            "san.cnf",
            cwd=tmp_path,
        )
    running = start_server(
        ServerConfig(
            data_dir=tmp_path / "data",
            listen="127.0.0.1:0",
            tokens=write_tokens(tmp_path / "tokens.toml"),
            tls_cert=tmp_path / "server.pem",
            tls_key=tmp_path / "server.key",
            tls_client_ca=tmp_path / "ca.pem",
        )
    )
    try:
        ca = (tmp_path / "ca.pem").read_bytes()
        good = grpc.ssl_channel_credentials(
            root_certificates=ca,
            private_key=(tmp_path / "client.key").read_bytes(),
            certificate_chain=(tmp_path / "client.pem").read_bytes(),
        )
        with grpc.secure_channel(f"127.0.0.1:{running.port}", good) as channel:
            reply = pb_grpc.PoolServiceStub(channel).ListPools(
                pb.ListPoolsRequest(),
                metadata=(("authorization", f"Bearer {TOKENS['reader']}"),),
                timeout=10,
            )
            assert list(reply.pools) == []
        # Without a client certificate the handshake fails.
        bare = grpc.ssl_channel_credentials(root_certificates=ca)
        with grpc.secure_channel(f"127.0.0.1:{running.port}", bare) as channel:
            with pytest.raises(grpc.RpcError) as caught:
                pb_grpc.PoolServiceStub(channel).ListPools(pb.ListPoolsRequest(), timeout=5)
            assert caught.value.code() == grpc.StatusCode.UNAVAILABLE
    finally:
        running.stop()


def test_health_turns_not_serving_when_shutdown_starts(tmp_path: Path) -> None:
    running = start_server(
        ServerConfig(
            data_dir=tmp_path / "data",
            listen="127.0.0.1:0",
            tokens=write_tokens(tmp_path / "tokens.toml"),
        )
    )
    channel = grpc.insecure_channel(f"127.0.0.1:{running.port}")
    try:
        watch = health_pb2_grpc.HealthStub(channel).Watch(
            health_pb2.HealthCheckRequest(service=""), timeout=20
        )
        assert next(watch).status == health_pb2.HealthCheckResponse.SERVING
        stopper = threading.Thread(target=running.stop, kwargs={"grace": 2.0})
        stopper.start()
        assert next(watch).status == health_pb2.HealthCheckResponse.NOT_SERVING
        stopper.join(30)
        assert not stopper.is_alive()
    finally:
        channel.close()
        running.stop()


def test_acknowledged_writes_survive_a_kill(tmp_path: Path, cancer_pool) -> None:
    """Acknowledged = committed: after SIGKILL (no shutdown at all) every acknowledged item,
    draw and label is back."""
    from tests.service.helpers import classification_pool, item_batch, label_round

    tokens = write_tokens(tmp_path / "tokens.toml")
    args = [
        "--data-dir",
        str(tmp_path / "data"),
        "--listen",
        "127.0.0.1:0",
        "--tokens",
        str(tokens),
    ]
    counts = []
    for attempt in range(2):
        process = _serve(args)
        try:
            port = _listening_line(process).rsplit(":", 1)[1]
            with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
                stubs = Stubs(channel, "ops")
                if attempt == 0:
                    stubs.call(stubs.pools.CreatePool, classification_pool("kill", cancer_pool))
                    stubs.call(
                        stubs.ingest.IngestItems, item_batch("kill", cancer_pool, range(300))
                    )
                    label_round(stubs, "kill", cancer_pool, 7)
                pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/kill"))
                counts.append((pool.item_count, pool.draw_count, pool.labeled_count))
            if attempt == 0:
                process.kill()
                process.wait(timeout=30)
            else:
                process.send_signal(signal.SIGTERM)
                assert process.wait(timeout=30) == 0
        finally:
            if process.poll() is None:
                process.kill()
                process.wait()
            assert process.stderr is not None
            process.stderr.close()
    assert counts == [(300, 7, 7), (300, 7, 7)]


def test_metrics_export_both_bounds_named_by_kind(harness_factory, cancer_pool) -> None:
    from tests.service.helpers import classification_pool, item_batch, label_round

    harness: Harness = harness_factory(metrics_listen="127.0.0.1:0")
    assert harness.server is not None
    with harness.stubs("ops") as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", cancer_pool, range(300)))
        label_round(stubs, "tumours", cancer_pool, 30)
        estimate = stubs.call(
            stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool="pools/tumours")
        )
    url = f"http://127.0.0.1:{harness.server.metrics_port}/metrics"
    with urllib.request.urlopen(url, timeout=10) as response:
        body = response.read().decode()
    values = {
        line.rsplit(" ", 1)[0]: float(line.rsplit(" ", 1)[1])
        for line in body.splitlines()
        if line.startswith("leadline_pool_risk")
    }
    # Each bound says which it is; both kinds are there, equal to GetEstimate's (the pool's
    # default mode and confidence, two-sided).
    assert values['leadline_pool_risk_upper{pool="tumours",bound="fixed-time"}'] == estimate.upper
    assert values['leadline_pool_risk_lower{pool="tumours",bound="fixed-time"}'] == estimate.lower
    assert (
        values['leadline_pool_risk_upper{pool="tumours",bound="anytime"}'] == estimate.anytime_upper
    )
    assert (
        values['leadline_pool_risk_lower{pool="tumours",bound="anytime"}'] == estimate.anytime_lower
    )
    # The method label is the short method name.
    assert 'leadline_requests_total{method="AcquireItems",code="OK"} 1' in body
    assert "leadline.v1." not in body
