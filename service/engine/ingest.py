"""Ingest: append a validated batch to a pool's arrays; duplicates and conflicts.

Validation items (``apply_validation``) follow the same rules in their own arrays.

Work here runs under the pool lock and only touches memory; it returns the store writes
for the caller to queue (see :mod:`leadline.service.engine.engine`).
"""

from __future__ import annotations

import time

import numpy as np

from leadline.service.engine.pool import AVAILABLE, PoolState
from leadline.service.engine.results import (
    IngestResult,
    ItemBatch,
    ItemProblem,
    ValidationItems,
)
from leadline.service.errors import FailedPrecondition
from leadline.service.estimation import Surrogate, SurrogateScores, worst_squared_deviation_of
from leadline.service.store import records as store
from leadline.service.store.records import Write

__all__ = [
    "MAX_ITEM_ERRORS",
    "check_shape",
    "append_items",
    "append_validation",
    "apply_batch",
    "apply_validation",
    "compare_duplicates",
    "now_ms",
]

# At most this many per-item problems travel back in one reply.
MAX_ITEM_ERRORS = 20


def now_ms() -> int:
    return int(time.time() * 1000)


def check_shape(pool: PoolState, features: np.ndarray, outputs: np.ndarray) -> None:
    """FailedPrecondition unless the rows fit the pool's columns (call with ``pool.lock``
    held). The API layer validated the batch against the pool's settings before this
    call; a pool deleted and created again meanwhile may have other ones, and rows of
    another shape would put its item and feature arrays out of step."""
    settings = pool.settings
    width = (settings.num_classes,) if settings.is_classification else ()
    if features.shape[1:] != (settings.feature_dim,) or outputs.shape[1:] != width:
        raise FailedPrecondition(
            f"pool = 'pools/{pool.pool_id}': was created again while the request was checked "
            f"(now feature_dim = {settings.feature_dim}, {settings.task}); the batch was "
            "checked against the old settings. Send it again.",
            field="pool",
        )


def append_items(
    pool: PoolState,
    item_ids: list[str],
    features: np.ndarray,
    outputs: np.ndarray,
    payload_refs: list[str],
    segments: np.ndarray,
    event_time_ms: np.ndarray,
    ingest_time_ms: np.ndarray,
    *,
    cold: SurrogateScores,
    current: SurrogateScores,
) -> None:
    start = pool.data.item_count
    pool.data.item_ids.extend(item_ids)
    pool.data.payload_refs.extend(payload_refs)
    pool.data.features.extend(features)
    pool.data.outputs.extend(outputs)
    pool.data.segment.extend(segments)
    pool.data.event_time_ms.extend(event_time_ms)
    pool.data.ingest_time_ms.extend(ingest_time_ms)
    pool.data.g0.extend(cold.expected_loss)
    pool.data.expected_loss.extend(current.expected_loss)
    pool.data.second_moment.extend(current.residual_second_moment)
    pool.data.spread.extend(current.spread)
    pool.data.worst_deviation.extend(
        worst_squared_deviation_of(current, loss_bound=pool.loss_bound)
    )
    pool.data.status.extend(np.full(len(item_ids), AVAILABLE, dtype=np.int8))
    pool.data.item_draw.extend(np.full(len(item_ids), -1, dtype=np.int64))
    pool.data.index_items(start, loss_bound=pool.loss_bound)
    pool.data.sums_items_added()


