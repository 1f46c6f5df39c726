"""The server draws through the pool's draw index (O(k log N)); over a real server the draws
are the ones the whole-candidate path (``ledger.select``, the core's ``draw_batch``) makes
from the same state and seed, through ingests between draws, refits and a restart.

The reference is computed in the test process from the server's own pool state just before
each AcquireItems call (same scores, reliance, candidates in row order and generator seed).
"""

from __future__ import annotations

import time

import numpy as np

from leadline.service.engine import labeling
from leadline.service.engine.ingest import append_items
from leadline.service.engine.ledger import select
from leadline.service.engine.pool import AVAILABLE, PoolSettings, PoolState
from leadline.service.estimation import DEFAULT_FLOOR, Reliance
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, Stubs, classification_pool, item_batch

_POOL = "pools/lab"


def _state(harness: Harness) -> PoolState:
    assert harness.server is not None
    return harness.server._engine.pool("lab")


def _expected(harness: Harness, count: int) -> tuple[list[int], np.ndarray]:
    """The rows and probabilities the whole-candidate path draws next."""
    pool = _state(harness)
    with pool.lock:
        data = pool.data
        candidates = np.flatnonzero(data.status.view == AVAILABLE)
        selection = select(
            data.scores_at(candidates),
            count,
            reliance=data.reliance_for(DEFAULT_FLOOR),
            loss_bound=pool.loss_bound,
            rng=np.random.default_rng([pool.seed, len(data.draws)]),
            groups=data.segment.view[candidates].astype(np.int64),
            num_groups=len(data.segment_names),
        )
        return candidates[selection.positions].tolist(), selection.batch.probabilities


def _acquire(stubs: Stubs, count: int) -> list[pb.Assignment]:
    request = pb.AcquireItemsRequest(pool=_POOL, count=count, labeler="vendor-a")
    return list(stubs.call(stubs.labeling.AcquireItems, request).assignments)


def _check_next_draws(
    harness: Harness, stubs: Stubs, data: Dataset, count: int
) -> list[pb.Assignment]:
    rows, probabilities = _expected(harness, count)
    got = _acquire(stubs, count)
    assert [a.item_id for a in got] == [data.ids[r] for r in rows]
    np.testing.assert_allclose(
        [a.selection_probability for a in got], probabilities, rtol=1e-12, atol=0
    )
    assert all(0 < a.selection_probability <= 1 for a in got)
    return got


def test_server_draws_equal_the_whole_candidate_path_through_ingests_and_refits(
    harness_factory, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    harness: Harness = harness_factory(refit_every_labels=10, draw_seed=7)
    index = {item_id: i for i, item_id in enumerate(data.ids)}
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("lab", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("lab", data, range(200)))
        version = 0
        for step in range(4):
            drawn = _check_next_draws(harness, stubs, data, 10)
            # New items join the index between draws (scored with the surrogate in force).
            rows = range(200 + 60 * step, 260 + 60 * step)
            stubs.call(stubs.ingest.IngestItems, item_batch("lab", data, rows))
            assert _check_next_draws(harness, stubs, data, 3)
            # Labels: a refit follows and swaps in a new index with the new scores.
            submissions = [
                pb.LabelSubmission(
                    assignment_id=a.assignment_id, class_label=int(data.labels[index[a.item_id]])
                )
                for a in drawn
            ]
            stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(pool=_POOL, labeler="vendor-a", labels=submissions),
            )
            version = _wait_for_version(stubs, version + 1)
        assert version == 4  # a refit between every two checked batches


def _wait_for_version(stubs: Stubs, wanted: int) -> int:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        if pool.surrogate_version >= wanted:
            return int(pool.surrogate_version)
        time.sleep(0.1)
    raise AssertionError(f"no refit to surrogate version {wanted} within 60 s")


def test_a_restart_draws_what_the_running_server_would_have(
    harness_factory, cancer_pool: Dataset
) -> None:
    # The same history on two servers with the same draw seed; one restarts before the
    # last draws (its index is rebuilt from the store, the other's grew by ingests).
    data = cancer_pool
    picked = []
    for restart in (False, True):
        harness: Harness = harness_factory(draw_seed=99)
        with harness.stubs() as stubs:
            stubs.call(stubs.pools.CreatePool, classification_pool("lab", data))
            stubs.call(stubs.ingest.IngestItems, item_batch("lab", data, range(150)))
            first = _acquire(stubs, 5)
            stubs.call(stubs.ingest.IngestItems, item_batch("lab", data, range(150, 300)))
        if restart:
            harness.stop()
            harness.start()
        with harness.stubs() as stubs:
            second = _check_next_draws(harness, stubs, data, 8)
        picked.append(([a.item_id for a in first], [a.item_id for a in second]))
    assert picked[0] == picked[1]


def test_an_index_prepared_outside_the_lock_catches_up_when_installed(
    cancer_pool: Dataset,
) -> None:
    # A refit prepares the index from a snapshot; draws and ingests happen before it is
    # installed. Installed, it must draw exactly like one built at once from the state then.
    data = cancer_pool
    settings = PoolSettings(
        pool_id="lab", task="classification", num_classes=2, feature_dim=30, loss="zero_one"
    )
    pool = PoolState(settings=settings, seed=5, create_time_ms=0)

    def ingest(rows: range) -> None:
        with pool.lock:
            features, outputs = data.features[rows], data.outputs[rows].astype(np.float64)
            scores = pool.data.surrogate.score(features, outputs)
            append_items(
                pool,
                [data.ids[r] for r in rows],
                features,
                outputs,
                [""] * len(rows),
                np.zeros(len(rows), dtype=np.int32),
                np.zeros(len(rows), dtype=np.int64),
                np.zeros(len(rows), dtype=np.int64),
                cold=pool.cold.score(features, outputs),
                current=scores,
            )

    def draw(count: int) -> None:
        with pool.lock:
            records = labeling._new_draws(pool, count, "a", "h", 0, 1, floor=DEFAULT_FLOOR)
            pool.data.mark_drawn_items(records[0].draw_index)

    ingest(range(300))
    draw(5)
    with pool.lock:
        scores = pool.data.scores_at(np.arange(pool.data.item_count))
    prepared = pool.prepare_index(scores, Reliance(floor=DEFAULT_FLOOR), floor=DEFAULT_FLOOR)
    draw(7)  # drawn after the snapshot: must leave the prepared index
    ingest(range(300, 400))  # arrived after the snapshot: must join it
    draw(60)  # ...unless drawn before the install (found under kill -9 load: drawn twice)
    with pool.lock:
        late_drawn = np.count_nonzero(pool.data.draws.row.view[12:] >= 300)
        assert late_drawn > 0  # the seeded draws do take some of the late items
        pool.data.install_index(prepared, loss_bound=pool.loss_bound)
        installed = pool.data.draw_index
        assert installed is prepared.index
        pool.data.draw_index = None
        fresh = pool.data.drawing_index(loss_bound=pool.loss_bound)
    assert installed.size == fresh.size == 400 - 72
    assert installed.usefulness_total == fresh.usefulness_total
    a = installed.draw(20, floor=DEFAULT_FLOOR, rng=np.random.default_rng(1))
    b = fresh.draw(20, floor=DEFAULT_FLOOR, rng=np.random.default_rng(1))
    np.testing.assert_array_equal(a.positions, b.positions)
    np.testing.assert_array_equal(a.probabilities, b.probabilities)
