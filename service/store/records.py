"""Reads and writes of pools, items, draws, surrogate versions and remembered requests.

Write helpers return a function of a connection, to be queued on
:meth:`leadline.service.store.Database.submit`; read helpers take a connection (a reader).
Numeric columns travel as numpy arrays, features and model outputs as float32 blobs. Items
are stored one row per ingest batch (``item_chunks``), one blob per column.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from leadline.service.draws import DrawRecord, DrawStatus

__all__ = [
    "DRAW_COLUMNS",
    "DRAW_UPDATE_COLUMNS",
    "ItemChunk",
    "PoolRow",
    "RememberedRequest",
    "ValidationChunk",
    "count_items",
    "delete_pool",
    "find_request",
    "find_server_request",
    "insert_draws",
    "insert_items",
    "insert_model",
    "insert_pool",
    "insert_request",
    "insert_server_request",
    "insert_segments",
    "insert_validation_items",
    "load_draws",
    "load_items",
    "load_latest_model",
    "load_pool",
    "load_pools",
    "load_segments",
    "prune_requests",
    "rename_holders",
    "load_validation_items",
    "update_draws",
]

Write = Callable[[sqlite3.Connection], Any]

DRAW_COLUMNS: tuple[str, ...] = (
    "draw_index",
    "row",
    "probability",
    "remaining_count",
    "remaining_expected_loss",
    "remaining_by_segment",
    "correction_low",
    "correction_high",
    "min_probability",
    "expected_loss",
    "second_moment",
    "surrogate_version",
    "arrival_mark",
    "draw_time_ms",
    "status",
    "labeler",
    "holder",
    "assignment_id",
    "lease_expire_ms",
    "label",
    "loss",
    "label_time_ms",
    "skip_reason",
)
# The columns that change after a draw is made (lease, outcome).
DRAW_UPDATE_COLUMNS: tuple[str, ...] = (
    "status",
    "labeler",
    "holder",
    "assignment_id",
    "lease_expire_ms",
    "label",
    "loss",
    "label_time_ms",
    "skip_reason",
)


@dataclass(frozen=True)
class PoolRow:
    pool_id: str
    settings: dict[str, Any]
    seed: int
    create_time_ms: int


@dataclass(frozen=True)
class ItemChunk:
    """Rows ``start .. start + len(item_ids)`` of one pool, as stored."""

    start: int
    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, K) or (n,) float32
    payload_refs: list[str]
    segments: np.ndarray  # int32 codes
    event_time_ms: np.ndarray  # int64
    ingest_time_ms: np.ndarray  # int64


@dataclass(frozen=True)
class ValidationChunk:
    """Validation rows ``start .. start + len(item_ids)`` of one pool, as stored."""

    start: int
    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, K) or (n,) float32
    labels: np.ndarray  # (n,) float64: class index or target value
    segments: list[str]
    ingest_time_ms: np.ndarray  # int64


def insert_pool(row: PoolRow) -> Write:
    def write(connection: sqlite3.Connection) -> None:
        connection.execute(
            "INSERT INTO pools (pool_id, settings, seed, create_time_ms) VALUES (?, ?, ?, ?)",
            (row.pool_id, json.dumps(row.settings, sort_keys=True), row.seed, row.create_time_ms),
        )

    return write


def delete_pool(pool_id: str) -> Write:
    def write(connection: sqlite3.Connection) -> None:
        tables = (
            "items",
            "item_chunks",
            "validation_items",
            "draws",
            "segments",
            "models",
            "requests",
            "pools",
        )
        for table in tables:
            connection.execute(f"DELETE FROM {table} WHERE pool_id = ?", (pool_id,))

    return write


def insert_segments(pool_id: str, codes: Sequence[int], names: Sequence[str]) -> Write:
    rows = [(pool_id, int(code), name) for code, name in zip(codes, names, strict=True)]

    def write(connection: sqlite3.Connection) -> None:
        connection.executemany("INSERT INTO segments (pool_id, code, name) VALUES (?, ?, ?)", rows)

    return write


def _join_strings(field: str, values: Sequence[str]) -> bytes:
    """UTF-8 strings separated by line feeds. The API admits only printable strings here
    (item ids, payload refs), which never hold one; a count checks it anyway."""
    text = "\n".join(values)
    if text.count("\n") != len(values) - 1:
        raise ValueError(f"{field}: a value holds a line feed; cannot store it in a chunk")
    return text.encode("utf-8")


def _split_strings(blob: bytes) -> list[str]:
    return bytes(blob).decode("utf-8").split("\n")


def insert_items(pool_id: str, chunk: ItemChunk) -> Write:
    """Store the chunk's items as one ``item_chunks`` row: one blob per column (float32,
    int32 and int64 little-endian arrays; strings joined by line feeds)."""
    n = len(chunk.item_ids)
    row = (
        pool_id,
        chunk.start,
        n,
        _join_strings("item_ids", chunk.item_ids),
        np.ascontiguousarray(chunk.features, dtype="<f4").tobytes(),
        np.ascontiguousarray(chunk.outputs, dtype="<f4").tobytes(),
        _join_strings("payload_refs", chunk.payload_refs),
        np.ascontiguousarray(chunk.segments, dtype="<i4").tobytes(),
        np.ascontiguousarray(chunk.event_time_ms, dtype="<i8").tobytes(),
        np.ascontiguousarray(chunk.ingest_time_ms, dtype="<i8").tobytes(),
    )

    def write(connection: sqlite3.Connection) -> None:
        connection.execute(
            "INSERT INTO item_chunks (pool_id, start_row, row_count, item_ids, features,"
            " outputs, payload_refs, segments, event_time_ms, ingest_time_ms)"
            " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            row,
        )

    return write


def count_items(connection: sqlite3.Connection, pool_id: str) -> int:
    """How many items of the pool the store holds (rows of schema 1-5 plus chunks)."""
    (legacy,) = connection.execute(
        "SELECT COUNT(*) FROM items WHERE pool_id = ?", (pool_id,)
    ).fetchone()
    (chunked,) = connection.execute(
        "SELECT COALESCE(SUM(row_count), 0) FROM item_chunks WHERE pool_id = ?", (pool_id,)
    ).fetchone()
    return int(legacy) + int(chunked)


def insert_validation_items(pool_id: str, chunk: ValidationChunk) -> Write:
    n = len(chunk.item_ids)
    feature_rows = np.ascontiguousarray(chunk.features, dtype=np.float32).reshape(n, -1)
    output_rows = np.ascontiguousarray(chunk.outputs, dtype=np.float32).reshape(n, -1)
    rows = [
        (
            pool_id,
            chunk.start + i,
            chunk.item_ids[i],
            feature_rows[i].tobytes(),
            output_rows[i].tobytes(),
            float(chunk.labels[i]),
            chunk.segments[i],
            int(chunk.ingest_time_ms[i]),
        )
        for i in range(n)
    ]

    def write(connection: sqlite3.Connection) -> None:
        connection.executemany(
            "INSERT INTO validation_items (pool_id, row, item_id, features, outputs, label,"
            " segment, ingest_time_ms) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            rows,
        )

    return write


def _draw_value(draw: DrawRecord, column: str) -> Any:
    """A draw's field as the draws table stores it."""
    value = getattr(draw, column)
    if column == "remaining_by_segment":
        return np.asarray(value, dtype=np.float64).tobytes()
    if column == "status":
        return int(value)
    return value


