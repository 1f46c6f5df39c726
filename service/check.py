"""``leadline check --data-dir DIR``: SQLite's full ``integrity_check`` for operators.

Start-up runs the quick check (``PRAGMA quick_check``: the file's page and b-tree
structure); this command runs the full one, which also compares every index with its table.
It reads the database (read-only) and may run beside a live server. Exit 0 when SQLite
finds nothing, 3 when the directory holds no database, a lost one, or a damaged one.

Neither check can see a changed value inside an intact row (SQLite keeps no checksums of
row contents); backups are the remedy for that (docs/operations.md).
"""

from __future__ import annotations

import argparse
import contextlib
import sqlite3
import sys
import time
from pathlib import Path

from leadline.service.store.directory import (
    DATABASE_FILE,
    MARKER_FILE,
    DataDirectoryError,
    DataDirectoryInUse,
    check_for_lost_database,
    lock_data_dir,
    restore_hint,
)

__all__ = ["check_data_dir", "main"]

_EXIT_OK = 0
_EXIT_DAMAGED = 3
_MAX_FINDINGS = 100


def check_data_dir(data_dir: Path, *, quick: bool = False) -> tuple[list[str], list[str]]:
    """(notes, findings): what was checked, and what SQLite found wrong ([] = sound).

    Raises DataDirectoryError when there is nothing to check or the database is lost.
    """
    database = data_dir / DATABASE_FILE
    if not database.exists() and not (data_dir / MARKER_FILE).exists():
        raise DataDirectoryError(f"{str(data_dir)!r}: no leadline database here.")
    check_for_lost_database(data_dir)
    notes: list[str] = []
    with contextlib.ExitStack() as stack:
        try:
            lock = lock_data_dir(data_dir)
        except DataDirectoryInUse as busy:
            notes.append(f"a server (pid {busy.pid}) is using it: checked the live database")
        else:
            stack.callback(lock.release)
        pragma = "quick_check" if quick else "integrity_check"
        started = time.monotonic()
        try:
            connection = sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=30.0)
            stack.callback(connection.close)
            rows = connection.execute(f"PRAGMA {pragma}({_MAX_FINDINGS})").fetchall()
            found = [str(row[0]) for row in rows]
        except sqlite3.DatabaseError as error:
            found = [f"SQLite cannot read the database: {error}"]
        notes.append(f"{pragma} of {database} took {time.monotonic() - started:.2f} s")
    return notes, ([] if found == ["ok"] else found)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="leadline check",
        description="Check a data directory's database with SQLite's integrity_check "
        "(read-only; safe beside a running server). Exit 0 sound, 3 damaged or missing.",
    )
    parser.add_argument("--data-dir", type=Path, required=True, help="the server's data_dir")
    parser.add_argument(
        "--quick", action="store_true", help="quick_check only (what start-up runs)"
    )
    args = parser.parse_args(argv)
    data_dir = args.data_dir.expanduser().absolute()
    try:
        notes, findings = check_data_dir(data_dir, quick=args.quick)
    except DataDirectoryError as error:
        print(f"leadline check: {error}", file=sys.stderr)
        return _EXIT_DAMAGED
    for note in notes:
        print(note)
    pragma = "quick_check" if args.quick else "integrity_check"
    if not findings:
        print(f"{pragma}: ok")
        return _EXIT_OK
    print(f"{pragma}: {len(findings)} problem(s) in {data_dir / DATABASE_FILE}:")
    for finding in findings:
        print(f"  {finding}")
    print(restore_hint(data_dir))
    return _EXIT_DAMAGED


if __name__ == "__main__":
    sys.exit(main())
