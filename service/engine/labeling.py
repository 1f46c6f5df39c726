"""Labeling: draws, leases, submissions, skips and releases of one pool.

Functions here run under the pool lock, check the request against the state first (nothing
changes if it is refused), then change memory and return the store writes to queue.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Sequence

import numpy as np

from leadline.service.draws import DrawRecord, DrawStatus
from leadline.service.engine.ingest import MAX_ITEM_ERRORS, now_ms
from leadline.service.engine.ledger import select_from
from leadline.service.engine.pool import ITEM_LABELED, ITEM_SKIPPED, PoolState
from leadline.service.engine.results import AssignmentInfo, ItemProblem, LabelInput, OutcomeResult
from leadline.service.errors import (
    FailedPrecondition,
    InvalidArgument,
    NotFound,
    PermissionDenied,
    ServiceError,
)
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
    data = pool.data
    draws = data.draws
    status = draws.status.view
    free = (status == DrawStatus.WAITING) | (
        (status == DrawStatus.ASSIGNED) & (draws.lease_expire_ms.view <= now)
    )
    reoffer = np.flatnonzero(free)[:count]
    updates: list[DrawRecord] = []
    chosen: list[int] = []
    for index in reoffer.tolist():
        data.assignments.pop(draws.assignment_id[index], None)
        assignment = _new_assignment_id(index)
        draws.assign(
            index, labeler=labeler, holder=holder, assignment_id=assignment, lease_expire_ms=expire
        )
        data.assignments[assignment] = index
        updates.append(draws.at(index))
        chosen.append(index)
    writes: list[Write] = []
    if updates:
        writes.append(store.update_draws(pool.pool_id, updates))
    wanted = count - len(chosen)
    if wanted > 0:
        records = _new_draws(pool, wanted, labeler, holder, now, expire, floor=floor)
        if records:
            data.mark_drawn_items(records[0].draw_index)
            for record in records:
                data.assignments[record.assignment_id] = record.draw_index
            chosen.extend(r.draw_index for r in records)
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
    data = pool.data
    draws = data.draws
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
        outputs = data.outputs.view[rows].astype(np.float64)
        typed = values.astype(np.int64) if pool.settings.is_classification else values
        losses = np.asarray(pool.spec.losses(outputs, typed), dtype=np.float64)
        draws.set_labels(indices, values, losses, time_ms=now)
        data.status.view[rows] = ITEM_LABELED
        data.sums_rows_changed(rows)
        changed.extend(indices.tolist())
    for index, reason in to_skip:
        draws.skip(index, reason, time_ms=now)
        data.status.view[int(draws.row.view[index])] = ITEM_SKIPPED
        changed.append(index)
    writes: list[Write] = []
    if changed:
        writes.append(store.update_draws(pool.pool_id, [draws.at(i) for i in changed]))
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
    draws = pool.data.draws
    problems: list[ItemProblem] = []
    changed: list[int] = []
    released = 0
    for position, assignment_id in enumerate(assignment_ids):
        try:
            index = _held_draw(pool, assignment_id, labeler, holder, position)
            status = int(draws.status.view[index])
            if status in (DrawStatus.LABELED, DrawStatus.SKIPPED):
                raise FailedPrecondition(
                    f"assignment_ids[{position}] = {assignment_id!r}: already "
                    f"{'labeled' if status == DrawStatus.LABELED else 'skipped'}; nothing to "
                    "release.",
                    field="assignment_ids",
                )
        except ServiceError as error:
            problems.append(_problem(pool, assignment_id, error))
            continue
        released += 1
        if status == DrawStatus.ASSIGNED:
            draws.release(index, time_ms=now)
            changed.append(index)
    writes: list[Write] = []
    if changed:
        writes.append(store.update_draws(pool.pool_id, [draws.at(i) for i in changed]))
        pool.touch()
    result = OutcomeResult(
        accepted=released, errors=tuple(problems[:MAX_ITEM_ERRORS]), rejected=len(problems)
    )
    return result, writes


def _new_assignment_id(draw_index: int) -> str:
    return f"d{draw_index}-{secrets.token_hex(6)}"


def _assignment_info(pool: PoolState, index: int) -> AssignmentInfo:
    data = pool.data
    draws = data.draws
    row = int(draws.row.view[index])
    return AssignmentInfo(
        assignment_id=draws.assignment_id[index],
        item_id=data.item_ids[row],
        payload_ref=data.payload_refs[row],
        lease_expire_time_ms=int(draws.lease_expire_ms.view[index]),
        selection_probability=float(draws.probability.view[index]),
        draw_index=index,
        segment=data.segment_names[int(data.segment.view[row])],
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
) -> list[DrawRecord]:
    """Up to ``wanted`` new draws from the unlabeled, unassigned items, logged in the
    ledger (the new records come back for the store).

    The generator is seeded by the pool's seed and the draw count, so the same history
    replays the same draws. The pool's draw index makes them in O(k log N); the drawn
    items leave it."""
    data = pool.data
    index = data.drawing_index(loss_bound=pool.loss_bound, floor=floor)
    k = min(wanted, index.size)
    if k == 0:
        return []
    start = len(data.draws)
    selection = select_from(
        index,
        k,
        # The reliance guard chose, at the last refit, the control variate h (g shrunk
        # towards a constant) and the floor from the labels of that time: fixed before
        # these draws (the index holds h and the usefulness under it).
        reliance=data.reliance_for(floor),
        loss_bound=pool.loss_bound,
        rng=np.random.default_rng([pool.seed, start]),
        scores_at=data.scores_at,
    )
    return data.draws.record(
        selection,
        rows=selection.positions,
        surrogate_version=data.surrogate_version,
        arrival_mark=data.item_count,
        draw_time_ms=now,
        labeler=labeler,
        holder=holder,
        lease_expire_ms=expire,
        assignment_id=_new_assignment_id,
    )


def _held_draw(
    pool: PoolState, assignment_id: str, labeler: str, holder: str, position: int
) -> int:
    index = pool.data.assignments.get(assignment_id)
    if index is None:
        raise NotFound(
            f"labels[{position}].assignment_id = {assignment_id!r}: no such assignment in "
            f"pool {pool.pool_id!r} (after a release or an ended lease the item is "
            "re-offered under a new assignment id).",
            field="assignment_id",
        )
    draws = pool.data.draws
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
    draws = pool.data.draws
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
        if status == DrawStatus.LABELED:
            if float(draws.label.view[index]) == label:
                return "noop"
            raise FailedPrecondition(
                f"{name}: item {pool.data.item_ids[int(draws.row.view[index])]!r} is already "
                f"labeled {draws.label.view[index]:g}; a different label ({label:g}) is "
                "refused.",
                field="label",
            )
    else:
        if status == DrawStatus.SKIPPED:
            return "noop"
    if status == DrawStatus.LABELED:
        raise FailedPrecondition(
            f"{name}: the item is already labeled; it cannot be skipped.", field="label"
        )
    if status == DrawStatus.SKIPPED:
        raise FailedPrecondition(
            f"{name}: the item was skipped ({draws.skip_reason[index]!r}); it cannot be "
            "labeled now.",
            field="label",
        )
    lease_end = int(draws.lease_expire_ms.view[index])
    if status == DrawStatus.WAITING:
        # Only a release makes a held draw DrawStatus.WAITING; it set lease_expire_ms to its time.
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
    index = pool.data.assignments.get(assignment_id)
    item_id = "" if index is None else pool.data.item_ids[int(pool.data.draws.row.view[index])]
    return ItemProblem(
        item_id=item_id,
        reason=error.message,
        field=error.field or "assignment_id",
        kind=type(error).__name__,
    )