def insert_draws(pool_id: str, draws: Sequence[DrawRecord]) -> Write:
    placeholders = ", ".join("?" for _ in range(len(DRAW_COLUMNS) + 1))
    sql = f"INSERT INTO draws (pool_id, {', '.join(DRAW_COLUMNS)}) VALUES ({placeholders})"
    rows = [(pool_id, *(_draw_value(draw, column) for column in DRAW_COLUMNS)) for draw in draws]

    def write(connection: sqlite3.Connection) -> None:
        connection.executemany(sql, rows)

    return write


def update_draws(pool_id: str, draws: Sequence[DrawRecord]) -> Write:
    """Store the lease and outcome columns of ``draws`` (the draw-time ones never change)."""
    assignments = ", ".join(f"{column} = ?" for column in DRAW_UPDATE_COLUMNS)
    sql = f"UPDATE draws SET {assignments} WHERE pool_id = ? AND draw_index = ?"
    rows = [
        (*(_draw_value(draw, column) for column in DRAW_UPDATE_COLUMNS), pool_id, draw.draw_index)
        for draw in draws
    ]

    def write(connection: sqlite3.Connection) -> None:
        connection.executemany(sql, rows)

    return write


def insert_model(
    pool_id: str,
    version: int,
    label_count: int,
    data: bytes,
    create_time_ms: int,
    *,
    reliance: str = "",
) -> Write:
    """``reliance``: the reliance guard's choice for this version, as JSON ('' = full)."""

    def write(connection: sqlite3.Connection) -> None:
        connection.execute(
            "INSERT INTO models (pool_id, version, label_count, data, create_time_ms, reliance)"
            " VALUES (?, ?, ?, ?, ?, ?)",
            (pool_id, version, label_count, data, create_time_ms, reliance),
        )

    return write


