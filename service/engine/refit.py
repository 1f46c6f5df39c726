"""Background surrogate refits: when one is due, the refit itself, and the worker thread.

A refit (:meth:`Refits.run`) fits a new surrogate version on every label of the pool (and
its validation items), chooses the reliance guard's control variate and floor for the
draws until the next refit (:func:`choose_reliance_at_refit`), saves both with the
version, rescores every item and swaps the scores in. Fitting and rescoring run outside
the pool lock; only the final swap takes it, so ingest and queries never wait for a fit.
When one is due (:meth:`Refits.due`): after ``refit_every_labels`` new labels, after
``refit_interval_seconds`` with new labels, or at once when validation items arrived that
the surrogate does not cover.

The worker (:class:`RefitWorker`) wakes every ``poll_seconds`` (or when nudged after new
labels), refits every due pool, one at a time, then forgets request ids past their
retention (rate-limited).

Cadence (:func:`refit_gap_seconds`): a refit costs one core for the CPU time it takes to
fit and rescore the pool (seconds per million items), so besides the label count the
worker spaces a pool's refits so that they take at most ``refit_cpu_share`` of one
core: after a refit that used ``t`` CPU seconds (its thread's own, so a busy machine does
not stretch it) the next one waits ``t (1 - share) / share`` seconds, unless the labels
doubled since the surrogate's fit (geometric steps: 10, 20, 40, ... labels refit at once,
about log2(labels / refit_every_labels) refits in a pool's life). A small pool
refits in milliseconds and keeps its label cadence; a large pool's refits spread out in
proportion to its size (and to the label count, which the fit's cost grows with).
Rescoring (:func:`rescore_into`) runs in chunks outside the pool lock, pausing between
chunks, into fresh arrays that the final swap adopts as the pool's score
columns (one assignment per column under the lock, no extra copy).
"""

from __future__ import annotations

import contextlib
import json
import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from leadline.service.config import ServerConfig
from leadline.service.engine.ingest import now_ms
from leadline.service.engine.pool import AVAILABLE, SCORE_DTYPE, PoolState
from leadline.service.engine.writes import PoolWrites
from leadline.service.errors import Unavailable
from leadline.service.estimation import (
    MIN_DRAWS,
    LossSpec,
    Reliance,
    Surrogate,
    SurrogateScores,
    SurrogateSettings,
    ValidationRows,
    choose_reliance,
    cross_fitted_scores,
    fit_surrogate,
    worst_squared_deviation_of,
)
from leadline.service.store import Database, score_cache
from leadline.service.store import records as store

__all__ = [
    "RefitWorker",
    "Refits",
    "ScoreColumns",
    "choose_reliance_at_refit",
    "refit_gap_seconds",
    "rescore_into",
]

_LOG = logging.getLogger(__name__)

_SCORE_CHUNK = 65_536
# A refit scores at most this many late-arriving items while holding the pool lock.
_CATCH_UP_UNDER_LOCK = 5_000
# Between two rescoring chunks the refit thread sleeps this long: it gives the GIL and the
# surrogate's native-call lock to the request threads waiting for them.
_CHUNK_PAUSE_SECONDS = 0.001


def refit_gap_seconds(last_refit_cpu_seconds: float, share: float) -> float:
    """How long a pool waits after a refit that used ``last_refit_cpu_seconds`` of CPU
    before the next may start, so that its refits take at most ``share`` of one core:
    the refit's wall time w is at least its CPU time t, so t / (w + gap) <= t / (t + gap)
    <= share  <=  gap >= t (1 - share) / share."""
    return last_refit_cpu_seconds * (1.0 - share) / share


