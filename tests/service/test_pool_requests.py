"""CreatePool and DeletePool with a request_id: a retry gets the first answer, also after
a restart; the ids are remembered at server level (they outlive the pool they name)."""

from __future__ import annotations

import contextlib
import sqlite3
import threading

import grpc
import pytest

from leadline.service.store import DATABASE_FILE
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, Stubs, classification_pool, item_batch


def _create(stubs: Stubs, pool_id: str, data: Dataset, request_id: str) -> pb.Pool:
    request = classification_pool(pool_id, data)
    request.request_id = request_id
    return stubs.call(stubs.pools.CreatePool, request)


def _delete(stubs: Stubs, pool_id: str, request_id: str = "") -> None:
    stubs.call(
        stubs.pools.DeletePool, pb.DeletePoolRequest(name=f"pools/{pool_id}", request_id=request_id)
    )


def _code(call: object) -> grpc.StatusCode:
    with pytest.raises(grpc.RpcError) as caught:
        call()  # type: ignore[operator]
    return caught.value.code()


def test_retried_create_and_delete_get_the_first_answer_across_a_restart(
    harness: Harness, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    with harness.stubs() as stubs:
        created = _create(stubs, "tumours", data, "create-1")
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(30)))
        again = _create(stubs, "tumours", data, "create-1")
        # The pool this request created, as it is now.
        assert (again.name, again.create_time_ms, again.item_count) == (
            created.name,
            created.create_time_ms,
            30,
        )
        # Without the id (or with another one) the pool is still taken.
        assert _code(lambda: _create(stubs, "tumours", data, "")) == grpc.StatusCode.ALREADY_EXISTS
        assert (
            _code(lambda: _create(stubs, "tumours", data, "create-2"))
            == grpc.StatusCode.ALREADY_EXISTS
        )
        # One id, one pool.
        assert (
            _code(lambda: _create(stubs, "other", data, "create-1"))
            == grpc.StatusCode.INVALID_ARGUMENT
        )
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _create(stubs, "tumours", data, "create-1").item_count == 30
        _delete(stubs, "tumours", "delete-1")
        _delete(stubs, "tumours", "delete-1")
        assert _code(lambda: _delete(stubs, "tumours", "delete-2")) == grpc.StatusCode.NOT_FOUND
        assert _code(lambda: _delete(stubs, "tumours")) == grpc.StatusCode.NOT_FOUND
        # The first reply once the pool is gone; nothing is created again.
        first = _create(stubs, "tumours", data, "create-1")
        assert first.create_time_ms == created.create_time_ms
        assert first.item_count == 0
        assert (
            _code(lambda: stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/tumours")))
            == grpc.StatusCode.NOT_FOUND
        )
        # A new pool takes the name; the old delete, retried, leaves it alone.
        renewed = _create(stubs, "tumours", data, "create-3")
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        _delete(stubs, "tumours", "delete-1")
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name="pools/tumours"))
        assert pool.create_time_ms == renewed.create_time_ms
        assert (
            _code(lambda: _delete(stubs, "spare", "delete-1")) == grpc.StatusCode.INVALID_ARGUMENT
        )
    # Remembered outside the pools' own rows: the deleted pool left them behind.
    with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
        rows = connection.execute(
            "SELECT method, request_id, pool_id FROM server_requests ORDER BY method, request_id"
        ).fetchall()
        pool_rows = connection.execute("SELECT COUNT(*) FROM requests").fetchone()[0]
    assert rows == [
        ("create_pool", "create-1", "tumours"),
        ("create_pool", "create-3", "tumours"),
        ("delete_pool", "delete-1", "tumours"),
    ]
    assert pool_rows == 0


def test_concurrent_creates_with_one_request_id_make_one_pool(
    harness: Harness, cancer_pool: Dataset
) -> None:
    replies: list[object] = []
    with harness.stubs() as stubs:

        def create() -> None:
            try:
                replies.append(_create(stubs, "tumours", cancer_pool, "same-id"))
            except grpc.RpcError as error:
                replies.append(error)

        threads = [threading.Thread(target=create) for _ in range(6)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(30)
    assert len(replies) == 6
    assert all(isinstance(reply, pb.Pool) for reply in replies), replies
    assert len({reply.create_time_ms for reply in replies}) == 1  # type: ignore[union-attr]


def test_request_id_is_validated(harness: Harness, cancer_pool: Dataset) -> None:
    with harness.stubs() as stubs:
        with pytest.raises(grpc.RpcError) as caught:
            _create(stubs, "tumours", cancer_pool, "x" * 129)
        assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert "request_id" in caught.value.details()
        with pytest.raises(grpc.RpcError) as caught:
            _delete(stubs, "tumours", "x" * 129)
        assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT
        assert "request_id" in caught.value.details()


def test_create_that_cannot_be_saved_is_not_remembered(
    harness: Harness, cancer_pool: Dataset
) -> None:
    """A real store failure (a trigger refuses the pool row): UNAVAILABLE, no pool, and the
    same request id creates the pool once the cause is gone."""
    with harness.stubs() as stubs:
        with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
            connection.execute(
                "CREATE TRIGGER no_pools BEFORE INSERT ON pools"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
            connection.commit()
        with pytest.raises(grpc.RpcError) as caught:
            _create(stubs, "tumours", cancer_pool, "create-1")
        assert caught.value.code() == grpc.StatusCode.UNAVAILABLE
        assert "not saved" in caught.value.details()
        assert list(stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest()).pools) == []
        with contextlib.closing(sqlite3.connect(harness.data_dir / DATABASE_FILE)) as connection:
            connection.execute("DROP TRIGGER no_pools")
            connection.commit()
        created = _create(stubs, "tumours", cancer_pool, "create-1")
        assert created.name == "pools/tumours"
        listed = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
        assert [p.name for p in listed.pools] == ["pools/tumours"]