@dataclass(frozen=True)
class RememberedRequest:
    """A write call that carried a request_id: who sent it, what it was, what it answered."""

    holder: str
    request_id: str
    digest: str
    response: bytes
    time_ms: int
    pool_id: str = ""


def insert_request(pool_id: str, method: str, remembered: RememberedRequest) -> Write:
    """Remember a pool's call (replacing an expired row with the same key)."""

    def write(connection: sqlite3.Connection) -> None:
        connection.execute(
            "INSERT OR REPLACE INTO requests (pool_id, method, holder, request_id, digest,"
            " response, time_ms) VALUES (?, ?, ?, ?, ?, ?, ?)",
            (
                pool_id,
                method,
                remembered.holder,
                remembered.request_id,
                remembered.digest,
                remembered.response,
                remembered.time_ms,
            ),
        )

    return write


def find_request(
    connection: sqlite3.Connection,
    pool_id: str,
    method: str,
    holder: str,
    request_id: str,
    *,
    not_before_ms: int,
) -> RememberedRequest | None:
    """The call remembered for this holder and id since ``not_before_ms``, or None.

    Rows written before ids were scoped to tokens (holder '') match every holder.
    """
    row = connection.execute(
        "SELECT holder, digest, response, time_ms FROM requests WHERE pool_id = ? AND"
        " method = ? AND holder IN (?, '') AND request_id = ? AND time_ms >= ?"
        " ORDER BY holder DESC LIMIT 1",
        (pool_id, method, holder, request_id, not_before_ms),
    ).fetchone()
    if row is None:
        return None
    return RememberedRequest(
        holder=row[0],
        request_id=request_id,
        digest=row[1],
        response=bytes(row[2]),
        time_ms=int(row[3]),
        pool_id=pool_id,
    )


def insert_server_request(method: str, remembered: RememberedRequest) -> Write:
    """Remember a pool-level call (CreatePool, DeletePool) outside the pool's own rows."""

    def write(connection: sqlite3.Connection) -> None:
        connection.execute(
            "INSERT OR REPLACE INTO server_requests (method, holder, request_id, digest,"
            " pool_id, response, time_ms) VALUES (?, ?, ?, ?, ?, ?, ?)",
            (
                method,
                remembered.holder,
                remembered.request_id,
                remembered.digest,
                remembered.pool_id,
                remembered.response,
                remembered.time_ms,
            ),
        )

    return write


def find_server_request(
    connection: sqlite3.Connection,
    method: str,
    holder: str,
    request_id: str,
    *,
    not_before_ms: int,
) -> RememberedRequest | None:
    """A remembered pool-level call of this holder since ``not_before_ms``, or None."""
    row = connection.execute(
        "SELECT holder, digest, pool_id, response, time_ms FROM server_requests WHERE"
        " method = ? AND holder IN (?, '') AND request_id = ? AND time_ms >= ?"
        " ORDER BY holder DESC LIMIT 1",
        (method, holder, request_id, not_before_ms),
    ).fetchone()
    if row is None:
        return None
    return RememberedRequest(
        holder=row[0],
        request_id=request_id,
        digest=row[1],
        response=bytes(row[3]),
        time_ms=int(row[4]),
        pool_id=str(row[2]),
    )


def prune_requests(before_ms: int) -> Write:
    """Forget remembered calls older than ``before_ms`` (pool-level ones too)."""

    def write(connection: sqlite3.Connection) -> int:
        pruned = connection.execute("DELETE FROM requests WHERE time_ms < ?", (before_ms,))
        count = pruned.rowcount
        pruned = connection.execute("DELETE FROM server_requests WHERE time_ms < ?", (before_ms,))
        return int(count + pruned.rowcount)

    return write


def rename_holders(renames: Sequence[tuple[str, str]]) -> Write:
    """Replace holder ids (old, new) of draws; returns the number of draws changed."""

    def write(connection: sqlite3.Connection) -> int:
        if (
            connection.execute("SELECT 1 FROM draws WHERE length(holder) = 16 LIMIT 1").fetchone()
            is None
        ):
            return 0  # nothing written by an older server
        changed = 0
        for old, new in renames:
            cursor = connection.execute("UPDATE draws SET holder = ? WHERE holder = ?", (new, old))
            changed += cursor.rowcount
        return changed

    return write