def apply_batch(
    pool: PoolState,
    batch: ItemBatch,
    *,
    scored_with: Surrogate,
    cold: SurrogateScores,
    current: SurrogateScores,
) -> tuple[IngestResult, list[Write]]:
    """Add the batch's new items to the pool (call with ``pool.lock`` held).

    ``current`` are the batch's scores under ``scored_with``; rescored here if a refit
    swapped the surrogate since. Returns the result and the durable writes to queue.
    """
    check_shape(pool, batch.features, batch.outputs)
    existing = pool.data.item_ids.rows_of(batch.item_ids)
    is_new = existing < 0
    problems: list[ItemProblem] = []
    duplicates = 0
    if not is_new.all():
        duplicates, problems = compare_duplicates(pool, batch, existing)
    new_positions = np.flatnonzero(is_new)
    accepted = int(new_positions.shape[0])
    writes: list[Write] = []
    if accepted:
        if pool.data.surrogate is not scored_with:
            current = pool.data.surrogate.score(batch.features, batch.outputs)
        received = now_ms()
        every = accepted == len(batch.item_ids)
        names = _pick(batch.segments, new_positions, every) if batch.segments else [""] * accepted
        new_codes, new_names = pool.data.add_segments(names)
        if new_codes:
            writes.append(store.insert_segments(pool.pool_id, new_codes, new_names))
        codes = np.array(list(map(pool.data.segment_codes.__getitem__, names)), dtype=np.int32)
        ingest_times = np.full(accepted, received, dtype=np.int64)
        event_times = (
            batch.event_time_ms[new_positions] if batch.event_time_ms is not None else ingest_times
        )
        payloads = (
            _pick(batch.payload_refs, new_positions, every)
            if batch.payload_refs
            else [""] * accepted
        )
        ids = _pick(batch.item_ids, new_positions, every)
        chunk = store.ItemChunk(
            start=pool.data.item_count,
            item_ids=ids,
            features=batch.features[new_positions],
            outputs=batch.outputs[new_positions],
            payload_refs=payloads,
            segments=codes,
            event_time_ms=event_times,
            ingest_time_ms=ingest_times,
        )
        writes.append(store.insert_items(pool.pool_id, chunk))

        def take(scores: SurrogateScores) -> SurrogateScores:
            return SurrogateScores(
                expected_loss=scores.expected_loss[new_positions],
                residual_second_moment=scores.residual_second_moment[new_positions],
                spread=scores.spread[new_positions],
                worst_squared_deviation=worst_squared_deviation_of(
                    scores, loss_bound=pool.loss_bound
                )[new_positions],
            )

        append_items(
            pool,
            ids,
            chunk.features,
            chunk.outputs,
            payloads,
            codes,
            event_times,
            ingest_times,
            cold=take(cold),
            current=take(current),
        )
        pool.touch()
    result = IngestResult(
        accepted=accepted,
        duplicates=duplicates,
        rejected=len(problems),
        errors=tuple(problems[:MAX_ITEM_ERRORS]),
        item_count=pool.data.item_count,
    )
    return result, writes


def _pick(values: list[str], positions: np.ndarray, every: bool) -> list[str]:
    """``values`` at ``positions``; the list itself when ``every`` position is taken."""
    return values if every else [values[i] for i in positions]


def _existing_rows(index: dict[str, int], item_ids: list[str]) -> np.ndarray:
    """Each id's row in the pool, -1 for a new id. A batch of only new ids (the usual
    case) costs one set-disjointness test in C instead of a lookup per id."""
    if index.keys().isdisjoint(item_ids):
        return np.full(len(item_ids), -1, dtype=np.int64)
    known = [index.get(item_id) for item_id in item_ids]
    return np.array([-1 if k is None else k for k in known], dtype=np.int64)


def compare_duplicates(
    pool: PoolState, batch: ItemBatch, existing: np.ndarray
) -> tuple[int, list[ItemProblem]]:
    """Count identical re-sent items; list the conflicting ones (vectorised compare)."""
    positions = np.flatnonzero(existing >= 0)
    rows = existing[positions]
    same_features = np.all(pool.data.features.view[rows] == batch.features[positions], axis=1)
    outputs_stored = pool.data.outputs.view[rows]
    outputs_sent = batch.outputs[positions]
    if outputs_stored.ndim == 2:
        same_outputs = np.all(outputs_stored == outputs_sent, axis=1)
    else:
        same_outputs = outputs_stored == outputs_sent
    checks: list[tuple[str, np.ndarray]] = [
        ("features", same_features),
        ("model_outputs", same_outputs),
    ]
    if batch.payload_refs is not None:
        stored = [pool.data.payload_refs[r] for r in rows]
        sent = [batch.payload_refs[p] for p in positions]
        same = [a == b for a, b in zip(stored, sent, strict=True)]
        checks.append(("payload_refs", np.array(same, dtype=bool)))
    if batch.segments is not None:
        stored_codes = pool.data.segment.view[rows]
        sent_codes = np.array(
            [pool.data.segment_codes.get(batch.segments[p], -1) for p in positions]
        )
        checks.append(("segments", stored_codes == sent_codes))
    if batch.event_time_ms is not None:
        checks.append(
            ("event_time_ms", pool.data.event_time_ms.view[rows] == batch.event_time_ms[positions])
        )
    conflict_field = np.full(positions.shape, "", dtype=object)
    for name, same in reversed(checks):
        conflict_field[~same] = name
    problems = [
        ItemProblem(
            item_id=batch.item_ids[p],
            reason=(
                f"item_ids[{p}] = {batch.item_ids[p]!r}: already in the pool with a different "
                f"{name}; an item id may not change content (use a new id)."
            ),
            field=name,
            kind="InvalidArgument",
        )
        for p, name in zip(positions, conflict_field, strict=True)
        if name
    ]
    return int(positions.shape[0]) - len(problems), problems


