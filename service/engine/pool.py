"""One pool's settings and in-memory state (numpy arrays rebuilt from SQLite at start-up).

All mutation happens under ``PoolState.lock``; readers take the lock too while they gather
arrays, then compute outside it where they can.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from leadline.service.engine.columns import Column
from leadline.service.estimation import (
    EstimatorMode,
    LossKind,
    LossSpec,
    Reliance,
    Surrogate,
    cold_start_surrogate,
)

__all__ = [
    "AVAILABLE",
    "DRAWN",
    "ITEM_LABELED",
    "ITEM_SKIPPED",
    "ASSIGNED",
    "LABELED",
    "SKIPPED",
    "WAITING",
    "DrawLog",
    "PoolSettings",
    "PoolState",
]

# Item status codes (PoolState.status).
AVAILABLE, DRAWN, ITEM_LABELED, ITEM_SKIPPED = 0, 1, 2, 3
# Draw status codes (DrawLog.status); numerically equal to the proto's DrawStatus values.
ASSIGNED, LABELED, SKIPPED, WAITING = 1, 2, 3, 4

_REQUEST_MEMORY = 4096


@dataclass(frozen=True, kw_only=True)
class PoolSettings:
    """What CreatePool fixed for the pool (validated by the API layer before)."""

    pool_id: str
    task: str  # "classification" or "regression"
    num_classes: int
    feature_dim: int
    loss: str  # a LossKind value
    cost_matrix: tuple[float, ...] = ()
    loss_cap: float = 0.0
    default_mode: str = "balanced"  # an EstimatorMode value
    description: str = ""
    selection_floor: float = 0.0  # 0 = server default
    default_lease_seconds: int = 0  # 0 = server default
    default_confidence: float = 0.0  # 0 = server default
    refit_every_labels: int = 0  # 0 = server default

    @property
    def is_classification(self) -> bool:
        return self.task == "classification"

    @property
    def output_width(self) -> int:
        return self.num_classes if self.is_classification else 1

    def loss_spec(self) -> LossSpec:
        kind = LossKind(self.loss)
        if self.is_classification:
            matrix = None
            if kind is LossKind.COST_MATRIX:
                matrix = np.asarray(self.cost_matrix, dtype=np.float64).reshape(
                    self.num_classes, self.num_classes
                )
            return LossSpec(kind=kind, num_classes=self.num_classes, cost_matrix=matrix)
        return LossSpec(kind=kind, loss_cap=self.loss_cap)

    @property
    def mode(self) -> EstimatorMode:
        return EstimatorMode(self.default_mode)

    @property
    def loss_bound(self) -> float:
        """B, the largest loss one item can have (what a gate's max_risk must stay below)."""
        return float(self.loss_spec().bound)

    def to_json(self) -> dict[str, Any]:
        data = asdict(self)
        data["cost_matrix"] = list(self.cost_matrix)
        return data

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> PoolSettings:
        values = dict(data)
        values["cost_matrix"] = tuple(float(v) for v in values.get("cost_matrix", ()))
        return cls(**values)


class DrawLog:
    """The pool's draws in draw order: what was logged at draw time plus the outcome."""

    def __init__(self) -> None:
        self.row = Column(np.int64)
        self.probability = Column(np.float64)
        self.remaining_count = Column(np.int64)
        self.remaining_expected_loss = Column(np.float64)
        self.remaining_by_segment: list[np.ndarray] = []
        self.correction_low = Column(np.float64)
        self.correction_high = Column(np.float64)
        self.min_probability = Column(np.float64)
        self.expected_loss = Column(np.float64)
        self.second_moment = Column(np.float64)
        self.surrogate_version = Column(np.int64)
        self.arrival_mark = Column(np.int64)
        self.draw_time_ms = Column(np.int64)
        self.status = Column(np.int8)
        self.lease_expire_ms = Column(np.int64)
        self.label = Column(np.float64, fill=np.nan)
        self.loss = Column(np.float64, fill=np.nan)
        self.label_time_ms = Column(np.int64)
        self.labeler: list[str] = []
        self.holder: list[str] = []
        self.assignment_id: list[str] = []
        self.skip_reason: list[str] = []

    def __len__(self) -> int:
        return self.row.size

    def append(self, records: list[dict[str, Any]]) -> None:
        """Append draws given as column dicts (the store's row format)."""
        if not records:
            return

        def column(name: str) -> np.ndarray:
            return np.array([r[name] for r in records])

        self.row.extend(column("row"))
        self.probability.extend(column("probability"))
        self.remaining_count.extend(column("remaining_count"))
        self.remaining_expected_loss.extend(column("remaining_expected_loss"))
        self.remaining_by_segment.extend(
            np.frombuffer(r["remaining_by_segment"], dtype=np.float64) for r in records
        )
        self.correction_low.extend(column("correction_low"))
        self.correction_high.extend(column("correction_high"))
        self.min_probability.extend(column("min_probability"))
        self.expected_loss.extend(column("expected_loss"))
        self.second_moment.extend(column("second_moment"))
        self.surrogate_version.extend(column("surrogate_version"))
        self.arrival_mark.extend(column("arrival_mark"))
        self.draw_time_ms.extend(column("draw_time_ms"))
        self.status.extend(column("status"))
        self.lease_expire_ms.extend(column("lease_expire_ms"))
        self.label.extend(np.array([np.nan if r["label"] is None else r["label"] for r in records]))
        self.loss.extend(np.array([np.nan if r["loss"] is None else r["loss"] for r in records]))
        self.label_time_ms.extend(column("label_time_ms"))
        self.labeler.extend(r["labeler"] for r in records)
        self.holder.extend(r["holder"] for r in records)
        self.assignment_id.extend(r["assignment_id"] for r in records)
        self.skip_reason.extend(r["skip_reason"] for r in records)

    def outcome_record(self, index: int) -> dict[str, Any]:
        """The mutable columns of draw ``index`` in the store's format."""
        label = float(self.label.view[index])
        loss = float(self.loss.view[index])
        return {
            "draw_index": index,
            "status": int(self.status.view[index]),
            "labeler": self.labeler[index],
            "holder": self.holder[index],
            "assignment_id": self.assignment_id[index],
            "lease_expire_ms": int(self.lease_expire_ms.view[index]),
            "label": None if np.isnan(label) else label,
            "loss": None if np.isnan(loss) else loss,
            "label_time_ms": int(self.label_time_ms.view[index]),
            "skip_reason": self.skip_reason[index],
        }


@dataclass
class PoolState:
    """Everything the server keeps in memory for one pool."""

    settings: PoolSettings
    seed: int
    create_time_ms: int
    spec: LossSpec = field(init=False)
    loss_bound: float = field(init=False)
    cold: Surrogate = field(init=False)
    surrogate: Surrogate = field(init=False)
    surrogate_label_count: int = 0
    #: The reliance guard's choice made with the surrogate in force (None: full reliance).
    reliance: Reliance | None = None
    last_fit_time: float = 0.0
    deleted: bool = False

    def __post_init__(self) -> None:
        self.spec = self.settings.loss_spec()
        self.loss_bound = float(self.spec.bound)
        self.cold = cold_start_surrogate(self.spec)
        self.surrogate = self.cold
        self.lock = threading.RLock()
        d = self.settings.feature_dim
        width = (self.settings.num_classes,) if self.settings.is_classification else ()
        self.item_ids: list[str] = []
        self.index: dict[str, int] = {}
        self.payload_refs: list[str] = []
        self.features = Column(np.float32, (d,))
        self.outputs = Column(np.float32, width)
        self.segment = Column(np.int32)
        self.event_time_ms = Column(np.int64)
        self.ingest_time_ms = Column(np.int64)
        self.g0 = Column(np.float64)  # label-free cold-start expected loss
        self.expected_loss = Column(np.float64)  # current surrogate g
        self.second_moment = Column(np.float64)  # current E[(L - g)^2]
        self.spread = Column(np.float64)
        self.worst_deviation = Column(np.float64)  # max (L - g)^2: the selection hedge
        self.status = Column(np.int8)
        self.item_draw = Column(np.int64, fill=-1)
        self.segment_names: list[str] = []
        self.segment_codes: dict[str, int] = {}
        self.draws = DrawLog()
        self.assignments: dict[str, int] = {}
        # Validation items: labeled rows from outside the pool that only the surrogate
        # sees (never drawn, never in an estimate, a scope or the item count).
        self.validation_ids: list[str] = []
        self.validation_index: dict[str, int] = {}
        self.validation_features = Column(np.float32, (d,))
        self.validation_outputs = Column(np.float32, width)
        self.validation_labels = Column(np.float64)
        self.validation_segments: list[str] = []
        # Notified (under ``lock``) whenever a refit ends: a draw waiting for the surrogate
        # to cover newly added validation items waits on it.
        self.refit_done = threading.Condition(self.lock)
        # Bumped on every change that can move an estimate; keys the query cache.
        self.state_version = 0
        self.cache: dict[Any, Any] = {}
        self.requests: OrderedDict[tuple[str, str, str], Any] = OrderedDict()
        self.refitting = False
        # Label and validation-item counts at the last failed refit (-1: none failed).
        self.failed_fit_labels = -1
        self.failed_fit_validation = -1
        # The store lane of this pool's writes (see Database.submit) and the number of
        # reloads after a failed write: a write remembers the epoch it was queued in.
        self.lane = object()
        self.epoch = 0
        # Set after a failed write until the reload from the store succeeds.
        self.reload_pending = False

    # Attributes that survive a reload: the lock and lane (other threads hold them), the
    # refit bookkeeping (a refit may be running), the counters that key caches.
    _KEPT_ON_RELOAD = frozenset(
        {
            "lock",
            "refit_done",
            "lane",
            "epoch",
            "state_version",
            "refitting",
            "failed_fit_labels",
            "failed_fit_validation",
            "last_fit_time",
        }
    )

    def reliance_for(self, floor: float) -> Reliance:
        """The reliance in force, its floor at least ``floor`` (the configured minimum)."""
        if self.reliance is None:
            return Reliance(floor=floor)
        return Reliance(
            coefficient=self.reliance.coefficient,
            constant=self.reliance.constant,
            floor=max(self.reliance.floor, floor),
        )

    def adopt(self, fresh: PoolState) -> None:
        """Take over ``fresh``'s state (rebuilt from the store) in place; caller holds the lock.

        The object stays the same, so threads holding a reference (or waiting for the lock)
        see the reloaded state; the epoch and state version move on, caches and remembered
        request futures are dropped.
        """
        for name, value in fresh.__dict__.items():
            if name not in self._KEPT_ON_RELOAD:
                setattr(self, name, value)
        self.epoch += 1
        self.touch()

    @property
    def pool_id(self) -> str:
        return self.settings.pool_id

    @property
    def item_count(self) -> int:
        return len(self.item_ids)

    @property
    def surrogate_version(self) -> int:
        return int(self.surrogate.version)

    @property
    def validation_count(self) -> int:
        return len(self.validation_ids)

    def validation_refit_pending(self) -> bool:
        """Validation items arrived that the current surrogate was not fitted on, and no
        refit failed on exactly these (a failed one is retried only after more arrive)."""
        count = self.validation_count
        return count > self.surrogate.validation_count and count != self.failed_fit_validation

    def touch(self) -> None:
        self.state_version += 1
        self.cache.clear()

    def remember_request(self, key: tuple[str, str, str], value: Any) -> None:
        """Keep a (method, holder, request_id) call's (future, payload, epoch, digest,
        time_ms) at hand: the newest few thousand; older ones are read from the store."""
        self.requests[key] = value
        self.requests.move_to_end(key)
        while len(self.requests) > _REQUEST_MEMORY:
            self.requests.popitem(last=False)

    def forget_requests(self, *, before_ms: int) -> None:
        """Drop remembered calls made before ``before_ms`` (retention)."""
        stale = [key for key, value in self.requests.items() if value[4] < before_ms]
        for key in stale:
            del self.requests[key]

    def draw_counts(self) -> tuple[int, int, int]:
        """(labeled, pending, skipped) draws."""
        status = self.draws.status.view
        labeled = int(np.count_nonzero(status == LABELED))
        skipped = int(np.count_nonzero(status == SKIPPED))
        return labeled, len(status) - labeled - skipped, skipped

    def mark_drawn_items(self, start: int) -> None:
        """Set the item status of the items drawn from draw ``start`` on."""
        rows = self.draws.row.view[start:]
        status = self.draws.status.view[start:]
        item_status = np.full(rows.shape, DRAWN, dtype=np.int8)
        item_status[status == LABELED] = ITEM_LABELED
        item_status[status == SKIPPED] = ITEM_SKIPPED
        self.status.view[rows] = item_status
        self.item_draw.view[rows] = np.arange(start, start + rows.shape[0])

    def add_segments(self, names: list[str]) -> tuple[list[int], list[str]]:
        """Codes for new segment names, in first-seen order; returns the new (codes, names)."""
        new_codes: list[int] = []
        new_names: list[str] = []
        for name in names:
            if name not in self.segment_codes:
                code = len(self.segment_names)
                self.segment_codes[name] = code
                self.segment_names.append(name)
                new_codes.append(code)
                new_names.append(name)
        return new_codes, new_names
