"""Start-up: the port listens before the pools load; health says NOT_SERVING and leadline
calls get UNAVAILABLE until every pool is loaded, then SERVING."""

from __future__ import annotations

from collections.abc import Callable

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc

from leadline.service.api import Readiness
from leadline.service.config import ServerConfig
from leadline.service.server import start_server
from leadline.service.store import DataDirectoryError
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    metadata,
)

_SERVICES = ["", "leadline.v1.IngestService", "leadline.v1.EstimateService"]
_Status = health_pb2.HealthCheckResponse.ServingStatus


def _health(channel: grpc.Channel) -> list[_Status]:
    stub = health_pb2_grpc.HealthStub(channel)
    return [
        stub.Check(health_pb2.HealthCheckRequest(service=name), timeout=10).status
        for name in _SERVICES
    ]


def _config(harness: Harness) -> ServerConfig:
    return ServerConfig(data_dir=harness.data_dir, listen="127.0.0.1:0", tokens=harness.tokens)


def test_health_is_not_serving_and_calls_unavailable_until_the_pools_are_loaded(
    harness_factory: Callable[..., Harness], cancer_pool: Dataset
) -> None:
    harness = harness_factory()
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", cancer_pool, range(300)))
    harness.stop()
    seen: dict[str, object] = {}

    def while_loading(address: str) -> None:
        # Called by start_server once the port listens, before any pool is loaded.
        with grpc.insecure_channel(address) as channel:
            seen["health"] = _health(channel)
            pb_stubs = Stubs(channel, "ops")
            with pytest.raises(grpc.RpcError) as refused:
                pb_stubs.call(pb_stubs.pools.GetPool, pb.GetPoolRequest(name="pools/tumours"))
            seen["code"] = refused.value.code()
            seen["details"] = refused.value.details()
            # A caller without a token still hears UNAUTHENTICATED first.
            with pytest.raises(grpc.RpcError) as anonymous:
                pb_stubs.pools.GetPool(pb.GetPoolRequest(name="pools/tumours"), timeout=10)
            seen["anonymous"] = anonymous.value.code()

    harness.server = start_server(_config(harness), on_listening=while_loading)
    not_serving = health_pb2.HealthCheckResponse.NOT_SERVING
    assert seen["health"] == [not_serving] * len(_SERVICES)
    assert seen["code"] == grpc.StatusCode.UNAVAILABLE
    assert seen["details"] == (
        "the server is starting: it is loading its pools from the database. Retry "
        "shortly; the health service (grpc.health.v1.Health) reports SERVING once every "
        "pool is loaded."
    )
    assert seen["anonymous"] == grpc.StatusCode.UNAUTHENTICATED
    with harness.stubs() as stubs:
        assert _health(stubs.channel) == [health_pb2.HealthCheckResponse.SERVING] * len(_SERVICES)
        pool = stubs.pools.GetPool(
            pb.GetPoolRequest(name="pools/tumours"), metadata=metadata("ops"), timeout=10
        )
        assert pool.item_count == 300


def test_a_pool_that_does_not_load_stops_the_listening_server(
    harness_factory: Callable[..., Harness], cancer_pool: Dataset
) -> None:
    """Loading fails after the port listened: start_server raises and the port closes."""
    import contextlib
    import sqlite3

    from leadline.service.store import DATABASE_FILE

    harness = harness_factory()
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", cancer_pool, range(50)))
    harness.stop()
    with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
        connection.execute("UPDATE item_chunks SET start_row = 7")
        connection.commit()
    addresses: list[str] = []
    with pytest.raises(DataDirectoryError, match="item rows are not contiguous"):
        start_server(_config(harness), on_listening=addresses.append)
    assert len(addresses) == 1
    with grpc.insecure_channel(addresses[0]) as channel:
        with pytest.raises(grpc.RpcError) as gone:
            health_pb2_grpc.HealthStub(channel).Check(health_pb2.HealthCheckRequest(), timeout=2)
        assert gone.value.code() == grpc.StatusCode.UNAVAILABLE
    # The data directory was released: a fixed server starts on it again.
    with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
        connection.execute("UPDATE item_chunks SET start_row = 0")
        connection.commit()
    harness.start()
    with harness.stubs() as stubs:
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/tumours"))
        assert pool.item_count == 50


def test_the_refusal_says_how_many_pools_are_loaded() -> None:
    readiness = Readiness()
    readiness.progress(2, 5)
    assert "loading its pools from the database (2 of 5 loaded). Retry" in readiness.refusal()
    assert not readiness.ready
    readiness.set_ready()
    assert readiness.ready
