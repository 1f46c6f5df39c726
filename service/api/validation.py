"""Check requests at the boundary and turn them into the engine's plain values.

Every refusal is an InvalidArgument (or ResourceExhausted for size limits) whose message
names the field, shows the value and states the rule.
"""

from __future__ import annotations

import math
import re
from typing import Any

import numpy as np

from leadline.service.api.vocabulary import BOUNDS, LOSSES, MODES, TASKS
from leadline.service.config import ServerConfig
from leadline.service.engine import ItemBatch, LabelInput, PoolSettings, Scope, ValidationItems
from leadline.service.errors import InvalidArgument, ResourceExhausted
from leadline.service.estimation import BoundKind, EstimatorMode
from leadline.v1 import leadline_pb2 as pb
from leadline.v1.rules import max_risk_problem

__all__ = [
    "MAX_ACQUIRE",
    "MAX_LEASE_SECONDS",
    "PROBABILITY_TOLERANCE",
    "check_acquire",
    "check_bound",
    "check_confidence",
    "check_labels",
    "check_labeler",
    "check_max_risk",
    "check_mode",
    "check_page_size",
    "check_release",
    "check_request_id",
    "check_scope",
    "item_batch",
    "parse_pool_name",
    "pool_settings",
    "validation_batch",
]

POOL_ID_PATTERN = re.compile(r"[a-z][a-z0-9-]{0,62}")
PROBABILITY_TOLERANCE = 1e-3  # |sum of a row's probabilities - 1| allowed (proto comment)
MAX_ACQUIRE = 1000
MAX_SUBMIT = 1000
MAX_LEASE_SECONDS = 7 * 86400
MAX_ITEM_ID = 256
MAX_SEGMENT = 128
MAX_PAYLOAD_REF = 2048
MAX_LABELER = 128
MAX_REQUEST_ID = 128
MAX_SKIP_REASON = 512
MAX_CLASSES = 10_000
MAX_FEATURE_DIM = 100_000
MAX_DESCRIPTION = 2048


def _loss_name(value: int) -> str:
    return pb.LossKind.Name(value) if value in pb.LossKind.values() else str(value)


def _bad(field: str, message: str) -> InvalidArgument:
    return InvalidArgument(message, field=field)


def _text(field: str, value: str, *, max_length: int, required: bool = True) -> str:
    if not value:
        if required:
            raise _bad(field, f"{field} is empty: required, 1-{max_length} printable characters.")
        return value
    if len(value) > max_length or not value.isprintable():
        shown = value if len(value) <= 40 else value[:40] + "..."
        raise _bad(field, f"{field} = {shown!r}: must be 1-{max_length} printable characters.")
    return value


def parse_pool_name(name: str, *, field: str = "pool") -> str:
    """``pools/{pool_id}`` -> pool_id."""
    prefix, _, pool_id = name.partition("/")
    if prefix != "pools" or not POOL_ID_PATTERN.fullmatch(pool_id):
        raise _bad(
            field,
            f"{field} = {name!r}: must be 'pools/{{pool_id}}' with pool_id matching "
            "[a-z][a-z0-9-]{0,62}.",
        )
    return pool_id


def check_request_id(value: str, *, field: str = "request_id") -> str:
    return _text(field, value, max_length=MAX_REQUEST_ID, required=False)


def check_labeler(value: str) -> str:
    return _text("labeler", value, max_length=MAX_LABELER)


