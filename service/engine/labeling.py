"""Labeling: draws, leases, submissions, skips and releases of one pool.

Functions here run under the pool lock, check the request against the state first (nothing
changes if it is refused), then change memory and return the store writes to queue.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from leadline.service.engine.ingest import MAX_ITEM_ERRORS, now_ms
from leadline.service.engine.pool import (
    ASSIGNED,
    AVAILABLE,
    ITEM_LABELED,
    ITEM_SKIPPED,
    LABELED,
    SKIPPED,
    WAITING,
    PoolState,
)
from leadline.service.engine.results import AssignmentInfo, ItemProblem, LabelInput, OutcomeResult
from leadline.service.errors import (
    FailedPrecondition,
    InvalidArgument,
    NotFound,
    PermissionDenied,
    ServiceError,
)
from leadline.service.estimation import SurrogateScores, draw_batch, usefulness
from leadline.service.store import records as store
from leadline.service.store.records import Write

__all__ = ["acquire", "release", "submit"]


def acquire(
    pool: PoolState,
    *,
    count: int,
    labeler: str,
    holder: str,
    lease_seconds: int,
    floor: float,
) -> tuple[list[AssignmentInfo], list[Write]]:
    """Re-offer waiting draws first, then make new draws; each with a lease of
    ``lease_seconds`` (call with ``pool.lock`` held)."""
    now = now_ms()
    expire = now + 1000 * lease_seconds
    draws = pool.draws
    status = draws.status.view
    free = (status == WAITING) | ((status == ASSIGNED) & (draws.lease_expire_ms.view <= now))
    reoffer = np.flatnonzero(free)[:count]
    updates: list[dict[str, Any]] = []
    chosen: list[int] = []
    for index in reoffer.tolist():
        old = draws.assignment_id[index]
        pool.assignments.pop(old, None)
        assignment = _new_assignment_id(index)
        draws.status.view[index] = ASSIGNED
        draws.labeler[index] = labeler
        draws.holder[index] = holder
        draws.assignment_id[index] = assignment
        draws.lease_expire_ms.view[index] = expire
        pool.assignments[assignment] = index
        updates.append(draws.outcome_record(index))
        chosen.append(index)
    writes: list[Write] = []
    if updates:
        writes.append(store.update_draws(pool.pool_id, updates))
    wanted = count - len(chosen)
    if wanted > 0:
        records = _new_draws(pool, wanted, labeler, holder, now, expire, floor=floor)
        if records:
            start = len(draws)
            draws.append(records)
            pool.mark_drawn_items(start)
            for record in records:
                pool.assignments[record["assignment_id"]] = record["draw_index"]
            chosen.extend(r["draw_index"] for r in records)
            writes.append(store.insert_draws(pool.pool_id, records))
    if chosen:
        pool.touch()
    infos = [_assignment_info(pool, index) for index in chosen]
    return infos, writes


def submit(
    pool: PoolState, *, labeler: str, holder: str, labels: Sequence[LabelInput]
) -> tuple[OutcomeResult, list[Write]]:
    """Record labels and skips of held assignments; per-item problems come back listed
    (call with ``pool.lock`` held)."""
    now = now_ms()
    draws = pool.draws
    problems: list[ItemProblem] = []
    to_label: list[tuple[int, float]] = []
    to_skip: list[tuple[int, str]] = []
    noop = 0
    for position, submission in enumerate(labels):
        try:
            index = _held_draw(pool, submission.assignment_id, labeler, holder, position)
            outcome = _check_submission(pool, index, submission, position, now)
        except ServiceError as error:
            # An ended lease needs no write: acquire re-offers expired draws by their time.
            problems.append(_problem(pool, submission.assignment_id, error))
            continue
        if outcome == "noop":
            noop += 1
        elif submission.skip_reason is not None:
            to_skip.append((index, submission.skip_reason))
        else:
            label = (
                float(submission.class_label)
                if submission.class_label is not None
                else float(submission.value)  # type: ignore[arg-type]
            )
            to_label.append((index, label))
    changed: list[int] = []
    if to_label:
        indices = np.array([i for i, _ in to_label], dtype=np.int64)
        values = np.array([v for _, v in to_label], dtype=np.float64)
        rows = draws.row.view[indices]
        outputs = pool.outputs.view[rows].astype(np.float64)
        typed = values.astype(np.int64) if pool.settings.is_classification else values
        losses = np.asarray(pool.spec.losses(outputs, typed), dtype=np.float64)
        draws.status.view[indices] = LABELED
        draws.label.view[indices] = values
        draws.loss.view[indices] = losses
        draws.label_time_ms.view[indices] = now
        pool.status.view[rows] = ITEM_LABELED
        changed.extend(indices.tolist())
    for index, reason in to_skip:
        draws.status.view[index] = SKIPPED
        draws.skip_reason[index] = reason
        draws.label_time_ms.view[index] = now
        pool.status.view[int(draws.row.view[index])] = ITEM_SKIPPED
        changed.append(index)
    writes: list[Write] = []
    if changed:
        writes.append(store.update_draws(pool.pool_id, [draws.outcome_record(i) for i in changed]))
        pool.touch()
    result = OutcomeResult(
        accepted=len(to_label) + len(to_skip) + noop,
        errors=tuple(problems[:MAX_ITEM_ERRORS]),
        rejected=len(problems),
    )
    return result, writes


def release(
    pool: PoolState, *, labeler: str, holder: str, assignment_ids: Sequence[str]
) -> tuple[OutcomeResult, list[Write]]:
    """Give held assignments back unlabeled: they become WAITING and are re-offered first
    (call with ``pool.lock`` held). The lease ends at the release: ``lease_expire_ms``
    records when, so a late submission can say the assignment was released and when."""
    now = now_ms()
    draws = pool.draws
    problems: list[ItemProblem] = []
    changed: list[int] = []
    released = 0
    for position, assignment_id in enumerate(assignment_ids):
        try:
            index = _held_draw(pool, assignment_id, labeler, holder, position)
            status = int(draws.status.view[index])
            if status in (LABELED, SKIPPED):
                raise FailedPrecondition(
                    f"assignment_ids[{position}] = {assignment_id!r}: already "
                    f"{'labeled' if status == LABELED else 'skipped'}; nothing to release.",
                    field="assignment_ids",
                )
        except ServiceError as error:
            problems.append(_problem(pool, assignment_id, error))
            continue
        released += 1
        if status == ASSIGNED:
            draws.status.view[index] = WAITING
            draws.lease_expire_ms.view[index] = min(int(draws.lease_expire_ms.view[index]), now)
            changed.append(index)
    writes: list[Write] = []
    if changed:
        writes.append(store.update_draws(pool.pool_id, [draws.outcome_record(i) for i in changed]))
        pool.touch()
    result = OutcomeResult(
        accepted=released, errors=tuple(problems[:MAX_ITEM_ERRORS]), rejected=len(problems)
    )
    return result, writes


def _new_assignment_id(draw_index: int) -> str:
    return f"d{draw_index}-{secrets.token_hex(6)}"


def _assignment_info(pool: PoolState, index: int) -> AssignmentInfo:
    draws = pool.draws
    row = int(draws.row.view[index])
    return AssignmentInfo(
        assignment_id=draws.assignment_id[index],
        item_id=pool.item_ids[row],
        payload_ref=pool.payload_refs[row],
        lease_expire_time_ms=int(draws.lease_expire_ms.view[index]),
        selection_probability=float(draws.probability.view[index]),
        draw_index=index,
        segment=pool.segment_names[int(pool.segment.view[row])],
    )


def _new_draws(
    pool: PoolState,
    wanted: int,
    labeler: str,
    holder: str,
    now: int,
    expire: int,
    *,
    floor: float,
) -> list[dict[str, Any]]:
    """Up to ``wanted`` new draws from the unlabeled, unassigned items, as store records.

    The generator is seeded by the pool's seed and the draw count, so the same history
    replays the same draws."""
    candidates = np.flatnonzero(pool.status.view == AVAILABLE)
    k = min(wanted, int(candidates.shape[0]))
    if k == 0:
        return []
    g = pool.expected_loss.view[candidates]
    surrogate_scores = SurrogateScores(
        expected_loss=g,
        residual_second_moment=pool.second_moment.view[candidates],
        spread=pool.spread.view[candidates],
        worst_squared_deviation=pool.worst_deviation.view[candidates],
    )
    # The reliance guard chose, at the last refit, the control variate h (g shrunk towards
    # a constant) and the floor from the labels of that time: fixed before these draws.
    reliance = pool.reliance_for(floor)
    scores = reliance.apply(surrogate_scores, loss_bound=pool.loss_bound)
    h = scores.expected_loss
    worst = scores.worst_squared_deviation
    assert worst is not None
    # The hedged rule: the label-efficiency benchmark measured it against the plain one.
    u = usefulness(scores, loss_bound=pool.loss_bound)
    start = len(pool.draws)
    rng = np.random.default_rng([pool.seed, start])
    batch = draw_batch(
        u,
        h,
        k,
        floor=reliance.floor,
        loss_bound=pool.loss_bound,
        rng=rng,
        groups=pool.segment.view[candidates].astype(np.int64),
        num_groups=len(pool.segment_names),
        # Each item's own reach |L - h| narrows the anytime bound's per-draw ranges.
        max_deviation=np.sqrt(worst),
    )
    rows = candidates[batch.positions]
    by_group = batch.remaining_expected_loss_by_group
    version = pool.surrogate_version
    records = []
    for j in range(k):
        index = start + j
        records.append(
            {
                "draw_index": index,
                "row": int(rows[j]),
                # The last remaining item's probability can exceed 1 by rounding
                # (1 + 1e-14); the core's term check wants (0, 1].
                "probability": min(float(batch.probabilities[j]), 1.0),
                "remaining_count": int(batch.remaining_counts[j]),
                "remaining_expected_loss": float(batch.remaining_expected_loss[j]),
                "remaining_by_segment": (
                    b"" if by_group is None else np.asarray(by_group[j], np.float64).tobytes()
                ),
                "correction_low": float(batch.correction_low[j]),
                "correction_high": float(batch.correction_high[j]),
                "min_probability": min(float(batch.min_probability[j]), 1.0),
                "expected_loss": float(h[batch.positions[j]]),
                "second_moment": float(scores.residual_second_moment[batch.positions[j]]),
                "surrogate_version": version,
                "arrival_mark": pool.item_count,
                "draw_time_ms": now,
                "status": ASSIGNED,
                "labeler": labeler,
                "holder": holder,
                "assignment_id": _new_assignment_id(index),
                "lease_expire_ms": expire,
                "label": None,
                "loss": None,
                "label_time_ms": 0,
                "skip_reason": "",
            }
        )
    return records


def _held_draw(
    pool: PoolState, assignment_id: str, labeler: str, holder: str, position: int
) -> int:
    index = pool.assignments.get(assignment_id)
    if index is None:
        raise NotFound(
            f"labels[{position}].assignment_id = {assignment_id!r}: no such assignment in "
            f"pool {pool.pool_id!r} (after a release or an ended lease the item is "
            "re-offered under a new assignment id).",
            field="assignment_id",
        )
    draws = pool.draws
    if draws.labeler[index] != labeler or draws.holder[index] != holder:
        raise PermissionDenied(
            f"labels[{position}].assignment_id = {assignment_id!r}: held by another labeler; "
            "a labeler may submit or release only its own assignments.",
            field="assignment_id",
        )
    return index


def _check_submission(
    pool: PoolState, index: int, submission: LabelInput, position: int, now: int
) -> str:
    """'apply' or 'noop'; raises a ServiceError if the submission cannot be applied."""
    draws = pool.draws
    status = int(draws.status.view[index])
    name = f"labels[{position}]"
    settings = pool.settings
    if submission.skip_reason is None:
        if settings.is_classification:
            if submission.class_label is None:
                raise InvalidArgument(
                    f"{name}.value: pool {pool.pool_id!r} is a classification pool; "
                    "send class_label.",
                    field="class_label",
                )
            if not 0 <= submission.class_label < settings.num_classes:
                raise InvalidArgument(
                    f"{name}.class_label = {submission.class_label}: must be in "
                    f"0..{settings.num_classes - 1}.",
                    field="class_label",
                )
            label = float(submission.class_label)
        else:
            if submission.value is None:
                raise InvalidArgument(
                    f"{name}.class_label: pool {pool.pool_id!r} is a regression pool; send value.",
                    field="value",
                )
            if not np.isfinite(submission.value):
                raise InvalidArgument(
                    f"{name}.value = {submission.value}: must be finite.", field="value"
                )
            label = float(submission.value)
        if status == LABELED:
            if float(draws.label.view[index]) == label:
                return "noop"
            raise FailedPrecondition(
                f"{name}: item {pool.item_ids[int(draws.row.view[index])]!r} is already "
                f"labeled {draws.label.view[index]:g}; a different label ({label:g}) is "
                "refused.",
                field="label",
            )
    else:
        if status == SKIPPED:
            return "noop"
    if status == LABELED:
        raise FailedPrecondition(
            f"{name}: the item is already labeled; it cannot be skipped.", field="label"
        )
    if status == SKIPPED:
        raise FailedPrecondition(
            f"{name}: the item was skipped ({draws.skip_reason[index]!r}); it cannot be "
            "labeled now.",
            field="label",
        )
    lease_end = int(draws.lease_expire_ms.view[index])
    if status == WAITING:
        # Only a release makes a held draw WAITING; it set lease_expire_ms to its time.
        raise FailedPrecondition(
            f"{name}.assignment_id = {submission.assignment_id!r}: released at "
            f"{_when(lease_end)} and went back to be re-offered, so it no longer takes a "
            "label; acquire again.",
            field="lease",
        )
    if lease_end <= now:
        raise FailedPrecondition(
            f"{name}.assignment_id = {submission.assignment_id!r}: its lease ended at "
            f"{_when(lease_end)} and the item went back to be re-offered; acquire again "
            "(or ask for a longer lease_seconds).",
            field="lease",
        )
    return "apply"


def _when(ms: int) -> str:
    """A unix-ms time as people read it, with the number for tools."""
    readable = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(ms / 1000))
    return f"{readable} ({ms} unix ms)"


def _problem(pool: PoolState, assignment_id: str, error: ServiceError) -> ItemProblem:
    index = pool.assignments.get(assignment_id)
    item_id = "" if index is None else pool.item_ids[int(pool.draws.row.view[index])]
    return ItemProblem(
        item_id=item_id,
        reason=error.message,
        field=error.field or "assignment_id",
        kind=type(error).__name__,
    )
