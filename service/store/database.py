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

Failure episodes: a write that fails for a reason of the store itself (disk full, I/O
error, read-only or damaged file; not a write's own constraint) starts an *episode*. Until
a probe write of :data:`PROBE_BYTES` commits again, :meth:`Database.write_refusal` tells
callers not to try (so they neither change memory nor reload it); probes are spaced by a
backoff that doubles from :data:`FIRST_BACKOFF_SECONDS` to :data:`MAX_BACKOFF_SECONDS`.

Opening checks the data directory first (:mod:`leadline.service.store.directory`): the
exclusive lock, a database lost while the directory shows it held one, ``PRAGMA
quick_check``; any of these refuses with :class:`DataDirectoryError`.
"""

from __future__ import annotations

import contextlib
import logging
import queue
import sqlite3
import stat
import threading
import time
from collections.abc import Callable, Hashable
from concurrent.futures import Future
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from leadline.service.store.directory import (
    DATABASE_FILE,
    DataDirectoryError,
    check_for_lost_database,
    create_private_file,
    lock_data_dir,
    make_data_dir,
    read_or_create_key,
    restore_hint,
    write_marker,
)
from leadline.service.store.schema import migrate

__all__ = [
    "DATABASE_FILE",
    "FIRST_BACKOFF_SECONDS",
    "MAX_BACKOFF_SECONDS",
    "PROBE_BYTES",
    "DataDirectoryError",
    "Database",
    "EarlierWriteFailed",
    "StoreFailure",
    "is_store_failure",
    "quick_check",
]

_LOG = logging.getLogger(__name__)

_MAX_GROUP = 512
_STOP = object()
_PROBE = object()
# A probe commits this many bytes (then deletes them): about the largest ingest message
# the Python client builds, so a probe that passes predicts that such a write fits.
PROBE_BYTES = 1 << 20
FIRST_BACKOFF_SECONDS = 0.5
MAX_BACKOFF_SECONDS = 30.0
# SQLite primary result codes that mean the store, not the write, is at fault
# (https://www.sqlite.org/rescode.html): BUSY, READONLY, IOERR, CORRUPT, FULL, CANTOPEN,
# PROTOCOL, NOLFS, NOTADB.
_STORE_CODES = frozenset({5, 8, 10, 11, 13, 14, 15, 22, 26})

T = TypeVar("T")


class EarlierWriteFailed(RuntimeError):
    """A write was not run: an earlier write of its lane failed and the lane is not reopened."""


def is_store_failure(error: BaseException) -> bool:
    """True for SQLite errors that mean the store cannot write (disk full, I/O, ...)."""
    code = getattr(error, "sqlite_errorcode", None)
    return isinstance(error, sqlite3.Error) and code is not None and code & 0xFF in _STORE_CODES


@dataclass
class StoreFailure:
    """The current failure episode: its cause, when the next probe may run, the backoff."""

    cause: str
    since: float
    next_probe: float
    backoff: float
    failed_probes: int = 0


def quick_check(connection: sqlite3.Connection) -> list[str]:
    """``PRAGMA quick_check``: [] when SQLite finds the file's structure sound, else its
    findings (at most 20). O(file size); does not check index contents or values."""
    rows = connection.execute("PRAGMA quick_check(20)").fetchall()
    found = [str(row[0]) for row in rows]
    return [] if found == ["ok"] else found


def _connect(path: Path) -> sqlite3.Connection:
    connection = sqlite3.connect(path, isolation_level=None, check_same_thread=False, timeout=30.0)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=FULL")
    connection.execute("PRAGMA busy_timeout=30000")
    return connection


class Database:
    """Owns ``DIR/leadline.db``: directory checks and migrations at open, the writer
    thread, reader connections, failure episodes.

    Raises :class:`DataDirectoryError` when the directory is locked by another server,
    its database is lost or damaged, or the schema is newer than this server's.
    """

    def __init__(self, data_dir: Path) -> None:
        make_data_dir(data_dir)
        self.data_dir = data_dir
        self.path = data_dir / DATABASE_FILE
        self._lock = lock_data_dir(data_dir)
        try:
            self._open_checked()
            self.holder_key, self.holder_key_created = read_or_create_key(data_dir)
        except BaseException:
            self._lock.release()
            raise
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._local = threading.local()
        self._readers: list[sqlite3.Connection] = []
        self._readers_lock = threading.Lock()
        self._closed = False
        self.commits = 0
        self.store_failures = 0
        self._failure: StoreFailure | None = None
        self._failure_lock = threading.Lock()
        self._probing = threading.Lock()
        self._failed_lanes: set[Hashable] = set()
        self._writer = threading.Thread(target=self._run, name="leadline-writer", daemon=True)
        self._writer.start()

    def _open_checked(self) -> None:
        check_for_lost_database(self.data_dir)
        if not create_private_file(self.path):
            mode = stat.S_IMODE(self.path.stat().st_mode)
            if mode & 0o077:
                _LOG.warning(
                    "%s has mode %04o: other users can read it; run `chmod 600 %s*`.",
                    self.path,
                    mode,
                    self.path,
                )
        try:
            setup = _connect(self.path)
        except sqlite3.DatabaseError as error:
            raise DataDirectoryError(
                f"{str(self.path)!r}: SQLite cannot open the database ({error}). "
                f"{restore_hint(self.data_dir)}"
            ) from None
        try:
            started = time.monotonic()
            try:
                findings = quick_check(setup)
            except sqlite3.DatabaseError as error:
                findings = [str(error)]
            if findings:
                raise DataDirectoryError(
                    f"{str(self.path)!r}: damaged; SQLite's quick_check reports: "
                    f"{'; '.join(findings[:5])}. {restore_hint(self.data_dir)}"
                )
            _LOG.info("quick_check of %s: ok in %.2f s", self.path, time.monotonic() - started)
            try:
                migrate(setup)
            except sqlite3.Error as error:
                raise DataDirectoryError(
                    f"{str(self.path)!r}: the schema upgrade failed ({error}); it runs in one "
                    "transaction, so the database is as it was. See the server log."
                ) from None
            except RuntimeError as error:  # a newer schema
                raise DataDirectoryError(f"{str(self.path)!r}: {error}") from None
        finally:
            setup.close()
        write_marker(self.data_dir)

    # -- failure episodes --------------------------------------------------------------
    @property
    def failure(self) -> StoreFailure | None:
        """The current failure episode, or None while writes commit."""
        return self._failure

    def _start_failure(self, error: BaseException) -> None:
        """Called by the writer thread when a write fails for a reason of the store."""
        self.store_failures += 1
        with self._failure_lock:
            if self._failure is None:
                now = time.monotonic()
                self._failure = StoreFailure(
                    cause=str(error),
                    since=now,
                    next_probe=now + FIRST_BACKOFF_SECONDS,
                    backoff=FIRST_BACKOFF_SECONDS,
                )
                _LOG.error(
                    "the database refused a write (%s): writes are refused until a probe "
                    "write commits again (first probe in %.1f s)",
                    error,
                    FIRST_BACKOFF_SECONDS,
                )

    def write_refusal(self) -> str | None:
        """None if writes may go ahead; otherwise why not (a failure episode is on).

        Once the backoff has passed, the first caller runs a probe write (others are
        refused meanwhile); if it commits, the episode ends and the caller may write.
        """
        failure = self._failure
        if failure is None:
            return None
        now = time.monotonic()
        if now < failure.next_probe or not self._probing.acquire(blocking=False):
            return self._refusal_text(failure, now)
        try:
            if self._failure is not failure:
                return None if self._failure is None else self._refusal_text(self._failure, now)
            try:
                self._probe()
            except Exception as error:  # noqa: BLE001 - any failure keeps the episode on
                with self._failure_lock:
                    failure.failed_probes += 1
                    failure.cause = str(error)
                    failure.backoff = min(failure.backoff * 2, MAX_BACKOFF_SECONDS)
                    failure.next_probe = time.monotonic() + failure.backoff
                _LOG.warning(
                    "probe write failed (%s); next probe in %.1f s", error, failure.backoff
                )
                return self._refusal_text(failure, time.monotonic())
            with self._failure_lock:
                self._failure = None
            _LOG.warning(
                "probe write committed: the database accepts writes again after %.1f s",
                time.monotonic() - failure.since,
            )
            return None
        finally:
            self._probing.release()

    @staticmethod
    def _refusal_text(failure: StoreFailure, now: float) -> str:
        wait = max(failure.next_probe - now, 0.0)
        return (
            f"the database refuses writes ({failure.cause}) for {now - failure.since:.0f} s; "
            f"the next probe write is in {wait:.1f} s"
        )

    def _probe(self) -> None:
        """Commit :data:`PROBE_BYTES` on the writer thread, then delete them again."""
        if self._closed:
            raise RuntimeError("database is closed")
        future: Future[None] = Future()
        self._queue.put((_PROBE, future, None))
        future.result()

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
                if first[0] is _PROBE:
                    self._run_probe(connection, first[1])
                    continue
                group = [first]
                stop = False
                probe = None
                while len(group) < _MAX_GROUP:
                    try:
                        item = self._queue.get_nowait()
                    except queue.Empty:
                        break
                    if item is _STOP:
                        stop = True
                        break
                    if item[0] is _PROBE:
                        probe = item
                        break
                    group.append(item)
                self._commit_group(connection, group)
                if probe is not None:
                    self._run_probe(connection, probe[1])
                if stop:
                    break
            self._final_checkpoint(connection)
        finally:
            connection.close()

    def _final_checkpoint(self, connection: sqlite3.Connection) -> None:
        """Fold the WAL into the database file at shutdown; on failure the WAL keeps
        everything (it is replayed at the next start), so only log it."""
        try:
            connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        except sqlite3.Error as error:
            _LOG.warning(
                "could not fold the write-ahead log into %s at shutdown (%s); nothing is "
                "lost: %s-wal keeps the writes and the next start replays it. Keep both "
                "files together.",
                self.path,
                error,
                self.path,
            )

    def _run_probe(self, connection: sqlite3.Connection, future: Future[None]) -> None:
        try:
            connection.execute("BEGIN IMMEDIATE")
            try:
                # A row left by a probe whose clean-up failed goes first.
                connection.execute("DELETE FROM write_probe")
                connection.execute(
                    "INSERT INTO write_probe (data) VALUES (zeroblob(?))", (PROBE_BYTES,)
                )
                connection.execute("COMMIT")
            except BaseException:
                _rollback(connection)
                raise
            connection.execute("DELETE FROM write_probe")
        except BaseException as error:  # noqa: BLE001 - handed to the caller
            future.set_exception(error)
        else:
            future.set_result(None)

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
                    if is_store_failure(error):
                        self._start_failure(error)
                    if lane is not None:
                        failed.add(lane)
                    results.append((future, None, error))
                else:
                    connection.execute("RELEASE one_write")
                    results.append((future, value, None))
            connection.execute("COMMIT")
            self.commits += 1
        except BaseException as error:  # noqa: BLE001 - the whole group failed
            _LOG.error("commit of %d writes failed: %s", len(group), error)
            self._start_failure(error)
            _rollback(connection)
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

    def close(self) -> None:
        """Commit what is queued, checkpoint the WAL into the main file, close, unlock."""
        if self._closed:
            return
        self._closed = True
        self._queue.put(_STOP)
        self._writer.join()
        with self._readers_lock:
            for connection in self._readers:
                # Made in another thread that is gone; closing is best effort.
                with contextlib.suppress(sqlite3.Error):
                    connection.close()
            self._readers.clear()
        self._lock.release()


def _rollback(connection: sqlite3.Connection) -> None:
    """Roll back the open transaction, if any; a failing rollback (I/O error) is logged,
    since SQLite then rolls back on its own when the connection is next used."""
    try:
        if connection.in_transaction:
            connection.execute("ROLLBACK")
    except sqlite3.Error as error:
        _LOG.error("rollback failed: %s", error)