def pool_settings(pool_id: str, pool: pb.Pool, *, defaults: ServerConfig) -> PoolSettings:
    """Validate CreatePool's fields (output-only fields are ignored); messages name the
    server's ``defaults`` that a 0 stands for."""
    if not POOL_ID_PATTERN.fullmatch(pool_id):
        raise _bad("pool_id", f"pool_id = {pool_id!r}: must match [a-z][a-z0-9-]{{0,62}}.")
    if pool.task not in TASKS:
        raise _bad(
            "pool.task",
            f"pool.task = {pool.task}: must be TASK_TYPE_CLASSIFICATION or TASK_TYPE_REGRESSION.",
        )
    task = TASKS[pool.task]
    if not 1 <= pool.feature_dim <= MAX_FEATURE_DIM:
        raise _bad(
            "pool.feature_dim",
            f"pool.feature_dim = {pool.feature_dim}: must be in 1..{MAX_FEATURE_DIM}.",
        )
    cost: tuple[float, ...] = ()
    if task == "classification":
        if not 2 <= pool.num_classes <= MAX_CLASSES:
            raise _bad(
                "pool.num_classes",
                f"pool.num_classes = {pool.num_classes}: a classification pool needs "
                f"2..{MAX_CLASSES} classes.",
            )
        kind = LOSSES.get(pool.loss)
        if kind is None or not kind.is_classification:
            raise _bad(
                "pool.loss",
                f"pool.loss = {_loss_name(pool.loss)}: a classification pool takes ZERO_ONE, "
                "CROSS_ENTROPY, BRIER or COST_MATRIX.",
            )
        loss = kind.value
        if pool.loss_cap != 0:
            raise _bad(
                "pool.loss_cap",
                f"pool.loss_cap = {pool.loss_cap}: applies to regression pools only; leave it 0.",
            )
        k = pool.num_classes
        if loss == "cost_matrix":
            values = np.asarray(pool.cost_matrix, dtype=np.float64)
            if values.shape[0] != k * k:
                raise _bad(
                    "pool.cost_matrix",
                    f"pool.cost_matrix has {values.shape[0]} values: needs num_classes^2 = "
                    f"{k * k} (row = predicted, column = true).",
                )
            if not np.all(np.isfinite(values)) or np.any(values < 0):
                raise _bad(
                    "pool.cost_matrix",
                    "pool.cost_matrix: every cost must be finite and >= 0.",
                )
            if not np.any(values > 0):
                raise _bad("pool.cost_matrix", "pool.cost_matrix: at least one cost must be > 0.")
            cost = tuple(float(v) for v in values)
        elif len(pool.cost_matrix):
            raise _bad(
                "pool.cost_matrix",
                f"pool.cost_matrix has {len(pool.cost_matrix)} values: only LOSS_KIND_COST_MATRIX "
                "takes a cost matrix.",
            )
    else:
        if pool.num_classes != 0:
            raise _bad(
                "pool.num_classes",
                f"pool.num_classes = {pool.num_classes}: a regression pool takes 0.",
            )
        kind = LOSSES.get(pool.loss)
        if kind is None or kind.is_classification:
            raise _bad(
                "pool.loss",
                f"pool.loss = {_loss_name(pool.loss)}: a regression pool takes SQUARED_ERROR or "
                "ABSOLUTE_ERROR.",
            )
        loss = kind.value
        if not (math.isfinite(pool.loss_cap) and pool.loss_cap > 0):
            raise _bad(
                "pool.loss_cap",
                f"pool.loss_cap = {pool.loss_cap}: a regression pool needs a finite cap > 0 "
                "(losses are clipped to [0, loss_cap]; bounds need it).",
            )
        if len(pool.cost_matrix):
            raise _bad("pool.cost_matrix", "pool.cost_matrix: regression pools take none.")
    mode = check_mode(pool.default_mode, field="pool.default_mode") or EstimatorMode.BALANCED
    if not (pool.selection_floor == 0 or 0 < pool.selection_floor <= 1):
        raise _bad(
            "pool.selection_floor",
            f"pool.selection_floor = {pool.selection_floor}: must be in (0, 1], or 0 for the "
            f"server default ({defaults.selection_floor:g}).",
        )
    if not 0 <= pool.default_lease_seconds <= MAX_LEASE_SECONDS:
        raise _bad(
            "pool.default_lease_seconds",
            f"pool.default_lease_seconds = {pool.default_lease_seconds}: must be in "
            f"0..{MAX_LEASE_SECONDS} (0 = the server default, {defaults.default_lease_seconds}).",
        )
    if not (pool.default_confidence == 0 or 0 < pool.default_confidence < 1):
        raise _bad(
            "pool.default_confidence",
            f"pool.default_confidence = {pool.default_confidence}: must be in (0, 1), or 0 for "
            f"the server default ({defaults.default_confidence:g}).",
        )
    if pool.refit_every_labels < 0:
        raise _bad(
            "pool.refit_every_labels",
            f"pool.refit_every_labels = {pool.refit_every_labels}: must be >= 0 "
            f"(0 = the server default, {defaults.refit_every_labels}).",
        )
    if len(pool.description) > MAX_DESCRIPTION:
        raise _bad(
            "pool.description",
            f"pool.description has {len(pool.description)} characters: at most {MAX_DESCRIPTION}.",
        )
    return PoolSettings(
        pool_id=pool_id,
        task=task,
        num_classes=pool.num_classes,
        feature_dim=pool.feature_dim,
        loss=loss,
        cost_matrix=cost,
        loss_cap=pool.loss_cap,
        default_mode=mode.value,
        description=pool.description,
        selection_floor=pool.selection_floor,
        default_lease_seconds=pool.default_lease_seconds,
        default_confidence=pool.default_confidence,
        refit_every_labels=pool.refit_every_labels,
    )


