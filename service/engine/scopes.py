"""Turn a pool's arrays and draw log into the core's inputs for one scope.

A scope is the whole pool, one segment, an event-time window, or a segment inside a
window. For each draw m (docs/core-api.md, ``DrawTerms``):

* whole pool and segment: the control variate h_m is the draw-time surrogate, and the
  sums over the remaining items U_m were logged when the draw was made (whole pool and
  per segment), as were the correction range and the probability;
* time windows: the logged sums do not split by event time, so every term uses the
  label-free cold-start score g0 as its control variate. g0 never depends on labels, so it
  is predictable and the difference estimator stays exactly unbiased; the sum of g0 over
  U_m ∩ D is recovered from prefix sums in arrival order (items present at draw m are the
  rows below its arrival mark, minus the items drawn before m), and the correction range is
  the conservative [-B / min q_m, B / min q_m].

``late_*`` count the in-scope items that arrived after draw m, with their g0. Plug-in sums
use the current surrogate over the scope's unlabeled items. Everything is numpy over the
pool's arrays: no per-item Python loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from leadline.service.engine.pool import ITEM_LABELED, LABELED, SKIPPED, PoolState
from leadline.service.errors import FailedPrecondition, NotFound
from leadline.service.estimation import (
    DRAW_LABELED,
    DRAW_PENDING,
    DRAW_SKIPPED,
    DrawTerms,
    PlugInSums,
)

__all__ = ["Scope", "ScopeInputs", "build_scope_inputs"]


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


def _status_codes(status: np.ndarray) -> np.ndarray:
    codes = np.full(status.shape, DRAW_PENDING, dtype=np.int64)
    codes[status == LABELED] = DRAW_LABELED
    codes[status == SKIPPED] = DRAW_SKIPPED
    return codes


def _suffix_at(values: np.ndarray, marks: np.ndarray) -> np.ndarray:
    """sum(values[mark:]) for each mark (0 at mark == len(values))."""
    suffix = np.zeros(values.shape[0] + 1, dtype=np.float64)
    suffix[:-1] = np.cumsum(values[::-1])[::-1]
    return np.asarray(suffix[marks])


def build_scope_inputs(pool: PoolState, scope: Scope) -> ScopeInputs:
    """The core's inputs for ``scope``; call with ``pool.lock`` held. The plug-in sums use
    the current surrogate's g itself (the reliance guard shapes the draws' control variate,
    not the plug-in: a surrogate can be right on average yet a poor per-item guide).

    ``scope`` comes checked from the API layer (``validation.check_scope``: a window is
    [start, end) with start < end). Raises NotFound for an unknown segment and
    FailedPrecondition when the scope holds no items.
    """
    n = pool.item_count
    draws = pool.draws
    m_count = len(draws)
    rows = draws.row.view
    marks = draws.arrival_mark.view
    g0 = pool.g0.view

    mask: np.ndarray | None = None
    code = -1
    if scope.segment:
        if scope.segment not in pool.segment_codes:
            raise NotFound(
                f"segment = {scope.segment!r}: no item of pool {pool.pool_id!r} carries this "
                "segment tag.",
                field="segment",
            )
        code = pool.segment_codes[scope.segment]
        mask = pool.segment.view == code
    if scope.has_window:
        times = pool.event_time_ms.view
        window = np.ones(n, dtype=bool)
        if scope.start_time_ms:
            window &= times >= scope.start_time_ms
        if scope.end_time_ms:
            window &= times < scope.end_time_ms
        mask = window if mask is None else mask & window

    labeled = draws.status.view == LABELED
    losses = draws.loss.view
    if mask is None:
        scope_size = n
        in_scope = np.ones(m_count, dtype=bool)
        weighted = g0
        late_count = (n - marks).astype(np.float64)
        unlabeled = pool.status.view != ITEM_LABELED
    else:
        scope_size = int(np.count_nonzero(mask))
        in_scope = mask[rows]
        weighted = np.where(mask, g0, 0.0)
        late_count = _suffix_at(mask.astype(np.float64), marks)
        unlabeled = mask & (pool.status.view != ITEM_LABELED)
    # Suffix sums give exactly 0 where no item came later and never go negative (a total
    # minus a prefix can, by rounding, and the core refuses negative sums).
    late_g0 = _suffix_at(weighted, marks)
    if scope_size == 0:
        raise FailedPrecondition(
            f"pool {pool.pool_id!r} has no items in scope (segment = {scope.segment!r}, "
            f"window = [{scope.start_time_ms}, {scope.end_time_ms})).",
            field="segment" if not scope.has_window else "start_time_ms",
        )

    if scope.has_window:
        expected = g0[rows]
        drawn_in_scope = np.where(in_scope, expected, 0.0)
        drawn_before = np.cumsum(drawn_in_scope) - drawn_in_scope
        present_g0 = np.cumsum(weighted)[marks - 1] if m_count else np.zeros(0)
        remaining = np.maximum(present_g0 - drawn_before, 0.0)
        bound = pool.loss_bound
        min_q = draws.min_probability.view
        correction_low = -bound / min_q
        correction_high = bound / min_q
        # g0's residual second moment at the drawn items is not logged; the core then uses
        # its bound h (B - h).
        second_moment = None
    else:
        expected = draws.expected_loss.view.copy()
        correction_low = draws.correction_low.view.copy()
        correction_high = draws.correction_high.view.copy()
        second_moment = draws.second_moment.view.copy()
        if code < 0:
            remaining = draws.remaining_expected_loss.view.copy()
        else:
            remaining = np.array(
                [
                    float(blob[code]) if code < blob.shape[0] else 0.0
                    for blob in draws.remaining_by_segment
                ],
                dtype=np.float64,
            )

    terms = DrawTerms(
        probability=draws.probability.view.copy(),
        expected_loss=np.asarray(expected, dtype=np.float64),
        remaining_expected_loss=np.asarray(remaining, dtype=np.float64),
        late_expected_loss=np.asarray(late_g0, dtype=np.float64),
        late_count=np.asarray(late_count, dtype=np.float64),
        in_scope=np.asarray(in_scope, dtype=bool),
        status=_status_codes(draws.status.view),
        loss=np.where(labeled, losses, np.nan),
        correction_low=np.asarray(correction_low, dtype=np.float64),
        correction_high=np.asarray(correction_high, dtype=np.float64),
        residual_second_moment=second_moment,
        remaining_count=draws.remaining_count.view.astype(np.float64),
    )
    sums = PlugInSums(
        scope_size=scope_size,
        labeled_loss_sum=float(losses[labeled & in_scope].sum()),
        unlabeled_expected_loss_sum=float(pool.expected_loss.view[unlabeled].sum()),
        unlabeled_second_moment_sum=float(pool.second_moment.view[unlabeled].sum()),
        unlabeled_count=int(np.count_nonzero(unlabeled)),
    )
    if m_count:
        last_mark = int(marks[-1])
        unreached = (n - last_mark) if mask is None else int(np.count_nonzero(mask[last_mark:]))
    else:
        unreached = scope_size
    return ScopeInputs(
        terms=terms,
        sums=sums,
        items_in_scope=scope_size,
        items_unreached=int(unreached),
        surrogate_version=pool.surrogate_version,
    )
