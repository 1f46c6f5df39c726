"""A request id names one request of one token: a retry gets the first answer, a reuse with
other content is refused, another token's id is its own, and ids expire after the retention.
"""

from __future__ import annotations

import contextlib
import sqlite3
import time
from collections.abc import Callable

import grpc
import pytest

from leadline.service.store import DATABASE_FILE
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, classification_pool, item_batch

_POOL = "pools/tumours"
_REUSED = "was used for a different request"


def _refused(call: Callable[[], object]) -> str:
    with pytest.raises(grpc.RpcError) as caught:
        call()
    assert caught.value.code() == grpc.StatusCode.INVALID_ARGUMENT, caught.value.details()
    return str(caught.value.details())


def _stored(harness: Harness, sql: str) -> int:
    path = harness.data_dir / DATABASE_FILE
    with contextlib.closing(sqlite3.connect(path)) as connection:
        return int(connection.execute(sql).fetchone()[0])


def test_an_ingest_id_reused_for_other_rows_is_refused_not_answered(
    harness: Harness, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        first = stubs.call(
            stubs.ingest.IngestItems, item_batch("tumours", data, range(10), request_id="hour-7")
        )
        assert first.accepted == 10
        # The same id with 25 new rows: before, the reply was the first one (accepted=10)
        # and the 25 rows were silently dropped.
        reused = item_batch("tumours", data, range(10, 35), request_id="hour-7")
        message = _refused(lambda: stubs.call(stubs.ingest.IngestItems, reused))
        assert "request_id = 'hour-7'" in message
        assert _REUSED in message
        # The identical request again (a retry) is still answered from the first result.
        again = stubs.call(
            stubs.ingest.IngestItems, item_batch("tumours", data, range(10), request_id="hour-7")
        )
        assert (again.accepted, again.duplicates) == (10, 0)
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert pool.item_count == 10
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        # Also after a restart, when the first answer comes from the database.
        _refused(lambda: stubs.call(stubs.ingest.IngestItems, reused))
        fresh = item_batch("tumours", data, range(10, 35), request_id="hour-8")
        assert stubs.call(stubs.ingest.IngestItems, fresh).accepted == 25


def test_a_labelers_request_id_is_its_own(harness: Harness, cancer_pool: Dataset) -> None:
    """Two vendors (two tokens) happen to send the same request id: each gets its own
    assignments, never the other's."""
    data = cancer_pool
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(len(data.ids))))
        request = pb.AcquireItemsRequest(
            pool=_POOL, count=5, labeler="vendor", request_id="batch-1"
        )
        mine = stubs.call(stubs.labeling.AcquireItems, request, who="labeler")
        theirs = stubs.call(stubs.labeling.AcquireItems, request, who="labeler2")
        replay = stubs.call(stubs.labeling.AcquireItems, request, who="labeler")
    ids = [a.assignment_id for a in mine.assignments]
    assert len(ids) == 5
    assert [a.assignment_id for a in replay.assignments] == ids
    assert not set(ids) & {a.assignment_id for a in theirs.assignments}
    assert len(theirs.assignments) == 5


def test_submit_and_release_ids_are_checked_against_their_content(
    harness: Harness, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    index = {item_id: i for i, item_id in enumerate(data.ids)}
    with harness.stubs("labeler") as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data), who="admin")
        stubs.call(
            stubs.ingest.IngestItems,
            item_batch("tumours", data, range(len(data.ids))),
            who="ingest",
        )
        held = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=4, labeler="vendor"),
        ).assignments

        def submit(assignments: list[pb.Assignment]) -> pb.SubmitLabelsResponse:
            labels = [
                pb.LabelSubmission(
                    assignment_id=a.assignment_id, class_label=int(data.labels[index[a.item_id]])
                )
                for a in assignments
            ]
            request = pb.SubmitLabelsRequest(
                pool=_POOL, labeler="vendor", labels=labels, request_id="labels-1"
            )
            return stubs.call(stubs.labeling.SubmitLabels, request)

        assert submit(held[:2]).accepted == 2
        _refused(lambda: submit(held[2:]))
        release = pb.ReleaseItemsRequest(
            pool=_POOL, labeler="vendor", assignment_ids=[held[2].assignment_id], request_id="r-1"
        )
        assert stubs.call(stubs.labeling.ReleaseItems, release).released == 1
        release.assignment_ids[:] = [held[3].assignment_id]
        _refused(lambda: stubs.call(stubs.labeling.ReleaseItems, release))
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.labeled_count, pool.pending_count) == (2, 2)


def test_a_create_pool_id_reused_with_other_settings_is_refused(
    harness: Harness, cancer_pool: Dataset
) -> None:
    with harness.stubs("admin") as stubs:
        request = classification_pool("tumours", cancer_pool)
        request.request_id = "create-1"
        stubs.call(stubs.pools.CreatePool, request)
        request.pool.description = "something else"
        message = _refused(lambda: stubs.call(stubs.pools.CreatePool, request))
        assert _REUSED in message
        # Another admin token's id of the same name is a request of its own.
        other = classification_pool("second", cancer_pool)
        other.request_id = "create-1"
        assert stubs.call(stubs.pools.CreatePool, other, who="ops").name == "pools/second"


def test_request_ids_are_forgotten_after_the_retention(
    harness_factory: Callable[..., Harness], cancer_pool: Dataset
) -> None:
    # 0.0005 hours = 1.8 s; the refit worker prunes every quarter of it.
    harness = harness_factory(request_retention_hours=0.0005)
    data = cancer_pool
    with harness.stubs() as stubs:
        created = classification_pool("tumours", data)
        created.request_id = "create-1"
        stubs.call(stubs.pools.CreatePool, created)
        stubs.call(
            stubs.ingest.IngestItems, item_batch("tumours", data, range(10), request_id="hour-7")
        )
        assert _stored(harness, "SELECT COUNT(*) FROM requests") == 1
        assert _stored(harness, "SELECT COUNT(*) FROM server_requests") == 1
        deadline = time.monotonic() + 30
        while _stored(harness, "SELECT COUNT(*) FROM requests") > 0:
            assert time.monotonic() < deadline, "remembered ids were never pruned"
            time.sleep(0.2)
        assert _stored(harness, "SELECT COUNT(*) FROM server_requests") == 0
        # Forgotten: the id may now name a new request.
        later = stubs.call(
            stubs.ingest.IngestItems,
            item_batch("tumours", data, range(10, 35), request_id="hour-7"),
        )
        assert later.accepted == 25
