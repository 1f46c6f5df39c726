"""The client rides out a server restart, and a retried write is never applied twice.

A real server child is killed (SIGKILL: no shutdown work, replies in flight are lost) or
stopped (SIGTERM) and started again on the same port and data directory.
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from leadline.client import AlreadyExists, Client, IngestResult, LocalServer, NotFound

from .conftest import Digits, digits_pool


@pytest.fixture
def restartable(tmp_path: Path) -> Iterator[LocalServer]:
    local = LocalServer(tmp_path)
    local.start()
    try:
        yield local
    finally:
        local.stop()


@pytest.fixture(scope="module")
def digits() -> Digits:
    return digits_pool("restart")


def _create(client: Client, data: Digits) -> None:
    client.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )


def test_stream_survives_a_crash_mid_run_without_duplicates(
    restartable: LocalServer, digits: Digits
) -> None:
    client = Client(restartable.target, timeout=60)
    _create(client, digits)
    results: list[IngestResult] = []
    failures: list[BaseException] = []
    rows = 25
    batches = [slice(start, start + rows) for start in range(0, len(digits.item_ids), rows)]

    def monitoring_job() -> None:
        try:
            for part in batches:
                results.append(
                    client.ingest(
                        digits.pool,
                        digits.item_ids[part],
                        digits.features[part],
                        digits.probabilities[part],
                    )
                )
        except BaseException as error:  # reported by the main thread
            failures.append(error)

    job = threading.Thread(target=monitoring_job)
    job.start()
    while len(results) < 8 and job.is_alive():
        time.sleep(0.005)
    done_before_crash = len(results)
    restartable.kill()
    restartable.start()  # same port, same data directory
    job.join(timeout=120)
    assert not failures, failures
    assert done_before_crash < len(batches), "the crash came after the last batch"
    # Every batch acknowledged exactly once: a batch applied before the crash whose reply
    # was lost is answered from its first result (accepted, not duplicate) on retry.
    assert len(results) == len(batches)
    assert sum(r.accepted for r in results) == len(digits.item_ids)
    assert sum(r.duplicates for r in results) == 0
    assert client.get_pool(digits.pool).item_count == len(digits.item_ids)
    client.close()


def test_replayed_writes_are_answered_from_their_first_result_after_a_restart(
    restartable: LocalServer, digits: Digits
) -> None:
    client = Client(restartable.target, timeout=60)
    _create(client, digits)
    ingest_id, acquire_id, submit_id = (str(uuid.uuid4()) for _ in range(3))
    first = client.ingest(
        digits.pool, digits.item_ids, digits.features, digits.probabilities, request_id=ingest_id
    )
    assignments = client.acquire(digits.pool, 10, labeler="vendor", request_id=acquire_id)
    index = {item_id: i for i, item_id in enumerate(digits.item_ids)}
    answers = {a.assignment_id: int(digits.labels[index[a.item_id]]) for a in assignments}
    submitted = client.submit_labels(digits.pool, answers, labeler="vendor", request_id=submit_id)
    before = client.get_pool(digits.pool)

    restartable.stop()
    restartable.start()

    # The same calls again, as a retry after a lost reply would send them.
    again = client.ingest(
        digits.pool, digits.item_ids, digits.features, digits.probabilities, request_id=ingest_id
    )
    assert (again.accepted, again.duplicates) == (first.accepted, 0) == (len(digits.item_ids), 0)
    replayed = client.acquire(digits.pool, 10, labeler="vendor", request_id=acquire_id)
    assert [a.assignment_id for a in replayed] == [a.assignment_id for a in assignments]
    resubmitted = client.submit_labels(digits.pool, answers, labeler="vendor", request_id=submit_id)
    assert resubmitted.accepted == submitted.accepted == 10
    after = client.get_pool(digits.pool)
    assert (
        (after.item_count, after.draw_count, after.labeled_count)
        == (
            before.item_count,
            before.draw_count,
            before.labeled_count,
        )
        == (len(digits.item_ids), 10, 10)
    )
    # A fresh request id is a new write: the same items now count as duplicates.
    fresh = client.ingest(digits.pool, digits.item_ids, digits.features, digits.probabilities)
    assert (fresh.accepted, fresh.duplicates) == (0, len(digits.item_ids))
    client.close()


def test_a_call_made_while_the_server_is_down_completes_once_it_is_back(
    restartable: LocalServer, digits: Digits
) -> None:
    client = Client(restartable.target, timeout=60)
    _create(client, digits)
    restartable.stop()
    outcome: list[object] = []
    caller = threading.Thread(
        target=lambda: outcome.append(
            client.ingest(digits.pool, digits.item_ids, digits.features, digits.probabilities)
        )
    )
    caller.start()
    time.sleep(1.0)
    assert caller.is_alive(), "the call should wait for the server, not fail"
    restartable.start()
    caller.join(timeout=60)
    (result,) = outcome
    assert isinstance(result, IngestResult)
    assert (result.accepted, result.duplicates) == (len(digits.item_ids), 0)
    client.close()


def test_create_and_delete_repeat_by_request_id_across_a_restart(
    restartable: LocalServer,
) -> None:
    """What a client retry after a lost reply sends: the same request id again."""
    client = Client(restartable.target, timeout=60)
    settings = {"task": "classification", "num_classes": 2, "feature_dim": 3, "loss": "zero-one"}
    created = client.create_pool("again", request_id="create-again", **settings)  # type: ignore[arg-type]
    # A call of its own gets a fresh id: the pool is taken.
    with pytest.raises(AlreadyExists):
        client.create_pool("again", **settings)  # type: ignore[arg-type]
    restartable.kill()
    restartable.start()
    repeated = client.create_pool("again", request_id="create-again", **settings)  # type: ignore[arg-type]
    assert repeated.create_time_ms == created.create_time_ms
    client.delete_pool("again", request_id="delete-again")
    restartable.stop()
    restartable.start()
    client.delete_pool("again", request_id="delete-again")
    with pytest.raises(NotFound):
        client.delete_pool("again")
    client.delete_pool("again", missing_ok=True)
    client.create_pool("fresh", **settings)  # type: ignore[arg-type]
    # The data directory's database file (docs/operations.md): the server remembers the
    # explicit ids, and the uuid4 the client chose for the call without one.
    with contextlib.closing(sqlite3.connect(restartable.data_dir / "leadline.db")) as connection:
        rows = connection.execute(
            "SELECT pool_id, request_id FROM server_requests ORDER BY time_ms"
        ).fetchall()
    assert rows[:2] == [("again", "create-again"), ("again", "delete-again")]
    assert [pool for pool, _ in rows[2:]] == ["fresh"]
    assert uuid.UUID(rows[2][1]).version == 4
    client.close()
