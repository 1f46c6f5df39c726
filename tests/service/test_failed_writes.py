"""A write whose commit fails leaves nothing behind: not on disk, not in the server's memory.

Failures are real: a trigger created in the pool's SQLite file from the test makes the
server's own INSERT or UPDATE abort (no mocks). After a failure the call ends UNAVAILABLE
("not saved"), the pool is reloaded from the database, later writes of the pool that were
queued behind the failed one fail too, and a restart shows the same state.
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator
from typing import Any

import grpc
import pytest

from leadline.service.store import DATABASE_FILE
from leadline.service.store import records as store_records
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, Stubs, classification_pool, item_batch

_POOL = "pools/tumours"


@contextlib.contextmanager
def _sql(harness: Harness) -> Iterator[sqlite3.Connection]:
    """A connection of our own to the server's database file (autocommit)."""
    connection = sqlite3.connect(
        harness.data_dir / DATABASE_FILE, isolation_level=None, timeout=30.0
    )
    try:
        yield connection
    finally:
        connection.close()


def _stored_items(harness: Harness, pool_id: str) -> int:
    with _sql(harness) as connection:
        return store_records.count_items(connection, pool_id)


def _snapshot(stubs: Stubs) -> tuple[bytes, bytes, list[bytes]]:
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    estimate = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
    draws = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL))
    return (
        pool.SerializeToString(deterministic=True),
        estimate.SerializeToString(deterministic=True),
        [d.SerializeToString(deterministic=True) for d in draws.draws],
    )


def _expect_not_saved(call: Callable[[], Any]) -> grpc.RpcError:
    with pytest.raises(grpc.RpcError) as caught:
        call()
    assert caught.value.code() == grpc.StatusCode.UNAVAILABLE
    assert "not saved" in caught.value.details()
    assert "same request_id" in caught.value.details()
    return caught.value


def test_failed_ingest_leaves_no_trace_and_the_pool_keeps_serving(
    harness: Harness, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(200)))
        before = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER poison BEFORE INSERT ON item_chunks"
                " WHEN instr(CAST(NEW.item_ids AS TEXT), 'poison') > 0"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
        bad = item_batch("tumours", data, range(200, 260), request_id="batch-2")
        bad.item_ids[30] = "poison"
        error = _expect_not_saved(lambda: stubs.call(stubs.ingest.IngestItems, bad))
        assert "injected" in error.details()

        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert pool.item_count == 200 == _stored_items(harness, "tumours")
        after = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
        assert after.SerializeToString(deterministic=True) == before.SerializeToString(
            deterministic=True
        )
        # The same request id is not remembered as done: a retry runs (and fails) again.
        _expect_not_saved(lambda: stubs.call(stubs.ingest.IngestItems, bad))
        # Items of the failed batch were not kept in memory: sending them again adds them.
        good = item_batch("tumours", data, range(200, 260))
        summary = stubs.call(stubs.ingest.IngestItems, good)
        assert (summary.accepted, summary.duplicates, summary.item_count) == (60, 0, 260)
        # Once the cause is gone, the failed request with its request id goes through.
        with _sql(harness) as connection:
            connection.execute("DROP TRIGGER poison")
        summary = stubs.call(stubs.ingest.IngestItems, bad)
        assert (summary.accepted, summary.duplicates, summary.item_count) == (1, 59, 261)
        assert _stored_items(harness, "tumours") == 261
        seen = _snapshot(stubs)
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _snapshot(stubs) == seen


def test_writes_queued_behind_a_failed_one_are_not_acknowledged(
    harness: Harness, cancer_pool: Dataset
) -> None:
    """Hold the database's write lock from outside so that four calls queue up: a write of
    another pool (taken by the writer first), the poisoned batch, a good batch of the same
    pool behind it, a write of the other pool. Only the other pool's writes are kept."""
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.pools.CreatePool, classification_pool("spare", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(100)))
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER poison BEFORE INSERT ON item_chunks"
                " WHEN instr(CAST(NEW.item_ids AS TEXT), 'poison') > 0"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
        poisoned = item_batch("tumours", data, range(100, 150))
        poisoned.item_ids[0] = "poison"
        calls: list[tuple[str, pb.ItemBatch, str, int]] = [
            ("spare-1", item_batch("spare", data, range(40)), "pools/spare", 40),
            ("poisoned", poisoned, _POOL, 150),
            ("behind", item_batch("tumours", data, range(150, 190)), _POOL, 190),
            ("spare-2", item_batch("spare", data, range(40, 70)), "pools/spare", 70),
        ]
        outcomes: dict[str, Any] = {}

        def send(name: str, batch: pb.ItemBatch) -> None:
            try:
                outcomes[name] = stubs.call(stubs.ingest.IngestItems, batch)
            except grpc.RpcError as error:
                outcomes[name] = error

        threads = []
        with _sql(harness) as lock:
            lock.execute("BEGIN IMMEDIATE")
            for name, batch, pool, count in calls:
                thread = threading.Thread(target=send, args=(name, batch))
                thread.start()
                threads.append(thread)
                # The call has changed memory and queued its write once the count shows it.
                deadline = time.monotonic() + 20
                while (
                    stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=pool)).item_count
                    != count
                ):
                    assert time.monotonic() < deadline, f"{name} was not queued"
                    time.sleep(0.02)
            lock.execute("ROLLBACK")
        for thread in threads:
            thread.join(30)
        for name in ("poisoned", "behind"):
            error = outcomes[name]
            assert isinstance(error, grpc.RpcError), name
            assert error.code() == grpc.StatusCode.UNAVAILABLE
            assert "not saved" in error.details()
        assert outcomes["spare-1"].item_count == 40
        assert outcomes["spare-2"].item_count == 70
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert pool.item_count == 100 == _stored_items(harness, "tumours")
        assert _stored_items(harness, "spare") == 70
        # The batch that was queued behind goes through when sent again.
        summary = stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(150, 190)))
        assert (summary.accepted, summary.item_count) == (40, 140)
        seen = _snapshot(stubs)
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _snapshot(stubs) == seen


