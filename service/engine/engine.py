"""Per-pool orchestration: ingest -> score, acquire -> draws, labels -> refit, queries -> core.

The engine owns every pool's in-memory state and is the only caller of the store's writes.
Each write call follows one pattern, under the pool's lock: check the request against the
state (nothing changes if it is refused), change the in-memory state, queue the durable
write on the single writer; then, outside the lock, wait for that write's commit before
returning. The writer commits in queue order, so a reply never depends on data that is not
yet durable. A ``request_id`` is remembered with the result in the same transaction, so a
retry is answered from the first result (also after a restart). Remembered ids belong to
the token that sent them (its holder id) and keep a digest of the request: the same id with
other content is refused (InvalidArgument), never answered with another call's result.
They expire after ``request_retention_hours`` (:meth:`Engine.prune_requests`).

A failed commit must not leave memory ahead of disk: each pool's writes share one store
lane, so once one fails every later write of the pool fails unrun (it may build on the
unsaved change), and the first caller to see the failure rebuilds the pool's state from
SQLite with start-up's code (:meth:`Engine._recover`) before the pool serves again. The
failing calls get Unavailable ("not saved, retry with the same request_id").
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import secrets
import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any, NoReturn

import numpy as np

from leadline.service.config import ServerConfig
from leadline.service.engine import ingest, labeling, queries
from leadline.service.engine.gates import hint_within_scope
from leadline.service.engine.ingest import now_ms
from leadline.service.engine.pool import AVAILABLE, LABELED, PoolSettings, PoolState
from leadline.service.engine.results import (
    AssignmentInfo,
    DrawInfo,
    EstimateResult,
    GateOutcome,
    IngestResult,
    ItemBatch,
    LabelInput,
    OutcomeResult,
    PoolInfo,
    ValidationItems,
    decode_assignments,
    decode_ingest,
    decode_outcome,
    decode_pool_info,
    encode,
)
from leadline.service.engine.scopes import Scope, ScopeInputs, build_scope_inputs
from leadline.service.errors import AlreadyExists, InvalidArgument, NotFound, Unavailable
from leadline.service.estimation import (
    MIN_DRAWS,
    BoundKind,
    EstimatorMode,
    LossSpec,
    Reliance,
    Surrogate,
    SurrogateScores,
    SurrogateSettings,
    ValidationRows,
    check_gate,
    choose_reliance,
    concatenate_scores,
    cross_fitted_scores,
    estimate_risk,
    fit_surrogate,
    worst_squared_deviation_of,
)
from leadline.service.store import Database, EarlierWriteFailed
from leadline.service.store import records as store
from leadline.service.store.records import RememberedRequest, Write
from leadline.v1.rules import gate_confidence_problem

__all__ = ["Engine", "WriteCall"]

_LOG = logging.getLogger(__name__)

_SCORE_CHUNK = 100_000
# A refit scores at most this many late-arriving items while holding the pool lock.
_CATCH_UP_UNDER_LOCK = 5_000
# A draw waits at most this long for the refit that covers newly added validation items
# (so the first draw after an upload uses them); after that it draws with the surrogate
# it has, which is just as valid, only less informed. Well inside a client's default
# 30 s deadline; such a refit takes about a second, plus rescoring (4-6 s per million
# items) and any refit of another pool already running.
VALIDATION_REFIT_WAIT_SECONDS = 10.0


@dataclass(frozen=True)
class WriteCall:
    """Who sent a write call and what it was, for its request id: the holder id of the
    calling token, the request id ('' = none) and a digest of the whole request."""

    holder: str = ""
    request_id: str = ""
    digest: str = ""


_NO_ID = WriteCall()


def _reused(request_id: str) -> InvalidArgument:
    return InvalidArgument(
        f"request_id = {request_id!r}: was used for a different request (same token, other "
        "content); a request id names one request and its retries. Use a new request_id "
        "for new content.",
        field="request_id",
    )


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
    return concatenate_scores(parts)


def _rows_of(scores: SurrogateScores, rows: np.ndarray) -> SurrogateScores:
    worst = scores.worst_squared_deviation
    return SurrogateScores(
        scores.expected_loss[rows],
        scores.residual_second_moment[rows],
        scores.spread[rows],
        None if worst is None else worst[rows],
    )


def _choose_reliance(
    spec: LossSpec,
    features: np.ndarray,
    outputs: np.ndarray,
    labels: np.ndarray,
    *,
    losses: np.ndarray,
    probabilities: np.ndarray,
    remaining_counts: np.ndarray,
    candidates: SurrogateScores,
    floor: float,
    seed: int,
    settings: SurrogateSettings,
    validation: ValidationRows,
) -> Reliance:
    """The reliance guard at a refit: the labeled draws scored honestly (cross-fitted, the
    validation rows in every fold) against the new surrogate's scores of the candidates."""
    if losses.shape[0] < MIN_DRAWS:
        return Reliance(floor=floor)
    honest = cross_fitted_scores(
        spec, features, outputs, labels, seed=seed, settings=settings, validation=validation
    )
    return choose_reliance(
        losses=losses,
        honest=honest,
        probabilities=probabilities,
        remaining_counts=remaining_counts,
        candidates=candidates,
        loss_bound=spec.bound,
        minimum_floor=floor,
    )