def load_pools(connection: sqlite3.Connection) -> list[PoolRow]:
    rows = connection.execute(
        "SELECT pool_id, settings, seed, create_time_ms FROM pools ORDER BY pool_id"
    ).fetchall()
    return [PoolRow(r[0], json.loads(r[1]), int(r[2]), int(r[3])) for r in rows]


def load_pool(connection: sqlite3.Connection, pool_id: str) -> PoolRow | None:
    row = connection.execute(
        "SELECT pool_id, settings, seed, create_time_ms FROM pools WHERE pool_id = ?", (pool_id,)
    ).fetchone()
    return None if row is None else PoolRow(row[0], json.loads(row[1]), int(row[2]), int(row[3]))


def load_segments(connection: sqlite3.Connection, pool_id: str) -> list[str]:
    rows = connection.execute(
        "SELECT code, name FROM segments WHERE pool_id = ? ORDER BY code", (pool_id,)
    ).fetchall()
    names = [name for _, name in rows]
    if [code for code, _ in rows] != list(range(len(rows))):
        raise RuntimeError(f"pool {pool_id!r}: segment codes are not 0..n-1")
    return names


def load_items(
    connection: sqlite3.Connection,
    pool_id: str,
    *,
    feature_dim: int,
    output_width: int,
    chunk_rows: int = 100_000,
) -> Iterator[ItemChunk]:
    """All items of the pool in row order, about ``chunk_rows`` at a time: first the
    one-row-per-item rows an older server wrote, then the stored chunks, whose blobs
    become arrays with one join and one ``np.frombuffer`` per column.

    RuntimeError if the rows are not 0, 1, 2, ... without gaps or overlaps.
    """
    legacy = _load_item_rows(
        connection,
        pool_id,
        feature_dim=feature_dim,
        output_width=output_width,
        chunk_rows=chunk_rows,
    )
    expected = 0
    for chunk in legacy:
        yield chunk
        expected = chunk.start + len(chunk.item_ids)
    cursor = connection.execute(
        "SELECT start_row, row_count, item_ids, features, outputs, payload_refs, segments,"
        " event_time_ms, ingest_time_ms FROM item_chunks WHERE pool_id = ? ORDER BY start_row",
        (pool_id,),
    )
    group: list[tuple[Any, ...]] = []
    rows = 0
    for stored in cursor:
        start, count = int(stored[0]), int(stored[1])
        if start != expected + rows:
            raise RuntimeError(
                f"pool {pool_id!r}: item rows are not contiguous near {expected + rows}"
            )
        group.append(stored)
        rows += count
        if rows >= chunk_rows:
            yield _joined_chunk(group, expected, rows, feature_dim, output_width)
            expected += rows
            group, rows = [], 0
    if group:
        yield _joined_chunk(group, expected, rows, feature_dim, output_width)


def _joined_chunk(
    group: list[tuple[Any, ...]], start: int, n: int, feature_dim: int, output_width: int
) -> ItemChunk:
    """One ItemChunk of consecutive stored chunks (rows as selected in :func:`load_items`)."""

    def column(index: int, dtype: str) -> np.ndarray:
        return np.frombuffer(b"".join(stored[index] for stored in group), dtype=dtype)

    def strings(index: int) -> list[str]:
        values = [text for stored in group for text in _split_strings(stored[index])]
        if len(values) != n:
            raise RuntimeError(f"item chunks from row {start}: {len(values)} strings for {n} rows")
        return values

    features = column(3, "<f4").astype(np.float32, copy=False)
    outputs = column(4, "<f4").astype(np.float32, copy=False)
    if features.shape[0] != n * feature_dim or outputs.shape[0] != n * output_width:
        raise RuntimeError(f"item chunks from row {start}: feature or output blobs have odd sizes")
    return ItemChunk(
        start=start,
        item_ids=strings(2),
        features=features.reshape(n, feature_dim),
        outputs=outputs.reshape(n, output_width) if output_width > 1 else outputs,
        payload_refs=strings(5),
        segments=column(6, "<i4").astype(np.int32, copy=False),
        event_time_ms=column(7, "<i8").astype(np.int64, copy=False),
        ingest_time_ms=column(8, "<i8").astype(np.int64, copy=False),
    )


