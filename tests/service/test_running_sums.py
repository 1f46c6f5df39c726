"""The running sums (service/engine/sums.py) give the same core inputs as one full pass
over the items, after any sequence of ingests, draws, labels, skips, releases and refits,
and do not depend on that history (a pool reloaded from the store gets the same bits).

References: the full pass the engine used before (``build_window_inputs`` with no window:
``DrawLedger.terms`` / ``DrawLedger.plug_in_sums``, suffix sums over the items) and, for
the plug-in sums, Python's ``math.fsum`` (the correctly rounded sum, independent of order)
over plain numpy masks written here. Tolerances: the sums differ from the full pass only
by the order of float64 additions, so a relative 1e-12 (thousands of ulps over at most a
few thousand items) is ample.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from leadline.service.config import ServerConfig
from leadline.service.engine.engine import Engine
from leadline.service.engine.pool import ITEM_LABELED, PoolSettings, PoolState
from leadline.service.engine.results import ItemBatch, LabelInput
from leadline.service.engine.scopes import Scope, build_scope_inputs, build_window_inputs
from leadline.service.engine.sums import BLOCK, RunningSums
from leadline.service.estimation import DrawTerms
from leadline.service.store import Database
from leadline.service.store import records as store

_CLASSES = 3
_DIM = 4


@pytest.fixture
def engine(tmp_path: Path) -> Iterator[Engine]:
    database = Database(tmp_path)
    # Refits only when the test asks for one.
    config = ServerConfig(data_dir=tmp_path, refit_every_labels=10**6, draw_seed=5)
    engine = Engine(database, config)
    engine.load()
    yield engine
    engine.close()
    database.close()


def _batch(rng: np.random.Generator, start: int, size: int, segments: list[str]) -> ItemBatch:
    logits = rng.standard_normal((size, _CLASSES)) * 2.0
    outputs = np.exp(logits)
    outputs /= outputs.sum(axis=1, keepdims=True)
    return ItemBatch(
        item_ids=[f"item-{i}" for i in range(start, start + size)],
        features=rng.standard_normal((size, _DIM)).astype(np.float32),
        outputs=outputs.astype(np.float32),
        segments=[segments[i] for i in rng.integers(len(segments), size=size)],
        event_time_ms=np.arange(start, start + size, dtype=np.int64) * 10 + 1,
    )


def _assert_terms_close(fast: DrawTerms, full: DrawTerms) -> None:
    for name in (
        "probability",
        "expected_loss",
        "remaining_expected_loss",
        "late_count",
        "in_scope",
        "status",
        "correction_low",
        "correction_high",
        "residual_second_moment",
        "remaining_count",
    ):
        np.testing.assert_array_equal(getattr(fast, name), getattr(full, name), err_msg=name)
    np.testing.assert_array_equal(fast.loss, full.loss)  # NaN where unknown, in both
    np.testing.assert_allclose(
        fast.late_expected_loss, full.late_expected_loss, rtol=1e-12, atol=1e-9
    )
    assert np.all(fast.late_expected_loss >= 0.0)


def _check_against_full_pass(pool: PoolState) -> None:
    data = pool.data
    unlabeled = data.status.view != ITEM_LABELED
    for name in ["", *data.segment_names]:
        scope = Scope(segment=name)
        code = data.segment_codes[name] if name else -1
        if code >= 0 and not np.any(data.segment.view == code):
            continue
        fast = build_scope_inputs(pool, scope)
        full = build_window_inputs(pool, scope, code)
        _assert_terms_close(fast.terms, full.terms)
        assert fast.items_in_scope == full.items_in_scope
        assert fast.items_unreached == full.items_unreached
        assert fast.sums.scope_size == full.sums.scope_size
        assert fast.sums.unlabeled_count == full.sums.unlabeled_count
        assert fast.sums.labeled_loss_sum == full.sums.labeled_loss_sum
        left = unlabeled if code < 0 else unlabeled & (data.segment.view == code)
        # math.fsum: the exactly rounded sum (Python standard library).
        for got, values in (
            (fast.sums.unlabeled_expected_loss_sum, data.expected_loss.view[left]),
            (fast.sums.unlabeled_second_moment_sum, data.second_moment.view[left]),
        ):
            assert got == pytest.approx(math.fsum(values.tolist()), rel=1e-12, abs=1e-12)
        assert fast.sums.unlabeled_expected_loss_sum == pytest.approx(
            full.sums.unlabeled_expected_loss_sum, rel=1e-12, abs=1e-12
        )


def _from_scratch(pool: PoolState) -> RunningSums:
    """The sums of the pool's current state, built in one go (no history)."""
    data = pool.data
    fresh = RunningSums(labeled_status=ITEM_LABELED)
    fresh.add_items(
        g0=data.g0.view,
        expected_loss=data.expected_loss.view,
        second_moment=data.second_moment.view,
        status=data.status.view,
        segment=data.segment.view,
        num_segments=len(data.segment_names),
    )
    return fresh


