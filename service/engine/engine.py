"""The engine: every pool of one data directory, and the calls the API layer makes.

Each call is short: find the pool, then hand the work to the module that owns it:

* writes (ingest, labeling, pool creation and deletion) run through the write protocol
  of :mod:`leadline.service.engine.writes` (request memory, commits, recovery);
* the work itself lives in :mod:`~leadline.service.engine.ingest` and
  :mod:`~leadline.service.engine.labeling` (draws through the ledger,
  :mod:`~leadline.service.engine.ledger`);
* estimates, gates and their cache in :mod:`~leadline.service.engine.queries`;
* refits (when, and the refit itself) in :mod:`~leadline.service.engine.refit`.

Defaults a request leaves open (lease, floor, confidence, mode) are resolved here, from the
pool's settings, then the server's (``ServerConfig``, whose defaults come from the core's
constants).
"""

from __future__ import annotations

import hashlib
import logging
import secrets
import threading
import time
from collections.abc import Callable, Sequence

from leadline.service.config import ServerConfig
from leadline.service.engine import ingest, labeling, queries
from leadline.service.engine.ingest import now_ms
from leadline.service.engine.pool import PoolSettings, PoolState
from leadline.service.engine.refit import Refits, RefitWorker
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
from leadline.service.engine.scopes import Scope
from leadline.service.engine.writes import NO_CALL, PoolWrites, WriteCall, combine
from leadline.service.errors import AlreadyExists, InvalidArgument, NotFound, Unavailable
from leadline.service.estimation import BoundKind, EstimatorMode
from leadline.service.store import Database, score_cache
from leadline.service.store import records as store
from leadline.service.store.records import RememberedRequest, Write
from leadline.v1.rules import gate_confidence_problem

__all__ = ["VALIDATION_REFIT_WAIT_SECONDS", "Engine"]

_LOG = logging.getLogger(__name__)

# A draw waits at most this long for the refit that covers newly added validation items
# (so the first draw after an upload uses them); after that it draws with the surrogate
# it has, which is just as valid, only less informed. Well inside a client's default
# 30 s deadline; such a refit takes about a second, plus rescoring (4-6 s per million
# items) and any refit of another pool already running.
VALIDATION_REFIT_WAIT_SECONDS = 10.0


