"""How long SQLite's checks take on a large data directory (a rough measurement).

Builds a data directory with one pool of N items (32 features, 10 classes, float32 blobs:
the system benchmark's shape) through the store's own writes, then times

- opening it the way the server starts (lock, ``PRAGMA quick_check``, migrations),
- ``PRAGMA quick_check`` alone,
- ``leadline check`` (``PRAGMA integrity_check``, read-only).

Usage: ``.venv/bin/python benchmarks/integrity.py [--items 1000000] [--dir PATH]``.
Prints one line per figure; nothing is written to BENCHMARKS.md.
"""

from __future__ import annotations

import argparse
import platform
import sqlite3
import tempfile
import time
from pathlib import Path

import numpy as np

from leadline.service.check import check_data_dir
from leadline.service.engine.pool import PoolSettings
from leadline.service.store import Database
from leadline.service.store import records as store
from leadline.service.store.database import quick_check

_FEATURES = 32
_CLASSES = 10
_CHUNK = 50_000


def build(data_dir: Path, items: int, seed: int = 0) -> None:
    rng = np.random.default_rng(seed)
    database = Database(data_dir)
    try:
        settings = PoolSettings(
            pool_id="big",
            task="classification",
            num_classes=_CLASSES,
            feature_dim=_FEATURES,
            loss="zero_one",
        )
        database.write(store.insert_pool(store.PoolRow("big", settings.to_json(), 1, 0)))
        for start in range(0, items, _CHUNK):
            n = min(_CHUNK, items - start)
            outputs = rng.dirichlet(np.ones(_CLASSES), size=n).astype(np.float32)
            chunk = store.ItemChunk(
                start=start,
                item_ids=[f"item-{start + i:08d}" for i in range(n)],
                features=rng.normal(size=(n, _FEATURES)).astype(np.float32),
                outputs=outputs,
                payload_refs=[f"s3://archive/{start + i}" for i in range(n)],
                segments=np.zeros(n, dtype=np.int32),
                event_time_ms=np.full(n, 1_700_000_000_000, dtype=np.int64),
                ingest_time_ms=np.full(n, 1_700_000_000_000, dtype=np.int64),
            )
            database.write(store.insert_items("big", chunk))
    finally:
        database.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=1_000_000)
    parser.add_argument("--dir", type=Path, help="where to build (default: a temporary folder)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        data_dir = (args.dir or Path(scratch)) / "data"
        started = time.monotonic()
        build(data_dir, args.items)
        size = (data_dir / "leadline.db").stat().st_size
        print(
            f"built {args.items:,} items in {time.monotonic() - started:.1f} s; "
            f"leadline.db {size / 2**20:.0f} MiB"
        )
        print(f"machine: {platform.processor() or platform.machine()}, {platform.system()}")
        started = time.monotonic()
        Database(data_dir).close()
        print(
            f"open as at start-up (lock, quick_check, migrate): {time.monotonic() - started:.2f} s"
        )
        with sqlite3.connect(data_dir / "leadline.db") as connection:
            started = time.monotonic()
            findings = quick_check(connection)
            print(f"quick_check alone: {time.monotonic() - started:.2f} s, findings {findings}")
        started = time.monotonic()
        notes, findings = check_data_dir(data_dir)
        elapsed = time.monotonic() - started
        print(f"leadline check (integrity_check): {elapsed:.2f} s, findings {findings}")


if __name__ == "__main__":
    main()