class ScoreColumns:
    """A surrogate's per-item score columns, filled chunk by chunk in arrays with room
    for items that arrive while the rest are scored (see :func:`rescore_into`).

    ``expected_loss`` is float64 (it enters every estimate directly); the second moment,
    the spread and the worst squared deviation are float32, as in the pool's columns.
    """

    def __init__(self, capacity: int) -> None:
        capacity = max(capacity, 1)
        self.expected_loss = np.empty(capacity, dtype=np.float64)
        self.second_moment = np.empty(capacity, dtype=SCORE_DTYPE)
        self.spread = np.empty(capacity, dtype=SCORE_DTYPE)
        self.worst_deviation = np.empty(capacity, dtype=SCORE_DTYPE)
        self.size = 0

    def _reserve(self, needed: int) -> None:
        if needed <= self.expected_loss.shape[0]:
            return
        capacity = max(needed, self.expected_loss.shape[0] + self.expected_loss.shape[0] // 4)
        for name in ("expected_loss", "second_moment", "spread", "worst_deviation"):
            old = getattr(self, name)
            grown = np.empty(capacity, dtype=old.dtype)
            grown[: self.size] = old[: self.size]
            setattr(self, name, grown)

    def append(self, scores: SurrogateScores, *, loss_bound: float) -> None:
        count = scores.expected_loss.shape[0]
        end = self.size + count
        self._reserve(end)
        self.expected_loss[self.size : end] = scores.expected_loss
        self.second_moment[self.size : end] = scores.residual_second_moment
        self.spread[self.size : end] = scores.spread
        self.worst_deviation[self.size : end] = worst_squared_deviation_of(
            scores, loss_bound=loss_bound
        )
        self.size = end

    def scores(self) -> SurrogateScores:
        """Views of the filled part."""
        n = self.size
        return SurrogateScores(
            self.expected_loss[:n],
            self.second_moment[:n],
            self.spread[:n],
            self.worst_deviation[:n],
        )


def rescore_into(
    out: ScoreColumns,
    surrogate: Surrogate,
    features: np.ndarray,
    outputs: np.ndarray,
    stop: int,
    *,
    loss_bound: float,
    chunk: int | None = None,
    pause: float | None = None,
) -> None:
    """Score rows ``out.size`` .. ``stop`` of ``features`` / ``outputs`` in chunks of
    ``chunk`` rows (default ``_SCORE_CHUNK``), sleeping ``pause`` seconds between chunks
    (default ``_CHUNK_PAUSE_SECONDS``); append to ``out``. The trees score each row on
    its own, so the result equals one call on all rows."""
    rows = _SCORE_CHUNK if chunk is None else chunk
    wait = _CHUNK_PAUSE_SECONDS if pause is None else pause
    while out.size < stop:
        start = out.size
        end = min(stop, start + rows)
        out.append(surrogate.score(features[start:end], outputs[start:end]), loss_bound=loss_bound)
        if wait > 0 and out.size < stop:
            time.sleep(wait)


def _rows_of(scores: SurrogateScores, rows: np.ndarray) -> SurrogateScores:
    worst = scores.worst_squared_deviation
    return SurrogateScores(
        scores.expected_loss[rows],
        scores.residual_second_moment[rows],
        scores.spread[rows],
        None if worst is None else worst[rows],
    )


def choose_reliance_at_refit(
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
    validation: ValidationRows | None,
) -> Reliance:
    """The reliance guard at a refit: the labeled draws (their items' ``features``,
    ``outputs``, ``labels``, and each draw's loss, q and |U|) scored honestly
    (cross-fitted, the validation rows in every fold) against the new surrogate's scores
    of the ``candidates`` the next draws choose from. Below ``MIN_DRAWS`` labeled draws:
    full reliance at ``floor``. The label benchmark calls this too."""
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


@dataclass(frozen=True)
class _Snapshot:
    """What a refit fits on, gathered under the pool lock (views of append-only rows)."""

    epoch: int
    version: int
    seed: int
    floor: float
    rows: np.ndarray
    labels: np.ndarray
    losses: np.ndarray
    probabilities: np.ndarray
    remaining_counts: np.ndarray
    available: np.ndarray
    features: np.ndarray
    outputs: np.ndarray
    item_count: int
    validation: ValidationRows


class Refits:
    """Decides when a pool's refit is due and runs it (thread-safe; one per engine)."""

    def __init__(self, database: Database, config: ServerConfig, writes: PoolWrites) -> None:
        self._db = database
        self._config = config
        self._writes = writes
        self.count = 0
        self.seconds_total = 0.0
        # CPU time of the refitting thread (LightGBM runs on it with surrogate_threads = 1).
        self.cpu_seconds_total = 0.0

    def due(self, pool: PoolState, now: float) -> bool:
        """Whether the worker should refit ``pool`` at monotonic time ``now``: validation
        items the surrogate does not cover (at once), or new labels (``refit_every_labels``
        of them, or any after ``refit_interval_seconds``) once the gap after the last
        refit (:func:`refit_gap_seconds`) has passed."""
        with pool.lock:
            if pool.deleted or pool.refitting or pool.reload_pending:
                return False
            if self._db.failure is not None:
                return False  # the store refuses writes: the fit could not be saved
            if pool.validation_refit_pending():
                return True  # at once: the next draw waits for it
            data = pool.data
            labeled, _, _ = data.draws.counts()
            new_labels = labeled - data.surrogate.label_count
            if new_labels <= 0 or labeled <= pool.failed_fit_labels:
                return False
            every = pool.settings.refit_every_labels or self._config.refit_every_labels
            if new_labels >= max(every, data.surrogate.label_count):
                # The labels doubled since the fit: refit without waiting for the gap. A
                # lagging surrogate costs most while labels are few, and this happens only
                # about log2(labels / every) times in a pool's life.
                return True
            waited = now - pool.last_fit_time
            gap = refit_gap_seconds(pool.last_refit_cpu_seconds, self._config.refit_cpu_share)
            if waited < gap:
                return False
            return new_labels >= every or waited >= self._config.refit_interval_seconds

    def run(self, pool: PoolState) -> bool:
        """Fit a new surrogate version on all labels, persist it with its reliance,
        rescore, swap. True if done."""
        started = time.monotonic()
        cpu_started = time.thread_time()
        with pool.lock:
            if pool.deleted or pool.refitting:
                return False
            job = self._snapshot(pool)
            pool.refitting = True
        reliance = None
        try:
            surrogate, scores, reliance = self._fit(pool, job)
            digest = self._save(pool, job, surrogate, reliance)
            if digest is None:
                return False
            if not self._swap(pool, job, surrogate, scores, reliance):
                return False
            self._keep_scores(pool, digest, scores)
        except Exception:
            _LOG.exception("refit of pool %s (version %d) failed", pool.pool_id, job.version)
            with pool.lock:
                # Retry only once more labels (or validation items) arrived: the same
                # data would fail again.
                pool.failed_fit_labels = int(job.labels.shape[0])
                pool.failed_fit_validation = len(job.validation)
                pool.last_fit_time = time.monotonic()
            return False
        finally:
            elapsed = time.monotonic() - started
            cpu = time.thread_time() - cpu_started
            with pool.lock:
                pool.refitting = False
                # The next refit of this pool waits in proportion (refit_gap_seconds).
                pool.last_refit_cpu_seconds = cpu
                pool.refit_done.notify_all()
            self.cpu_seconds_total += cpu
        self.count += 1
        self.seconds_total += elapsed
        _LOG.info(
            "refit pool %s: surrogate version %d on %d labels and %d validation items,"
            " %d items rescored in %.2f s; reliance: coefficient %.3f, constant %.4g, floor %.3f",
            pool.pool_id,
            job.version,
            job.labels.shape[0],
            len(job.validation),
            job.item_count,
            elapsed,
            reliance.coefficient if reliance is not None else 1.0,
            reliance.constant if reliance is not None else 0.0,
            reliance.floor if reliance is not None else float("nan"),
        )
        return True

    def _snapshot(self, pool: PoolState) -> _Snapshot:
        data = pool.data
        draws = data.draws
        labeled = draws.labeled
        version = data.surrogate_version + 1
        classification = pool.settings.is_classification
        labels = draws.label.view[labeled].copy()
        validation_labels = data.validation_labels.view
        return _Snapshot(
            epoch=pool.epoch,
            version=version,
            seed=int((pool.seed + version) % (2**31 - 1)),
            floor=pool.settings.selection_floor or self._config.selection_floor,
            rows=draws.row.view[labeled],
            labels=labels.astype(np.int64) if classification else labels,
            losses=draws.loss.view[labeled].copy(),
            probabilities=draws.probability.view[labeled].copy(),
            remaining_counts=draws.remaining_count.view[labeled].astype(np.float64),
            available=data.status.view == AVAILABLE,
            # Views of rows that never change once written (append-only columns).
            features=data.features.view,
            outputs=data.outputs.view,
            item_count=data.item_count,
            validation=ValidationRows(
                features=data.validation_features.view,
                outputs=data.validation_outputs.view,
                labels=(
                    validation_labels.astype(np.int64) if classification else validation_labels
                ),
            ),
        )

    def _fit(self, pool: PoolState, job: _Snapshot) -> tuple[Surrogate, ScoreColumns, Reliance]:
        """The new surrogate, its scores of the items present, and the reliance (outside
        the lock)."""
        settings = SurrogateSettings(num_threads=self._config.surrogate_threads)
        features, outputs, n0 = job.features, job.outputs, job.item_count
        surrogate = fit_surrogate(
            pool.spec,
            features[job.rows],
            outputs[job.rows],
            job.labels,
            version=job.version,
            seed=job.seed,
            settings=settings,
            validation=job.validation,
        )
        # Room for the items that arrive while the rest are scored.
        scores = ScoreColumns(n0 + n0 // 16 + _CATCH_UP_UNDER_LOCK)
        rescore_into(scores, surrogate, features, outputs, n0, loss_bound=pool.loss_bound)
        reliance = choose_reliance_at_refit(
            pool.spec,
            features[job.rows],
            outputs[job.rows],
            job.labels,
            losses=job.losses,
            probabilities=job.probabilities,
            remaining_counts=job.remaining_counts,
            candidates=_rows_of(scores.scores(), np.flatnonzero(job.available[:n0])),
            floor=job.floor,
            seed=job.seed,
            settings=settings,
            validation=job.validation,
        )
        return surrogate, scores, reliance

    def _save(
        self, pool: PoolState, job: _Snapshot, surrogate: Surrogate, reliance: Reliance
    ) -> str | None:
        """Persist the version with its reliance on the pool's lane; returns the saved
        bytes' digest (``score_cache.model_digest``), or None if the pool moved on
        (closed, deleted, reloaded) or the write failed (the pool reloads)."""
        blob = surrogate.to_bytes()
        with pool.lock:
            if (
                pool.deleted
                or self._writes.closed
                or pool.epoch != job.epoch
                or pool.reload_pending
            ):
                # Shutting down: the fit is dropped and redone after the next start. A
                # reload since the fit began: its labels may include unsaved ones.
                return None
            future = self._db.submit(
                store.insert_model(
                    pool.pool_id,
                    job.version,
                    int(job.labels.shape[0]),
                    blob,
                    now_ms(),
                    reliance=json.dumps(reliance.to_json(), sort_keys=True),
                ),
                lane=pool.lane,
            )
        try:
            future.result()
        except Exception as error:
            # Not saved (maybe behind a failed write of the pool): the pool reloads, the
            # fit is redone on the saved labels when due.
            with contextlib.suppress(Unavailable):
                self._writes.recover(pool, job.epoch, error)
            return None
        return score_cache.model_digest(blob)

    def _keep_scores(self, pool: PoolState, digest: str, scores: ScoreColumns) -> None:
        """Write the adopted scores beside the database so a restart need not rescore
        (``score_cache``; rows below ``scores.size`` never change once written)."""
        n = scores.size
        score_cache.save_scores(
            self._db.data_dir,
            pool.pool_id,
            digest,
            score_cache.CachedScores(
                expected_loss=scores.expected_loss[:n],
                second_moment=scores.second_moment[:n],
                spread=scores.spread[:n],
                worst_deviation=scores.worst_deviation[:n],
            ),
        )

    def _swap(
        self,
        pool: PoolState,
        job: _Snapshot,
        surrogate: Surrogate,
        scores: ScoreColumns,
        reliance: Reliance,
    ) -> bool:
        """Score the items that arrived while fitting, then swap every score in."""
        # Outside the lock until few are left, so the final swap under the lock stays
        # short even under heavy ingest. Rows never change once written: views of the
        # columns taken under the lock stay valid after it is released.
        while True:
            with pool.lock:
                data = pool.data
                n, features, outputs = data.item_count, data.features.view, data.outputs.view
            if n - scores.size <= _CATCH_UP_UNDER_LOCK:
                break
            rescore_into(scores, surrogate, features, outputs, n, loss_bound=pool.loss_bound)
        # The new draw index, built outside the lock too; installed with the scores.
        prepared = pool.prepare_index(scores.scores(), reliance, floor=job.floor)
        with pool.lock:
            if pool.epoch != job.epoch:
                # Reloaded meanwhile: the reload read this version from the store.
                return False
            data = pool.data
            rescore_into(
                scores,
                surrogate,
                data.features.view,
                data.outputs.view,
                data.item_count,
                loss_bound=pool.loss_bound,
                pause=0.0,
            )
            data.adopt_scores(
                scores.expected_loss,
                scores.second_moment,
                scores.spread,
                scores.worst_deviation,
                size=scores.size,
            )
            data.sums_scores_replaced()
            data.surrogate = surrogate
            data.reliance = reliance
            data.install_index(prepared, loss_bound=pool.loss_bound)
            pool.last_fit_time = time.monotonic()
            pool.touch()
        return True


class RefitWorker:
    """Runs due refits (and the request-id pruning) on one thread until :meth:`stop`.

    ``pools()`` lists the pools to check; ``prune(now)`` forgets expired request ids.
    """

    def __init__(
        self,
        refits: Refits,
        *,
        pools: Callable[[], list[PoolState]],
        prune: Callable[[float], object],
        poll_seconds: float = 0.5,
    ) -> None:
        self._refits = refits
        self._pools = pools
        self._prune = prune
        self._poll = poll_seconds
        self._wake = threading.Event()
        self._stopping = threading.Event()
        self._thread = threading.Thread(target=self._run, name="leadline-refit", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def nudge(self) -> None:
        """Check the pools now (called after labels arrive)."""
        self._wake.set()

    def stop(self, timeout: float | None = None) -> None:
        """Stop after the refit in progress (if any) finishes or ``timeout`` passes."""
        self._stopping.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(timeout)

    def _run(self) -> None:
        while not self._stopping.is_set():
            self._wake.wait(self._poll)
            self._wake.clear()
            for pool in self._pools():
                if self._stopping.is_set():
                    return
                try:
                    if self._refits.due(pool, time.monotonic()):
                        self._refits.run(pool)
                except Exception:  # noqa: BLE001 - the worker must survive any one pool
                    _LOG.exception("refit check of pool %s failed", pool.pool_id)
            # Housekeeping rides on the same thread: forget expired request ids.
            self._prune(time.monotonic())
