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
from leadline.service.engine.pool import AVAILABLE, PoolState
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
    concatenate_scores,
    cross_fitted_scores,
    fit_surrogate,
    worst_squared_deviation_of,
)
from leadline.service.store import Database
from leadline.service.store import records as store

__all__ = ["RefitWorker", "Refits", "choose_reliance_at_refit", "score_rows"]

_LOG = logging.getLogger(__name__)

_SCORE_CHUNK = 100_000
# A refit scores at most this many late-arriving items while holding the pool lock.
_CATCH_UP_UNDER_LOCK = 5_000


def score_rows(surrogate: Surrogate, features: np.ndarray, outputs: np.ndarray) -> SurrogateScores:
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

    def due(self, pool: PoolState, now: float) -> bool:
        """Whether the worker should refit ``pool`` at monotonic time ``now``."""
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
            waited = now - pool.last_fit_time
            return new_labels >= every or waited >= self._config.refit_interval_seconds

    def run(self, pool: PoolState) -> bool:
        """Fit a new surrogate version on all labels, persist it with its reliance,
        rescore, swap. True if done."""
        started = time.monotonic()
        with pool.lock:
            if pool.deleted or pool.refitting:
                return False
            job = self._snapshot(pool)
            pool.refitting = True
        reliance = None
        try:
            surrogate, scores, reliance = self._fit(pool, job)
            if not self._save(pool, job, surrogate, reliance):
                return False
            if not self._swap(pool, job, surrogate, scores, reliance):
                return False
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
            with pool.lock:
                pool.refitting = False
                pool.refit_done.notify_all()
        elapsed = time.monotonic() - started
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

    def _fit(self, pool: PoolState, job: _Snapshot) -> tuple[Surrogate, SurrogateScores, Reliance]:
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
        scores = score_rows(surrogate, features[:n0], outputs[:n0])
        reliance = choose_reliance_at_refit(
            pool.spec,
            features[job.rows],
            outputs[job.rows],
            job.labels,
            losses=job.losses,
            probabilities=job.probabilities,
            remaining_counts=job.remaining_counts,
            candidates=_rows_of(scores, np.flatnonzero(job.available[:n0])),
            floor=job.floor,
            seed=job.seed,
            settings=settings,
            validation=job.validation,
        )
        return surrogate, scores, reliance

    def _save(
        self, pool: PoolState, job: _Snapshot, surrogate: Surrogate, reliance: Reliance
    ) -> bool:
        """Persist the version with its reliance on the pool's lane; False if the pool
        moved on (closed, deleted, reloaded) or the write failed (the pool reloads)."""
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
                return False
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
            return False
        return True

    def _swap(
        self,
        pool: PoolState,
        job: _Snapshot,
        surrogate: Surrogate,
        scores: SurrogateScores,
        reliance: Reliance,
    ) -> bool:
        """Score the items that arrived while fitting, then swap every score in."""
        # Outside the lock until few are left, so the final swap under the lock stays
        # short even under heavy ingest.
        parts = [scores]
        done = job.item_count
        while True:
            with pool.lock:
                data = pool.data
                n, features, outputs = data.item_count, data.features.view, data.outputs.view
            if n - done <= _CATCH_UP_UNDER_LOCK:
                break
            parts.append(score_rows(surrogate, features[done:n], outputs[done:n]))
            done = n
        with pool.lock:
            if pool.epoch != job.epoch:
                # Reloaded meanwhile: the reload read this version from the store.
                return False
            data = pool.data
            n = data.item_count
            if n > done:
                parts.append(surrogate.score(data.features.view[done:n], data.outputs.view[done:n]))
            rescored = concatenate_scores(parts)
            data.expected_loss.replace(rescored.expected_loss)
            data.second_moment.replace(rescored.residual_second_moment)
            data.spread.replace(rescored.spread)
            data.worst_deviation.replace(
                worst_squared_deviation_of(rescored, loss_bound=pool.loss_bound)
            )
            data.surrogate = surrogate
            data.reliance = reliance
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