class Engine:
    """All pools of one data directory. Thread-safe; one instance per server."""

    def __init__(self, database: Database, config: ServerConfig) -> None:
        self._db = database
        self._config = config
        self._pools: dict[str, PoolState] = {}
        self._pools_lock = threading.Lock()
        # CreatePool / DeletePool request ids in flight (see _claim_server_request).
        self._server_requests: dict[tuple[str, str, str], threading.Event] = {}
        self._closed = False
        self._retention_ms = int(config.request_retention_hours * 3_600_000)
        # Prune remembered request ids this often (a quarter of the retention, 10 min at most).
        self._prune_every = min(config.request_retention_hours * 900.0, 600.0)
        self._last_prune = -float("inf")
        self.refit_count = 0
        self.refit_seconds_total = 0.0
        self.reload_count = 0
        self.pruned_requests = 0

    # ------------------------------------------------------------------------------------
    # start-up
    # ------------------------------------------------------------------------------------
    def load(self) -> None:
        """Rebuild every pool's in-memory state from the database (start-up)."""
        reader = self._db.reader()
        for row in store.load_pools(reader):
            pool = self._read_pool(row)
            with self._pools_lock:
                self._pools[pool.pool_id] = pool

    def _read_pool(self, row: store.PoolRow) -> PoolState:
        """One pool's in-memory state as stored: items scored with its latest surrogate.

        Used at start-up and to reload a pool after a failed write.
        """
        reader = self._db.reader()
        started = time.monotonic()
        settings = PoolSettings.from_json(row.settings)
        pool = PoolState(settings=settings, seed=row.seed, create_time_ms=row.create_time_ms)
        for name in store.load_segments(reader, settings.pool_id):
            pool.add_segments([name])
        for rows in store.load_validation_items(
            reader,
            settings.pool_id,
            feature_dim=settings.feature_dim,
            output_width=settings.output_width,
        ):
            ingest.append_validation(
                pool, rows.item_ids, rows.features, rows.outputs, rows.labels, rows.segments
            )
        model = store.load_latest_model(reader, settings.pool_id)
        if model is not None:
            _, label_count, data, reliance = model
            if reliance:
                pool.reliance = Reliance(**json.loads(reliance))
            pool.surrogate = Surrogate.from_bytes(pool.spec, data)
            pool.surrogate_label_count = label_count
        for chunk in store.load_items(
            reader,
            settings.pool_id,
            feature_dim=settings.feature_dim,
            output_width=settings.output_width,
        ):
            ingest.append_items(
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
        pool.mark_drawn_items(0)
        pool.last_fit_time = time.monotonic()
        _LOG.info(
            "loaded pool %s: %d items, %d validation items, %d draws, surrogate version %d"
            " in %.2f s",
            settings.pool_id,
            pool.item_count,
            pool.validation_count,
            len(pool.draws),
            pool.surrogate_version,
            time.monotonic() - started,
        )
        return pool

    def _reload(self, pool: PoolState) -> None:
        """Rebuild a pool marked ``reload_pending`` from the store; caller holds its lock.

        If reading fails, the pool stays marked and refuses calls (Unavailable) until a
        later call's reload succeeds.
        """
        pool_id = pool.pool_id
        try:
            row = store.load_pool(self._db.reader(), pool_id)
            if row is None:
                pool.deleted = True
                pool.reload_pending = False
                with self._pools_lock:
                    if self._pools.get(pool_id) is pool:
                        del self._pools[pool_id]
            else:
                pool.adopt(self._read_pool(row))
        except Exception:
            _LOG.exception("pool %s: reload from the database failed", pool_id)

    def _recover(self, pool: PoolState, epoch: int, error: BaseException) -> NoReturn:
        """A write of ``pool`` queued in ``epoch`` failed: reload the pool, then raise.

        The pool's memory already holds the change that was not saved (and maybe later
        changes built on it, whose writes the store fails too, see ``Database.submit``).
        Under the pool's lock (calls to the pool wait meanwhile): wait until every write
        of the pool queued so far is handled, reopen its lane, rebuild its state from
        SQLite the way start-up does. The first failing caller of an epoch reloads; the
        others find the epoch moved on. Raises Unavailable for the failing call.
        """
        with pool.lock:
            if pool.epoch == epoch and not self._closed and not pool.reload_pending:
                if isinstance(error, EarlierWriteFailed):
                    _LOG.warning("pool %s: write dropped after an earlier failure", pool.pool_id)
                else:
                    _LOG.error("pool %s: a write failed (%s); reloading", pool.pool_id, error)
                pool.reload_pending = True
                self._db.reopen(pool.lane).result()
                self.reload_count += 1
                self._reload(pool)
        cause = (
            "an earlier write of this pool failed"
            if isinstance(error, EarlierWriteFailed)
            else f"store error: {error}"
        )
        raise Unavailable(
            f"pool = 'pools/{pool.pool_id}': the write was not saved ({cause}); the pool "
            "was reloaded from the database. Retry with the same request_id."
        ) from error

    # ------------------------------------------------------------------------------------
    # pools
    # ------------------------------------------------------------------------------------
    @property
    def config(self) -> ServerConfig:
        """The server's settings (frozen): the defaults in force where a pool sets none."""
        return self._config

    def settings(self, pool_id: str) -> PoolSettings:
        """What CreatePool fixed for the pool (frozen); NotFound if there is none."""
        return self.pool(pool_id).settings

    def pool(self, pool_id: str) -> PoolState:
        with self._pools_lock:
            pool = self._pools.get(pool_id)
        if pool is None or pool.deleted:
            raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
        if pool.reload_pending:
            with pool.lock:
                if pool.reload_pending and not pool.deleted:
                    self._reload(pool)
                self._check_loaded(pool)
        return pool

    def _check_loaded(self, pool: PoolState) -> None:
        if pool.reload_pending:
            raise Unavailable(
                f"pool = 'pools/{pool.pool_id}': being reloaded from the database after a "
                "failed write (see the server log); retry later."
            )

    def pools(self) -> list[PoolState]:
        with self._pools_lock:
            return [self._pools[key] for key in sorted(self._pools)]

    def create_pool(self, settings: PoolSettings, *, call: WriteCall = _NO_ID) -> PoolInfo:
        """Create an empty pool; AlreadyExists if the id is in use.

        With a request id this token sent before (also before a restart) the pool that
        request created is returned: its current state, or the first reply if it is gone.
        """
        self._check_open()
        self._check_writable(f"pool_id = {settings.pool_id!r}")
        pool_id = settings.pool_id
        method = "create_pool"
        request_id = call.request_id
        if request_id:
            remembered = self._claim_server_request(method, call, pool_id)
            if remembered is not None:
                first = decode_pool_info(remembered)
                with self._pools_lock:
                    current = self._pools.get(pool_id)
                if (
                    current is not None
                    and not current.deleted
                    and current.create_time_ms == first.create_time_ms
                ):
                    return self.pool_info(current)
                return first
        try:
            return self._create_pool(settings, method=method, call=call)
        finally:
            if request_id:
                self._release_server_request(method, call)

    def _create_pool(self, settings: PoolSettings, *, method: str, call: WriteCall) -> PoolInfo:
        created = now_ms()
        if self._config.draw_seed:
            digest = hashlib.sha256(f"{self._config.draw_seed}:{settings.pool_id}".encode())
            seed = int.from_bytes(digest.digest()[:8], "big") >> 2
        else:
            seed = secrets.randbits(62)
        pool = PoolState(settings=settings, seed=seed, create_time_ms=created)
        info = self.pool_info(pool)
        row = store.PoolRow(settings.pool_id, settings.to_json(), pool.seed, created)
        writes = [store.insert_pool(row)]
        if call.request_id:
            writes.append(
                store.insert_server_request(
                    method,
                    RememberedRequest(
                        holder=call.holder,
                        request_id=call.request_id,
                        digest=call.digest,
                        response=encode(info),
                        time_ms=created,
                        pool_id=settings.pool_id,
                    ),
                )
            )
        # Under the new pool's lock until its row is queued: a write to the pool queued
        # later (on its lane) fails if the row does not commit.
        with pool.lock:
            with self._pools_lock:
                if settings.pool_id in self._pools:
                    raise AlreadyExists(
                        f"pool_id = {settings.pool_id!r}: a pool with this id exists.",
                        field="pool_id",
                    )
                self._pools[settings.pool_id] = pool
            future = self._db.submit(_combine(writes), lane=pool.lane)
        try:
            future.result()
        except Exception as error:
            with pool.lock:
                pool.deleted = True
                # Writes to the pool queued meanwhile fail (lane); nothing follows this.
                self._db.reopen(pool.lane)
            with self._pools_lock:
                if self._pools.get(settings.pool_id) is pool:
                    del self._pools[settings.pool_id]
            raise Unavailable(
                f"pool_id = {settings.pool_id!r}: the pool was not saved (store error: "
                f"{error}). Retry with the same request_id."
            ) from error
        pool.last_fit_time = time.monotonic()
        _LOG.info("created pool %s (%s, loss %s)", settings.pool_id, settings.task, settings.loss)
        return info

    def _claim_server_request(self, method: str, call: WriteCall, pool_id: str) -> bytes | None:
        """The remembered reply of a pool-level request id, or None after claiming it.

        A claimed id is in flight until :meth:`_release_server_request`; the same id
        arriving meanwhile waits for it, then finds the committed reply (or claims it in
        turn if the first call failed). Reusing an id for another request is InvalidArgument.
        """
        key = (method, call.holder, call.request_id)
        while True:
            with self._pools_lock:
                running = self._server_requests.get(key)
                if running is None:
                    found = store.find_server_request(
                        self._db.reader(),
                        method,
                        call.holder,
                        call.request_id,
                        not_before_ms=now_ms() - self._retention_ms,
                    )
                    if found is None:
                        self._server_requests[key] = threading.Event()
                        return None
                    if found.pool_id != pool_id:
                        raise InvalidArgument(
                            f"request_id = {call.request_id!r}: was used for a different "
                            f"request (for pool 'pools/{found.pool_id}', not "
                            f"'pools/{pool_id}'); use a new request_id.",
                            field="request_id",
                        )
                    if found.digest and found.digest != call.digest:
                        raise _reused(call.request_id)
                    return found.response
            running.wait()

    def _release_server_request(self, method: str, call: WriteCall) -> None:
        with self._pools_lock:
            running = self._server_requests.pop((method, call.holder, call.request_id), None)
        if running is not None:
            running.set()

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
                validation_count=pool.validation_count,
                surrogate_label_count=pool.surrogate.label_count,
                surrogate_validation_count=pool.surrogate.validation_count,
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

    def delete_pool(self, pool_id: str, *, call: WriteCall = _NO_ID) -> None:
        """Delete the pool and everything in it; NotFound if there is none.

        With a request id this token sent before (also before a restart) nothing is done
        and the call succeeds, even if a new pool took the id meanwhile.
        """
        self._check_open()
        self._check_writable(f"pool = 'pools/{pool_id}'")
        method = "delete_pool"
        if call.request_id and self._claim_server_request(method, call, pool_id) is not None:
            return
        try:
            self._delete_pool(pool_id, method=method, call=call)
        finally:
            if call.request_id:
                self._release_server_request(method, call)

    def _delete_pool(self, pool_id: str, *, method: str, call: WriteCall) -> None:
        pool = self.pool(pool_id)
        with pool.lock:
            if pool.deleted:
                raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
            self._check_loaded(pool)
            pool.deleted = True
            epoch = pool.epoch
            writes = [store.delete_pool(pool_id)]
            if call.request_id:
                writes.append(
                    store.insert_server_request(
                        method,
                        RememberedRequest(
                            holder=call.holder,
                            request_id=call.request_id,
                            digest=call.digest,
                            response=b"{}",
                            time_ms=now_ms(),
                            pool_id=pool_id,
                        ),
                    )
                )
            future = self._db.submit(_combine(writes), lane=pool.lane)
        self._wait(pool, future, epoch)
        with self._pools_lock:
            if self._pools.get(pool_id) is pool:
                del self._pools[pool_id]
        _LOG.info("deleted pool %s", pool_id)

    # ------------------------------------------------------------------------------------
    # the write pattern
    # ------------------------------------------------------------------------------------
    def _check_open(self) -> None:
        if self._closed:
            raise Unavailable("the server is shutting down; retry on another replica or later.")

    def _check_writable(self, what: str, *, probe: bool = True) -> None:
        """Unavailable, before anything changes, while the store refuses writes (a failure
        episode, see Database.write_refusal): no memory change, so no reload either.

        ``probe=False`` (under a pool lock) only looks at the episode, never waits for a
        probe write.
        """
        if probe:
            refusal = self._db.write_refusal()
        else:
            failure = self._db.failure
            refusal = None if failure is None else f"the database refuses writes ({failure.cause})"
        if refusal is not None:
            raise Unavailable(
                f"{what}: the write was not saved ({refusal}). Retry with the same "
                "request_id; see the server log."
            )

    def _prior(
        self, pool: PoolState, method: str, call: WriteCall, *, memory_only: bool = False
    ) -> Any:
        """A remembered (future, payload, epoch) of this token's request id, or None.

        InvalidArgument if the id was used for a request with other content.
        """
        oldest = now_ms() - self._retention_ms
        remembered = pool.requests.get((method, call.holder, call.request_id))
        if remembered is not None:
            future, payload, epoch, digest, time_ms = remembered
            if time_ms >= oldest:
                if digest != call.digest:
                    raise _reused(call.request_id)
                return future, payload, epoch
        if memory_only:
            return None
        found = store.find_request(
            self._db.reader(),
            pool.pool_id,
            method,
            call.holder,
            call.request_id,
            not_before_ms=oldest,
        )
        if found is None:
            return None
        if found.digest and found.digest != call.digest:
            raise _reused(call.request_id)
        return None, found.response, pool.epoch

    def prune_requests(self, now: float | None = None, *, force: bool = False) -> int:
        """Forget request ids older than the retention (database and memory); returns how
        many rows went. Runs at most every ``_prune_every`` seconds unless ``force``."""
        now = time.monotonic() if now is None else now
        if not force and now - self._last_prune < self._prune_every:
            return 0
        if self._closed or self._db.failure is not None:
            return 0
        self._last_prune = now
        oldest = now_ms() - self._retention_ms
        for pool in self.pools():
            with pool.lock:
                pool.forget_requests(before_ms=oldest)
        try:
            pruned = int(self._db.write(store.prune_requests(oldest)))
        except Exception:  # noqa: BLE001 - retried at the next prune
            _LOG.exception("pruning remembered request ids failed")
            return 0
        if pruned:
            _LOG.info("forgot %d request ids older than the retention", pruned)
        self.pruned_requests += pruned
        return pruned

    def _wait(self, pool: PoolState, future: Future[Any], epoch: int) -> None:
        """Wait for the commit of a write of ``pool`` queued in ``epoch``; recover if it failed."""
        try:
            future.result()
        except Exception as error:
            self._recover(pool, epoch, error)

    def _write(
        self,
        pool_id: str,
        method: str,
        call: WriteCall,
        work: Callable[[PoolState], tuple[Any, list[Callable[[sqlite3.Connection], Any]]]],
        decode: Callable[[bytes], Any],
    ) -> Any:
        """Run ``work`` under the pool lock, queue its writes, wait for their commit.

        ``work`` returns (result, writes) and must raise before changing anything if the
        request is refused. With a request id this token sent before for the same request,
        the first result is decoded and returned instead (after its commit, if that is
        still in flight); for another request, InvalidArgument. While the store refuses
        writes the call fails with Unavailable before anything changes; if the commit
        fails, the pool is reloaded from the store and the call fails with Unavailable.
        """
        self._check_open()
        pool = self.pool(pool_id)
        request_id = call.request_id
        with pool.lock:
            if pool.deleted:
                raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
            self._check_loaded(pool)
            prior = self._prior(pool, method, call) if request_id else None
        if prior is None:
            self._check_writable(f"pool = 'pools/{pool_id}'")
            with pool.lock:
                if pool.deleted:
                    raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
                self._check_loaded(pool)
                if request_id:
                    # A call with this id may have started while the lock was free.
                    prior = self._prior(pool, method, call, memory_only=True)
                if prior is None:
                    # An episode may have begun meanwhile (and this pool been reloaded).
                    self._check_writable(f"pool = 'pools/{pool_id}'", probe=False)
                epoch = pool.epoch
                if prior is None:
                    result, writes = work(pool)
                    if request_id:
                        payload = encode(result)
                        remembered = RememberedRequest(
                            holder=call.holder,
                            request_id=request_id,
                            digest=call.digest,
                            response=payload,
                            time_ms=now_ms(),
                        )
                        writes.append(store.insert_request(pool_id, method, remembered))
                    future: Future[None] | None = (
                        self._db.submit(_combine(writes), lane=pool.lane) if writes else None
                    )
                    if request_id:
                        pool.remember_request(
                            (method, call.holder, request_id),
                            (future, payload, epoch, call.digest, remembered.time_ms),
                        )
        if prior is not None:
            earlier, payload, earlier_epoch = prior
            if earlier is not None:
                self._wait(pool, earlier, earlier_epoch)
            return decode(payload)
        if future is not None:
            self._wait(pool, future, epoch)
        return result

    # ------------------------------------------------------------------------------------
    # ingest
    # ------------------------------------------------------------------------------------
    def ingest(self, pool_id: str, batch: ItemBatch, *, call: WriteCall = _NO_ID) -> IngestResult:
        """Add a validated batch; identical re-sent ids are duplicates, conflicting ones
        rejected (listed per item)."""
        pool = self.pool(pool_id)
        # Score outside the lock (the expensive part); apply_batch rescores if a refit
        # swapped the surrogate in between, and checks the shape again.
        with pool.lock:
            ingest.check_shape(pool, batch.features, batch.outputs)
            surrogate = pool.surrogate
        current = surrogate.score(batch.features, batch.outputs)
        cold = pool.cold.score(batch.features, batch.outputs)
        result: IngestResult = self._write(
            pool_id,
            "ingest",
            call,
            lambda p: ingest.apply_batch(
                p, batch, scored_with=surrogate, cold=cold, current=current
            ),
            decode_ingest,
        )
        return result

    def add_validation(
        self, pool_id: str, batch: ValidationItems, *, call: WriteCall = _NO_ID
    ) -> IngestResult:
        """Add validated validation items; identical re-sent ids are duplicates, conflicting
        ones rejected (listed per item). The caller nudges the refit worker when any were
        accepted: a refit then covers them before the next draw (see :meth:`acquire`)."""
        result: IngestResult = self._write(
            pool_id,
            "add_validation",
            call,
            lambda p: ingest.apply_validation(p, batch),
            decode_ingest,
        )
        return result

    # ------------------------------------------------------------------------------------
    # labeling
    # ------------------------------------------------------------------------------------
    def acquire(
        self,
        pool_id: str,
        *,
        count: int,
        labeler: str,
        holder: str,
        lease_seconds: int = 0,
        call: WriteCall = _NO_ID,
    ) -> list[AssignmentInfo]:
        """Re-offer waiting draws first, then make new draws; each with a lease.

        If validation items arrived that the surrogate does not cover yet, first wait (up
        to VALIDATION_REFIT_WAIT_SECONDS) for the refit that will.
        """
        self._wait_for_validation_refit(self.pool(pool_id))

        def work(pool: PoolState) -> tuple[list[AssignmentInfo], list[Write]]:
            return labeling.acquire(
                pool,
                count=count,
                labeler=labeler,
                holder=holder,
                lease_seconds=lease_seconds
                or pool.settings.default_lease_seconds
                or self._config.default_lease_seconds,
                floor=pool.settings.selection_floor or self._config.selection_floor,
            )

        result: list[AssignmentInfo] = self._write(
            pool_id, "acquire", call, work, decode_assignments
        )
        return result

    def _wait_for_validation_refit(self, pool: PoolState) -> None:
        deadline = time.monotonic() + VALIDATION_REFIT_WAIT_SECONDS
        with pool.lock:
            while (
                pool.validation_refit_pending()
                and not pool.deleted
                and not self._closed
                and self._db.failure is None  # no refit can be saved meanwhile
            ):
                remaining = deadline - time.monotonic()
                if remaining <= 0:
                    _LOG.warning(
                        "pool %s: drawing before the refit on %d validation items finished",
                        pool.pool_id,
                        pool.validation_count,
                    )
                    return
                pool.refit_done.wait(remaining)

    def submit(
        self,
        pool_id: str,
        *,
        labeler: str,
        holder: str,
        labels: Sequence[LabelInput],
        call: WriteCall = _NO_ID,
    ) -> OutcomeResult:
        """Record labels and skips of held assignments; per-item problems come back listed."""
        result: OutcomeResult = self._write(
            pool_id,
            "submit",
            call,
            lambda p: labeling.submit(p, labeler=labeler, holder=holder, labels=labels),
            decode_outcome,
        )
        return result

    def release(
        self,
        pool_id: str,
        *,
        labeler: str,
        holder: str,
        assignment_ids: Sequence[str],
        call: WriteCall = _NO_ID,
    ) -> OutcomeResult:
        """Give held assignments back unlabeled: they become WAITING and are re-offered."""
        result: OutcomeResult = self._write(
            pool_id,
            "release",
            call,
            lambda p: labeling.release(
                p, labeler=labeler, holder=holder, assignment_ids=assignment_ids
            ),
            decode_outcome,
        )
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
        return cached

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

        def answer(inputs: ScopeInputs) -> EstimateResult:
            estimate = estimate_risk(
                inputs.terms,
                inputs.sums,
                mode=chosen_mode,
                confidence=level,
                loss_bound=pool.loss_bound,
            )
            return EstimateResult(
                estimate=estimate,
                items_in_scope=inputs.items_in_scope,
                items_unreached=inputs.items_unreached,
                surrogate_version=inputs.surrogate_version,
            )

        key = ("estimate", scope, chosen_mode, level)
        return self._cached_query(pool, key, scope, answer)  # type: ignore[no-any-return]

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
        """Gate verdict for the scope (cached until the pool changes: a polling gate costs
        one dictionary look-up between changes)."""
        pool = self.pool(pool_id)
        with pool.lock:
            chosen_mode = self._mode(pool, mode)
            level = self._confidence(pool, confidence)
        # Checked here, not at the API boundary: the value in force may be the pool's
        # default (a pool may default to any confidence in (0, 1) for its estimates).
        problem = gate_confidence_problem(level)
        if problem is not None:
            source = "" if confidence else " (the pool's default, as the request left it 0)"
            raise InvalidArgument(problem + source, field="confidence")

        def answer(inputs: ScopeInputs) -> GateOutcome:
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
                decision=hint_within_scope(
                    decision, items_in_scope=inputs.items_in_scope, max_risk=max_risk
                ),
                items_in_scope=inputs.items_in_scope,
                items_unreached=inputs.items_unreached,
                surrogate_version=inputs.surrogate_version,
            )

        key = ("gate", scope, chosen_mode, level, bound, max_risk)
        return self._cached_query(pool, key, scope, answer)  # type: ignore[no-any-return]

    def _cached_query(
        self,
        pool: PoolState,
        key: tuple[Any, ...],
        scope: Scope,
        answer: Callable[[ScopeInputs], Any],
    ) -> Any:
        """A read answered from the pool's cache, or computed outside the lock from the
        scope's inputs and cached unless the pool changed meanwhile."""
        with pool.lock:
            cached = pool.cache.get(key)
            if cached is not None:
                return cached
            inputs = self._inputs(pool, scope)
            version = pool.state_version
        result = answer(inputs)
        with pool.lock:
            if pool.state_version == version:
                pool.cache[key] = result
        return result

    def list_draws(self, pool_id: str, *, start: int, limit: int) -> tuple[list[DrawInfo], int]:
        """Draws ``start .. start + limit``; the second value is the next start or 0 at the end."""
        pool = self.pool(pool_id)
        with pool.lock:
            return queries.draw_page(pool, start=start, limit=limit)

    def estimate_trace(
        self,
        pool_id: str,
        scope: Scope,
        *,
        mode: EstimatorMode | None = None,
        confidence: float = 0.0,
        max_points: int = 50,
    ) -> list[EstimateResult]:
        """Estimates after the first k labeled draws (see :func:`queries.trace`)."""
        pool = self.pool(pool_id)
        with pool.lock:
            chosen_mode = self._mode(pool, mode)
            level = self._confidence(pool, confidence)
            inputs = self._inputs(pool, scope)
        return queries.trace(
            pool, inputs, mode=chosen_mode, confidence=level, max_points=max_points
        )

    # ------------------------------------------------------------------------------------
    # refits (called by the background worker)
    # ------------------------------------------------------------------------------------
    def refit_due(self, pool: PoolState, now: float) -> bool:
        with pool.lock:
            if pool.deleted or pool.refitting or pool.reload_pending:
                return False
            if self._db.failure is not None:
                return False  # the store refuses writes: the fit could not be saved
            if pool.validation_refit_pending():
                return True  # at once: the next draw waits for it
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
            losses = draws.loss.view[labeled].copy()
            probabilities = draws.probability.view[labeled].copy()
            remaining_counts = draws.remaining_count.view[labeled].astype(np.float64)
            available = pool.status.view == AVAILABLE
            floor = pool.settings.selection_floor or self._config.selection_floor
            # Views of rows that never change once written (append-only columns).
            validation = ValidationRows(
                features=pool.validation_features.view,
                outputs=pool.validation_outputs.view,
                labels=pool.validation_labels.view,
            )
            features = pool.features.view
            outputs = pool.outputs.view
            n0 = pool.item_count
            version = pool.surrogate_version + 1
            epoch = pool.epoch
            seed = int((pool.seed + version) % (2**31 - 1))
        try:
            settings = SurrogateSettings(num_threads=self._config.surrogate_threads)
            classification = pool.settings.is_classification
            typed = labels.astype(np.int64) if classification else labels
            if classification:
                validation = ValidationRows(
                    features=validation.features,
                    outputs=validation.outputs,
                    labels=validation.labels.astype(np.int64),
                )
            surrogate = fit_surrogate(
                pool.spec,
                features[rows],
                outputs[rows],
                typed,
                version=version,
                seed=seed,
                settings=settings,
                validation=validation,
            )
            scores = _score_rows(surrogate, features[:n0], outputs[:n0])
            reliance = _choose_reliance(
                pool.spec,
                features[rows],
                outputs[rows],
                typed,
                losses=losses,
                probabilities=probabilities,
                remaining_counts=remaining_counts,
                candidates=_rows_of(scores, np.flatnonzero(available[:n0])),
                floor=floor,
                seed=seed,
                settings=settings,
                validation=validation,
            )
            data = surrogate.to_bytes()
            with pool.lock:
                if pool.deleted or self._closed or pool.epoch != epoch or pool.reload_pending:
                    # Shutting down: the fit is dropped and redone after the next start. A
                    # reload since the fit began: its labels may include unsaved ones.
                    return False
                future = self._db.submit(
                    store.insert_model(
                        pool.pool_id,
                        version,
                        int(labels.shape[0]),
                        data,
                        now_ms(),
                        reliance=json.dumps(reliance.to_json(), sort_keys=True),
                    ),
                    lane=pool.lane,
                )
            try:
                future.result()
            except Exception as error:
                # Not saved (maybe behind a failed write of the pool): the pool reloads,
                # the fit is redone on the saved labels when due.
                with contextlib.suppress(Unavailable):
                    self._recover(pool, epoch, error)
                return False
            # Items that arrived while fitting: score them outside the lock until few are
            # left, so the final swap under the lock stays short even under heavy ingest.
            parts = [scores]
            done = n0
            while True:
                with pool.lock:
                    n = pool.item_count
                    features = pool.features.view
                    outputs = pool.outputs.view
                if n - done <= _CATCH_UP_UNDER_LOCK:
                    break
                parts.append(_score_rows(surrogate, features[done:n], outputs[done:n]))
                done = n
            with pool.lock:
                if pool.epoch != epoch:
                    # Reloaded meanwhile: the reload read this version from the store.
                    return False
                n = pool.item_count
                if n > done:
                    parts.append(
                        surrogate.score(pool.features.view[done:n], pool.outputs.view[done:n])
                    )
                rescored = concatenate_scores(parts)
                pool.expected_loss.replace(rescored.expected_loss)
                pool.second_moment.replace(rescored.residual_second_moment)
                pool.spread.replace(rescored.spread)
                pool.worst_deviation.replace(
                    worst_squared_deviation_of(rescored, loss_bound=pool.loss_bound)
                )
                pool.surrogate = surrogate
                pool.reliance = reliance
                pool.surrogate_label_count = int(labels.shape[0])
                pool.last_fit_time = time.monotonic()
                pool.touch()
        except Exception:
            _LOG.exception("refit of pool %s (version %d) failed", pool.pool_id, version)
            with pool.lock:
                # Retry only once more labels (or validation items) arrived: the same
                # data would fail again.
                pool.failed_fit_labels = int(labels.shape[0])
                pool.failed_fit_validation = len(validation)
                pool.last_fit_time = time.monotonic()
            return False
        finally:
            with pool.lock:
                pool.refitting = False
                pool.refit_done.notify_all()
        elapsed = time.monotonic() - started
        self.refit_count += 1
        self.refit_seconds_total += elapsed
        _LOG.info(
            "refit pool %s: surrogate version %d on %d labels and %d validation items,"
            " %d items rescored in %.2f s",
            pool.pool_id,
            version,
            labels.shape[0],
            len(validation),
            n0,
            elapsed,
        )
        return True

    def close(self) -> None:
        """Refuse further writes (queued ones still commit when the database closes)."""
        self._closed = True
