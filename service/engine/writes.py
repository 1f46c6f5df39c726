"""The write protocol of every pool: request memory, commits, and recovery.

Each write call follows one pattern, under the pool's lock: check the request against the
state (nothing changes if it is refused), change the in-memory state, queue the durable
write on the single writer; then, outside the lock, wait for that write's commit before
returning (:meth:`PoolWrites.run`). The writer commits in queue order, so a reply never
depends on data that is not yet durable. A ``request_id`` is remembered with the result in
the same transaction, so a retry is answered from the first result (also after a
restart). Remembered ids belong to the token that sent them (its holder id) and keep a
digest of the request: the same id with other content is refused (InvalidArgument), never
answered with another call's result. They expire after ``request_retention_hours``
(:meth:`PoolWrites.prune`).

A failed commit must not leave memory ahead of disk: each pool's writes share one store
lane, so once one fails every later write of the pool fails unrun (it may build on the
unsaved change), and the first caller to see the failure rebuilds the pool's contents
from SQLite with start-up's code (:meth:`PoolWrites.recover`, :meth:`PoolWrites.load`)
and swaps them in whole (``PoolState.replace_data``) before the pool serves again. The
failing calls get Unavailable ("not saved, retry with the same request_id").
"""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any, NoReturn

import numpy as np

from leadline.service.config import ServerConfig
from leadline.service.engine import ingest
from leadline.service.engine.ingest import now_ms
from leadline.service.engine.pool import PoolSettings, PoolState, RememberedCall
from leadline.service.engine.results import encode
from leadline.service.errors import InvalidArgument, NotFound, Unavailable
from leadline.service.estimation import (
    DEFAULT_FLOOR,
    Reliance,
    Surrogate,
    SurrogateScores,
    concatenate_scores,
)
from leadline.service.store import Database, EarlierWriteFailed, score_cache
from leadline.service.store import records as store
from leadline.service.store.records import RememberedRequest

__all__ = ["NO_CALL", "PoolWrites", "WriteCall", "combine"]

_LOG = logging.getLogger(__name__)


@dataclass(frozen=True)
class WriteCall:
    """Who sent a write call and what it was, for its request id: the holder id of the
    calling token, the request id ('' = none) and a digest of the whole request."""

    holder: str = ""
    request_id: str = ""
    digest: str = ""


#: A write call without a request id.
NO_CALL = WriteCall()


def _reused(request_id: str) -> InvalidArgument:
    return InvalidArgument(
        f"request_id = {request_id!r}: was used for a different request (same token, other "
        "content); a request id names one request and its retries. Use a new request_id "
        "for new content.",
        field="request_id",
    )


def combine(writes: Sequence[Callable[[sqlite3.Connection], Any]]) -> Callable[..., None]:
    def write(connection: sqlite3.Connection) -> None:
        for one in writes:
            one(connection)

    return write


