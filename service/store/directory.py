"""The data directory: one server at a time, files only its owner can read, damage noticed.

A data directory holds::

    leadline.db        the SQLite database (with leadline.db-wal / -shm beside it)
    leadline.lock      locked (flock) by the running server, holds its pid
    leadline.marker    written once, when the database is first created here
    leadline.key       per-directory secret of the token holder ids (see api.auth)
    scores/            item scores under each pool's latest surrogate (score_cache.py;
                       derived data a restart may use instead of rescoring)

:func:`lock_data_dir` takes an exclusive ``flock`` on ``leadline.lock`` for the server's
life. The kernel drops the lock when the process ends in any way (kill -9 included), so a
crashed server never leaves a stale lock behind; a second server on the same directory is
refused with :class:`DataDirectoryError` naming the holder's pid.

:func:`check_for_lost_database` compares the database file with the evidence around it
(the marker, a non-empty write-ahead log): a database that is missing or empty while the
directory shows it once held one is refused, instead of starting an empty server over
data that is gone. A directory with none of these files is new and starts empty.

Everything is created readable by its owner only (directory 0700, files 0600); SQLite
gives the -wal and -shm files the database file's permissions.
"""

from __future__ import annotations

import fcntl
import logging
import os
import secrets
import stat
import time
from pathlib import Path

__all__ = [
    "DATABASE_FILE",
    "KEY_FILE",
    "LOCK_FILE",
    "MARKER_FILE",
    "DataDirectoryError",
    "DataDirectoryInUse",
    "DirectoryLock",
    "check_for_lost_database",
    "create_private_file",
    "lock_data_dir",
    "make_data_dir",
    "read_or_create_key",
    "restore_hint",
    "write_marker",
]

_LOG = logging.getLogger(__name__)

DATABASE_FILE = "leadline.db"
LOCK_FILE = "leadline.lock"
MARKER_FILE = "leadline.marker"
KEY_FILE = "leadline.key"
_KEY_BYTES = 32


class DataDirectoryError(RuntimeError):
    """The data directory cannot be served: in use by another server, damaged or unreadable.

    The message names the path and what to do next. ``leadline serve`` exits with 3.
    """


class DataDirectoryInUse(DataDirectoryError):
    """Another process holds the directory's lock; ``pid`` is its pid (or 'unknown')."""

    def __init__(self, message: str, *, pid: str) -> None:
        super().__init__(message)
        self.pid = pid


def restore_hint(data_dir: Path) -> str:
    """The next step after damage, for every message that reports it."""
    return (
        f"Stop here and restore {data_dir / DATABASE_FILE} from your latest backup "
        "(docs/operations.md, 'Backup and restore'); `leadline check --data-dir "
        f"{data_dir}` reports what SQLite finds. To start over with an empty server on "
        "purpose, move the directory away and start with an empty one."
    )


def make_data_dir(data_dir: Path) -> None:
    """Create the directory (0700) if missing; warn when an existing one is open to every
    user (group access is left alone: container volumes and service managers use it)."""
    try:
        data_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
    except OSError as error:
        raise DataDirectoryError(
            f"data_dir = {str(data_dir)!r}: cannot create the directory ({error})."
        ) from None
    if not data_dir.is_dir():
        raise DataDirectoryError(f"data_dir = {str(data_dir)!r}: not a directory.")
    mode = stat.S_IMODE(data_dir.stat().st_mode)
    if mode & 0o007:
        _LOG.warning(
            "data_dir %s has mode %04o: every user can enter the data directory, which "
            "holds every item's features and outputs; run `chmod 700 %s`.",
            data_dir,
            mode,
            data_dir,
        )


def create_private_file(path: Path) -> bool:
    """Create ``path`` empty with mode 0600 if it does not exist; True if it was created."""
    try:
        descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return False
    os.close(descriptor)
    return True


class DirectoryLock:
    """An exclusive ``flock`` on ``DIR/leadline.lock``; released by :meth:`release` or
    by the kernel when the process ends."""

    def __init__(self, path: Path, descriptor: int) -> None:
        self.path = path
        self._descriptor: int | None = descriptor

    def release(self) -> None:
        if self._descriptor is not None:
            os.close(self._descriptor)  # closing the descriptor drops the flock
            self._descriptor = None