def _acquire(stubs: Stubs, request_id: str) -> pb.AcquireItemsResponse:
    return stubs.call(
        stubs.labeling.AcquireItems,
        pb.AcquireItemsRequest(pool=_POOL, count=5, labeler="vendor-a", request_id=request_id),
    )


def test_failed_draw_and_label_writes_are_undone(
    harness_factory: Callable[..., Harness], cancer_pool: Dataset
) -> None:
    data = cancer_pool
    # Two servers with the same draw seed: the twin never fails, so it shows which draws
    # an untouched pool makes (draws derive from the pool's seed and its draw count).
    twin = harness_factory(draw_seed=4242)
    harness = harness_factory(draw_seed=4242)
    with twin.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(len(data.ids))))
        expected = [a.item_id for a in _acquire(stubs, "acq-1").assignments]
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(len(data.ids))))
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER no_draws BEFORE INSERT ON draws"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
        _expect_not_saved(lambda: _acquire(stubs, "acq-1"))
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.draw_count, pool.pending_count) == (0, 0)
        with _sql(harness) as connection:
            connection.execute("DROP TRIGGER no_draws")
        assignments = _acquire(stubs, "acq-1").assignments
        assert [a.item_id for a in assignments] == expected

        # Labels: the UPDATE that records a label (status 2 = LABELED) aborts.
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER no_labels BEFORE UPDATE ON draws WHEN NEW.status = 2"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
        index = {item_id: i for i, item_id in enumerate(data.ids)}
        submit = pb.SubmitLabelsRequest(
            pool=_POOL,
            labeler="vendor-a",
            request_id="labels-1",
            labels=[
                pb.LabelSubmission(
                    assignment_id=a.assignment_id, class_label=int(data.labels[index[a.item_id]])
                )
                for a in assignments
            ],
        )
        _expect_not_saved(lambda: stubs.call(stubs.labeling.SubmitLabels, submit))
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.labeled_count, pool.pending_count, pool.draw_count) == (0, 5, 5)
        with _sql(harness) as connection:
            connection.execute("DROP TRIGGER no_labels")
        assert stubs.call(stubs.labeling.SubmitLabels, submit).accepted == 5
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.labeled_count, pool.pending_count) == (5, 0)
        seen = _snapshot(stubs)
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _snapshot(stubs) == seen


def test_failed_delete_brings_the_pool_back(harness: Harness, cancer_pool: Dataset) -> None:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", cancer_pool, range(80)))
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER keep_pools BEFORE DELETE ON pools"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
        _expect_not_saved(
            lambda: stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name=_POOL))
        )
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert pool.item_count == 80 == _stored_items(harness, "tumours")
        with _sql(harness) as connection:
            connection.execute("DROP TRIGGER keep_pools")
        stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name=_POOL))
        assert _stored_items(harness, "tumours") == 0
        listed = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
        assert list(listed.pools) == []


def test_pool_refuses_calls_until_a_reload_succeeds(harness: Harness, cancer_pool: Dataset) -> None:
    """Two faults at once: the write fails and so does the reload (a stray segment row
    breaks the segment codes, which load_segments checks). The pool answers UNAVAILABLE
    until the stored state reads back cleanly, then reloads on the next call."""
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(100)))
        with _sql(harness) as connection:
            connection.execute(
                "CREATE TRIGGER poison BEFORE INSERT ON item_chunks"
                " WHEN instr(CAST(NEW.item_ids AS TEXT), 'poison') > 0"
                " BEGIN SELECT RAISE(ABORT, 'injected'); END"
            )
            connection.execute("INSERT INTO segments VALUES ('tumours', 7, 'stray')")
        bad = item_batch("tumours", data, range(100, 120))
        bad.item_ids[0] = "poison"
        _expect_not_saved(lambda: stubs.call(stubs.ingest.IngestItems, bad))
        for call in (
            lambda: stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL)),
            lambda: stubs.call(
                stubs.ingest.IngestItems, item_batch("tumours", data, range(100, 120))
            ),
        ):
            with pytest.raises(grpc.RpcError) as caught:
                call()
            assert caught.value.code() == grpc.StatusCode.UNAVAILABLE
            assert "being reloaded" in caught.value.details()
        assert _stored_items(harness, "tumours") == 100
        with _sql(harness) as connection:
            connection.execute("DELETE FROM segments WHERE code = 7")
            connection.execute("DROP TRIGGER poison")
        assert stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL)).item_count == 100
        summary = stubs.call(stubs.ingest.IngestItems, bad)
        assert (summary.accepted, summary.item_count) == (20, 120)
