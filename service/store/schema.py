"""SQLite schema of the data directory and its migrations.

The database holds one row per pool, ingest batch of items (``item_chunks``: one blob per
column; ``items`` keeps the one-row-per-item rows of schema 1-5), validation item, draw,
surrogate version and remembered request (per pool, and at server level for creating and
deleting pools; each with the holder of the token that sent it, a digest of the request
and its time).
``schema_version`` records the last migration applied; :func:`migrate` applies the missing
ones in order inside one transaction, so a data dir written by an older server opens in a
newer one, and a newer data dir is refused by an older server.
"""

from __future__ import annotations

import logging
import sqlite3

__all__ = ["SCHEMA_VERSION", "migrate"]

_LOG = logging.getLogger(__name__)

# Each entry upgrades the schema from version i to i + 1.
_MIGRATIONS: tuple[tuple[str, ...], ...] = (
    (
        """CREATE TABLE pools (
            pool_id TEXT PRIMARY KEY,
            settings TEXT NOT NULL,
            seed INTEGER NOT NULL,
            create_time_ms INTEGER NOT NULL
        )""",
        """CREATE TABLE segments (
            pool_id TEXT NOT NULL,
            code INTEGER NOT NULL,
            name TEXT NOT NULL,
            PRIMARY KEY (pool_id, code)
        )""",
        """CREATE TABLE items (
            pool_id TEXT NOT NULL,
            row INTEGER NOT NULL,
            item_id TEXT NOT NULL,
            features BLOB NOT NULL,
            outputs BLOB NOT NULL,
            payload_ref TEXT NOT NULL,
            segment INTEGER NOT NULL,
            event_time_ms INTEGER NOT NULL,
            ingest_time_ms INTEGER NOT NULL,
            PRIMARY KEY (pool_id, row)
        )""",
        """CREATE TABLE draws (
            pool_id TEXT NOT NULL,
            draw_index INTEGER NOT NULL,
            row INTEGER NOT NULL,
            probability REAL NOT NULL,
            remaining_count INTEGER NOT NULL,
            remaining_expected_loss REAL NOT NULL,
            remaining_by_segment BLOB NOT NULL,
            correction_low REAL NOT NULL,
            correction_high REAL NOT NULL,
            min_probability REAL NOT NULL,
            expected_loss REAL NOT NULL,
            second_moment REAL NOT NULL,
            surrogate_version INTEGER NOT NULL,
            arrival_mark INTEGER NOT NULL,
            draw_time_ms INTEGER NOT NULL,
            status INTEGER NOT NULL,
            labeler TEXT NOT NULL,
            holder TEXT NOT NULL,
            assignment_id TEXT NOT NULL,
            lease_expire_ms INTEGER NOT NULL,
            label REAL,
            loss REAL,
            label_time_ms INTEGER NOT NULL DEFAULT 0,
            skip_reason TEXT NOT NULL DEFAULT '',
            PRIMARY KEY (pool_id, draw_index)
        )""",
        """CREATE TABLE models (
            pool_id TEXT NOT NULL,
            version INTEGER NOT NULL,
            label_count INTEGER NOT NULL,
            data BLOB NOT NULL,
            create_time_ms INTEGER NOT NULL,
            PRIMARY KEY (pool_id, version)
        )""",
        """CREATE TABLE requests (
            pool_id TEXT NOT NULL,
            method TEXT NOT NULL,
            request_id TEXT NOT NULL,
            response BLOB NOT NULL,
            PRIMARY KEY (pool_id, method, request_id)
        )""",
    ),
    # 2: request ids of CreatePool / DeletePool, kept at server level (they outlive pools).
    (
        """CREATE TABLE server_requests (
            method TEXT NOT NULL,
            request_id TEXT NOT NULL,
            pool_id TEXT NOT NULL,
            response BLOB NOT NULL,
            time_ms INTEGER NOT NULL,
            PRIMARY KEY (method, request_id)
        )""",
    ),
    # 3: a remembered request id belongs to the token that sent it (holder) and keeps a
    # digest of the request, so the same id with other content is refused instead of
    # answered; time_ms lets ids expire after the retention. Rows from before carry holder
    # '' and digest '' (matched as before). write_probe takes the store's probe writes.
    (
        """CREATE TABLE requests_v3 (
            pool_id TEXT NOT NULL,
            method TEXT NOT NULL,
            holder TEXT NOT NULL,
            request_id TEXT NOT NULL,
            digest TEXT NOT NULL,
            response BLOB NOT NULL,
            time_ms INTEGER NOT NULL,
            PRIMARY KEY (pool_id, method, holder, request_id)
        )""",
        """INSERT INTO requests_v3 (pool_id, method, holder, request_id, digest, response, time_ms)
            SELECT pool_id, method, '', request_id, '', response,
                CAST(strftime('%s', 'now') AS INTEGER) * 1000
            FROM requests""",
        "DROP TABLE requests",
        "ALTER TABLE requests_v3 RENAME TO requests",
        "CREATE INDEX requests_by_time ON requests (time_ms)",
        """CREATE TABLE server_requests_v3 (
            method TEXT NOT NULL,
            holder TEXT NOT NULL,
            request_id TEXT NOT NULL,
            digest TEXT NOT NULL,
            pool_id TEXT NOT NULL,
            response BLOB NOT NULL,
            time_ms INTEGER NOT NULL,
            PRIMARY KEY (method, holder, request_id)
        )""",
        """INSERT INTO server_requests_v3
            (method, holder, request_id, digest, pool_id, response, time_ms)
            SELECT method, '', request_id, '', pool_id, response, time_ms FROM server_requests""",
        "DROP TABLE server_requests",
        "ALTER TABLE server_requests_v3 RENAME TO server_requests",
        "CREATE INDEX server_requests_by_time ON server_requests (time_ms)",
        "CREATE TABLE write_probe (data BLOB NOT NULL)",
    ),
    # 4: validation items (AddValidationItems): labeled rows from outside the pool that
    # teach the surrogate; never drawn, never counted among the pool's items.
    (
        """CREATE TABLE validation_items (
            pool_id TEXT NOT NULL,
            row INTEGER NOT NULL,
            item_id TEXT NOT NULL,
            features BLOB NOT NULL,
            outputs BLOB NOT NULL,
            label REAL NOT NULL,
            segment TEXT NOT NULL,
            ingest_time_ms INTEGER NOT NULL,
            PRIMARY KEY (pool_id, row)
        )""",
    ),
    # 5: the reliance guard's choice made at each refit (JSON: coefficient, constant,
    # floor), kept with the surrogate it governs; '' = full reliance (models saved before).
    ("ALTER TABLE models ADD COLUMN reliance TEXT NOT NULL DEFAULT ''",),
    # 6: items are stored one row per ingest batch, one blob per column (item_chunks), so
    # a batch costs one B-tree insert instead of one per item (two with the primary key
    # index) and a restart reads a few large blobs instead of a row per item. Rows an
    # older server wrote stay in ``items`` and are read first; new items go to chunks.
    (
        """CREATE TABLE item_chunks (
            pool_id TEXT NOT NULL,
            start_row INTEGER NOT NULL,
            row_count INTEGER NOT NULL,
            item_ids BLOB NOT NULL,
            features BLOB NOT NULL,
            outputs BLOB NOT NULL,
            payload_refs BLOB NOT NULL,
            segments BLOB NOT NULL,
            event_time_ms BLOB NOT NULL,
            ingest_time_ms BLOB NOT NULL,
            PRIMARY KEY (pool_id, start_row)
        )""",
    ),
)

SCHEMA_VERSION = len(_MIGRATIONS)


def migrate(connection: sqlite3.Connection) -> int:
    """Bring the schema to :data:`SCHEMA_VERSION`; return the version found before.

    Raises RuntimeError if the file was written by a newer server (unknown version).
    """
    connection.execute("BEGIN IMMEDIATE")
    try:
        connection.execute("CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL)")
        row = connection.execute("SELECT version FROM schema_version").fetchone()
        found = 0 if row is None else int(row[0])
        if found > SCHEMA_VERSION:
            raise RuntimeError(
                f"schema version {found} is newer than this server's {SCHEMA_VERSION}: "
                "upgrade the server."
            )
        for version in range(found, SCHEMA_VERSION):
            for statement in _MIGRATIONS[version]:
                connection.execute(statement)
            _LOG.info("applied schema migration %d -> %d", version, version + 1)
        connection.execute("DELETE FROM schema_version")
        connection.execute("INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,))
        connection.execute("COMMIT")
    except BaseException:
        connection.execute("ROLLBACK")
        raise
    return found