def append_validation(
    pool: PoolState,
    item_ids: list[str],
    features: np.ndarray,
    outputs: np.ndarray,
    labels: np.ndarray,
    segments: list[str],
) -> None:
    start = pool.data.validation_count
    pool.data.validation_ids.extend(item_ids)
    pool.data.validation_index.update(
        zip(item_ids, range(start, start + len(item_ids)), strict=True)
    )
    pool.data.validation_features.extend(features)
    pool.data.validation_outputs.extend(outputs)
    pool.data.validation_labels.extend(labels)
    pool.data.validation_segments.extend(segments)


def apply_validation(pool: PoolState, batch: ValidationItems) -> tuple[IngestResult, list[Write]]:
    """Add the batch's new validation items (call with ``pool.lock`` held).

    Same semantics as :func:`apply_batch`: identical re-sent ids are duplicates, an id
    re-sent with different content is rejected per item, the rest is kept. The result's
    ``item_count`` is the pool's validation count after the batch. Nothing here touches
    the pool's items, scores or estimates, so the query caches stay valid.
    """
    check_shape(pool, batch.features, batch.outputs)
    existing = _existing_rows(pool.data.validation_index, batch.item_ids)
    problems: list[ItemProblem] = []
    duplicates = 0
    if (existing >= 0).any():
        duplicates, problems = _compare_validation(pool, batch, existing)
    new_positions = np.flatnonzero(existing < 0)
    accepted = int(new_positions.shape[0])
    writes: list[Write] = []
    if accepted:
        ids = [batch.item_ids[i] for i in new_positions]
        segments = [batch.segments[i] for i in new_positions] if batch.segments else [""] * accepted
        chunk = store.ValidationChunk(
            start=pool.data.validation_count,
            item_ids=ids,
            features=batch.features[new_positions],
            outputs=batch.outputs[new_positions],
            labels=batch.labels[new_positions],
            segments=segments,
            ingest_time_ms=np.full(accepted, now_ms(), dtype=np.int64),
        )
        writes.append(store.insert_validation_items(pool.pool_id, chunk))
        append_validation(pool, ids, chunk.features, chunk.outputs, chunk.labels, segments)
    result = IngestResult(
        accepted=accepted,
        duplicates=duplicates,
        rejected=len(problems),
        errors=tuple(problems[:MAX_ITEM_ERRORS]),
        item_count=pool.data.validation_count,
    )
    return result, writes


def _compare_validation(
    pool: PoolState, batch: ValidationItems, existing: np.ndarray
) -> tuple[int, list[ItemProblem]]:
    """Count identical re-sent validation items; list the conflicting ones."""
    positions = np.flatnonzero(existing >= 0)
    rows = existing[positions]
    same_features = np.all(
        pool.data.validation_features.view[rows] == batch.features[positions], axis=1
    )
    stored = pool.data.validation_outputs.view[rows]
    sent = batch.outputs[positions]
    same_outputs = np.all(stored == sent, axis=1) if stored.ndim == 2 else stored == sent
    label_field = "class_labels" if pool.settings.is_classification else "values"
    checks: list[tuple[str, np.ndarray]] = [
        ("features", same_features),
        ("model_outputs", same_outputs),
        (label_field, pool.data.validation_labels.view[rows] == batch.labels[positions]),
    ]
    if batch.segments is not None:
        same = [
            pool.data.validation_segments[r] == batch.segments[p]
            for r, p in zip(rows, positions, strict=True)
        ]
        checks.append(("segments", np.array(same, dtype=bool)))
    conflict_field = np.full(positions.shape, "", dtype=object)
    for name, same_values in reversed(checks):
        conflict_field[~same_values] = name
    problems = [
        ItemProblem(
            item_id=batch.item_ids[p],
            reason=(
                f"item_ids[{p}] = {batch.item_ids[p]!r}: already among the pool's validation "
                f"items with a different {name}; an item id may not change content (use a "
                "new id)."
            ),
            field=name,
            kind="InvalidArgument",
        )
        for p, name in zip(positions, conflict_field, strict=True)
        if name
    ]
    return int(positions.shape[0]) - len(problems), problems