class PoolWrites:
    """Runs the pools' writes on one database (thread-safe; one per engine).

    ``forget(pool)`` is called when a reload finds the pool gone from the store (the
    engine drops it from its registry).
    """

    def __init__(
        self, database: Database, config: ServerConfig, *, forget: Callable[[PoolState], None]
    ) -> None:
        self._db = database
        self._forget = forget
        self._retention_ms = int(config.request_retention_hours * 3_600_000)
        # Prune remembered request ids this often (a quarter of the retention, 10 min at most).
        self._prune_every = min(config.request_retention_hours * 900.0, 600.0)
        self._last_prune = -float("inf")
        # CreatePool / DeletePool request ids in flight (see claim_server_request).
        self._server_requests: dict[tuple[str, str, str], threading.Event] = {}
        self._server_lock = threading.Lock()
        #: Set by the engine's close(): writes are refused from then on.
        self.closed = False
        self.reload_count = 0
        self.pruned_requests = 0

    def check_open(self) -> None:
        if self.closed:
            raise Unavailable("the server is shutting down; retry on another replica or later.")

    def check_writable(self, what: str, *, probe: bool = True) -> None:
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

    def check_loaded(self, pool: PoolState) -> None:
        if pool.reload_pending:
            raise Unavailable(
                f"pool = 'pools/{pool.pool_id}': being reloaded from the database after a "
                "failed write (see the server log); retry later."
            )

    def run(
        self,
        pool: PoolState,
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
        self.check_open()
        pool_id = pool.pool_id
        request_id = call.request_id
        with pool.lock:
            if pool.deleted:
                raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
            self.check_loaded(pool)
            prior = self._prior(pool, method, call) if request_id else None
        if prior is None:
            self.check_writable(f"pool = 'pools/{pool_id}'")
            with pool.lock:
                if pool.deleted:
                    raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
                self.check_loaded(pool)
                if request_id:
                    # A call with this id may have started while the lock was free.
                    prior = self._prior(pool, method, call, memory_only=True)
                if prior is None:
                    # An episode may have begun meanwhile (and this pool been reloaded).
                    self.check_writable(f"pool = 'pools/{pool_id}'", probe=False)
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
                        self._db.submit(combine(writes), lane=pool.lane) if writes else None
                    )
                    if request_id:
                        pool.remember_request(
                            (method, call.holder, request_id),
                            RememberedCall(future, payload, epoch, call.digest, remembered.time_ms),
                        )
        if prior is not None:
            earlier, payload, earlier_epoch = prior
            if earlier is not None:
                self.wait(pool, earlier, earlier_epoch)
            return decode(payload)
        if future is not None:
            self.wait(pool, future, epoch)
        return result

    def _prior(
        self, pool: PoolState, method: str, call: WriteCall, *, memory_only: bool = False
    ) -> tuple[Future[Any] | None, bytes, int] | None:
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

    def wait(self, pool: PoolState, future: Future[Any], epoch: int) -> None:
        """Wait for the commit of a write of ``pool`` queued in ``epoch``; recover if it failed."""
        try:
            future.result()
        except Exception as error:
            self.recover(pool, epoch, error)

    def recover(self, pool: PoolState, epoch: int, error: BaseException) -> NoReturn:
        """A write of ``pool`` queued in ``epoch`` failed: reload the pool, then raise.

        The pool's memory already holds the change that was not saved (and maybe later
        changes built on it, whose writes the store fails too, see ``Database.submit``).
        Under the pool's lock (calls to the pool wait meanwhile): wait until every write
        of the pool queued so far is handled, reopen its lane, rebuild its state from
        SQLite the way start-up does. The first failing caller of an epoch reloads; the
        others find the epoch moved on. Raises Unavailable for the failing call.
        """
        with pool.lock:
            if pool.epoch == epoch and not self.closed and not pool.reload_pending:
                if isinstance(error, EarlierWriteFailed):
                    _LOG.warning("pool %s: write dropped after an earlier failure", pool.pool_id)
                else:
                    _LOG.error("pool %s: a write failed (%s); reloading", pool.pool_id, error)
                pool.reload_pending = True
                self._db.reopen(pool.lane).result()
                self.reload_count += 1
                self.reload(pool)
        cause = (
            "an earlier write of this pool failed"
            if isinstance(error, EarlierWriteFailed)
            else f"store error: {error}"
        )
        raise Unavailable(
            f"pool = 'pools/{pool.pool_id}': the write was not saved ({cause}); the pool "
            "was reloaded from the database. Retry with the same request_id."
        ) from error

    def reload(self, pool: PoolState) -> None:
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
                self._forget(pool)
            else:
                pool.replace_data(self.load(row).data)
                # The store has the pool: an unsaved delete is undone too.
                pool.deleted = False
                pool.reload_pending = False
        except Exception:
            _LOG.exception("pool %s: reload from the database failed", pool_id)

    def load(self, row: store.PoolRow) -> PoolState:
        """One pool's in-memory state as stored: items scored with its latest surrogate.

        Used at start-up and, for its ``data``, to reload a pool after a failed write.
        """
        reader = self._db.reader()
        started = time.monotonic()
        settings = PoolSettings.from_json(row.settings)
        pool = PoolState(settings=settings, seed=row.seed, create_time_ms=row.create_time_ms)
        for name in store.load_segments(reader, settings.pool_id):
            pool.data.add_segments([name])
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
        cached: score_cache.CachedScores | None = None
        if model is not None:
            _, _, blob, reliance = model
            if reliance:
                pool.data.reliance = Reliance(**json.loads(reliance))
            pool.data.surrogate = Surrogate.from_bytes(pool.spec, blob)
            # The scores the last refit wrote for exactly this surrogate, if intact.
            cached = score_cache.load_scores(
                self._db.data_dir, settings.pool_id, score_cache.model_digest(blob)
            )
        scoring = 0.0
        reused = 0
        for chunk in store.load_items(
            reader,
            settings.pool_id,
            feature_dim=settings.feature_dim,
            output_width=settings.output_width,
        ):
            scoring -= time.monotonic()
            cold = pool.cold.score(chunk.features, chunk.outputs)
            if pool.data.surrogate is pool.cold:
                current = cold
            else:
                current, taken = _current_scores(pool, chunk.features, chunk.outputs, cached)
                reused += taken
            scoring += time.monotonic()
            ingest.append_items(
                pool,
                chunk.item_ids,
                chunk.features,
                chunk.outputs,
                chunk.payload_refs,
                chunk.segments,
                chunk.event_time_ms,
                chunk.ingest_time_ms,
                cold=cold,
                current=current,
            )
        draws = store.load_draws(reader, settings.pool_id)
        pool.data.draws.append(draws)
        for draw in draws:
            pool.data.assignments[draw.assignment_id] = draw.draw_index
        pool.data.mark_drawn_items(0)
        pool.data.drawing_index(
            loss_bound=pool.loss_bound, floor=settings.selection_floor or DEFAULT_FLOOR
        )
        pool.last_fit_time = time.monotonic()
        _LOG.info(
            "loaded pool %s: %d items, %d validation items, %d draws, surrogate version %d"
            " in %.2f s (scoring the items %.2f s, %d scores from the score file)",
            settings.pool_id,
            pool.data.item_count,
            pool.data.validation_count,
            len(pool.data.draws),
            pool.data.surrogate_version,
            time.monotonic() - started,
            scoring,
            reused,
        )
        return pool

    def claim_server_request(self, method: str, call: WriteCall, pool_id: str) -> bytes | None:
        """The remembered reply of a pool-level request id, or None after claiming it.

        A claimed id is in flight until :meth:`_release_server_request`; the same id
        arriving meanwhile waits for it, then finds the committed reply (or claims it in
        turn if the first call failed). Reusing an id for another request is InvalidArgument.
        """
        key = (method, call.holder, call.request_id)
        while True:
            with self._server_lock:
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

    def release_server_request(self, method: str, call: WriteCall) -> None:
        with self._server_lock:
            running = self._server_requests.pop((method, call.holder, call.request_id), None)
        if running is not None:
            running.set()

    def prune(
        self, pools: Sequence[PoolState], now: float | None = None, *, force: bool = False
    ) -> int:
        """Forget request ids older than the retention (database and memory); returns how
        many rows went. Runs at most every ``_prune_every`` seconds unless ``force``."""
        now = time.monotonic() if now is None else now
        if not force and now - self._last_prune < self._prune_every:
            return 0
        if self.closed or self._db.failure is not None:
            return 0
        self._last_prune = now
        oldest = now_ms() - self._retention_ms
        for pool in pools:
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


def _current_scores(
    pool: PoolState,
    features: np.ndarray,
    outputs: np.ndarray,
    cached: score_cache.CachedScores | None,
) -> tuple[SurrogateScores, int]:
    """The scores under the pool's surrogate of the rows about to be appended: from the
    score file for the rows it covers, scored for the rest; and how many came from the
    file. The file holds what the surrogate gave these rows at its refit (the same trees
    on the same rows), so a restart's estimates are the same either way."""
    start = pool.data.item_count
    n = features.shape[0]
    surrogate = pool.data.surrogate
    covered = 0 if cached is None else max(0, min(n, cached.rows - start))
    if cached is None or covered == 0:
        return surrogate.score(features, outputs), 0
    stop = start + covered
    taken = SurrogateScores(
        expected_loss=cached.expected_loss[start:stop],
        residual_second_moment=cached.second_moment[start:stop],
        spread=cached.spread[start:stop],
        worst_squared_deviation=cached.worst_deviation[start:stop],
    )
    if covered == n:
        return taken, covered
    rest = surrogate.score(features[covered:], outputs[covered:])
    return concatenate_scores([taken, rest]), covered