def _first(mask: Any) -> int:
    return int(np.flatnonzero(mask)[0])


def _all_fit(values: list[str], *, max_length: int, allow_empty: bool) -> bool:
    """Whether every string is printable and 0 (or 1) to ``max_length`` characters long.

    One pass in C over the joined strings (a string is printable when each of its
    characters is, so the joined one is printable exactly when every part is); the
    per-entry loops that name the first offender run only when this says no.
    """
    if not values:
        return True
    lengths = list(map(len, values))
    return (
        max(lengths) <= max_length
        and (allow_empty or min(lengths) > 0)
        and "".join(values).isprintable()
    )


def _strings(field: str, values: Any, n: int, *, max_length: int, allow_empty: bool) -> list[str]:
    items = list(values)
    if len(items) != n:
        raise _bad(
            field,
            f"{field} has {len(items)} entries for {n} item ids: optional columns are "
            "all-or-nothing (give none or one per item).",
        )
    if _all_fit(items, max_length=max_length, allow_empty=allow_empty):
        return items
    for position, value in enumerate(items):
        if (not value and not allow_empty) or len(value) > max_length or not value.isprintable():
            shown = value if len(value) <= 40 else value[:40] + "..."
            raise _bad(
                field,
                f"{field}[{position}] = {shown!r}: must be "
                f"{'0' if allow_empty else '1'}-{max_length} printable characters.",
            )
    return items


def _check_item_ids(values: Any, *, max_items: int) -> list[str]:
    ids = list(values)
    n = len(ids)
    if n == 0:
        raise _bad("item_ids", "item_ids is empty: a batch needs at least one item.")
    if n > max_items:
        raise ResourceExhausted(
            f"item_ids has {n} entries: at most {max_items} items per batch; split the batch.",
            field="item_ids",
        )
    fit = _all_fit(ids, max_length=MAX_ITEM_ID, allow_empty=False)
    for position, item_id in enumerate([] if fit else ids):
        if not item_id or len(item_id) > MAX_ITEM_ID or not item_id.isprintable():
            shown = item_id if len(item_id) <= 40 else item_id[:40] + "..."
            raise _bad(
                "item_ids",
                f"item_ids[{position}] = {shown!r}: an item id is 1-{MAX_ITEM_ID} printable "
                "characters.",
            )
    if len(set(ids)) != n:
        seen: set[str] = set()
        for position, item_id in enumerate(ids):
            if item_id in seen:
                raise _bad(
                    "item_ids",
                    f"item_ids[{position}] = {item_id!r}: repeated within the batch; each id "
                    "may appear once per batch.",
                )
            seen.add(item_id)
    return ids


