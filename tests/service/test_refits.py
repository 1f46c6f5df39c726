"""Background refits: triggered by new labels or by time, each a new stored version."""

from __future__ import annotations

import contextlib
import sqlite3
import time

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    label_round,
)

_POOL = "pools/fits"


def _version(stubs: Stubs) -> int:
    return stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL)).surrogate_version


def _due(harness: Harness, *, after_seconds: float) -> bool:
    """Would the refit worker start a refit of the pool ``after_seconds`` from now, with no
    further call? (Asks the engine's rule directly instead of sleeping and watching.)"""
    assert harness.server is not None
    engine = harness.server.engine
    return engine.refit_due(engine.pool("fits"), time.monotonic() + after_seconds)


def _wait_version(stubs: Stubs, wanted: int, seconds: float) -> float:
    started = time.monotonic()
    while _version(stubs) < wanted:
        assert time.monotonic() - started < seconds, f"version {wanted} not reached"
        time.sleep(0.05)
    return time.monotonic() - started


def test_refit_after_interval_with_few_new_labels(harness_factory, cancer_pool: Dataset) -> None:
    harness: Harness = harness_factory(refit_every_labels=1000, refit_interval_seconds=1.0)
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("fits", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("fits", cancer_pool, range(200)))
        # No labels yet: time alone never refits.
        assert not _due(harness, after_seconds=60)
        assert _version(stubs) == 0
        label_round(stubs, "fits", cancer_pool, 6)
        _wait_version(stubs, 1, 30)
        # Nothing new: the version stays, however long the pool waits.
        assert not _due(harness, after_seconds=60)
        assert _version(stubs) == 1
        label_round(stubs, "fits", cancer_pool, 6)
        _wait_version(stubs, 2, 30)
        estimate = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
        assert estimate.surrogate_version == 2
    harness.stop()
    # Every version is stored with the labels it was fitted on.
    with contextlib.closing(sqlite3.connect(harness.data_dir / "leadline.db")) as connection:
        stored = connection.execute(
            "SELECT version, label_count FROM models WHERE pool_id = 'fits' ORDER BY version"
        ).fetchall()
    assert stored == [(1, 6), (2, 12)]


def test_pool_setting_overrides_server_refit_count(harness_factory, cancer_pool: Dataset) -> None:
    harness: Harness = harness_factory(refit_every_labels=1000, refit_interval_seconds=3600)
    with harness.stubs() as stubs:
        stubs.call(
            stubs.pools.CreatePool,
            classification_pool("fits", cancer_pool, refit_every_labels=5),
        )
        stubs.call(stubs.ingest.IngestItems, item_batch("fits", cancer_pool, range(200)))
        label_round(stubs, "fits", cancer_pool, 4)
        # Four new labels: below the pool's five, and the server's 3600 s are far away.
        assert not _due(harness, after_seconds=60)
        assert _version(stubs) == 0
        label_round(stubs, "fits", cancer_pool, 1)
        _wait_version(stubs, 1, 30)