def _assert_same_bits(kept: RunningSums, fresh: RunningSums, pool: PoolState) -> None:
    marks = pool.data.draws.arrival_mark.view
    for code in range(-1, len(pool.data.segment_names)):
        a, b = kept.unlabeled(code), fresh.unlabeled(code)
        assert (a.count, a.expected_loss, a.second_moment) == (
            b.count,
            b.expected_loss,
            b.second_moment,
        )
        for x, y in zip(kept.late(marks, code), fresh.late(marks, code), strict=True):
            np.testing.assert_array_equal(x, y)


def _label_some(engine: Engine, pool: PoolState, rng: np.random.Generator, count: int) -> None:
    infos = engine.acquire(pool.pool_id, count=count, labeler="a", holder="h")
    labels = []
    for info in infos:
        roll = rng.random()
        if roll < 0.15:
            labels.append(LabelInput(assignment_id=info.assignment_id, skip_reason="unreadable"))
        elif roll < 0.3:
            continue  # stays pending
        else:
            labels.append(
                LabelInput(
                    assignment_id=info.assignment_id, class_label=int(rng.integers(_CLASSES))
                )
            )
    if rng.random() < 0.3 and infos:
        engine.release(
            pool.pool_id, labeler="a", holder="h", assignment_ids=[infos[0].assignment_id]
        )
        labels = [x for x in labels if x.assignment_id != infos[0].assignment_id]
    if labels:
        engine.submit(pool.pool_id, labeler="a", holder="h", labels=labels)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_running_sums_match_the_full_pass_after_random_histories(engine: Engine, seed: int) -> None:
    rng = np.random.default_rng(seed)
    settings = PoolSettings(
        pool_id=f"p{seed}",
        task="classification",
        num_classes=_CLASSES,
        feature_dim=_DIM,
        loss="zero_one",
    )
    engine.create_pool(settings)
    pool = engine.pool(settings.pool_id)
    segments = ["north", "south"]
    count = 0
    refits = 0
    # Blocks of BLOCK rows: the pool spans several, so per-block refreshes are exercised.
    while count < 2 * BLOCK + 500 or refits < 2:
        step = rng.random()
        if step < 0.35 or count < 50:
            if rng.random() < 0.2:
                segments.append(f"s{len(segments)}")  # a segment first seen now
            size = int(rng.integers(1, 1500))
            engine.ingest(settings.pool_id, _batch(rng, count, size, segments))
            count += size
        elif step < 0.85:
            _label_some(engine, pool, rng, int(rng.integers(1, 12)))
        elif engine.refit(pool):
            refits += 1
        with pool.lock:
            _check_against_full_pass(pool)
            _assert_same_bits(pool.data.sums, _from_scratch(pool), pool)
    # Reloaded from the store (as at a restart): the same inputs, bit for bit.
    database = engine._db  # the engine's own store, read back as at start-up
    row = store.load_pool(database.reader(), settings.pool_id)
    assert row is not None
    reloaded = engine._writes.load(row)
    with pool.lock:
        for name in ["", *pool.data.segment_names]:
            live = build_scope_inputs(pool, Scope(segment=name))
            again = build_scope_inputs(reloaded, Scope(segment=name))
            assert live.sums == again.sums
            for field in ("late_expected_loss", "late_count", "remaining_expected_loss"):
                np.testing.assert_array_equal(
                    getattr(live.terms, field), getattr(again.terms, field)
                )