def _check_features(values: Any, ids: list[str], settings: PoolSettings) -> np.ndarray:
    n = len(ids)
    d = settings.feature_dim
    features = np.asarray(values, dtype=np.float32)
    if features.shape[0] != n * d:
        raise _bad(
            "features",
            f"features has {features.shape[0]} values: expected n * feature_dim = {n} * {d} = "
            f"{n * d} (row-major).",
        )
    features = features.reshape(n, d)
    finite = np.isfinite(features).all(axis=1)
    if not finite.all():
        row = _first(~finite)
        raise _bad(
            "features",
            f"features of item {ids[row]!r} (row {row}): every value must be finite "
            "(no NaN or infinity).",
        )
    return features


def _check_outputs(values: Any, ids: list[str], settings: PoolSettings) -> np.ndarray:
    n = len(ids)
    outputs = np.asarray(values, dtype=np.float32)
    if settings.is_classification:
        k = settings.num_classes
        if outputs.shape[0] != n * k:
            raise _bad(
                "model_outputs",
                f"model_outputs has {outputs.shape[0]} values: expected n * num_classes = "
                f"{n} * {k} = {n * k} probabilities.",
            )
        outputs = outputs.reshape(n, k)
        in_range = (np.isfinite(outputs) & (outputs >= 0) & (outputs <= 1)).all(axis=1)
        if not in_range.all():
            row = _first(~in_range)
            raise _bad(
                "model_outputs",
                f"model_outputs of item {ids[row]!r} (row {row}): probabilities must be in [0, 1].",
            )
        wide = outputs.astype(np.float64)
        totals = wide.sum(axis=1)
        off = np.abs(totals - 1.0) > PROBABILITY_TOLERANCE
        if off.any():
            row = _first(off)
            raise _bad(
                "model_outputs",
                f"model_outputs of item {ids[row]!r} (row {row}) sum to {totals[row]:.6g}: each "
                f"row must sum to 1 within {PROBABILITY_TOLERANCE:g}.",
            )
        # Rows are renormalised to sum to 1 (the core checks sums to a tighter tolerance);
        # the stored outputs are the renormalised ones.
        return np.asarray((wide / totals[:, None]).astype(np.float32))
    if outputs.shape[0] != n:
        raise _bad(
            "model_outputs",
            f"model_outputs has {outputs.shape[0]} values: a regression pool takes one "
            f"prediction per item ({n}).",
        )
    finite_outputs = np.isfinite(outputs)
    if not finite_outputs.all():
        row = _first(~finite_outputs)
        raise _bad(
            "model_outputs",
            f"model_outputs of item {ids[row]!r} (row {row}) = {outputs[row]}: must be finite.",
        )
    return outputs


def item_batch(batch: pb.ItemBatch, settings: PoolSettings, *, max_items: int) -> ItemBatch:
    """Validate an ingest batch whole (nothing is written if any rule fails)."""
    ids = _check_item_ids(batch.item_ids, max_items=max_items)
    n = len(ids)
    features = _check_features(batch.features, ids, settings)
    outputs = _check_outputs(batch.model_outputs, ids, settings)
    payload_refs = (
        _strings(
            "payload_refs", batch.payload_refs, n, max_length=MAX_PAYLOAD_REF, allow_empty=True
        )
        if len(batch.payload_refs)
        else None
    )
    segments = (
        _strings("segments", batch.segments, n, max_length=MAX_SEGMENT, allow_empty=True)
        if len(batch.segments)
        else None
    )
    event_times = None
    if len(batch.event_time_ms):
        event_times = np.asarray(batch.event_time_ms, dtype=np.int64)
        if event_times.shape[0] != n:
            raise _bad(
                "event_time_ms",
                f"event_time_ms has {event_times.shape[0]} entries for {n} item ids: optional "
                "columns are all-or-nothing (give none or one per item).",
            )
        if np.any(event_times <= 0):
            row = _first(event_times <= 0)
            raise _bad(
                "event_time_ms",
                f"event_time_ms[{row}] = {event_times[row]}: must be > 0 (unix milliseconds).",
            )
    return ItemBatch(
        item_ids=ids,
        features=features,
        outputs=outputs,
        payload_refs=payload_refs,
        segments=segments,
        event_time_ms=event_times,
    )


