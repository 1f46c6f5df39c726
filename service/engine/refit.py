"""Background surrogate refits: one worker thread per server.

The worker wakes every ``poll_seconds`` (or when :meth:`RefitWorker.nudge` is called after
new labels), refits every pool whose new-label count or time since the last fit calls for
it (:meth:`Engine.refit_due`), one pool at a time, then forgets request ids past their
retention (:meth:`Engine.prune_requests`, itself rate-limited). Fitting and rescoring run
outside the pool lock; only the final swap of the score arrays takes it, so ingest and
queries never wait for a fit.
"""

from __future__ import annotations

import logging
import threading
import time

from leadline.service.engine.engine import Engine

__all__ = ["RefitWorker"]

_LOG = logging.getLogger(__name__)


class RefitWorker:
    """Runs :meth:`Engine.refit` for due pools until :meth:`stop`."""

    def __init__(self, engine: Engine, *, poll_seconds: float = 0.5) -> None:
        self._engine = engine
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
            for pool in self._engine.pools():
                if self._stopping.is_set():
                    return
                try:
                    if self._engine.refit_due(pool, time.monotonic()):
                        self._engine.refit(pool)
                except Exception:  # noqa: BLE001 - the worker must survive any one pool
                    _LOG.exception("refit check of pool %s failed", pool.pool_id)
            # Housekeeping rides on the same thread: forget expired request ids.
            self._engine.prune_requests(time.monotonic())