class Engine:
    """All pools of one data directory. Thread-safe; one instance per server."""

    def __init__(self, database: Database, config: ServerConfig) -> None:
        self._db = database
        self._config = config
        self._pools: dict[str, PoolState] = {}
        self._pools_lock = threading.Lock()
        self._writes = PoolWrites(database, config, forget=self._forget)
        self._refits = Refits(database, config, self._writes)

    # ------------------------------------------------------------------------------------
    # start-up, shutdown, the background worker, counters
    # ------------------------------------------------------------------------------------
    def load(self, *, progress: Callable[[int, int], None] | None = None) -> None:
        """Rebuild every pool's in-memory state from the database (start-up);
        ``progress(loaded, total)`` is told before the first pool and after each one."""
        rows = store.load_pools(self._db.reader())
        if progress is not None:
            progress(0, len(rows))
        for loaded, row in enumerate(rows, start=1):
            pool = self._writes.load(row)
            with self._pools_lock:
                self._pools[pool.pool_id] = pool
            if progress is not None:
                progress(loaded, len(rows))

    def close(self) -> None:
        """Refuse further writes (queued ones still commit when the database closes)."""
        self._writes.closed = True

    def refit_worker(self, *, poll_seconds: float = 0.5) -> RefitWorker:
        """The background thread that runs due refits and forgets expired request ids."""
        return RefitWorker(
            self._refits, pools=self.pools, prune=self.prune_requests, poll_seconds=poll_seconds
        )

    def refit_due(self, pool: PoolState, now: float) -> bool:
        """Whether ``pool``'s refit is due at monotonic time ``now`` (:mod:`refit`)."""
        return self._refits.due(pool, now)

    def refit(self, pool: PoolState) -> bool:
        """Refit ``pool`` now; True if a new version is in force (:mod:`refit`)."""
        return self._refits.run(pool)

    def prune_requests(self, now: float | None = None, *, force: bool = False) -> int:
        """Forget request ids past their retention; returns how many stored rows went."""
        return self._writes.prune(self.pools(), now, force=force)

    @property
    def refit_count(self) -> int:
        return self._refits.count

    @property
    def refit_seconds_total(self) -> float:
        return self._refits.seconds_total

    @property
    def refit_cpu_seconds_total(self) -> float:
        return self._refits.cpu_seconds_total

    @property
    def reload_count(self) -> int:
        return self._writes.reload_count

    @property
    def pruned_requests(self) -> int:
        return self._writes.pruned_requests

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
        """The pool's handle; NotFound if there is none, Unavailable while it reloads."""
        with self._pools_lock:
            pool = self._pools.get(pool_id)
        if pool is None or pool.deleted:
            raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
        if pool.reload_pending:
            with pool.lock:
                if pool.reload_pending and not pool.deleted:
                    self._writes.reload(pool)
                self._writes.check_loaded(pool)
        return pool

    def pools(self) -> list[PoolState]:
        with self._pools_lock:
            return [self._pools[key] for key in sorted(self._pools)]

    def _forget(self, pool: PoolState) -> None:
        """Drop ``pool`` from the registry (a reload found it gone from the store)."""
        with self._pools_lock:
            if self._pools.get(pool.pool_id) is pool:
                del self._pools[pool.pool_id]

    def create_pool(self, settings: PoolSettings, *, call: WriteCall = NO_CALL) -> PoolInfo:
        """Create an empty pool; AlreadyExists if the id is in use.

        With a request id this token sent before (also before a restart) the pool that
        request created is returned: its current state, or the first reply if it is gone.
        """
        self._writes.check_open()
        self._writes.check_writable(f"pool_id = {settings.pool_id!r}")
        pool_id = settings.pool_id
        method = "create_pool"
        request_id = call.request_id
        if request_id:
            remembered = self._writes.claim_server_request(method, call, pool_id)
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
                self._writes.release_server_request(method, call)

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
            future = self._db.submit(combine(writes), lane=pool.lane)
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

    def pool_info(self, pool: PoolState) -> PoolInfo:
        with pool.lock:
            labeled, pending, skipped = pool.data.draws.counts()
            return PoolInfo(
                settings=pool.settings,
                create_time_ms=pool.create_time_ms,
                item_count=pool.data.item_count,
                labeled_count=labeled,
                surrogate_version=pool.data.surrogate_version,
                draw_count=len(pool.data.draws),
                pending_count=pending,
                skipped_count=skipped,
                segments=tuple(sorted(name for name in pool.data.segment_names if name)),
                validation_count=pool.data.validation_count,
                surrogate_label_count=pool.data.surrogate.label_count,
                surrogate_validation_count=pool.data.surrogate.validation_count,
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

    def delete_pool(self, pool_id: str, *, call: WriteCall = NO_CALL) -> None:
        """Delete the pool and everything in it; NotFound if there is none.

        With a request id this token sent before (also before a restart) nothing is done
        and the call succeeds, even if a new pool took the id meanwhile.
        """
        self._writes.check_open()
        self._writes.check_writable(f"pool = 'pools/{pool_id}'")
        method = "delete_pool"
        if call.request_id and self._writes.claim_server_request(method, call, pool_id) is not None:
            return
        try:
            self._delete_pool(pool_id, method=method, call=call)
        finally:
            if call.request_id:
                self._writes.release_server_request(method, call)

    def _delete_pool(self, pool_id: str, *, method: str, call: WriteCall) -> None:
        pool = self.pool(pool_id)
        with pool.lock:
            if pool.deleted:
                raise NotFound(f"pool = 'pools/{pool_id}': no such pool.", field="pool")
            self._writes.check_loaded(pool)
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
            future = self._db.submit(combine(writes), lane=pool.lane)
        self._writes.wait(pool, future, epoch)
        with self._pools_lock:
            if self._pools.get(pool_id) is pool:
                del self._pools[pool_id]
        score_cache.drop_scores(self._db.data_dir, pool_id)
        _LOG.info("deleted pool %s", pool_id)

    # ------------------------------------------------------------------------------------
    # ingest
    # ------------------------------------------------------------------------------------
    def ingest(self, pool_id: str, batch: ItemBatch, *, call: WriteCall = NO_CALL) -> IngestResult:
        """Add a validated batch; identical re-sent ids are duplicates, conflicting ones
        rejected (listed per item)."""
        pool = self.pool(pool_id)
        # Score outside the lock (the expensive part); apply_batch rescores if a refit
        # swapped the surrogate in between, and checks the shape again.
        with pool.lock:
            ingest.check_shape(pool, batch.features, batch.outputs)
            surrogate = pool.data.surrogate
        current = surrogate.score(batch.features, batch.outputs)
        # Before the first refit the pool's surrogate is its cold start: score once.
        cold = current if surrogate is pool.cold else pool.cold.score(batch.features, batch.outputs)
        result: IngestResult = self._writes.run(
            self.pool(pool_id),
            "ingest",
            call,
            lambda p: ingest.apply_batch(
                p, batch, scored_with=surrogate, cold=cold, current=current
            ),
            decode_ingest,
        )
        return result

    def add_validation(
        self, pool_id: str, batch: ValidationItems, *, call: WriteCall = NO_CALL
    ) -> IngestResult:
        """Add validated validation items; identical re-sent ids are duplicates, conflicting
        ones rejected (listed per item). The caller nudges the refit worker when any were
        accepted: a refit then covers them before the next draw (see :meth:`acquire`)."""
        result: IngestResult = self._writes.run(
            self.pool(pool_id),
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
        call: WriteCall = NO_CALL,
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

        result: list[AssignmentInfo] = self._writes.run(
            self.pool(pool_id), "acquire", call, work, decode_assignments
        )
        return result

    def _wait_for_validation_refit(self, pool: PoolState) -> None:
        deadline = time.monotonic() + VALIDATION_REFIT_WAIT_SECONDS
        with pool.lock:
            while (
                pool.validation_refit_pending()
                and not pool.deleted
                and not self._writes.closed
                and self._db.failure is None  # no refit can be saved meanwhile
            ):
                remaining = deadline - time.monotonic()
                if remaining <= 0:
                    _LOG.warning(
                        "pool %s: drawing before the refit on %d validation items finished",
                        pool.pool_id,
                        pool.data.validation_count,
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
        call: WriteCall = NO_CALL,
    ) -> OutcomeResult:
        """Record labels and skips of held assignments; per-item problems come back listed."""
        result: OutcomeResult = self._writes.run(
            self.pool(pool_id),
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
        call: WriteCall = NO_CALL,
    ) -> OutcomeResult:
        """Give held assignments back unlabeled: they become WAITING and are re-offered."""
        result: OutcomeResult = self._writes.run(
            self.pool(pool_id),
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
        return queries.estimate(
            pool, scope, mode=self._mode(pool, mode), confidence=self._confidence(pool, confidence)
        )

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
        level = self._confidence(pool, confidence)
        # Checked here, not at the API boundary: the value in force may be the pool's
        # default (a pool may default to any confidence in (0, 1) for its estimates).
        problem = gate_confidence_problem(level)
        if problem is not None:
            source = "" if confidence else " (the pool's default, as the request left it 0)"
            raise InvalidArgument(problem + source, field="confidence")
        return queries.gate(
            pool,
            scope,
            max_risk=max_risk,
            confidence=level,
            bound=bound,
            mode=self._mode(pool, mode),
        )

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
            inputs = queries.scope_inputs(pool, scope)
        return queries.trace(
            pool,
            inputs,
            mode=self._mode(pool, mode),
            confidence=self._confidence(pool, confidence),
            max_points=max_points,
        )