def validation_batch(
    batch: pb.ValidationBatch, settings: PoolSettings, *, max_items: int
) -> ValidationItems:
    """Validate an AddValidationItems batch whole (nothing is written if any rule fails):
    the ingest rules, plus exactly one label column by task (class_labels for
    classification, values for regression), one label per item."""
    ids = _check_item_ids(batch.item_ids, max_items=max_items)
    n = len(ids)
    features = _check_features(batch.features, ids, settings)
    outputs = _check_outputs(batch.model_outputs, ids, settings)
    pool = f"pool 'pools/{settings.pool_id}'"
    if settings.is_classification:
        if len(batch.values):
            raise _bad(
                "values",
                f"values has {len(batch.values)} entries: {pool} is a classification pool; "
                "send the labels as class_labels and leave values empty.",
            )
        if len(batch.class_labels) != n:
            raise _bad(
                "class_labels",
                f"class_labels has {len(batch.class_labels)} entries for {n} item ids: a "
                "classification pool needs one class label per item.",
            )
        labels = np.asarray(batch.class_labels, dtype=np.int64)
        k = settings.num_classes
        outside = (labels < 0) | (labels >= k)
        if outside.any():
            row = _first(outside)
            raise _bad(
                "class_labels",
                f"class_labels[{row}] = {labels[row]} (item {ids[row]!r}): must be in 0..{k - 1}.",
            )
    else:
        if len(batch.class_labels):
            raise _bad(
                "class_labels",
                f"class_labels has {len(batch.class_labels)} entries: {pool} is a regression "
                "pool; send the targets as values and leave class_labels empty.",
            )
        if len(batch.values) != n:
            raise _bad(
                "values",
                f"values has {len(batch.values)} entries for {n} item ids: a regression pool "
                "needs one target value per item.",
            )
        labels = np.asarray(batch.values, dtype=np.float64)
        finite = np.isfinite(labels)
        if not finite.all():
            row = _first(~finite)
            raise _bad(
                "values",
                f"values[{row}] = {labels[row]} (item {ids[row]!r}): must be finite.",
            )
    segments = (
        _strings("segments", batch.segments, n, max_length=MAX_SEGMENT, allow_empty=True)
        if len(batch.segments)
        else None
    )
    return ValidationItems(
        item_ids=ids,
        features=features,
        outputs=outputs,
        labels=labels.astype(np.float64),
        segments=segments,
    )


def check_acquire(request: pb.AcquireItemsRequest) -> None:
    if not 1 <= request.count <= MAX_ACQUIRE:
        raise _bad("count", f"count = {request.count}: must be in 1..{MAX_ACQUIRE}.")
    check_labeler(request.labeler)
    if not 0 <= request.lease_seconds <= MAX_LEASE_SECONDS:
        raise _bad(
            "lease_seconds",
            f"lease_seconds = {request.lease_seconds}: must be in 0..{MAX_LEASE_SECONDS} "
            "(0 = pool default).",
        )
    check_request_id(request.request_id)


def check_labels(request: pb.SubmitLabelsRequest) -> list[LabelInput]:
    check_labeler(request.labeler)
    check_request_id(request.request_id)
    if not request.labels:
        raise _bad("labels", "labels is empty: send at least one submission.")
    if len(request.labels) > MAX_SUBMIT:
        raise ResourceExhausted(
            f"labels has {len(request.labels)} entries: at most {MAX_SUBMIT} per call.",
            field="labels",
        )
    inputs: list[LabelInput] = []
    seen: set[str] = set()
    for position, submission in enumerate(request.labels):
        name = f"labels[{position}]"
        _text(f"{name}.assignment_id", submission.assignment_id, max_length=MAX_REQUEST_ID)
        if submission.assignment_id in seen:
            raise _bad(
                f"{name}.assignment_id",
                f"{name}.assignment_id = {submission.assignment_id!r}: repeated within the "
                "request.",
            )
        seen.add(submission.assignment_id)
        outcome = submission.WhichOneof("outcome")
        if outcome is None:
            raise _bad(
                f"{name}",
                f"{name}: set one of class_label, value or skip_reason.",
            )
        if outcome == "class_label":
            inputs.append(LabelInput(submission.assignment_id, class_label=submission.class_label))
        elif outcome == "value":
            if not math.isfinite(submission.value):
                raise _bad(f"{name}.value", f"{name}.value = {submission.value}: must be finite.")
            inputs.append(LabelInput(submission.assignment_id, value=submission.value))
        else:
            reason = submission.skip_reason
            _text(f"{name}.skip_reason", reason, max_length=MAX_SKIP_REASON)
            inputs.append(LabelInput(submission.assignment_id, skip_reason=reason))
    return inputs