def lock_data_dir(data_dir: Path) -> DirectoryLock:
    """Lock the directory for this process; DataDirectoryError naming the holder if taken."""
    path = data_dir / LOCK_FILE
    try:
        descriptor = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
    except OSError as error:
        raise DataDirectoryError(
            f"data_dir = {str(data_dir)!r}: cannot open the lock file {str(path)!r} ({error})."
        ) from None
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = _read_pid(descriptor)
        os.close(descriptor)
        raise DataDirectoryInUse(
            f"data_dir = {str(data_dir)!r}: in use by another leadline server (pid "
            f"{holder}, which holds {str(path)!r}). One server per data directory: stop "
            "that server first, or give this one its own --data-dir.",
            pid=holder,
        ) from None
    except OSError as error:
        os.close(descriptor)
        raise DataDirectoryError(
            f"data_dir = {str(data_dir)!r}: cannot lock {str(path)!r} ({error}); the "
            "filesystem must support flock (local disks do; some network filesystems do not)."
        ) from None
    os.ftruncate(descriptor, 0)
    os.pwrite(descriptor, f"{os.getpid()}\n".encode(), 0)
    return DirectoryLock(path, descriptor)


def _read_pid(descriptor: int) -> str:
    try:
        text = os.pread(descriptor, 32, 0).decode("ascii", "replace").strip()
    except OSError:
        return "unknown"
    return text if text.isdigit() else "unknown"


def check_for_lost_database(data_dir: Path) -> None:
    """Refuse a database that is missing or empty while the directory shows it held one.

    The evidence: the marker written when the database was created, or a non-empty
    write-ahead log (which is only ever written beside a database that has its header).
    """
    database = data_dir / DATABASE_FILE
    size = database.stat().st_size if database.exists() else -1
    if size > 0:
        return
    evidence = []
    marker = data_dir / MARKER_FILE
    if marker.exists():
        evidence.append(f"{marker.name} says a database was created here ({_marker_text(marker)})")
    wal = data_dir / f"{DATABASE_FILE}-wal"
    if wal.exists() and wal.stat().st_size > 0:
        evidence.append(f"{wal.name} holds {wal.stat().st_size:,} bytes of logged writes")
    if not evidence:
        return  # a new data directory
    state = "is missing" if size < 0 else "is empty (0 bytes)"
    raise DataDirectoryError(
        f"{str(database)!r} {state}, but {' and '.join(evidence)}: the data this "
        f"directory held is gone. Refusing to start an empty server over it. "
        f"{restore_hint(data_dir)}"
    )


def _marker_text(marker: Path) -> str:
    try:
        for line in marker.read_text(encoding="utf-8").splitlines():
            if line.startswith("created "):
                return line
    except OSError:
        pass
    return "no creation time readable"


def write_marker(data_dir: Path) -> None:
    """Write ``leadline.marker`` once (a directory whose database exists and is readable)."""
    marker = data_dir / MARKER_FILE
    if marker.exists():
        return
    created = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    text = (
        "This directory holds a leadline database (leadline.db). Do not delete this file:\n"
        "leadline refuses to start when the database is missing or empty while it exists.\n"
        f"created {created}\n"
    )
    temporary = marker.with_name(f"{MARKER_FILE}.tmp")
    descriptor = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(descriptor, text.encode())
        os.fsync(descriptor)
    finally:
        os.close(descriptor)
    os.replace(temporary, marker)
    _fsync_dir(data_dir)


def read_or_create_key(data_dir: Path) -> tuple[bytes, bool]:
    """The directory's holder-id secret and whether it was created now.

    DataDirectoryError if the file exists but is not a key this server wrote.
    """
    path = data_dir / KEY_FILE
    try:
        text = path.read_text(encoding="ascii").strip()
    except FileNotFoundError:
        key = secrets.token_bytes(_KEY_BYTES)
        temporary = path.with_name(f"{KEY_FILE}.tmp")
        descriptor = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(descriptor, (key.hex() + "\n").encode())
            os.fsync(descriptor)
        finally:
            os.close(descriptor)
        os.replace(temporary, path)
        _fsync_dir(data_dir)
        return key, True
    except (OSError, UnicodeDecodeError) as error:
        raise DataDirectoryError(f"{str(path)!r}: cannot read ({error}).") from None
    try:
        key = bytes.fromhex(text)
    except ValueError:
        key = b""
    if len(key) != _KEY_BYTES:
        raise DataDirectoryError(
            f"{str(path)!r}: not a key written by leadline ({_KEY_BYTES * 2} hex digits "
            "expected). Restore it from your backup, or delete it to make a new one (open "
            "assignments then go back to the pool when their leases run out)."
        )
    return key, False


def _fsync_dir(directory: Path) -> None:
    descriptor = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)
