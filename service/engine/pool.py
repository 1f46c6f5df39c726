"""One pool in memory: its fixed settings, a stable handle, and replaceable contents.

:class:`PoolState` is the handle every thread holds: the lock, the store lane, the epoch,
the query cache, remembered request ids and the refit bookkeeping. It never changes
identity. :class:`PoolData` is what the store can rebuild (items, scores, draws,
validation items, the surrogate): at start-up and after a failed write the engine reads a
fresh one and swaps it in whole (``handle.data = fresh``, :meth:`PoolState.replace_data`),
so a field added to the contents is rebuilt on reload by construction.

All mutation happens under ``PoolState.lock``; readers take the lock too while they gather
arrays, then compute outside it where they can.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from concurrent.futures import Future
from dataclasses import asdict, dataclass
from typing import Any, NamedTuple

import numpy as np

from leadline.service.draws import DrawStatus
from leadline.service.engine.columns import Column
from leadline.service.engine.item_ids import ItemIds
from leadline.service.engine.ledger import DrawLedger, build_index, index_rows
from leadline.service.engine.sums import RunningSums
from leadline.service.estimation import (
    DEFAULT_FLOOR,
    DrawIndex,
    EstimatorMode,
    LossKind,
    LossSpec,
    Reliance,
    Surrogate,
    SurrogateScores,
    cold_start_surrogate,
)

__all__ = [
    "AVAILABLE",
    "DRAWN",
    "ITEM_LABELED",
    "ITEM_SKIPPED",
    "PoolData",
    "PoolSettings",
    "PoolState",
    "PreparedIndex",
    "RememberedCall",
    "SCORE_DTYPE",
]

# Item status codes (PoolData.status).
AVAILABLE, DRAWN, ITEM_LABELED, ITEM_SKIPPED = 0, 1, 2, 3

# The per-item scores that only shape the selection (second moment, spread, worst squared
# deviation) are kept in float32: they enter q through the usefulness, and q is logged as
# computed, so their rounding (relative 6e-8) changes no estimate's validity; sums over
# them are accumulated in float64. The control variate g (``expected_loss``) and the
# cold-start g0 stay float64: they enter every estimate directly.
SCORE_DTYPE = np.float32

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


class PoolData:
    """A pool's contents as the store can rebuild them (see the module docstring)."""

    def __init__(self, settings: PoolSettings, cold: Surrogate) -> None:
        d = settings.feature_dim
        width = (settings.num_classes,) if settings.is_classification else ()
        # Ids by row and rows by id (ItemIds.rows_of), ~50 B per item.
        self.item_ids = ItemIds()
        self.payload_refs: list[str] = []
        self.features = Column(np.float32, (d,))
        self.outputs = Column(np.float32, width)
        self.segment = Column(np.int32)
        self.event_time_ms = Column(np.int64)
        self.ingest_time_ms = Column(np.int64)
        self.g0 = Column(np.float64)  # label-free cold-start expected loss
        self.expected_loss = Column(np.float64)  # current surrogate g
        self.second_moment = Column(SCORE_DTYPE)  # current E[(L - g)^2]
        self.spread = Column(SCORE_DTYPE)
        self.worst_deviation = Column(SCORE_DTYPE)  # max (L - g)^2: the selection hedge
        self.status = Column(np.int8)
        self.item_draw = Column(np.int32)  # draw index (< 2**31 draws per pool)
        self.segment_names: list[str] = []
        self.segment_codes: dict[str, int] = {}
        self.draws = DrawLedger()
        #: Sums over the items kept up to date by the three calls below (items added,
        #: rows changed, scores replaced), so a fresh estimate needs no pass over them.
        self.sums = RunningSums(labeled_status=ITEM_LABELED)
        self.assignments: dict[str, int] = {}
        # Validation items: labeled rows from outside the pool that only the surrogate
        # sees (never drawn, never in an estimate, a scope or the item count).
        self.validation_ids: list[str] = []
        self.validation_index: dict[str, int] = {}
        self.validation_features = Column(np.float32, (d,))
        self.validation_outputs = Column(np.float32, width)
        self.validation_labels = Column(np.float64)
        self.validation_segments: list[str] = []
        #: The surrogate in force (it knows the labels it was fitted on).
        self.surrogate: Surrogate = cold
        #: The reliance guard's choice made with the surrogate in force (None: full).
        self.reliance: Reliance | None = None
        #: The draw weights of the AVAILABLE items under the surrogate and reliance in
        #: force (None: built at the next draw). Rebuilt with every new surrogate.
        self.draw_index: DrawIndex | None = None

    @property
    def item_count(self) -> int:
        return len(self.item_ids)

    @property
    def surrogate_version(self) -> int:
        return int(self.surrogate.version)

    @property
    def validation_count(self) -> int:
        return len(self.validation_ids)

    def reliance_for(self, floor: float) -> Reliance:
        """The reliance in force, its floor at least ``floor`` (the configured minimum)."""
        if self.reliance is None:
            return Reliance(floor=floor)
        return Reliance(
            coefficient=self.reliance.coefficient,
            constant=self.reliance.constant,
            floor=max(self.reliance.floor, floor),
        )

    def adopt_scores(
        self,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        spread: np.ndarray,
        worst_deviation: np.ndarray,
        *,
        size: int,
    ) -> None:
        """Take a refit's score arrays as the score columns, their first ``size`` rows
        filled (caller holds the lock; no copy: the old arrays go once no view holds
        them)."""
        self.expected_loss.adopt(expected_loss, size)
        self.second_moment.adopt(second_moment, size)
        self.spread.adopt(spread, size)
        self.worst_deviation.adopt(worst_deviation, size)

    def scores_at(self, rows: np.ndarray) -> SurrogateScores:
        """The current surrogate's scores of pool ``rows``."""
        return SurrogateScores(
            expected_loss=self.expected_loss.view[rows],
            residual_second_moment=self.second_moment.view[rows],
            spread=self.spread.view[rows],
            worst_squared_deviation=self.worst_deviation.view[rows],
        )

    def drawing_index(self, *, loss_bound: float, floor: float = DEFAULT_FLOOR) -> DrawIndex:
        """The draw index, built now over every item (O(N)) if there is none; ``floor``
        only shapes its range buckets (each draw takes its own)."""
        if self.draw_index is None:
            n = self.item_count
            self.draw_index = build_index(
                self.scores_at(np.arange(n)),
                reliance=self.reliance_for(floor),
                loss_bound=loss_bound,
                present=self.status.view == AVAILABLE,
                groups=self.segment.view.astype(np.int64),
                num_groups=max(len(self.segment_names), 1),
            )
        return self.draw_index

    def index_items(self, start: int, *, loss_bound: float) -> None:
        """Items ``start``.. that are still AVAILABLE (scored with the surrogate in force)
        join the draw index, if there is one (O(r log N)). Only available ones: when a
        prepared index is installed, items that arrived after its snapshot may have been
        drawn meanwhile through the old index, and must not be drawn again."""
        if self.draw_index is None or start >= self.item_count:
            return
        rows = np.arange(start, self.item_count)
        rows = rows[self.status.view[rows] == AVAILABLE]
        if rows.size == 0:
            return
        index_rows(
            self.draw_index,
            rows,
            self.scores_at(rows),
            reliance=self.reliance_for(DEFAULT_FLOOR),
            loss_bound=loss_bound,
            groups=self.segment.view[rows].astype(np.int64),
        )

    def install_index(self, prepared: PreparedIndex | None, *, loss_bound: float) -> None:
        """Swap in an index prepared outside the lock (:meth:`PoolState.prepare_index`)
        for the scores and reliance just swapped in: the items drawn since it was prepared
        leave it, the items that arrived since join it (call with the lock held, after the
        new scores and reliance are in place). None: built at the next draw."""
        self.draw_index = None if prepared is None else prepared.index
        if prepared is None:
            return
        drawn = self.draws.row.view[prepared.draw_count :]
        prepared.index.remove(drawn[drawn < prepared.item_count])
        self.index_items(prepared.item_count, loss_bound=loss_bound)

    def mark_drawn_items(self, start: int) -> None:
        """Set the item status of the items drawn from draw ``start`` on."""
        rows = self.draws.row.view[start:]
        status = self.draws.status.view[start:]
        item_status = np.full(rows.shape, DRAWN, dtype=np.int8)
        item_status[status == DrawStatus.LABELED] = ITEM_LABELED
        item_status[status == DrawStatus.SKIPPED] = ITEM_SKIPPED
        self.status.view[rows] = item_status
        self.item_draw.view[rows] = np.arange(start, start + rows.shape[0])
        self.sums_rows_changed(rows[item_status == ITEM_LABELED])

    def sums_items_added(self) -> None:
        """Keep :attr:`sums` up to date after items were appended to the columns."""
        self.sums.add_items(
            g0=self.g0.view,
            expected_loss=self.expected_loss.view,
            second_moment=self.second_moment.view,
            status=self.status.view,
            segment=self.segment.view,
            num_segments=len(self.segment_names),
        )

    def sums_rows_changed(self, rows: np.ndarray) -> None:
        """Keep :attr:`sums` up to date after items ``rows`` changed status (labeled)."""
        if rows.shape[0]:
            self.sums.refresh_rows(
                rows,
                expected_loss=self.expected_loss.view,
                second_moment=self.second_moment.view,
                status=self.status.view,
                segment=self.segment.view,
            )

    def sums_scores_replaced(self) -> None:
        """Recompute :attr:`sums` after every item's scores were replaced (a refit)."""
        self.sums.rebuild(
            expected_loss=self.expected_loss.view,
            second_moment=self.second_moment.view,
            status=self.status.view,
            segment=self.segment.view,
            num_segments=len(self.segment_names),
        )

    def add_segments(self, names: list[str]) -> tuple[list[int], list[str]]:
        """Codes for new segment names, in first-seen order; returns the new (codes, names)."""
        new_codes: list[int] = []
        new_names: list[str] = []
        if self.segment_codes.keys() >= set(names):
            return new_codes, new_names  # the usual batch: only known names, one C pass
        for name in names:
            if name not in self.segment_codes:
                code = len(self.segment_names)
                self.segment_codes[name] = code
                self.segment_names.append(name)
                new_codes.append(code)
                new_names.append(name)
        return new_codes, new_names