def _load_item_rows(
    connection: sqlite3.Connection,
    pool_id: str,
    *,
    feature_dim: int,
    output_width: int,
    chunk_rows: int,
) -> Iterator[ItemChunk]:
    """The pool's one-row-per-item rows (schema 1-5) in row order, ``chunk_rows`` at a time."""
    cursor = connection.execute(
        "SELECT row, item_id, features, outputs, payload_ref, segment, event_time_ms,"
        " ingest_time_ms FROM items WHERE pool_id = ? ORDER BY row",
        (pool_id,),
    )
    expected = 0
    while True:
        rows = cursor.fetchmany(chunk_rows)
        if not rows:
            return
        n = len(rows)
        rows_seen = np.fromiter((r[0] for r in rows), dtype=np.int64, count=n)
        if rows_seen[0] != expected or not np.array_equal(
            rows_seen, np.arange(expected, expected + n)
        ):
            raise RuntimeError(f"pool {pool_id!r}: item rows are not contiguous near {expected}")
        features = np.frombuffer(b"".join(r[2] for r in rows), dtype=np.float32)
        outputs = np.frombuffer(b"".join(r[3] for r in rows), dtype=np.float32)
        yield ItemChunk(
            start=expected,
            item_ids=[r[1] for r in rows],
            features=features.reshape(n, feature_dim),
            outputs=outputs.reshape(n, output_width) if output_width > 1 else outputs,
            payload_refs=[r[4] for r in rows],
            segments=np.fromiter((r[5] for r in rows), dtype=np.int32, count=n),
            event_time_ms=np.fromiter((r[6] for r in rows), dtype=np.int64, count=n),
            ingest_time_ms=np.fromiter((r[7] for r in rows), dtype=np.int64, count=n),
        )
        expected += n


def load_validation_items(
    connection: sqlite3.Connection,
    pool_id: str,
    *,
    feature_dim: int,
    output_width: int,
    chunk_rows: int = 100_000,
) -> Iterator[ValidationChunk]:
    """All validation items of the pool in row order, ``chunk_rows`` at a time."""
    cursor = connection.execute(
        "SELECT row, item_id, features, outputs, label, segment, ingest_time_ms"
        " FROM validation_items WHERE pool_id = ? ORDER BY row",
        (pool_id,),
    )
    expected = 0
    while True:
        rows = cursor.fetchmany(chunk_rows)
        if not rows:
            return
        n = len(rows)
        rows_seen = np.fromiter((r[0] for r in rows), dtype=np.int64, count=n)
        if not np.array_equal(rows_seen, np.arange(expected, expected + n)):
            raise RuntimeError(
                f"pool {pool_id!r}: validation rows are not contiguous near {expected}"
            )
        features = np.frombuffer(b"".join(r[2] for r in rows), dtype=np.float32)
        outputs = np.frombuffer(b"".join(r[3] for r in rows), dtype=np.float32)
        yield ValidationChunk(
            start=expected,
            item_ids=[r[1] for r in rows],
            features=features.reshape(n, feature_dim),
            outputs=outputs.reshape(n, output_width) if output_width > 1 else outputs,
            labels=np.fromiter((r[4] for r in rows), dtype=np.float64, count=n),
            segments=[r[5] for r in rows],
            ingest_time_ms=np.fromiter((r[6] for r in rows), dtype=np.int64, count=n),
        )
        expected += n


def load_draws(connection: sqlite3.Connection, pool_id: str) -> list[DrawRecord]:
    """The pool's draws in draw order."""
    cursor = connection.execute(
        f"SELECT {', '.join(DRAW_COLUMNS)} FROM draws WHERE pool_id = ? ORDER BY draw_index",
        (pool_id,),
    )
    draws = []
    for row in cursor:
        values = dict(zip(DRAW_COLUMNS, row, strict=True))
        values["remaining_by_segment"] = np.frombuffer(values["remaining_by_segment"], np.float64)
        values["status"] = DrawStatus(values["status"])
        draws.append(DrawRecord(**values))
    return draws


def load_latest_model(
    connection: sqlite3.Connection, pool_id: str
) -> tuple[int, int, bytes, str] | None:
    """(version, label_count, data, reliance JSON) of the newest surrogate, or None at cold
    start."""
    row = connection.execute(
        "SELECT version, label_count, data, reliance FROM models WHERE pool_id = ?"
        " ORDER BY version DESC LIMIT 1",
        (pool_id,),
    ).fetchone()
    return None if row is None else (int(row[0]), int(row[1]), bytes(row[2]), str(row[3]))
