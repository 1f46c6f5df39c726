"""The data directory's SQLite database: one writer thread with group commit, per-thread readers.

Writes are functions of a connection, queued to the single writer thread, which runs every
queued write of a group inside one transaction (each in its own savepoint, so one failing
write does not undo the others) and commits once with ``synchronous=FULL``. A write's
future resolves only after that commit: a caller that waits for it before replying never
acknowledges data that is not durable. Writes are applied in the order they were queued.

Lanes: writes that build on each other's (in-memory) assumptions share a *lane* (the engine
uses one per pool). Once a write of a lane fails, by its own error or because the commit of
its group failed, every later write of that lane fails with :class:`EarlierWriteFailed`
without running, until a :meth:`Database.reopen` marker queued after them is reached. So a
write is never committed on top of a failed one it may depend on, in the same group or in
a later one.
"""

from __future__ import annotations

import logging
import queue
import sqlite3
import threading
from collections.abc import Callable, Hashable
from concurrent.futures import Future
from pathlib import Path
from typing import Any, TypeVar

from leadline.service.store.schema import migrate

__all__ = ["Database", "DATABASE_FILE", "EarlierWriteFailed"]

_LOG = logging.getLogger(__name__)

DATABASE_FILE = "leadline.db"
_MAX_GROUP = 512
_STOP = object()

T = TypeVar("T")


class EarlierWriteFailed(RuntimeError):
    """A write was not run: an earlier write of its lane failed and the lane is not reopened."""


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
        self._failed_lanes: set[Hashable] = set()
        self._writer = threading.Thread(target=self._run, name="leadline-writer", daemon=True)
        self._writer.start()

    # -- writes ------------------------------------------------------------------------
    def submit(
        self, write: Callable[[sqlite3.Connection], T], *, lane: Hashable | None = None
    ) -> Future[T]:
        """Queue ``write``; the future resolves after the transaction holding it commits.

        With a ``lane``, the write fails with :class:`EarlierWriteFailed` (without running)
        if an earlier write of the same lane failed and no :meth:`reopen` came in between.
        """
        if self._closed:
            raise RuntimeError("database is closed")
        future: Future[T] = Future()
        self._queue.put((write, future, lane))
        return future

    def reopen(self, lane: Hashable) -> Future[None]:
        """Queue the end of ``lane``'s failed state; writes queued after it run again.

        The future resolves once every write queued before the marker has been handled
        (committed or failed), whatever the outcome of the marker's own group.
        """
        if self._closed:
            raise RuntimeError("database is closed")
        future: Future[None] = Future()
        self._queue.put((None, future, lane))
        return future

    def write(self, write: Callable[[sqlite3.Connection], T], *, lane: Hashable | None = None) -> T:
        """Queue ``write`` and wait until it is committed; return its result."""
        return self.submit(write, lane=lane).result()

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
        # Lanes with a failed write and no reopen marker since; touched by this thread only.
        failed = self._failed_lanes
        results: list[tuple[Future[Any], Any, BaseException | None]] = []
        try:
            connection.execute("BEGIN IMMEDIATE")
            for write, future, lane in group:
                if write is None:  # a reopen marker
                    failed.discard(lane)
                    results.append((future, None, None))
                    continue
                if lane is not None and lane in failed:
                    results.append(
                        (future, None, EarlierWriteFailed("an earlier write of its lane failed"))
                    )
                    continue
                connection.execute("SAVEPOINT one_write")
                try:
                    value = write(connection)
                except BaseException as error:  # noqa: BLE001 - handed to the caller
                    connection.execute("ROLLBACK TO one_write")
                    connection.execute("RELEASE one_write")
                    _LOG.error("a queued write failed and was rolled back: %s", error)
                    if lane is not None:
                        failed.add(lane)
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
            # Replay the group in order: every write of a lane after its last marker failed.
            for write, future, lane in group:
                if write is None:
                    failed.discard(lane)
                    future.set_result(None)
                else:
                    if lane is not None:
                        failed.add(lane)
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
