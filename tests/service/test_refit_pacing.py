"""Refit cadence and pacing: the time-share gap, chunked rescoring, late arrivals scored by
the new surrogate, and request calls that go through while a refit runs (real server,
real LightGBM; the slow refit is made slow by our own pacing constants, not a mock)."""

from __future__ import annotations

import time

import numpy as np
import pytest

from leadline.service.engine import refit as refit_module
from leadline.service.engine.pool import SCORE_DTYPE
from leadline.service.engine.refit import ScoreColumns, refit_gap_seconds, rescore_into
from leadline.service.estimation import (
    LossKind,
    LossSpec,
    SurrogateSettings,
    fit_surrogate,
    worst_squared_deviation_of,
)
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    label_round,
)

_POOL = "pools/paced"


def _version(stubs: Stubs) -> int:
    return stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL)).surrogate_version


def _wait(condition, seconds: float, what: str) -> None:  # type: ignore[no-untyped-def]
    started = time.monotonic()
    while not condition():
        assert time.monotonic() - started < seconds, f"{what}: not within {seconds} s"
        time.sleep(0.01)


def test_gap_keeps_refits_to_their_share_of_the_time() -> None:
    # The rule's own algebra: a refit of t CPU seconds followed by the gap takes exactly
    # `share` of one core over t + gap (common practice for a duty cycle, no source).
    for seconds, share in ((4.0, 0.25), (0.05, 0.5), (40.0, 0.1), (3.0, 1.0)):
        gap = refit_gap_seconds(seconds, share)
        assert seconds / (seconds + gap) == pytest.approx(share, rel=1e-12)
    assert refit_gap_seconds(4.0, 0.25) == pytest.approx(12.0)
    assert refit_gap_seconds(0.0, 0.25) == 0.0  # a pool never refitted waits for nothing


def test_refit_waits_for_its_gap(harness_factory, cancer_pool: Dataset) -> None:
    share = 1e-4  # a tiny share makes even a small pool's gap long enough to observe
    harness: Harness = harness_factory(
        refit_every_labels=10, refit_interval_seconds=1e6, refit_cpu_share=share
    )
    assert harness.server is not None
    engine = harness.server.engine
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("paced", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("paced", cancer_pool, range(300)))
        label_round(stubs, "paced", cancer_pool, 20)
        # The first refit has no predecessor: due at once with its 20 labels.
        _wait(lambda: _version(stubs) == 1, 30, "first refit")
        pool = engine.pool("paced")
        took = pool.last_refit_cpu_seconds
        assert took > 0
        gap = refit_gap_seconds(took, share)
        label_round(stubs, "paced", cancer_pool, 10)
        # Ten new labels are enough by count, but the gap has not passed.
        assert not engine.refit_due(pool, pool.last_fit_time + 0.99 * gap)
        assert engine.refit_due(pool, pool.last_fit_time + 1.01 * gap)
        assert _version(stubs) == 1
        label_round(stubs, "paced", cancer_pool, 10)
        # Twenty new labels on a surrogate fitted on twenty: doubled, refit without waiting
        # for the gap (the worker starts it at once, well before the gap ends).
        assert gap > 60
        _wait(lambda: _version(stubs) == 2, 30, "refit after the labels doubled")


def test_chunked_rescoring_equals_one_call(cancer_pool: Dataset) -> None:
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=2)
    rows = np.arange(0, 569, 3)
    surrogate = fit_surrogate(
        spec,
        cancer_pool.features[rows],
        cancer_pool.outputs[rows],
        cancer_pool.labels[rows],
        version=1,
        seed=5,
        settings=SurrogateSettings(num_threads=1),
    )
    whole = surrogate.score(cancer_pool.features, cancer_pool.outputs)
    out = ScoreColumns(10)  # grows while it fills
    # 569 rows in uneven chunks of 50, then a second call continues where the first ended.
    rescore_into(
        out, surrogate, cancer_pool.features, cancer_pool.outputs, 300, loss_bound=1.0, chunk=50
    )
    rescore_into(
        out, surrogate, cancer_pool.features, cancer_pool.outputs, 569, loss_bound=1.0, chunk=50
    )
    assert out.size == 569
    got = out.scores()
    # Bit-identical: the trees score each row on its own and the per-row arithmetic does
    # not depend on the chunk; the float32 columns are the one-call values rounded once.
    np.testing.assert_array_equal(got.expected_loss, whole.expected_loss)
    np.testing.assert_array_equal(
        got.residual_second_moment, whole.residual_second_moment.astype(SCORE_DTYPE)
    )
    np.testing.assert_array_equal(got.spread, whole.spread.astype(SCORE_DTYPE))
    np.testing.assert_array_equal(
        got.worst_squared_deviation,
        worst_squared_deviation_of(whole, loss_bound=1.0).astype(SCORE_DTYPE),
    )


def test_calls_go_through_a_running_refit_and_late_items_get_new_scores(
    harness_factory, cancer_pool: Dataset, monkeypatch: pytest.MonkeyPatch
) -> None:
    harness: Harness = harness_factory(refit_every_labels=10, refit_cpu_share=1.0)
    assert harness.server is not None
    engine = harness.server.engine
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("paced", cancer_pool))
        stubs.call(stubs.ingest.IngestItems, item_batch("paced", cancer_pool, range(400)))
        pool = engine.pool("paced")
        # Slow the rescoring down: 50-row chunks with 0.25 s pauses (8 chunks: about 2 s),
        # and catch up on late items outside the lock down to 20 left.
        monkeypatch.setattr(refit_module, "_SCORE_CHUNK", 50)
        monkeypatch.setattr(refit_module, "_CHUNK_PAUSE_SECONDS", 0.25)
        monkeypatch.setattr(refit_module, "_CATCH_UP_UNDER_LOCK", 20)
        label_round(stubs, "paced", cancer_pool, 10)
        _wait(lambda: pool.refitting, 30, "refit start")
        # AcquireItems and IngestItems complete while the refit runs: it holds no lock.
        acquired = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=1, labeler="vendor-a"),
        )
        assert len(acquired.assignments) == 1
        late = range(400, 569)
        stubs.call(stubs.ingest.IngestItems, item_batch("paced", cancer_pool, late))
        assert pool.refitting, "the refit ended before the calls: the test proves nothing"
        assert _version(stubs) == 0
        _wait(lambda: _version(stubs) == 1, 60, "refit end")
        data = pool.data
        rows = data.item_ids.rows_of([cancer_pool.ids[i] for i in late])
        assert rows.min() >= 400  # they arrived after the refit's snapshot
        fresh = data.surrogate.score(cancer_pool.features[late], cancer_pool.outputs[late])
        cold = pool.cold.score(cancer_pool.features[late], cancer_pool.outputs[late])
        assert not np.allclose(fresh.expected_loss, cold.expected_loss)  # the check can fail
        np.testing.assert_array_equal(data.expected_loss.view[rows], fresh.expected_loss)
        np.testing.assert_array_equal(
            data.second_moment.view[rows], fresh.residual_second_moment.astype(SCORE_DTYPE)
        )
        np.testing.assert_array_equal(data.spread.view[rows], fresh.spread.astype(SCORE_DTYPE))
        # And every earlier item too, with the same surrogate.
        everything = data.surrogate.score(data.features.view, data.outputs.view)
        np.testing.assert_array_equal(data.expected_loss.view, everything.expected_loss)
