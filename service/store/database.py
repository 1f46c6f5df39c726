"""The data directory's SQLite database: one writer thread with group commit, per-thread readers.

Writes are functions of a connection, queued to the single writer thread, which runs every
queued write of a group inside one transaction (each in its own savepoint, so one failing
write does not undo the others) and commits once with ``synchronous=FULL``. A write's
future resolves only after that commit: a caller that waits for it before replying never
acknowledges data that is not durable. Writes are applied in the order they were queued.
"""

from __future__ import annotations

import logging
import queue
import sqlite3
import threading
from collections.abc import Callable
from concurrent.futures import Future
from pathlib import Path
from typing import Any, TypeVar

from leadline.service.store.schema import migrate

__all__ = ["Database", "DATABASE_FILE"]

_LOG = logging.getLogger(__name__)

DATABASE_FILE = "leadline.db"
_MAX_GROUP = 512
_STOP = object()

T = TypeVar("T")


def _connect(path: Path) -> sqlite3.Connection:
    connection = sqlite3.connect(path, isolation_level=None, check_same_thread=False, timeout=30.0)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=FULL")
    connection.execute("PRAGMA busy_timeout=30000")
    return connection


class Database:
    """Owns ``DIR/leadline.db``: migrations at open, the writer thread, reader connections."""

    def __init__(self, data_dir: Path) -> None:
        data_dir.mkdir(parents=True, exist_ok=True)
        self.path = data_dir / DATABASE_FILE
        setup = _connect(self.path)
        try:
            migrate(setup)
        finally:
            setup.close()
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._local = threading.local()
        self._readers: list[sqlite3.Connection] = []
        self._readers_lock = threading.Lock()
        self._closed = False
        self.commits = 0
        self._writer = threading.Thread(target=self._run, name="leadline-writer", daemon=True)
        self._writer.start()

    # -- writes ------------------------------------------------------------------------
    def submit(self, write: Callable[[sqlite3.Connection], T]) -> Future[T]:
        """Queue ``write``; the future resolves after the transaction holding it commits."""
        if self._closed:
            raise RuntimeError("database is closed")
        future: Future[T] = Future()
        self._queue.put((write, future))
        return future

    def write(self, write: Callable[[sqlite3.Connection], T]) -> T:
        """Queue ``write`` and wait until it is committed; return its result."""
        return self.submit(write).result()

    def _run(self) -> None:
        connection = _connect(self.path)
        try:
            while True:
                first = self._queue.get()
                if first is _STOP:
                    break
                group = [first]
                stop = False
                while len(group) < _MAX_GROUP:
                    try:
                        item = self._queue.get_nowait()
                    except queue.Empty:
                        break
                    if item is _STOP:
                        stop = True
                        break
                    group.append(item)
                self._commit_group(connection, group)
                if stop:
                    break
            connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        finally:
            connection.close()

    def _commit_group(self, connection: sqlite3.Connection, group: list[Any]) -> None:
        results: list[tuple[Future[Any], Any, BaseException | None]] = []
        try:
            connection.execute("BEGIN IMMEDIATE")
            for write, future in group:
                connection.execute("SAVEPOINT one_write")
                try:
                    value = write(connection)
                except BaseException as error:  # noqa: BLE001 - handed to the caller
                    connection.execute("ROLLBACK TO one_write")
                    connection.execute("RELEASE one_write")
                    results.append((future, None, error))
                else:
                    connection.execute("RELEASE one_write")
                    results.append((future, value, None))
            connection.execute("COMMIT")
            self.commits += 1
        except BaseException as error:  # noqa: BLE001 - the whole group failed
            _LOG.exception("commit of %d writes failed", len(group))
            if connection.in_transaction:
                connection.execute("ROLLBACK")
            for _, future in group:
                future.set_exception(error)
            return
        for future, value, failure in results:
            if failure is None:
                future.set_result(value)
            else:
                future.set_exception(failure)

    # -- reads -------------------------------------------------------------------------
    def reader(self) -> sqlite3.Connection:
        """This thread's read-only connection (created on first use)."""
        connection = getattr(self._local, "connection", None)
        if connection is None:
            connection = _connect(self.path)
            connection.execute("PRAGMA query_only=ON")
            self._local.connection = connection
            with self._readers_lock:
                self._readers.append(connection)
        return connection

    def backup(self, destination: Path) -> None:
        """Consistent online copy of the database into ``destination`` (SQLite backup API)."""
        target = sqlite3.connect(destination)
        try:
            self.reader().backup(target)
        finally:
            target.close()

    def close(self) -> None:
        """Commit what is queued, checkpoint the WAL into the main file and close."""
        if self._closed:
            return
        self._closed = True
        self._queue.put(_STOP)
        self._writer.join()
        with self._readers_lock:
            for connection in self._readers:
                try:
                    connection.close()
                except sqlite3.ProgrammingError:
                    # Made in another thread that is gone; closing is best effort.
                    pass
            self._readers.clear()
