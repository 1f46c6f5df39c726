"""Per-pool orchestration: ingest -> score, acquire -> draws, labels -> refit, queries -> core.

The engine owns every pool's in-memory state and is the only caller of the store's writes.
Each write call follows one pattern, under the pool's lock: check the request against the
state (nothing changes if it is refused), change the in-memory state, queue the durable
write on the single writer; then, outside the lock, wait for that write's commit before
returning. The writer commits in queue order, so a reply never depends on data that is not
yet durable. A ``request_id`` is remembered with the result in the same transaction, so a
retry is answered from the first result (also after a restart).
"""

from __future__ import annotations

import hashlib
import logging
import secrets
import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from typing import Any

import numpy as np

from leadline.service.config import ServerConfig
from leadline.service.engine.pool import (
    ASSIGNED,
    AVAILABLE,
    DRAWN,
    ITEM_LABELED,
    ITEM_SKIPPED,
    LABELED,
    SKIPPED,
    WAITING,
    PoolSettings,
    PoolState,
)
from leadline.service.engine.results import (
    AssignmentInfo,
    DrawInfo,
    EstimateResult,
    GateOutcome,
    IngestResult,
    ItemBatch,
    ItemProblem,
    LabelInput,
    OutcomeResult,
    PoolInfo,
    decode_assignments,
    decode_ingest,
    decode_outcome,
    encode,
)
from leadline.service.engine.scopes import Scope, ScopeInputs, build_scope_inputs
from leadline.service.errors import (
    AlreadyExists,
    FailedPrecondition,
    InvalidArgument,
    NotFound,
    PermissionDenied,
    ServiceError,
    Unavailable,
)
from leadline.service.estimation import (
    DRAW_LABELED,
    BoundKind,
    EstimatorMode,
    Surrogate,
    SurrogateScores,
    SurrogateSettings,
    check_gate,
    draw_batch,
    estimate_risk,
    fit_surrogate,
    usefulness,
)
from leadline.service.store import Database
from leadline.service.store import records as store

__all__ = ["Engine"]

_LOG = logging.getLogger(__name__)

_MAX_ITEM_ERRORS = 20
_SCORE_CHUNK = 100_000


def now_ms() -> int:
    return int(time.time() * 1000)


def _combine(writes: Sequence[Callable[[sqlite3.Connection], Any]]) -> Callable[..., None]:
    def write(connection: sqlite3.Connection) -> None:
        for one in writes:
            one(connection)

    return write


def _score_rows(surrogate: Surrogate, features: np.ndarray, outputs: np.ndarray) -> SurrogateScores:
    """Score rows in chunks (bounded memory for a million items)."""
    n = features.shape[0]
    if n <= _SCORE_CHUNK:
        return surrogate.score(features, outputs)
    parts = [
        surrogate.score(features[i : i + _SCORE_CHUNK], outputs[i : i + _SCORE_CHUNK])
        for i in range(0, n, _SCORE_CHUNK)
    ]
    return SurrogateScores(
        expected_loss=np.concatenate([p.expected_loss for p in parts]),
        residual_second_moment=np.concatenate([p.residual_second_moment for p in parts]),
        spread=np.concatenate([p.spread for p in parts]),
    )


