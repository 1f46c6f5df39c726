"""The SQLite store: migrations, group commit with per-write isolation, durability."""

from __future__ import annotations

import contextlib
import sqlite3
import threading
from pathlib import Path

import pytest

from leadline.service.store import DATABASE_FILE, SCHEMA_VERSION, Database, EarlierWriteFailed


def test_new_data_dir_gets_current_schema_and_reopens(tmp_path: Path) -> None:
    database = Database(tmp_path)
    database.close()
    database = Database(tmp_path)
    database.close()
    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        (version,) = connection.execute("SELECT version FROM schema_version").fetchone()
        mode = connection.execute("PRAGMA journal_mode").fetchone()[0]
    assert version == SCHEMA_VERSION
    assert mode == "wal"


def test_newer_schema_is_refused(tmp_path: Path) -> None:
    Database(tmp_path).close()
    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        connection.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
        connection.commit()
    with pytest.raises(RuntimeError, match="newer than this server"):
        Database(tmp_path)


def test_failing_write_does_not_undo_its_group(tmp_path: Path) -> None:
    database = Database(tmp_path)
    try:
        database.write(
            lambda c: c.execute("CREATE TABLE notes (id INTEGER PRIMARY KEY, text TEXT)")
        )
        barrier = threading.Event()
        # Hold the writer so the next three writes share one group commit.
        blocker = database.submit(lambda _c: barrier.wait(5))
        good = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (1, 'kept')"))
        bad = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (1, 'duplicate')"))
        also = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (2, 'kept too')"))
        barrier.set()
        blocker.result(10)
        good.result(10)
        also.result(10)
        with pytest.raises(sqlite3.IntegrityError):
            bad.result(10)
        rows = database.reader().execute("SELECT id, text FROM notes ORDER BY id").fetchall()
        assert rows == [(1, "kept"), (2, "kept too")]
    finally:
        database.close()


def test_committed_write_is_visible_to_a_fresh_connection(tmp_path: Path) -> None:
    database = Database(tmp_path)
    database.write(lambda c: c.execute("CREATE TABLE t (x INTEGER)"))
    database.write(lambda c: c.execute("INSERT INTO t VALUES (42)"))
    # Acknowledged = committed: another connection sees it before the server closes.
    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as other:
        assert other.execute("SELECT x FROM t").fetchall() == [(42,)]
    database.close()
    with pytest.raises(RuntimeError, match="closed"):
        database.submit(lambda _c: None)


def test_lane_fails_later_writes_until_reopened(tmp_path: Path) -> None:
    """After a failed write of a lane, later writes of that lane fail unrun (same group and
    later groups) until a reopen marker; other lanes commit as usual."""
    database = Database(tmp_path)
    try:
        database.write(
            lambda c: c.execute("CREATE TABLE notes (id INTEGER PRIMARY KEY, lane TEXT)")
        )
        database.write(lambda c: c.execute("INSERT INTO notes VALUES (1, 'a')"))
        barrier = threading.Event()
        blocker = database.submit(lambda _c: barrier.wait(5))
        bad = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (1, 'a')"), lane="a")
        behind = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (2, 'a')"), lane="a")
        other = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (3, 'b')"), lane="b")
        barrier.set()
        blocker.result(10)
        with pytest.raises(sqlite3.IntegrityError):
            bad.result(10)
        with pytest.raises(EarlierWriteFailed):
            behind.result(10)
        other.result(10)
        # A later group: still refused until the marker.
        with pytest.raises(EarlierWriteFailed):
            database.write(lambda c: c.execute("INSERT INTO notes VALUES (4, 'a')"), lane="a")
        reopened = database.reopen("a")
        after = database.submit(lambda c: c.execute("INSERT INTO notes VALUES (5, 'a')"), lane="a")
        reopened.result(10)
        after.result(10)
        rows = database.reader().execute("SELECT id, lane FROM notes ORDER BY id").fetchall()
        assert rows == [(1, "a"), (3, "b"), (5, "a")]
    finally:
        database.close()


def test_version_one_data_dir_is_upgraded_and_keeps_its_request_ids(tmp_path: Path) -> None:
    """A data dir written before pool-level request ids (schema 1) opens and is upgraded:
    its remembered request ids stay (holder '' and digest '': they match as before)."""
    from leadline.service.store.schema import _MIGRATIONS

    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        connection.execute("PRAGMA journal_mode=WAL")
        for statement in _MIGRATIONS[0]:
            connection.execute(statement)
        connection.execute("CREATE TABLE schema_version (version INTEGER NOT NULL)")
        connection.execute("INSERT INTO schema_version VALUES (1)")
        connection.execute("INSERT INTO requests VALUES ('p', 'ingest', 'id-1', x'7b7d')")
        connection.commit()
    Database(tmp_path).close()
    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        (version,) = connection.execute("SELECT version FROM schema_version").fetchone()
        columns = [row[1] for row in connection.execute("PRAGMA table_info(server_requests)")]
        rows = connection.execute(
            "SELECT pool_id, method, holder, request_id, digest, response FROM requests"
        ).fetchall()
    assert version == SCHEMA_VERSION
    assert columns == ["method", "holder", "request_id", "digest", "pool_id", "response", "time_ms"]
    assert rows == [("p", "ingest", "", "id-1", "", b"{}")]


def test_version_three_data_dir_gains_the_validation_items_table_and_keeps_its_rows(
    tmp_path: Path,
) -> None:
    """A data dir written before validation items (schema 3) opens with its rows intact."""
    from leadline.service.store.schema import _MIGRATIONS

    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        connection.execute("PRAGMA journal_mode=WAL")
        for migration in _MIGRATIONS[:3]:
            for statement in migration:
                connection.execute(statement)
        connection.execute("CREATE TABLE schema_version (version INTEGER NOT NULL)")
        connection.execute("INSERT INTO schema_version VALUES (3)")
        connection.execute(
            "INSERT INTO pools (pool_id, settings, seed, create_time_ms) VALUES ('p', '{}', 1, 2)"
        )
        connection.commit()
    Database(tmp_path).close()
    with contextlib.closing(sqlite3.connect(tmp_path / DATABASE_FILE)) as connection:
        (version,) = connection.execute("SELECT version FROM schema_version").fetchone()
        columns = [row[1] for row in connection.execute("PRAGMA table_info(validation_items)")]
        pools = connection.execute("SELECT pool_id FROM pools").fetchall()
    assert version == SCHEMA_VERSION >= 4
    assert columns == [
        "pool_id",
        "row",
        "item_id",
        "features",
        "outputs",
        "label",
        "segment",
        "ingest_time_ms",
    ]
    assert pools == [("p",)]