@dataclass(frozen=True)
class PreparedIndex:
    """A draw index built outside the pool lock over the first ``item_count`` items as
    they were after ``draw_count`` draws (see :meth:`PoolData.install_index`)."""

    index: DrawIndex
    item_count: int
    draw_count: int


class RememberedCall(NamedTuple):
    """A write call with a request id, kept at hand for its retries: the commit it waits
    for (None: read back from the store), its encoded reply, the epoch it was queued in,
    the request's digest and when it was made (unix ms)."""

    future: Future[Any] | None
    payload: bytes
    epoch: int
    digest: str
    time_ms: int


class PoolState:
    """The stable handle of one pool (see the module docstring); ``data`` is replaceable."""

    def __init__(self, *, settings: PoolSettings, seed: int, create_time_ms: int) -> None:
        self.settings = settings
        self.seed = seed
        self.create_time_ms = create_time_ms
        self.spec = settings.loss_spec()
        self.loss_bound = float(self.spec.bound)
        self.cold = cold_start_surrogate(self.spec)
        self.lock = threading.RLock()
        # Notified (under ``lock``) whenever a refit ends: a draw waiting for the surrogate
        # to cover newly added validation items waits on it.
        self.refit_done = threading.Condition(self.lock)
        # The store lane of this pool's writes (see Database.submit) and the number of
        # reloads after a failed write: a write remembers the epoch it was queued in.
        self.lane = object()
        self.epoch = 0
        # Bumped on every change that can move an estimate; keys the query cache.
        self.state_version = 0
        self.cache: dict[Any, Any] = {}
        self.requests: OrderedDict[tuple[str, str, str], RememberedCall] = OrderedDict()
        # Refit bookkeeping (survives a reload: a refit may be running).
        self.refitting = False
        self.last_fit_time = 0.0
        # CPU seconds the last refit took: the next waits in proportion (refit.py).
        self.last_refit_cpu_seconds = 0.0
        # Label and validation-item counts at the last failed refit (-1: none failed).
        self.failed_fit_labels = -1
        self.failed_fit_validation = -1
        self.deleted = False
        # Set after a failed write until the reload from the store succeeds.
        self.reload_pending = False
        self.data = PoolData(settings, self.cold)

    def replace_data(self, fresh: PoolData) -> None:
        """Swap in contents rebuilt from the store (caller holds the lock): the epoch and
        the state version move on, caches and remembered request futures are dropped."""
        self.data = fresh
        self.requests.clear()
        self.epoch += 1
        self.touch()

    def prepare_index(
        self, scores: SurrogateScores, reliance: Reliance, *, floor: float
    ) -> PreparedIndex:
        """The draw index for new ``scores`` of the first items (as the score columns will
        hold them) and their ``reliance``, built outside the lock from a snapshot of which
        items are AVAILABLE (the lock is held only to copy it). Install it with the scores
        (:meth:`PoolData.install_index`)."""
        rows = scores.expected_loss.shape[0]
        with self.lock:
            data = self.data
            present = data.status.view[:rows] == AVAILABLE
            groups = data.segment.view[:rows].astype(np.int64)
            num_groups = max(len(data.segment_names), 1)
            draw_count = len(data.draws)
        index = build_index(
            scores,
            reliance=Reliance(
                coefficient=reliance.coefficient,
                constant=reliance.constant,
                floor=max(reliance.floor, floor),
            ),
            loss_bound=self.loss_bound,
            present=present,
            groups=groups,
            num_groups=num_groups,
        )
        return PreparedIndex(index=index, item_count=rows, draw_count=draw_count)

    @property
    def pool_id(self) -> str:
        return self.settings.pool_id

    def validation_refit_pending(self) -> bool:
        """Validation items arrived that the current surrogate was not fitted on, and no
        refit failed on exactly these (a failed one is retried only after more arrive)."""
        count = self.data.validation_count
        return count > self.data.surrogate.validation_count and count != self.failed_fit_validation

    def touch(self) -> None:
        self.state_version += 1
        self.cache.clear()

    def remember_request(self, key: tuple[str, str, str], call: RememberedCall) -> None:
        """Keep a (method, holder, request_id) call at hand: the newest few thousand;
        older ones are read from the store."""
        self.requests[key] = call
        self.requests.move_to_end(key)
        while len(self.requests) > _REQUEST_MEMORY:
            self.requests.popitem(last=False)

    def forget_requests(self, *, before_ms: int) -> None:
        """Drop remembered calls made before ``before_ms`` (retention)."""
        stale = [key for key, call in self.requests.items() if call.time_ms < before_ms]
        for key in stale:
            del self.requests[key]
