"""Durable state in SQLite: schema and migrations, one writer thread, per-thread readers."""

from leadline.service.store.database import DATABASE_FILE, Database, EarlierWriteFailed
from leadline.service.store.schema import SCHEMA_VERSION, migrate

__all__ = ["DATABASE_FILE", "SCHEMA_VERSION", "Database", "EarlierWriteFailed", "migrate"]
