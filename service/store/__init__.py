"""Durable state in SQLite: the data directory, schema and migrations, one writer thread,
per-thread readers."""

from leadline.service.store.database import (
    DATABASE_FILE,
    Database,
    DataDirectoryError,
    EarlierWriteFailed,
    StoreFailure,
)
from leadline.service.store.schema import SCHEMA_VERSION, migrate

__all__ = [
    "DATABASE_FILE",
    "SCHEMA_VERSION",
    "DataDirectoryError",
    "Database",
    "EarlierWriteFailed",
    "StoreFailure",
    "migrate",
]