def check_release(request: pb.ReleaseItemsRequest) -> list[str]:
    check_labeler(request.labeler)
    check_request_id(request.request_id)
    ids = list(request.assignment_ids)
    if not ids:
        raise _bad("assignment_ids", "assignment_ids is empty: name at least one assignment.")
    if len(ids) > MAX_SUBMIT:
        raise ResourceExhausted(
            f"assignment_ids has {len(ids)} entries: at most {MAX_SUBMIT} per call.",
            field="assignment_ids",
        )
    for position, assignment_id in enumerate(ids):
        _text(f"assignment_ids[{position}]", assignment_id, max_length=MAX_REQUEST_ID)
    if len(set(ids)) != len(ids):
        raise _bad("assignment_ids", "assignment_ids: an assignment id appears twice.")
    return ids


def check_confidence(value: float, *, field: str = "confidence") -> float:
    if value == 0:
        return 0.0
    if not (math.isfinite(value) and 0 < value < 1):
        raise _bad(field, f"{field} = {value}: must be in (0, 1), or 0 for the pool default.")
    return float(value)


def check_max_risk(value: float, *, loss_bound: float, field: str = "max_risk") -> float:
    """A gate threshold in (0, B), B the pool's largest possible loss (leadline.v1.rules)."""
    problem = max_risk_problem(value, loss_bound=loss_bound, name=field)
    if problem is not None:
        raise _bad(field, problem)
    return float(value)


def check_mode(value: pb.EstimatorMode, *, field: str = "mode") -> EstimatorMode | None:
    """The estimator mode asked for; None (UNSPECIFIED) leaves the pool's default."""
    if value == pb.ESTIMATOR_MODE_UNSPECIFIED:
        return None
    if value not in MODES:
        raise _bad(field, f"{field} = {value}: unknown estimator mode.")
    return MODES[value]


def check_bound(value: pb.BoundKind) -> BoundKind:
    """The gate's bound; UNSPECIFIED means ANYTIME (a gate is polled: API.md)."""
    if value == pb.BOUND_KIND_UNSPECIFIED:
        return BoundKind.ANYTIME
    if value not in BOUNDS:
        raise _bad("bound", f"bound = {value}: unknown bound kind.")
    return BOUNDS[value]


def check_scope(segment: str, start_time_ms: int, end_time_ms: int) -> Scope:
    _text("segment", segment, max_length=MAX_SEGMENT, required=False)
    if start_time_ms < 0 or end_time_ms < 0:
        field = "start_time_ms" if start_time_ms < 0 else "end_time_ms"
        raise _bad(
            field, f"{field} = {min(start_time_ms, end_time_ms)}: must be >= 0 (0 = open end)."
        )
    if start_time_ms and end_time_ms and start_time_ms >= end_time_ms:
        raise _bad(
            "start_time_ms",
            f"start_time_ms = {start_time_ms}, end_time_ms = {end_time_ms}: the window "
            "[start, end) must not be empty (start < end).",
        )
    return Scope(segment=segment, start_time_ms=start_time_ms, end_time_ms=end_time_ms)


def check_page_size(value: int, *, default: int, maximum: int, field: str = "page_size") -> int:
    if value == 0:
        return default
    if not 1 <= value <= maximum:
        raise _bad(field, f"{field} = {value}: must be in 1..{maximum}, or 0 for {default}.")
    return int(value)