class Engine:
    """All pools of one data directory. Thread-safe; one instance per server."""

    def __init__(self, database: Database, config: ServerConfig) -> None:
        self._db = database
        self._config = config
        self._pools: dict[str, PoolState] = {}
        self._pools_lock = threading.Lock()
        self._closed = False
        self.refit_count = 0
        self.refit_seconds_total = 0.0

    # ------------------------------------------------------------------------------------
    # start-up
    # ------------------------------------------------------------------------------------
    def load(self) -> None:
        """Rebuild every pool's in-memory state from the database (start-up only)."""
        reader = self._db.reader()
        for row in store.load_pools(reader):
            started = time.monotonic()
            settings = PoolSettings.from_json(row.settings)
            pool = PoolState(settings=settings, seed=row.seed, create_time_ms=row.create_time_ms)
            for name in store.load_segments(reader, settings.pool_id):
                pool.add_segments([name])
            model = store.load_latest_model(reader, settings.pool_id)
            if model is not None:
                version, label_count, data = model
                pool.surrogate = Surrogate.from_bytes(pool.spec, data)
                pool.surrogate_label_count = label_count
            for chunk in store.load_items(
                reader,
                settings.pool_id,
                feature_dim=settings.feature_dim,
                output_width=settings.output_width,
            ):
                self._append_items(
                    pool,
                    chunk.item_ids,
                    chunk.features,
                    chunk.outputs,
                    chunk.payload_refs,
                    chunk.segments,
                    chunk.event_time_ms,
                    chunk.ingest_time_ms,
                    cold=pool.cold.score(chunk.features, chunk.outputs),
                    current=pool.surrogate.score(chunk.features, chunk.outputs),
                )
            draws = store.load_draws(reader, settings.pool_id)
            pool.draws.append(draws)
            for draw in draws:
                index = draw["draw_index"]
                pool.assignments[draw["assignment_id"]] = index
            self._mark_drawn_items(pool, 0)
            pool.last_fit_time = time.monotonic()
            with self._pools_lock:
                self._pools[settings.pool_id] = pool
            _LOG.info(
                "loaded pool %s: %d items, %d draws, surrogate version %d in %.2f s",
                settings.pool_id,
                pool.item_count,
                len(pool.draws),
                pool.surrogate_version,
                time.monotonic() - started,
            )

    def _mark_drawn_items(self, pool: PoolState, start: int) -> None:
        rows = pool.draws.row.view[start:]
        status = pool.draws.status.view[start:]
        item_status = np.full(rows.shape, DRAWN, dtype=np.int8)
        item_status[status == LABELED] = ITEM_LABELED
        item_status[status == SKIPPED] = ITEM_SKIPPED
        pool.status.view[rows] = item_status
        pool.item_draw.view[rows] = np.arange(start, start + rows.shape[0])

    # ------------------------------------------------------------------------------------
    # pools
    # ------------------------------------------------------------------------------------
    def pool(self, pool_id: str) -> PoolState:
        with self._pools_lock:
            pool = self._pools.get(pool_id)
        if pool is None or pool.deleted:
            raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
        return pool

    def pools(self) -> list[PoolState]:
        with self._pools_lock:
            return [self._pools[key] for key in sorted(self._pools)]

    def create_pool(self, settings: PoolSettings) -> PoolInfo:
        self._check_open()
        created = now_ms()
        if self._config.draw_seed:
            digest = hashlib.sha256(f"{self._config.draw_seed}:{settings.pool_id}".encode())
            seed = int.from_bytes(digest.digest()[:8], "big") >> 2
        else:
            seed = secrets.randbits(62)
        pool = PoolState(settings=settings, seed=seed, create_time_ms=created)
        with self._pools_lock:
            if settings.pool_id in self._pools:
                raise AlreadyExists(
                    f"pool_id = {settings.pool_id!r}: a pool with this id exists.",
                    field="pool_id",
                )
            self._pools[settings.pool_id] = pool
        row = store.PoolRow(settings.pool_id, settings.to_json(), pool.seed, created)
        try:
            self._db.write(store.insert_pool(row))
        except BaseException:
            with self._pools_lock:
                self._pools.pop(settings.pool_id, None)
            raise
        pool.last_fit_time = time.monotonic()
        _LOG.info("created pool %s (%s, loss %s)", settings.pool_id, settings.task, settings.loss)
        return self.pool_info(pool)

    def pool_info(self, pool: PoolState) -> PoolInfo:
        with pool.lock:
            labeled, pending, skipped = pool.draw_counts()
            return PoolInfo(
                settings=pool.settings,
                create_time_ms=pool.create_time_ms,
                item_count=pool.item_count,
                labeled_count=labeled,
                surrogate_version=pool.surrogate_version,
                draw_count=len(pool.draws),
                pending_count=pending,
                skipped_count=skipped,
                segments=tuple(sorted(name for name in pool.segment_names if name)),
            )

    def get_pool(self, pool_id: str) -> PoolInfo:
        return self.pool_info(self.pool(pool_id))

    def list_pools(self, *, after: str, limit: int) -> tuple[list[PoolInfo], str]:
        """Pools with id > ``after`` in id order; the second value is the last id if more."""
        with self._pools_lock:
            ids = sorted(key for key, pool in self._pools.items() if not pool.deleted)
        chosen = [pool_id for pool_id in ids if pool_id > after]
        page = chosen[:limit]
        infos = []
        for pool_id in page:
            try:
                infos.append(self.get_pool(pool_id))
            except NotFound:
                continue
        more = len(chosen) > limit
        return infos, (page[-1] if more and page else "")

    def delete_pool(self, pool_id: str) -> None:
        self._check_open()
        pool = self.pool(pool_id)
        with pool.lock:
            pool.deleted = True
            future = self._db.submit(store.delete_pool(pool_id))
        with self._pools_lock:
            if self._pools.get(pool_id) is pool:
                del self._pools[pool_id]
        future.result()
        _LOG.info("deleted pool %s", pool_id)

    # ------------------------------------------------------------------------------------
    # the write pattern
    # ------------------------------------------------------------------------------------
    def _check_open(self) -> None:
        if self._closed:
            raise Unavailable("the server is shutting down; retry on another replica or later.")

    def _prior(self, pool: PoolState, method: str, request_id: str) -> Any:
        """A remembered (future, payload) or committed payload for this request id."""
        remembered = pool.requests.get((method, request_id))
        if remembered is not None:
            return remembered
        data = store.find_request(self._db.reader(), pool.pool_id, method, request_id)
        return None if data is None else (None, data)

    def _write(
        self,
        pool_id: str,
        method: str,
        request_id: str,
        work: Callable[[PoolState], tuple[Any, list[Callable[[sqlite3.Connection], Any]]]],
        decode: Callable[[bytes], Any],
    ) -> Any:
        self._check_open()
        pool = self.pool(pool_id)
        with pool.lock:
            if pool.deleted:
                raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
            prior = self._prior(pool, method, request_id) if request_id else None
            if prior is None:
                result, writes = work(pool)
                if request_id:
                    payload = encode(result)
                    writes.append(store.insert_request(pool_id, method, request_id, payload))
                future: Future[None] | None = self._db.submit(_combine(writes)) if writes else None
                if request_id:
                    pool.remember_request(method, request_id, (future, payload))
        if prior is not None:
            earlier, payload = prior
            if earlier is not None:
                earlier.result()
            return decode(payload)
        if future is not None:
            future.result()
        return result

    # ------------------------------------------------------------------------------------
    # ingest
    # ------------------------------------------------------------------------------------
    def _append_items(
        self,
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
        start = pool.item_count
        pool.item_ids.extend(item_ids)
        pool.index.update(zip(item_ids, range(start, start + len(item_ids)), strict=True))
        pool.payload_refs.extend(payload_refs)
        pool.features.extend(features)
        pool.outputs.extend(outputs)
        pool.segment.extend(segments)
        pool.event_time_ms.extend(event_time_ms)
        pool.ingest_time_ms.extend(ingest_time_ms)
        pool.g0.extend(cold.expected_loss)
        pool.expected_loss.extend(current.expected_loss)
        pool.second_moment.extend(current.residual_second_moment)
        pool.spread.extend(current.spread)
        pool.status.extend(np.full(len(item_ids), AVAILABLE, dtype=np.int8))
        pool.item_draw.extend(np.full(len(item_ids), -1, dtype=np.int64))

    def ingest(self, pool_id: str, batch: ItemBatch, *, request_id: str = "") -> IngestResult:
        """Add a validated batch; identical re-sent ids are duplicates, conflicting ones
        rejected (listed per item)."""
        pool = self.pool(pool_id)
        # Score outside the lock (the expensive part); redone below if a refit swapped the
        # surrogate in between.
        with pool.lock:
            surrogate = pool.surrogate
        current = surrogate.score(batch.features, batch.outputs)
        cold = pool.cold.score(batch.features, batch.outputs)

        def work(pool: PoolState) -> tuple[IngestResult, list[Any]]:
            nonlocal current
            known = [pool.index.get(item_id) for item_id in batch.item_ids]
            existing = np.array([-1 if k is None else k for k in known], dtype=np.int64)
            is_new = existing < 0
            problems: list[ItemProblem] = []
            duplicates = 0
            if not is_new.all():
                duplicates, problems = self._compare_duplicates(pool, batch, existing)
            new_positions = np.flatnonzero(is_new)
            accepted = int(new_positions.shape[0])
            writes: list[Any] = []
            if accepted:
                if pool.surrogate is not surrogate:
                    current = pool.surrogate.score(batch.features, batch.outputs)
                received = now_ms()
                names = (
                    [batch.segments[i] for i in new_positions]
                    if batch.segments
                    else [""] * accepted
                )
                new_codes, new_names = pool.add_segments(names)
                if new_codes:
                    writes.append(store.insert_segments(pool.pool_id, new_codes, new_names))
                codes = np.fromiter(
                    (pool.segment_codes[name] for name in names), dtype=np.int32, count=accepted
                )
                ingest_times = np.full(accepted, received, dtype=np.int64)
                event_times = (
                    batch.event_time_ms[new_positions]
                    if batch.event_time_ms is not None
                    else ingest_times
                )
                payloads = (
                    [batch.payload_refs[i] for i in new_positions]
                    if batch.payload_refs
                    else [""] * accepted
                )
                ids = [batch.item_ids[i] for i in new_positions]
                chunk = store.ItemChunk(
                    start=pool.item_count,
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
                    )

                self._append_items(
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
                errors=tuple(problems[:_MAX_ITEM_ERRORS]),
                item_count=pool.item_count,
            )
            return result, writes

        result: IngestResult = self._write(pool_id, "ingest", request_id, work, decode_ingest)
        return result

    def _compare_duplicates(
        self, pool: PoolState, batch: ItemBatch, existing: np.ndarray
    ) -> tuple[int, list[ItemProblem]]:
        """Count identical re-sent items; list the conflicting ones (vectorised compare)."""
        positions = np.flatnonzero(existing >= 0)
        rows = existing[positions]
        same_features = np.all(pool.features.view[rows] == batch.features[positions], axis=1)
        outputs_stored = pool.outputs.view[rows]
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
            stored = [pool.payload_refs[r] for r in rows]
            sent = [batch.payload_refs[p] for p in positions]
            same = [a == b for a, b in zip(stored, sent, strict=True)]
            checks.append(("payload_refs", np.array(same, dtype=bool)))
        if batch.segments is not None:
            stored_codes = pool.segment.view[rows]
            sent_codes = np.array(
                [pool.segment_codes.get(batch.segments[p], -1) for p in positions]
            )
            checks.append(("segments", stored_codes == sent_codes))
        if batch.event_time_ms is not None:
            checks.append(
                ("event_time_ms", pool.event_time_ms.view[rows] == batch.event_time_ms[positions])
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

    # ------------------------------------------------------------------------------------
    # labeling
    # ------------------------------------------------------------------------------------
    def _floor(self, pool: PoolState) -> float:
        return pool.settings.selection_floor or self._config.selection_floor

    def acquire(
        self,
        pool_id: str,
        *,
        count: int,
        labeler: str,
        holder: str,
        lease_seconds: int = 0,
        request_id: str = "",
    ) -> list[AssignmentInfo]:
        """Re-offer waiting draws first, then make new draws; each with a lease."""

        def work(pool: PoolState) -> tuple[list[AssignmentInfo], list[Any]]:
            now = now_ms()
            lease = (
                lease_seconds
                or pool.settings.default_lease_seconds
                or self._config.default_lease_seconds
            )
            expire = now + 1000 * lease
            draws = pool.draws
            status = draws.status.view
            free = (status == WAITING) | (
                (status == ASSIGNED) & (draws.lease_expire_ms.view <= now)
            )
            reoffer = np.flatnonzero(free)[:count]
            updates: list[dict[str, Any]] = []
            chosen: list[int] = []
            for index in reoffer.tolist():
                old = draws.assignment_id[index]
                pool.assignments.pop(old, None)
                assignment = self._new_assignment_id(index)
                draws.status.view[index] = ASSIGNED
                draws.labeler[index] = labeler
                draws.holder[index] = holder
                draws.assignment_id[index] = assignment
                draws.lease_expire_ms.view[index] = expire
                pool.assignments[assignment] = index
                updates.append(draws.outcome_record(index))
                chosen.append(index)
            writes: list[Any] = []
            if updates:
                writes.append(store.update_draws(pool.pool_id, updates))
            wanted = count - len(chosen)
            if wanted > 0:
                records = self._new_draws(pool, wanted, labeler, holder, now, expire)
                if records:
                    start = len(draws)
                    draws.append(records)
                    self._mark_drawn_items(pool, start)
                    for record in records:
                        pool.assignments[record["assignment_id"]] = record["draw_index"]
                    chosen.extend(r["draw_index"] for r in records)
                    writes.append(store.insert_draws(pool.pool_id, records))
            if chosen:
                pool.touch()
            infos = [self._assignment_info(pool, index) for index in chosen]
            return infos, writes

        result: list[AssignmentInfo] = self._write(
            pool_id, "acquire", request_id, work, decode_assignments
        )
        return result

    @staticmethod
    def _new_assignment_id(draw_index: int) -> str:
        return f"d{draw_index}-{secrets.token_hex(6)}"

    def _assignment_info(self, pool: PoolState, index: int) -> AssignmentInfo:
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
        self, pool: PoolState, wanted: int, labeler: str, holder: str, now: int, expire: int
    ) -> list[dict[str, Any]]:
        candidates = np.flatnonzero(pool.status.view == AVAILABLE)
        k = min(wanted, int(candidates.shape[0]))
        if k == 0:
            return []
        g = pool.expected_loss.view[candidates]
        scores = SurrogateScores(
            expected_loss=g,
            residual_second_moment=pool.second_moment.view[candidates],
            spread=pool.spread.view[candidates],
        )
        start = len(pool.draws)
        rng = np.random.default_rng([pool.seed, start])
        batch = draw_batch(
            usefulness(scores),
            g,
            k,
            floor=self._floor(pool),
            loss_bound=pool.loss_bound,
            rng=rng,
            groups=pool.segment.view[candidates].astype(np.int64),
            num_groups=len(pool.segment_names),
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
                    "expected_loss": float(g[batch.positions[j]]),
                    "second_moment": float(scores.residual_second_moment[batch.positions[j]]),
                    "surrogate_version": version,
                    "arrival_mark": pool.item_count,
                    "draw_time_ms": now,
                    "status": ASSIGNED,
                    "labeler": labeler,
                    "holder": holder,
                    "assignment_id": self._new_assignment_id(index),
                    "lease_expire_ms": expire,
                    "label": None,
                    "loss": None,
                    "label_time_ms": 0,
                    "skip_reason": "",
                }
            )
        return records

    def _held_draw(
        self, pool: PoolState, assignment_id: str, labeler: str, holder: str, position: int
    ) -> int:
        index = pool.assignments.get(assignment_id)
        if index is None:
            raise NotFound(
                f"labels[{position}].assignment_id = {assignment_id!r}: no such assignment in "
                f"pool {pool.pool_id!r} (it may have been re-offered after its lease ended).",
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

    def submit(
        self,
        pool_id: str,
        *,
        labeler: str,
        holder: str,
        labels: Sequence[LabelInput],
        request_id: str = "",
    ) -> OutcomeResult:
        """Record labels and skips of held assignments; per-item problems come back listed."""

        def work(pool: PoolState) -> tuple[OutcomeResult, list[Any]]:
            now = now_ms()
            draws = pool.draws
            problems: list[ItemProblem] = []
            to_label: list[tuple[int, float]] = []
            to_skip: list[tuple[int, str]] = []
            expired: list[int] = []
            noop = 0
            for position, submission in enumerate(labels):
                try:
                    index = self._held_draw(
                        pool, submission.assignment_id, labeler, holder, position
                    )
                    outcome = self._check_submission(pool, index, submission, position, now)
                except ServiceError as error:
                    problems.append(self._problem(pool, submission.assignment_id, error))
                    if isinstance(error, FailedPrecondition) and error.field == "lease":
                        expired.append(pool.assignments[submission.assignment_id])
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
            for index in expired:
                draws.status.view[index] = WAITING
                changed.append(index)
            writes: list[Any] = []
            if changed:
                writes.append(
                    store.update_draws(pool.pool_id, [draws.outcome_record(i) for i in changed])
                )
                pool.touch()
            result = OutcomeResult(
                accepted=len(to_label) + len(to_skip) + noop,
                errors=tuple(problems[:_MAX_ITEM_ERRORS]),
            )
            return result, writes

        result: OutcomeResult = self._write(pool_id, "submit", request_id, work, decode_outcome)
        return result

    def _check_submission(
        self, pool: PoolState, index: int, submission: LabelInput, position: int, now: int
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
                        f"{name}.class_label: pool {pool.pool_id!r} is a regression pool; "
                        "send value.",
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
        if status == WAITING or lease_end <= now:
            raise FailedPrecondition(
                f"{name}.assignment_id = {submission.assignment_id!r}: the lease ended at "
                f"{lease_end} (unix ms) and the item went back to be re-offered; acquire again.",
                field="lease",
            )
        return "apply"

    @staticmethod
    def _problem(pool: PoolState, assignment_id: str, error: ServiceError) -> ItemProblem:
        index = pool.assignments.get(assignment_id)
        item_id = "" if index is None else pool.item_ids[int(pool.draws.row.view[index])]
        return ItemProblem(
            item_id=item_id,
            reason=error.message,
            field=error.field or "assignment_id",
            kind=type(error).__name__,
        )

    def release(
        self,
        pool_id: str,
        *,
        labeler: str,
        holder: str,
        assignment_ids: Sequence[str],
        request_id: str = "",
    ) -> OutcomeResult:
        """Give held assignments back unlabeled: they become WAITING and are re-offered."""

        def work(pool: PoolState) -> tuple[OutcomeResult, list[Any]]:
            draws = pool.draws
            problems: list[ItemProblem] = []
            changed: list[int] = []
            released = 0
            for position, assignment_id in enumerate(assignment_ids):
                try:
                    index = self._held_draw(pool, assignment_id, labeler, holder, position)
                    status = int(draws.status.view[index])
                    if status in (LABELED, SKIPPED):
                        raise FailedPrecondition(
                            f"assignment_ids[{position}] = {assignment_id!r}: already "
                            f"{'labeled' if status == LABELED else 'skipped'}; nothing to release.",
                            field="assignment_ids",
                        )
                except ServiceError as error:
                    problems.append(self._problem(pool, assignment_id, error))
                    continue
                released += 1
                if status == ASSIGNED:
                    draws.status.view[index] = WAITING
                    changed.append(index)
            writes: list[Any] = []
            if changed:
                writes.append(
                    store.update_draws(pool.pool_id, [draws.outcome_record(i) for i in changed])
                )
                pool.touch()
            return OutcomeResult(
                accepted=released, errors=tuple(problems[:_MAX_ITEM_ERRORS])
            ), writes

        result: OutcomeResult = self._write(pool_id, "release", request_id, work, decode_outcome)
        return result

    # ------------------------------------------------------------------------------------
    # queries
    # ------------------------------------------------------------------------------------
    def _inputs(self, pool: PoolState, scope: Scope) -> ScopeInputs:
        key = ("inputs", scope)
        cached = pool.cache.get(key)
        if cached is None:
            cached = build_scope_inputs(pool, scope)
            pool.cache[key] = cached
        return cached  # type: ignore[no-any-return]

    def _mode(self, pool: PoolState, mode: EstimatorMode | None) -> EstimatorMode:
        return mode if mode is not None else pool.settings.mode

    def _confidence(self, pool: PoolState, confidence: float) -> float:
        return confidence or pool.settings.default_confidence or self._config.default_confidence

    def estimate(
        self,
        pool_id: str,
        scope: Scope,
        *,
        mode: EstimatorMode | None = None,
        confidence: float = 0.0,
    ) -> EstimateResult:
        """Risk estimate for the scope (cached until the pool changes)."""
        pool = self.pool(pool_id)
        with pool.lock:
            chosen_mode = self._mode(pool, mode)
            level = self._confidence(pool, confidence)
            key = ("estimate", scope, chosen_mode, level)
            cached = pool.cache.get(key)
            if cached is not None:
                return cached  # type: ignore[no-any-return]
            inputs = self._inputs(pool, scope)
            version = pool.state_version
        estimate = estimate_risk(
            inputs.terms,
            inputs.sums,
            mode=chosen_mode,
            confidence=level,
            loss_bound=pool.loss_bound,
        )
        result = EstimateResult(
            estimate=estimate,
            items_in_scope=inputs.items_in_scope,
            items_unreached=inputs.items_unreached,
            surrogate_version=inputs.surrogate_version,
        )
        with pool.lock:
            if pool.state_version == version:
                pool.cache[key] = result
        return result

    def check_gate(
        self,
        pool_id: str,
        scope: Scope,
        *,
        max_risk: float,
        confidence: float = 0.0,
        bound: BoundKind = BoundKind.ANYTIME,
        mode: EstimatorMode | None = None,
    ) -> GateOutcome:
        pool = self.pool(pool_id)
        with pool.lock:
            chosen_mode = self._mode(pool, mode)
            level = self._confidence(pool, confidence)
            inputs = self._inputs(pool, scope)
        decision = check_gate(
            inputs.terms,
            inputs.sums,
            max_risk=max_risk,
            confidence=level,
            bound=bound,
            mode=chosen_mode,
            loss_bound=pool.loss_bound,
        )
        return GateOutcome(
            decision=decision,
            items_in_scope=inputs.items_in_scope,
            items_unreached=inputs.items_unreached,
            surrogate_version=inputs.surrogate_version,
        )

    def list_draws(self, pool_id: str, *, start: int, limit: int) -> tuple[list[DrawInfo], int]:
        """Draws ``start .. start + limit``; the second value is the next start or 0 at the end."""
        pool = self.pool(pool_id)
        with pool.lock:
            draws = pool.draws
            stop = min(len(draws), start + limit)
            infos = []
            for index in range(start, stop):
                row = int(draws.row.view[index])
                label = float(draws.label.view[index])
                loss = float(draws.loss.view[index])
                infos.append(
                    DrawInfo(
                        draw_index=index,
                        item_id=pool.item_ids[row],
                        selection_probability=float(draws.probability.view[index]),
                        surrogate_version=int(draws.surrogate_version.view[index]),
                        expected_loss=float(draws.expected_loss.view[index]),
                        status=int(draws.status.view[index]),
                        label=None if np.isnan(label) else label,
                        loss=None if np.isnan(loss) else loss,
                        labeler=draws.labeler[index],
                        draw_time_ms=int(draws.draw_time_ms.view[index]),
                        label_time_ms=int(draws.label_time_ms.view[index]),
                        skip_reason=draws.skip_reason[index],
                        segment=pool.segment_names[int(pool.segment.view[row])],
                        remaining_count=int(draws.remaining_count.view[index]),
                    )
                )
            return infos, (stop if stop < len(draws) else 0)

    def estimate_trace(
        self,
        pool_id: str,
        scope: Scope,
        *,
        mode: EstimatorMode | None = None,
        confidence: float = 0.0,
        max_points: int = 50,
    ) -> list[EstimateResult]:
        """Estimates after the first k labeled draws for up to ``max_points`` values of k.

        Each point uses the draws up to the k-th labeled one, and for the plug-in part the
        current surrogate over the items not labeled by then (a progress view, not a replay
        of what was reported at the time).
        """
        pool = self.pool(pool_id)
        with pool.lock:
            chosen_mode = self._mode(pool, mode)
            level = self._confidence(pool, confidence)
            inputs = self._inputs(pool, scope)
            n_scope = inputs.items_in_scope
        terms = inputs.terms
        labeled_positions = np.flatnonzero(terms.status == DRAW_LABELED)
        if labeled_positions.shape[0] == 0:
            return []
        count = labeled_positions.shape[0]
        ks = np.unique(np.linspace(1, count, num=min(max_points, count)).round().astype(int))
        points = []
        in_scope_labeled = terms.in_scope & (terms.status == DRAW_LABELED)
        for k in ks.tolist():
            stop = int(labeled_positions[k - 1]) + 1
            prefix = type(terms)(
                **{
                    name: None if getattr(terms, name) is None else getattr(terms, name)[:stop]
                    for name in terms.__dataclass_fields__
                }
            )
            later_labeled = in_scope_labeled.copy()
            later_labeled[:stop] = False
            # Items labeled after the prefix count as unlabeled at this point: their loss is
            # replaced by their current predicted loss in the plug-in sums.
            rows = pool.draws.row.view[: len(later_labeled)][later_labeled]
            sums = type(inputs.sums)(
                scope_size=n_scope,
                labeled_loss_sum=float(np.nansum(terms.loss[:stop][terms.in_scope[:stop]])),
                unlabeled_expected_loss_sum=inputs.sums.unlabeled_expected_loss_sum
                + float(pool.expected_loss.view[rows].sum()),
                unlabeled_second_moment_sum=inputs.sums.unlabeled_second_moment_sum
                + float(pool.second_moment.view[rows].sum()),
            )
            estimate = estimate_risk(
                prefix, sums, mode=chosen_mode, confidence=level, loss_bound=pool.loss_bound
            )
            points.append(
                EstimateResult(
                    estimate=estimate,
                    items_in_scope=n_scope,
                    items_unreached=inputs.items_unreached,
                    surrogate_version=inputs.surrogate_version,
                )
            )
        return points

    # ------------------------------------------------------------------------------------
    # refits (called by the background worker)
    # ------------------------------------------------------------------------------------
    def refit_due(self, pool: PoolState, now: float) -> bool:
        with pool.lock:
            if pool.deleted or pool.refitting:
                return False
            labeled, _, _ = pool.draw_counts()
            new_labels = labeled - pool.surrogate_label_count
            if new_labels <= 0 or labeled <= pool.failed_fit_labels:
                return False
            every = pool.settings.refit_every_labels or self._config.refit_every_labels
            waited = now - pool.last_fit_time
            return new_labels >= every or waited >= self._config.refit_interval_seconds

    def refit(self, pool: PoolState) -> bool:
        """Fit a new surrogate version on all labels, persist it, rescore, swap. True if done."""
        started = time.monotonic()
        with pool.lock:
            if pool.deleted or pool.refitting:
                return False
            pool.refitting = True
            draws = pool.draws
            labeled = np.flatnonzero(draws.status.view == LABELED)
            rows = draws.row.view[labeled]
            labels = draws.label.view[labeled].copy()
            features = pool.features.view
            outputs = pool.outputs.view
            n0 = pool.item_count
            version = pool.surrogate_version + 1
            seed = int((pool.seed + version) % (2**31 - 1))
        try:
            typed = labels.astype(np.int64) if pool.settings.is_classification else labels
            surrogate = fit_surrogate(
                pool.spec,
                features[rows],
                outputs[rows],
                typed,
                version=version,
                seed=seed,
                settings=SurrogateSettings(num_threads=self._config.surrogate_threads),
            )
            scores = _score_rows(surrogate, features[:n0], outputs[:n0])
            data = surrogate.to_bytes()
            with pool.lock:
                if pool.deleted or self._closed:
                    # Shutting down: the fit is dropped and redone after the next start.
                    return False
                future = self._db.submit(
                    store.insert_model(pool.pool_id, version, int(labels.shape[0]), data, now_ms())
                )
            future.result()
            with pool.lock:
                n = pool.item_count
                expected = scores.expected_loss
                second = scores.residual_second_moment
                spread = scores.spread
                if n > n0:
                    late = surrogate.score(pool.features.view[n0:n], pool.outputs.view[n0:n])
                    expected = np.concatenate([expected, late.expected_loss])
                    second = np.concatenate([second, late.residual_second_moment])
                    spread = np.concatenate([spread, late.spread])
                pool.expected_loss.replace(expected)
                pool.second_moment.replace(second)
                pool.spread.replace(spread)
                pool.surrogate = surrogate
                pool.surrogate_label_count = int(labels.shape[0])
                pool.last_fit_time = time.monotonic()
                pool.touch()
        except Exception:
            _LOG.exception("refit of pool %s (version %d) failed", pool.pool_id, version)
            with pool.lock:
                # Retry only once more labels arrived: the same labels would fail again.
                pool.failed_fit_labels = int(labels.shape[0])
                pool.last_fit_time = time.monotonic()
            return False
        finally:
            with pool.lock:
                pool.refitting = False
        elapsed = time.monotonic() - started
        self.refit_count += 1
        self.refit_seconds_total += elapsed
        _LOG.info(
            "refit pool %s: surrogate version %d on %d labels, %d items rescored in %.2f s",
            pool.pool_id,
            version,
            labels.shape[0],
            n0,
            elapsed,
        )
        return True

    def close(self) -> None:
        """Refuse further writes (queued ones still commit when the database closes)."""
        self._closed = True
