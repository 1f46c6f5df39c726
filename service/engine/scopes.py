"""Which items an estimate is about, and the core's inputs for them.

A scope is the whole pool, one segment, an event-time window, or a segment inside a
window. This module resolves it to a mask over the pool's items (with the errors for an
unknown segment and an empty scope) and asks the pool's ledger for the terms and the
plug-in sums; :meth:`leadline.service.engine.ledger.DrawLedger.terms` states how each kind
of scope builds its terms.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from leadline.service.engine.pool import ITEM_LABELED, PoolState
from leadline.service.errors import FailedPrecondition, NotFound
from leadline.service.estimation import DrawTerms, PlugInSums

__all__ = ["Scope", "ScopeInputs", "build_scope_inputs", "build_window_inputs"]


@dataclass(frozen=True)
class Scope:
    """Which items an estimate is about; empty / 0 fields mean "no restriction". A window
    is [start_time_ms, end_time_ms) in event time (start < end when both are set)."""

    segment: str = ""
    start_time_ms: int = 0
    end_time_ms: int = 0

    @property
    def has_window(self) -> bool:
        return self.start_time_ms != 0 or self.end_time_ms != 0


@dataclass(frozen=True)
class ScopeInputs:
    terms: DrawTerms
    sums: PlugInSums
    items_in_scope: int
    items_unreached: int
    surrogate_version: int


def build_scope_inputs(pool: PoolState, scope: Scope) -> ScopeInputs:
    """The core's inputs for ``scope``; call with ``pool.lock`` held.

    The whole pool and a segment read the pool's running sums
    (:mod:`leadline.service.engine.sums`) and the draw ledger: O(draws * log N + blocks *
    segments), no pass over the items. A scope with an event-time window is one pass over
    the items (:func:`build_window_inputs`).

    ``scope`` comes checked from the API layer (``validation.check_scope``: a window is
    [start, end) with start < end). Raises NotFound for an unknown segment and
    FailedPrecondition when the scope holds no items.
    """
    data = pool.data
    code = -1
    if scope.segment:
        if scope.segment not in data.segment_codes:
            raise NotFound(
                f"segment = {scope.segment!r}: no item of pool {pool.pool_id!r} carries this "
                "segment tag.",
                field="segment",
            )
        code = data.segment_codes[scope.segment]
    if scope.has_window:
        return build_window_inputs(pool, scope, code)
    sums = data.sums
    draws = data.draws
    scope_size = sums.size if code < 0 else sums.segment_size(code)
    if scope_size == 0:
        raise _empty(pool, scope)
    marks = draws.arrival_mark.view
    in_scope = None if code < 0 else data.segment.view[draws.row.view] == code
    late_count, late_expected_loss = sums.late(marks, code)
    terms = draws.logged_terms(
        in_scope=in_scope,
        late_count=late_count,
        late_expected_loss=late_expected_loss,
        segment=code,
    )
    unlabeled = sums.unlabeled(code)
    plug_in = PlugInSums(
        scope_size=scope_size,
        labeled_loss_sum=draws.labeled_loss_sum(in_scope),
        unlabeled_expected_loss_sum=unlabeled.expected_loss,
        unlabeled_second_moment_sum=unlabeled.second_moment,
        unlabeled_count=unlabeled.count,
    )
    unreached = sums.arrived_from(int(marks[-1]), code) if len(draws) else scope_size
    return ScopeInputs(
        terms=terms,
        sums=plug_in,
        items_in_scope=scope_size,
        items_unreached=int(unreached),
        surrogate_version=data.surrogate_version,
    )


def build_window_inputs(pool: PoolState, scope: Scope, code: int) -> ScopeInputs:
    """The core's inputs for a scope with an event-time window (of segment ``code``, -1:
    any): one pass over the items, since event time does not follow arrival order. Also the
    reference the running sums are checked against (with ``scope`` windowless)."""
    data = pool.data
    n = data.item_count
    mask: np.ndarray | None = None
    if code >= 0:
        mask = data.segment.view == code
    if scope.has_window:
        times = data.event_time_ms.view
        window = np.ones(n, dtype=bool)
        if scope.start_time_ms:
            window &= times >= scope.start_time_ms
        if scope.end_time_ms:
            window &= times < scope.end_time_ms
        mask = window if mask is None else mask & window
    scope_size = n if mask is None else int(np.count_nonzero(mask))
    if scope_size == 0:
        raise _empty(pool, scope)
    draws = data.draws
    terms = draws.terms(
        item_count=n,
        cold_expected_loss=data.g0.view,
        loss_bound=pool.loss_bound,
        scope=mask,
        segment=code,
        window=scope.has_window,
    )
    sums = draws.plug_in_sums(
        unlabeled=data.status.view != ITEM_LABELED,
        expected_loss=data.expected_loss.view,
        second_moment=data.second_moment.view,
        scope=mask,
    )
    if len(draws):
        last_mark = int(draws.arrival_mark.view[-1])
        unreached = (n - last_mark) if mask is None else int(np.count_nonzero(mask[last_mark:]))
    else:
        unreached = scope_size
    return ScopeInputs(
        terms=terms,
        sums=sums,
        items_in_scope=scope_size,
        items_unreached=int(unreached),
        surrogate_version=data.surrogate_version,
    )


def _empty(pool: PoolState, scope: Scope) -> FailedPrecondition:
    return FailedPrecondition(
        f"pool {pool.pool_id!r} has no items in scope (segment = {scope.segment!r}, "
        f"window = [{scope.start_time_ms}, {scope.end_time_ms})).",
        field="segment" if not scope.has_window else "start_time_ms",
    )
