"""Items stored one row per ingest batch (schema 6), and data dirs from before it.

A schema-5 data dir keeps its items one row per item in ``items``; the server upgrades the
schema, reads those rows first and stores new batches as chunks after them.
"""

from __future__ import annotations

import contextlib
import json
import sqlite3
from pathlib import Path

import numpy as np

from leadline.service.api import validation
from leadline.service.config import ServerConfig
from leadline.service.store import DATABASE_FILE, SCHEMA_VERSION
from leadline.service.store import records as store_records
from leadline.service.store.schema import _MIGRATIONS
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, classification_pool, item_batch, write_tokens

_POOL = "pools/tumours"
_SEGMENTS = ["north", "south"]


def _write_schema_five_dir(data_dir: Path, dataset: Dataset, rows: range) -> None:
    """A data dir as a schema-5 server left it: one pool, ``rows`` as one row per item,
    written with that server's statements."""
    data_dir.mkdir(mode=0o700)
    request = classification_pool("tumours", dataset)
    settings = validation.pool_settings(
        "tumours", request.pool, defaults=ServerConfig(data_dir=data_dir)
    )
    with contextlib.closing(sqlite3.connect(data_dir / DATABASE_FILE)) as connection:
        connection.execute("PRAGMA journal_mode=WAL")
        for migration in _MIGRATIONS[:5]:
            for statement in migration:
                connection.execute(statement)
        connection.execute("CREATE TABLE schema_version (version INTEGER NOT NULL)")
        connection.execute("INSERT INTO schema_version VALUES (5)")
        connection.execute(
            "INSERT INTO pools (pool_id, settings, seed, create_time_ms) VALUES (?, ?, 7, 1)",
            ("tumours", json.dumps(settings.to_json(), sort_keys=True)),
        )
        connection.executemany(
            "INSERT INTO segments (pool_id, code, name) VALUES ('tumours', ?, ?)",
            list(enumerate(_SEGMENTS)),
        )
        connection.executemany(
            "INSERT INTO items (pool_id, row, item_id, features, outputs, payload_ref, segment,"
            " event_time_ms, ingest_time_ms) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [
                (
                    "tumours",
                    i,
                    dataset.ids[r],
                    dataset.features[r].tobytes(),
                    dataset.outputs[r].tobytes(),
                    f"s3://scans/{r}",
                    r % 2,
                    1_000 + r,
                    2_000,
                )
                for i, r in enumerate(rows)
            ],
        )
        connection.commit()


def _batch(dataset: Dataset, rows: range) -> pb.ItemBatch:
    return item_batch(
        "tumours",
        dataset,
        rows,
        payload_refs=[f"s3://scans/{r}" for r in rows],
        segments=[_SEGMENTS[r % 2] for r in rows],
        event_time_ms=[1_000 + r for r in rows],
    )


def test_schema_five_data_dir_keeps_its_items_and_adds_chunks_after_them(
    tmp_path: Path, cancer_pool: Dataset
) -> None:
    data_dir = tmp_path / "data"
    _write_schema_five_dir(data_dir, cancer_pool, range(0, 200))
    harness = Harness(data_dir=data_dir, tokens=write_tokens(tmp_path / "tokens.toml"), settings={})
    harness.start()
    try:
        with harness.stubs() as stubs:
            pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
            assert pool.item_count == 200
            # New rows go to chunks; rows 150..199 are the old ones sent again, identical.
            summary = stubs.call(stubs.ingest.IngestItems, _batch(cancer_pool, range(150, 400)))
            assert (summary.accepted, summary.duplicates, summary.item_count) == (200, 50, 400)
            summary = stubs.call(stubs.ingest.IngestItems, _batch(cancer_pool, range(400, 569)))
            assert summary.item_count == 569
        harness.stop()
        with contextlib.closing(sqlite3.connect(data_dir / DATABASE_FILE)) as connection:
            (version,) = connection.execute("SELECT version FROM schema_version").fetchone()
            legacy = connection.execute("SELECT COUNT(*) FROM items").fetchone()[0]
            chunks = connection.execute(
                "SELECT start_row, row_count FROM item_chunks ORDER BY start_row"
            ).fetchall()
            assert store_records.count_items(connection, "tumours") == 569
        assert version == SCHEMA_VERSION == 6
        assert (legacy, chunks) == (200, [(200, 200), (400, 169)])
        harness.start()
        with harness.stubs() as stubs:
            pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
            assert pool.item_count == 569
            # Every stored column came back as sent, old rows and chunks alike: sending all
            # again finds only identical duplicates.
            summary = stubs.call(stubs.ingest.IngestItems, _batch(cancer_pool, range(0, 569)))
            assert (summary.accepted, summary.duplicates, summary.rejected) == (0, 569, 0)
            # ... and a changed event time is a conflict, for an old row and a chunk row.
            changed = _batch(cancer_pool, range(0, 569))
            changed.event_time_ms[10] += 1
            changed.event_time_ms[300] += 1
            summary = stubs.call(stubs.ingest.IngestItems, changed)
            assert summary.rejected == 2
            assert [e.item_id for e in summary.errors] == [
                cancer_pool.ids[10],
                cancer_pool.ids[300],
            ]
    finally:
        harness.stop()


def test_chunk_blobs_round_trip_every_column(tmp_path: Path) -> None:
    """insert_items then load_items on a bare connection of the current schema."""
    from leadline.service.store.schema import migrate

    rng = np.random.default_rng(3)
    with contextlib.closing(
        sqlite3.connect(tmp_path / DATABASE_FILE, isolation_level=None)
    ) as connection:
        migrate(connection)
        starts = [0, 3, 10]
        sizes = [3, 7, 5]
        sent = []
        for start, n in zip(starts, sizes, strict=True):
            chunk = store_records.ItemChunk(
                start=start,
                item_ids=[f"id-{start + i}" for i in range(n)],
                features=rng.standard_normal((n, 4), dtype=np.float32),
                outputs=rng.random((n, 3), dtype=np.float32),
                payload_refs=["" if i % 2 else f"ref {i}" for i in range(n)],
                segments=rng.integers(0, 5, n).astype(np.int32),
                event_time_ms=rng.integers(1, 10**13, n),
                ingest_time_ms=np.full(n, 99, dtype=np.int64),
            )
            store_records.insert_items("p", chunk)(connection)
            sent.append(chunk)
        loaded = list(
            store_records.load_items(connection, "p", feature_dim=4, output_width=3, chunk_rows=8)
        )
    # chunk_rows = 8 groups the first two stored chunks (10 rows), then the last one.
    assert [(c.start, len(c.item_ids)) for c in loaded] == [(0, 10), (10, 5)]
    for name in ("features", "outputs", "segments", "event_time_ms", "ingest_time_ms"):
        assert np.array_equal(
            np.concatenate([getattr(c, name) for c in loaded]),
            np.concatenate([getattr(c, name) for c in sent]),
        ), name
    for name in ("item_ids", "payload_refs"):
        assert sum((getattr(c, name) for c in loaded), []) == sum(
            (getattr(c, name) for c in sent), []
        ), name
